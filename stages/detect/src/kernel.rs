//! Detection kernels: threshold crossings on one channel, and the merge of
//! one spike seen on several electrodes into one event.

use crate::params::Polarity;
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

/// Scan one channel for threshold crossings.
///
/// `x` holds frames starting at `first_frame`; crossings are looked for at
/// positions `core` of `x` (position k crosses when `x[k−1]` is on the near
/// side of the threshold and `x[k]` beyond it); the extremum is searched in
/// `k..k + peak_frames` (clipped to `x`). `last_crossing` carries the dead
/// time across chunks.
#[allow(clippy::too_many_arguments)]
pub fn find_crossings(
    x: &[f32],
    first_frame: u64,
    core: std::ops::Range<usize>,
    threshold_uv: f32,
    polarity: Polarity,
    peak_frames: usize,
    dead_frames: u64,
    channel: u32,
    last_crossing: &mut Option<u64>,
    out: &mut Vec<Event>,
) {
    let start = core.start.max(1);
    for k in start..core.end {
        let (before, now) = (x[k - 1], x[k]);
        let sign = if matches!(polarity, Polarity::Negative | Polarity::Both)
            && before >= -threshold_uv
            && now < -threshold_uv
        {
            -1.0f32
        } else if matches!(polarity, Polarity::Positive | Polarity::Both)
            && before <= threshold_uv
            && now > threshold_uv
        {
            1.0
        } else {
            continue;
        };
        let frame = first_frame + k as u64;
        if let Some(last) = *last_crossing {
            if frame < last + dead_frames {
                continue;
            }
        }
        *last_crossing = Some(frame);
        let end = (k + peak_frames).min(x.len());
        let (peak, value) =
            x[k..end]
                .iter()
                .enumerate()
                .fold((k, now), |best, (i, &v)| if sign * v > sign * best.1 { (k + i, v) } else { best });
        out.push(Event { sample: first_frame + peak as u64, channel, amplitude_uv: value });
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
        let mut last = None;
        find_crossings(x, 100, 0..x.len(), 5.0, polarity, 3, dead, 0, &mut last, &mut out);
        out.iter().map(|e| (e.sample, e.amplitude_uv)).collect()
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
