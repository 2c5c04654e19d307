//! Detection kernels: threshold crossings on every channel of time-major frames, and the merge of
//! one spike seen on several electrodes into one event.

use crate::params::Polarity;
use spikeyard_contract::packed::PackedRange;
use spikeyard_contract::recording::{i16_first_where, stored_microvolts, Frames};
use std::collections::VecDeque;

/// A detected event.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Event {
    /// Frame of the extremum (0-based, into the recording).
    pub sample: u64,
    pub channel: u32,
    /// Signed value at the extremum, µV.
    pub amplitude_uv: f32,
}

impl Event {
    fn key(&self) -> (u64, u32) {
        (self.sample, self.channel)
    }
}

/// Scan every channel of time-major frames for threshold crossings.
///
/// `frames` holds `n_channels`-wide frames starting at `first_frame`;
/// crossings are looked for at frame positions `core` (position k crosses
/// on channel c when frame k−1 is on the near side of `thresholds_uv[c]`
/// and frame k beyond it; an infinite threshold turns a channel off); the
/// extremum is searched in `k..k + peak_frames` (clipped to `frames`).
/// `last_crossing[c]` carries channel c's dead time across chunks. Events
/// are appended in order of crossing.
///
/// The scan runs along frames, across channels, so no transpose is needed
/// and the comparisons of one frame run side by side. Stored i16 frames are
/// compared as stored, against the thresholds moved to stored units (the
/// same answers: the conversion to µV is monotone), so only the values
/// around a crossing are ever converted.
#[allow(clippy::too_many_arguments)]
pub fn find_crossings(
    frames: Frames,
    n_channels: usize,
    first_frame: u64,
    core: std::ops::Range<usize>,
    thresholds_uv: &[f32],
    polarity: Polarity,
    peak_frames: usize,
    dead_frames: u64,
    last_crossing: &mut [Option<u64>],
    out: &mut Vec<Event>,
) {
    let n_frames = frames.len() / n_channels.max(1);
    let (negative, positive) = (
        matches!(polarity, Polarity::Negative | Polarity::Both),
        matches!(polarity, Polarity::Positive | Polarity::Both),
    );
    let scan = Scan { start: core.start.max(1), end: core.end.min(n_frames), negative, positive };
    // µV frames: "above t" is "at or above the next f32 after t".
    let scan_microvolts = |values: &[f32]| {
        let low: Vec<f32> = thresholds_uv.iter().map(|t| -t).collect();
        let high: Vec<f32> = thresholds_uv.iter().map(|&t| next_up(t)).collect();
        let frame = |k: usize| &values[k * n_channels..(k + 1) * n_channels];
        scan.run(|from| scan.task(scan.frames_from(from), &low, &high, frame, |v| v))
    };
    // "Below −t" is "stored below the first value at or above −t";
    // "above t" is "stored at or above the first value above t".
    let stored_thresholds = |gain: f64, offset: f64| -> (Vec<i32>, Vec<i32>) {
        thresholds_uv
            .iter()
            .map(|&t| (i16_first_where(gain, offset, |v| v >= -t), i16_first_where(gain, offset, |v| v > t)))
            .unzip()
    };
    let peaks = PeakSearch { frames: peak_frames, n_frames };
    let crossings = match frames {
        Frames::StoredI16 { bytes, gain, offset } if gain > 0.0 => {
            let (low, high) = stored_thresholds(gain, offset);
            let stored = StoredScan { scan: &scan, low: &low, high: &high, n_channels };
            scan.run(|from| stored.task(from, bytes))
        }
        Frames::Packed { range, gain, offset } if gain > 0.0 => {
            let (low, high) = stored_thresholds(gain, offset);
            let stored = StoredScan { scan: &scan, low: &low, high: &high, n_channels };
            if stored.only_exceptions_cross() {
                scan.run(|from| stored.exceptions_task(from, range, (gain, offset), &peaks))
            } else {
                scan.run(|from| stored.packed_task(from, range, (gain, offset), &peaks))
            }
        }
        Frames::Microvolts(values) => scan_microvolts(values),
        // Stored values with a gain that is not positive: converted whole.
        Frames::StoredI16 { .. } | Frames::Packed { .. } => {
            scan_microvolts(&(0..frames.len()).map(|i| frames.get(i)).collect::<Vec<f32>>())
        }
    };
    for (k, c, sign, found) in crossings.into_iter().flatten() {
        let frame = first_frame + k as u64;
        if last_crossing[c].is_some_and(|last| frame < last + dead_frames) {
            continue;
        }
        last_crossing[c] = Some(frame);
        let (peak, value) = found.unwrap_or_else(|| peaks.extremum(k, sign, |j| frames.get(j * n_channels + c)));
        out.push(Event { sample: first_frame + peak as u64, channel: c as u32, amplitude_uv: value });
    }
}

/// Where a crossing's extremum is looked for: frames `k..k + frames`,
/// clipped to the `n_frames` at hand.
struct PeakSearch {
    frames: usize,
    n_frames: usize,
}

impl PeakSearch {
    /// The frame and µV value of the extremum after a crossing at frame `k`
    /// with `sign` (−1 below, +1 above); `value(j)` is frame j's value, µV.
    /// The first of equal extremes wins.
    #[inline(always)]
    fn extremum(&self, k: usize, sign: f32, value: impl Fn(usize) -> f32) -> (usize, f32) {
        let stop = (k + self.frames).min(self.n_frames);
        (k..stop)
            .map(|j| (j, value(j)))
            .fold((k, value(k)), |best, (j, v)| if sign * v > sign * best.1 { (j, v) } else { best })
    }
}

/// The smallest f32 above `t` (`t` itself when infinite or NaN).
fn next_up(t: f32) -> f32 {
    match t {
        t if !t.is_finite() => t,
        0.0 => f32::from_bits(1),
        t if t > 0.0 => f32::from_bits(t.to_bits() + 1),
        t => f32::from_bits(t.to_bits() - 1),
    }
}

/// Which frames and signs a scan for crossings covers.
struct Scan {
    start: usize,
    end: usize,
    negative: bool,
    positive: bool,
}

/// A crossing: frame, channel, sign (−1 below, +1 above), and its extremum
/// (frame, µV) when the scan has already found it.
type Crossing = (usize, usize, f32, Option<(usize, f32)>);

impl Scan {
    const FRAMES_PER_TASK: usize = 4096;

    /// Crossings in parallel over runs of frames, in frame order; `task(from)`
    /// scans the run starting at `from` ([`Scan::task`]).
    fn run(&self, task: impl Fn(usize) -> Vec<Crossing> + Send + Sync) -> Vec<Vec<Crossing>> {
        use rayon::prelude::*;
        (self.start..self.end.max(self.start))
            .step_by(Self::FRAMES_PER_TASK)
            .collect::<Vec<_>>()
            .into_par_iter()
            .map(task)
            .collect()
    }

    /// The frames of the run that starts at `from`.
    fn frames_from(&self, from: usize) -> std::ops::Range<usize> {
        from..(from + Self::FRAMES_PER_TASK).min(self.end)
    }

    /// The crossings at `frames` (within a run); `frame(k)` gives frame k's
    /// stored values, `convert` one of them in the thresholds' units. Per channel c, a value v is below when v < `low[c]` and above
    /// when v ≥ `high[c]`. Plain loops over each frame, which the compiler
    /// vectorizes (iterator adapters would stay out of line in the wide
    /// copies of [`StoredScan`]).
    #[inline(always)]
    fn task<'a, S: Copy + 'a, T: Copy + PartialOrd>(
        &self,
        frames: std::ops::Range<usize>,
        low: &[T],
        high: &[T],
        frame: impl Fn(usize) -> &'a [S],
        convert: impl Fn(S) -> T,
    ) -> Vec<Crossing> {
        let (negative, positive) = (self.negative, self.positive);
        let n = low.len();
        let high = &high[..n];
        let mut found = Vec::new();
        for k in frames {
            let (before, now) = (&frame(k - 1)[..n], &frame(k)[..n]);
            let crosses = |c: usize| {
                let (b, x) = (convert(before[c]), convert(now[c]));
                (negative & (b >= low[c]) & (x < low[c]), positive & (b < high[c]) & (x >= high[c]))
            };
            // Most frames cross nowhere: a branch-free test over the whole
            // frame first, the search only on a hit.
            let mut any = false;
            for c in 0..n {
                let (down, up) = crosses(c);
                any |= down | up;
            }
            if !any {
                continue;
            }
            for c in 0..n {
                match crosses(c) {
                    (true, _) => found.push((k, c, -1.0, None)),
                    (false, true) => found.push((k, c, 1.0, None)),
                    _ => {}
                }
            }
        }
        found
    }
}

/// [`Scan::task`] on stored i16 frames against thresholds in stored units,
/// built for AVX-512 or AVX2 when the CPU has them (the comparisons of a
/// frame run 16 or 8 channels to a register instead of 4).
struct StoredScan<'a> {
    scan: &'a Scan,
    low: &'a [i32],
    high: &'a [i32],
    n_channels: usize,
}

impl StoredScan<'_> {
    /// Frames of a packed run decoded and scanned at a time: with their
    /// previous frame, their plain i16 values stay in a core's L2 cache
    /// between the two (a whole chunk decoded first would go to memory and
    /// back).
    const PACKED_TILE_FRAMES: usize = 256;

    /// The run from `from` of plain i16 frames (`bytes`, little endian).
    fn task(&self, from: usize, bytes: &[u8]) -> Vec<Crossing> {
        spikeyard_contract::wide_build!(StoredScan<'_>, self.task_portable(from: usize, bytes: &[u8]) -> Vec<Crossing>)
    }

    #[inline(always)]
    fn task_portable(&self, from: usize, bytes: &[u8]) -> Vec<Crossing> {
        self.scan_decoded(self.scan.frames_from(from), 0, bytes)
    }

    /// The run from `from` of packed frames (µV = (stored − offset) × gain),
    /// decoded a tile at a time into a
    /// buffer kept by the thread (a fresh one would be fresh pages from the
    /// system every time), with each crossing's extremum found while its
    /// tile is at hand (read later from the packed bytes, each would be a
    /// cache miss and, being large, a search for its exception record).
    fn packed_task(
        &self,
        from: usize,
        range: PackedRange,
        (gain, offset): (f64, f64),
        peaks: &PeakSearch,
    ) -> Vec<Crossing> {
        thread_local!(static DECODED: std::cell::RefCell<Vec<u8>> = const { std::cell::RefCell::new(Vec::new()) });
        let n = self.n_channels;
        let frames = self.scan.frames_from(from);
        let mut found = Vec::new();
        DECODED.with_borrow_mut(|decoded| {
            for tile in frames.clone().step_by(Self::PACKED_TILE_FRAMES) {
                // From the frame before the tile, which each crossing test
                // compares with, to the last frame its extrema can reach.
                let tile = tile - 1..(tile + Self::PACKED_TILE_FRAMES).min(frames.end);
                let decoded_frames = tile.start..(tile.end + peaks.frames).min(peaks.n_frames);
                decoded.resize(2 * n * decoded_frames.len(), 0);
                range.decode(decoded_frames.start * n, decoded);
                let first = tile.start;
                let crossings = self.scan_tile(tile, decoded);
                let stored = Frames::StoredI16 { bytes: decoded, gain, offset };
                for (k, c, sign, _) in crossings {
                    let value = |j: usize| stored.get((j - first) * n + c);
                    found.push((k, c, sign, Some(peaks.extremum(k, sign, value))));
                }
            }
        });
        found
    }

    /// Whether every threshold lies beyond the values a packed byte holds
    /// (−127..=127): then only values held by exception records can cross
    /// (`low` ≤ −127 for the negative side, `high` ≥ 128 for the positive),
    /// and the extremum after a crossing, further out still, is one of them.
    fn only_exceptions_cross(&self) -> bool {
        (!self.scan.negative || self.low.iter().all(|&l| l <= -127))
            && (!self.scan.positive || self.high.iter().all(|&h| h >= 128))
    }

    /// [`StoredScan::packed_task`] when [`StoredScan::only_exceptions_cross`]:
    /// one walk over the run's exceptions ([`PackedRange::visit_exceptions`]),
    /// from the frame before it to the last frame its extrema can reach,
    /// with the same crossings and extrema. A byte is never beyond a
    /// threshold, so the frame before a crossing matters only when it is an
    /// exception too; nor is a byte beyond a crossing's value, so the
    /// extremum after it is the first most extreme of the later exceptions
    /// on its channel within reach.
    fn exceptions_task(
        &self,
        from: usize,
        range: PackedRange,
        (gain, offset): (f64, f64),
        peaks: &PeakSearch,
    ) -> Vec<Crossing> {
        let n = self.n_channels;
        let frames = self.scan.frames_from(from);
        // The run's own frames, and as far on as its last crossing's extremum can lie.
        let reach = (frames.end - 1 + peaks.frames.max(1)).min(peaks.n_frames);
        // Per channel: the frame and value of its last exception, and its
        // crossings whose extremum is still looked for (indices into `found`).
        let mut last = vec![(usize::MAX, 0i32); n];
        let mut open: Vec<Vec<usize>> = vec![Vec::new(); n];
        let mut found: Vec<Crossing> = Vec::new();
        // The frame of the exception at hand and its first index, moved on
        // (exceptions come in order) rather than divided out.
        let (mut k, mut frame_start) = (frames.start - 1, (frames.start - 1) * n);
        range.visit_exceptions(frame_start..reach * n, |index, x| {
            while index >= frame_start + n {
                (k, frame_start) = (k + 1, frame_start + n);
            }
            let c = index - frame_start;
            let microvolts = stored_microvolts(x, gain, offset);
            let open = &mut open[c];
            if !open.is_empty() {
                open.retain(|&i| {
                    let (crossed, _, sign, Some(extremum)) = &mut found[i] else { return false };
                    if k >= (*crossed + peaks.frames).min(peaks.n_frames) {
                        return false;
                    }
                    if *sign * microvolts > *sign * extremum.1 {
                        *extremum = (k, microvolts);
                    }
                    true
                });
            }
            let (x, before) = (i32::from(x), (last[c].0 == k.wrapping_sub(1)).then_some(last[c].1));
            last[c] = (k, x);
            let sign = if !frames.contains(&k) {
                return;
            } else if self.scan.negative && x < self.low[c] && before.is_none_or(|b| b >= self.low[c]) {
                -1.0
            } else if self.scan.positive && x >= self.high[c] && before.is_none_or(|b| b < self.high[c]) {
                1.0
            } else {
                return;
            };
            open.push(found.len());
            found.push((k, c, sign, Some((k, microvolts))));
        });
        found
    }

    /// The crossings at frames `tile.start + 1..tile.end`, decoded in `bytes` from `tile.start` on.
    fn scan_tile(&self, tile: std::ops::Range<usize>, bytes: &[u8]) -> Vec<Crossing> {
        spikeyard_contract::wide_build!(
            StoredScan<'_>,
            self.scan_tile_portable(tile: std::ops::Range<usize>, bytes: &[u8]) -> Vec<Crossing>
        )
    }

    #[inline(always)]
    fn scan_tile_portable(&self, tile: std::ops::Range<usize>, bytes: &[u8]) -> Vec<Crossing> {
        self.scan_decoded(tile.start + 1..tile.end, tile.start, bytes)
    }

    /// [`Scan::task`] at `frames`, on plain i16 frames held in `bytes` from frame `first` on.
    #[inline(always)]
    fn scan_decoded(&self, frames: std::ops::Range<usize>, first: usize, bytes: &[u8]) -> Vec<Crossing> {
        let (pairs, n) = (bytes.as_chunks::<2>().0, self.n_channels);
        let frame = |k: usize| &pairs[(k - first) * n..(k - first + 1) * n];
        self.scan.task(frames, self.low, self.high, frame, |p| i32::from(i16::from_le_bytes(p)))
    }
}

/// Merges events that are one spike seen on neighbouring electrodes: an
/// event is dropped when another event within `window_frames` on an
/// electrode within the radius (or on the same electrode) is larger in
/// |amplitude| (ties go to the earlier, then lower-numbered, event).
///
/// The rule is a local maximum test, so the result does not depend on the
/// order events arrive in or on how the recording was chunked. Events are
/// fed chunk by chunk and decided once nothing later can change them.
pub struct EventMerger {
    neighbours: Vec<Vec<u32>>,
    window_frames: u64,
    pending: VecDeque<Event>,
    /// How many events at the front of `pending` are already decided.
    decided: usize,
}

impl EventMerger {
    /// `neighbours[c]` lists the channels within the merge radius of c (c included or not).
    pub fn new(mut neighbours: Vec<Vec<u32>>, window_frames: u64) -> Self {
        for list in neighbours.iter_mut() {
            list.sort_unstable();
        }
        EventMerger { neighbours, window_frames, pending: VecDeque::new(), decided: 0 }
    }

    /// Add a chunk's events. Every event must have `sample` ≥ the `complete_before`
    /// given to the previous [`EventMerger::decide`] call.
    pub fn add(&mut self, events: impl IntoIterator<Item = Event>) {
        self.pending.extend(events);
        let undecided = self.pending.make_contiguous();
        undecided[self.decided..].sort_by_key(Event::key);
    }

    /// Decide every event with `sample + window < complete_before` (all
    /// events when `complete_before` is `None`: the end of the recording),
    /// knowing that no event still to come has `sample < complete_before`.
    /// Kept events are appended to `kept` in (sample, channel) order.
    pub fn decide(&mut self, complete_before: Option<u64>, kept: &mut Vec<Event>) {
        let window = self.window_frames;
        let events = self.pending.make_contiguous();
        let limit = complete_before.map_or(u64::MAX, |c| c.saturating_sub(window));
        let mut index = self.decided;
        while index < events.len() && events[index].sample < limit {
            let event = events[index];
            let low = events.partition_point(|e| e.sample + window < event.sample);
            let beaten = events[low..].iter().take_while(|e| e.sample <= event.sample + window).any(|other| {
                other.key() != event.key()
                    && (other.channel == event.channel
                        || self.neighbours[event.channel as usize].binary_search(&other.channel).is_ok())
                    && beats(other, &event)
            });
            if !beaten {
                kept.push(event);
            }
            index += 1;
        }
        self.decided = index;
        // Decided events stay while an undecided one may still compare with them.
        let keep_from = limit.saturating_sub(window);
        while self.decided > 0 && self.pending.front().is_some_and(|e| e.sample < keep_from) {
            self.pending.pop_front();
            self.decided -= 1;
        }
    }
}

fn beats(a: &Event, b: &Event) -> bool {
    let (x, y) = (a.amplitude_uv.abs(), b.amplitude_uv.abs());
    x > y || (x == y && a.key() < b.key())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scan(x: &[f32], polarity: Polarity, dead: u64) -> Vec<(u64, f32)> {
        let mut out = vec![];
        let mut last = [None];
        find_crossings(Frames::Microvolts(x), 1, 100, 0..x.len(), &[5.0], polarity, 3, dead, &mut last, &mut out);
        out.iter().map(|e| (e.sample, e.amplitude_uv)).collect()
    }

    #[test]
    fn channels_are_scanned_independently_and_off_channels_are_skipped() {
        // Three channels interleaved: channel 0 crosses at frame 1 (trough
        // at 2), channel 1 at frame 2; channel 2 would cross but is off.
        let frames = [0.0, 0.0, 0.0, -6.0, 0.0, -9.0, -7.0, -8.0, -9.0, 0.0, -6.0, 0.0];
        let mut out = vec![];
        let mut last = [None; 3];
        find_crossings(
            Frames::Microvolts(&frames),
            3,
            0,
            0..4,
            &[5.0, 5.0, f32::INFINITY],
            Polarity::Negative,
            2,
            0,
            &mut last,
            &mut out,
        );
        let found: Vec<(u64, u32, f32)> = out.iter().map(|e| (e.sample, e.channel, e.amplitude_uv)).collect();
        assert_eq!(found, vec![(2, 0, -7.0), (2, 1, -8.0)]);
        assert_eq!(last, [Some(1), Some(2), None]);
    }

    #[test]
    fn crossing_is_placed_at_the_trough_within_the_search_window() {
        let x = [0.0, -2.0, -6.0, -9.0, -7.0, -1.0, 0.0, -8.0, 0.0];
        assert_eq!(scan(&x, Polarity::Negative, 0), vec![(103, -9.0), (107, -8.0)]);
        // A dead time of 5 frames swallows the second crossing (5 frames after the first).
        assert_eq!(scan(&x, Polarity::Negative, 6), vec![(103, -9.0)]);
    }

    #[test]
    fn polarity_selects_the_sign() {
        let x = [0.0, 6.0, 0.0, -6.0, 0.0];
        assert_eq!(scan(&x, Polarity::Positive, 0), vec![(101, 6.0)]);
        assert_eq!(scan(&x, Polarity::Negative, 0), vec![(103, -6.0)]);
        assert_eq!(scan(&x, Polarity::Both, 0).len(), 2);
        // A value exactly at ±threshold (5) is not beyond it; the next f32 is.
        let just = f32::from_bits(5.0f32.to_bits() + 1);
        let x = [0.0, 5.0, 0.0, -5.0, 0.0, just, 0.0, -just, 0.0];
        assert_eq!(scan(&x, Polarity::Both, 0), vec![(105, just), (107, -just)]);
    }

    // Stored i16 frames are compared in stored units: the same events as
    // on the converted µV, also for values exactly at a threshold, for
    // both signs, an off channel and a gain and offset that do not divide
    // the thresholds evenly.
    // The stored path (built wide on CPUs that have AVX2 or AVX-512) finds
    // the events of the µV path (as built), on 37 channels: whole vectors
    // and a remainder; so do the same values packed (decoded a tile at a
    // time, crossings and extrema across tile seams).
    #[test]
    fn stored_i16_frames_give_the_events_of_their_microvolts() {
        let (gain, offset, n_channels) = (0.195_f64, 3.0_f64, 37);
        let microvolts = |s: i16| ((s as f64 - offset) * gain) as f32;
        let levels = [microvolts(-47), microvolts(52), 9.8, f32::INFINITY];
        let thresholds: Vec<f32> = (0..n_channels).map(|c| levels[c % 4]).collect();
        let mut state = 7u64;
        let stored: Vec<i16> = (0..4000 * n_channels)
            .map(|i| {
                state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                // Values around the thresholds, each one hit exactly now
                // and then, and large ones that packing stores as exceptions.
                [-47, -46, -48, 52, 53, 51, 0, 55, -60, -300, 250][(state >> 33) as usize % 11] + (i % 3) as i16 - 1
            })
            .collect();
        let bytes: Vec<u8> = stored.iter().flat_map(|v| v.to_le_bytes()).collect();
        let packed = PackedValues::new(&bytes);
        let values: Vec<f32> = stored.iter().map(|&v| microvolts(v)).collect();
        for polarity in [Polarity::Negative, Polarity::Positive, Polarity::Both] {
            let run = |frames: Frames| {
                let (mut last, mut out) = (vec![None; n_channels], Vec::new());
                find_crossings(frames, n_channels, 0, 0..4000, &thresholds, polarity, 3, 2, &mut last, &mut out);
                out
            };
            let expected = run(Frames::Microvolts(&values));
            assert!(expected.len() > 100, "{polarity:?}: {}", expected.len());
            assert!(expected.iter().all(|e| e.channel % 4 != 3));
            assert_eq!(run(Frames::StoredI16 { bytes: &bytes, gain, offset }), expected, "{polarity:?}");
            assert_eq!(run(Frames::Packed { range: packed.range(), gain, offset }), expected, "{polarity:?}");
        }
    }

    // With every threshold beyond what a packed byte holds, the packed scan
    // walks the exceptions alone (`StoredScan::exceptions_task`). It must
    // give the events of the µV: across task runs, with crossings closer
    // than the peak search, equal extremes, a channel off, and a core that
    // stops short of the frames at hand. A sentinel without its record is
    // noted.
    #[test]
    fn packed_scan_over_exceptions_alone_gives_the_events_of_the_microvolts() {
        let (gain, offset, n_channels, n_frames) = (0.195_f64, 3.0_f64, 11, 9000);
        let microvolts = |s: i16| ((s as f64 - offset) * gain) as f32;
        let levels = [-microvolts(-150), microvolts(140), -microvolts(-400), f32::INFINITY];
        let thresholds: Vec<f32> = (0..n_channels).map(|c| levels[c % 4]).collect();
        let (low, high): (Vec<i32>, Vec<i32>) = thresholds
            .iter()
            .map(|&t| (i16_first_where(gain, offset, |v| v >= -t), i16_first_where(gain, offset, |v| v > t)))
            .unzip();
        let scan = Scan { start: 1, end: n_frames, negative: true, positive: true };
        assert!(StoredScan { scan: &scan, low: &low, high: &high, n_channels }.only_exceptions_cross());
        let mut state = 11u64;
        let mut stored: Vec<i16> = (0..n_frames * n_channels)
            .map(|_| {
                state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                [-151, -150, -149, -200, -200, -410, 139, 141, 160, 160, 0, -127, 127, -128, 128, 5]
                    [(state >> 33) as usize % 16]
            })
            .collect();
        // On channel 0, a crossing on the last frame of the first task run
        // (frames 1..4097) whose extremum is the last frame within reach.
        for (frame, value) in [(4095, 0), (4096, -151), (4097, -150), (4098, -150), (4099, -150), (4100, -410)] {
            stored[frame * n_channels] = value;
        }
        let bytes: Vec<u8> = stored.iter().flat_map(|v| v.to_le_bytes()).collect();
        let packed = PackedValues::new(&bytes);
        let values: Vec<f32> = stored.iter().map(|&v| microvolts(v)).collect();
        // A peak search of 0 frames keeps the crossing's own value.
        let cases = [(Polarity::Negative, 5), (Polarity::Positive, 5), (Polarity::Both, 5), (Polarity::Both, 0)];
        for (polarity, peak) in cases {
            let run = |frames: Frames| {
                let (mut last, mut out) = (vec![None; n_channels], Vec::new());
                let core = 0..n_frames - 3;
                find_crossings(frames, n_channels, 0, core, &thresholds, polarity, peak, 2, &mut last, &mut out);
                out
            };
            let expected = run(Frames::Microvolts(&values));
            assert!(expected.len() > 1000, "{polarity:?}: {}", expected.len());
            let packed_events = run(Frames::Packed { range: packed.range(), gain, offset });
            assert_eq!(packed_events, expected, "{polarity:?}, peak search {peak}");
        }
        assert_eq!(packed.missing.load(std::sync::atomic::Ordering::Relaxed), 0);
        let mut broken = packed;
        let plain = (0..broken.bytes.len()).rev().find(|&i| broken.bytes[i] != 0x80).unwrap();
        broken.bytes[plain] = 0x80;
        let (mut last, mut out) = (vec![None; n_channels], Vec::new());
        let frames = Frames::Packed { range: broken.range(), gain, offset };
        find_crossings(frames, n_channels, 0, 0..n_frames, &thresholds, Polarity::Both, 5, 2, &mut last, &mut out);
        assert_eq!(broken.missing.load(std::sync::atomic::Ordering::Relaxed), plain as u64 + 1);
    }

    /// i16 values packed as the filter stores them, readable as one range.
    struct PackedValues {
        bytes: Vec<u8>,
        records: Vec<u8>,
        starts: Vec<u64>,
        missing: std::sync::atomic::AtomicU64,
    }

    impl PackedValues {
        fn new(little_endian: &[u8]) -> PackedValues {
            use spikeyard_contract::packed::{Packer, RECORD_BYTES};
            let (mut packer, mut bytes, mut records, mut index) = (Packer::default(), vec![], vec![], vec![]);
            packer.pack(little_endian, &mut bytes, &mut records, &mut index);
            packer.finish(&mut index);
            let starts: Vec<u64> = index.chunks(8).map(|e| u64::from_le_bytes(e.try_into().unwrap())).collect();
            assert!(records.len() > 100 * RECORD_BYTES, "exceptions to read: {}", records.len() / RECORD_BYTES);
            PackedValues { bytes, records, starts, missing: Default::default() }
        }

        fn range(&self) -> PackedRange<'_> {
            PackedRange {
                bytes: &self.bytes,
                records: &self.records,
                starts: &self.starts,
                first: 0,
                missing: &self.missing,
            }
        }
    }

    fn event(sample: u64, channel: u32, amplitude_uv: f32) -> Event {
        Event { sample, channel, amplitude_uv }
    }

    #[test]
    fn merge_keeps_the_largest_of_neighbours_only() {
        // Channels 0-1 neighbours, 2 far away.
        let neighbours = vec![vec![1], vec![0], vec![]];
        let mut merger = EventMerger::new(neighbours, 5);
        merger.add([event(10, 0, -50.0), event(12, 1, -80.0), event(11, 2, -20.0), event(30, 0, -40.0)]);
        let mut kept = vec![];
        merger.decide(None, &mut kept);
        assert_eq!(kept, vec![event(11, 2, -20.0), event(12, 1, -80.0), event(30, 0, -40.0)]);
    }

    #[test]
    fn merge_decision_does_not_depend_on_chunking() {
        let neighbours = vec![vec![1], vec![0, 2], vec![1]];
        let events: Vec<Event> =
            (0..200u64).map(|i| event(i * 3 + (i % 4), (i % 3) as u32, -((i * 37 % 23) as f32) - 5.0)).collect();
        let mut whole = vec![];
        let mut merger = EventMerger::new(neighbours.clone(), 6);
        merger.add(events.clone());
        merger.decide(None, &mut whole);
        for chunk in [7u64, 50, 101] {
            let mut merger = EventMerger::new(neighbours.clone(), 6);
            let mut kept = vec![];
            let mut start = 0;
            while start < 700 {
                let end = start + chunk;
                merger.add(events.iter().copied().filter(|e| e.sample >= start && e.sample < end));
                merger.decide(Some(end), &mut kept);
                start = end;
            }
            merger.decide(None, &mut kept);
            assert_eq!(kept, whole, "chunk {chunk}");
        }
    }
}
