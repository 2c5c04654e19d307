//! Noise level by the median absolute value (MAD) estimator.
//!
//! σ̂ = median(|x|) / Φ⁻¹(0.75), after Quiroga, Nadasdy & Ben-Shaul (2004),
//! going back to Donoho & Johnstone (1994). Robust to sparse large spikes,
//! which is why detect and QC use it rather than the standard deviation.

use crate::packed::{PackedRange, SENTINEL};
use crate::recording::stored_microvolts;

/// Φ⁻¹(0.75), the median of |N(0,1)| (scipy.stats.norm.ppf(0.75)).
pub const NORMAL_MAD_CONSTANT: f64 = 0.674_489_750_196_081_7;

/// Median of the absolute values, reordering `values` in place.
/// For an even count it is the mean of the middle two. Empty input gives NaN.
pub fn median_abs(values: &mut [f32]) -> f64 {
    let mut any_nan = false;
    for v in values.iter_mut() {
        *v = v.abs();
        any_nan |= v.is_nan();
    }
    if values.len() >= SAMPLED_MIN_VALUES && !any_nan {
        if let Some(median) = median_by_sampled_window(values) {
            return median;
        }
    }
    median_in_place(values)
}

/// Count from which [`median_by_sampled_window`] repays its sample (a
/// channel's noise window holds tens of thousands of values).
const SAMPLED_MIN_VALUES: usize = 2048;
/// Values in [`median_by_sampled_window`]'s sample.
const SAMPLE_VALUES: usize = 512;

/// The median of many values without NaN, as [`median_of_finite`] gives
/// it, or `None` (the values untouched) when the window misses it: a
/// sample of evenly spaced values places a window that holds the middle
/// ranks unless the sample is off by more than three standard deviations
/// of a sampled rank; one vector pass counts the values below and above
/// the window and copies those inside it (about an eighth), and only those
/// are selected among. Several times faster than a selection over all of
/// them, which is what detection and QC spend most of their noise
/// estimate on.
fn median_by_sampled_window(values: &[f32]) -> Option<f64> {
    let n = values.len();
    let (rank_low, rank_high) = if n % 2 == 1 { (n / 2, n / 2) } else { (n / 2 - 1, n / 2) };
    let stride = n / SAMPLE_VALUES;
    let mut sample: [f32; SAMPLE_VALUES] = std::array::from_fn(|i| values[i * stride]);
    // A sampled rank's standard deviation is at most √(s/4).
    let centre = rank_high as f64 * SAMPLE_VALUES as f64 / n as f64;
    let spread = 3.0 * (SAMPLE_VALUES as f64 / 4.0).sqrt();
    let low = (centre - spread).max(0.0) as usize;
    let high = ((centre + spread).ceil() as usize).min(SAMPLE_VALUES - 1);
    let (_, lo, above_lo) = sample.select_nth_unstable_by(low, finite_order);
    let lo = *lo;
    let hi = if high > low { *above_lo.select_nth_unstable_by(high - low - 1, finite_order).1 } else { lo };
    thread_local! {
        static KEPT: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
    }
    KEPT.with_borrow_mut(|kept| {
        kept.resize(n + WindowSplit::SLACK, 0.0);
        let WindowSplit { below, above, inside } = WindowSplit::run(values, lo, hi, kept);
        (below <= rank_low && rank_high < n - above)
            .then(|| middle_by_selection(&mut kept[..inside], rank_low - below, rank_high - below))
    })
}

/// Median of `values`, reordering them. Empty input gives NaN.
pub fn median_in_place(values: &mut [f32]) -> f64 {
    median_by(values, f32::total_cmp)
}

/// The same median for values known to be finite, with a plain comparison,
/// several times cheaper than the total order (the median reference takes
/// one per frame). Empty input gives NaN.
pub fn median_of_finite(values: &mut [f32]) -> f64 {
    median_by(values, finite_order)
}

fn finite_order(a: &f32, b: &f32) -> std::cmp::Ordering {
    a.partial_cmp(b).unwrap_or(std::cmp::Ordering::Equal)
}

fn median_by(values: &mut [f32], order: impl FnMut(&f32, &f32) -> std::cmp::Ordering) -> f64 {
    let n = values.len();
    if n == 0 {
        return f64::NAN;
    }
    value_of_rank(values, n / 2, n.is_multiple_of(2), order)
}

/// The value of rank `rank` in `values` (reordering them), averaged with
/// the one of rank `rank − 1` when `with_lower` (an even count's median).
fn value_of_rank(
    values: &mut [f32],
    rank: usize,
    with_lower: bool,
    order: impl FnMut(&f32, &f32) -> std::cmp::Ordering,
) -> f64 {
    let (lower, upper, _) = values.select_nth_unstable_by(rank, order);
    let upper = *upper as f64;
    if with_lower {
        let lower_max = lower.iter().copied().fold(f32::NEG_INFINITY, f32::max) as f64;
        0.5 * (lower_max + upper)
    } else {
        upper
    }
}

/// Exact medians of a sequence of sets of finite values (one frame of a
/// recording after another), cheaper than a selection over all values: the
/// values within a window around the set's mean are counted and selected
/// among (the mean of a few hundred noisy channels sits within a few
/// hundredths of σ of their median). When the median falls outside the
/// window it is found over all values and the window widens; the width
/// carries over from set to set. The answer is always
/// [`median_of_finite`]'s, whatever the window.
#[derive(Debug, Clone)]
pub struct RunningMedian {
    half_width: f32,
    scratch: Vec<f32>,
}

impl Default for RunningMedian {
    fn default() -> Self {
        RunningMedian { half_width: 1.0, scratch: Vec::new() }
    }
}

impl RunningMedian {
    /// Values kept in the window, about: fewer is cheaper to select among,
    /// more misses the median less often.
    const WINDOW_TARGET: usize = 48;

    /// The median of `values` (finite), as [`median_of_finite`] gives it.
    /// On x86-64 with AVX-512 the same code runs 16 values to a register,
    /// with the same answer.
    pub fn median(&mut self, values: &[f32]) -> f64 {
        #[cfg(target_arch = "x86_64")]
        if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("popcnt") {
            // SAFETY: the CPU supports AVX-512F and POPCNT, checked just above.
            return unsafe { self.median_avx512(values) };
        }
        self.median_with(values, WindowSplit::run_portable, middle_by_selection)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,popcnt")]
    unsafe fn median_avx512(&mut self, values: &[f32]) -> f64 {
        // SAFETY (both closures): this function runs only where AVX-512F and
        // POPCNT are supported; `median_with` gives the split its room.
        self.median_with(
            values,
            |values, lo, hi, kept| unsafe { WindowSplit::run_avx512(values, lo, hi, kept) },
            |values, low, high| {
                if values.len() <= COUNTING_MAX_VALUES {
                    unsafe { middle_by_counting_avx512(values, low, high) }
                } else {
                    middle_by_selection(values, low, high)
                }
            },
        )
    }

    /// `split` is [`WindowSplit::run_portable`] or a faster equivalent; it is
    /// handed a buffer of `values.len() + WindowSplit::SLACK`. `select` is
    /// [`middle_by_selection`] or a faster equivalent.
    #[inline(always)]
    fn median_with(
        &mut self,
        values: &[f32],
        split: impl Fn(&[f32], f32, f32, &mut [f32]) -> WindowSplit,
        select: impl Fn(&mut [f32], usize, usize) -> f64,
    ) -> f64 {
        let n = values.len();
        if n == 0 {
            return f64::NAN;
        }
        // Ranks of the middle one or two values.
        let (rank_low, rank_high) = if n % 2 == 1 { (n / 2, n / 2) } else { (n / 2 - 1, n / 2) };
        // The mean, summed in 16 lanes (vectorized; only a guess, but always the same one).
        let mut lanes = [0.0f32; 16];
        let whole = values.chunks_exact(16);
        let rest: f32 = whole.remainder().iter().sum();
        for chunk in whole {
            for (l, v) in lanes.iter_mut().zip(chunk) {
                *l += v;
            }
        }
        let centre = (lanes.iter().sum::<f32>() + rest) / n as f32;
        let (lo, hi) = (centre - self.half_width, centre + self.half_width);
        self.scratch.resize(n + WindowSplit::SLACK, 0.0);
        let WindowSplit { below, above, inside } = split(values, lo, hi, &mut self.scratch);
        if below <= rank_low && rank_high < n - above {
            if inside > Self::WINDOW_TARGET {
                self.half_width *= 0.9;
            }
            // rank_low ≥ below: both middle values are inside the window.
            select(&mut self.scratch[..inside], rank_low - below, rank_high - below)
        } else {
            self.scratch.clear();
            self.scratch.extend_from_slice(values);
            let median = median_of_finite(&mut self.scratch);
            self.half_width = (2.0 * self.half_width).max(1.5 * (median as f32 - centre).abs());
            median
        }
    }
}

/// The mean of the values of ranks `low` and `high` (equal, or `high` =
/// `low` + 1) among finite values, reordering them.
fn middle_by_selection(values: &mut [f32], low: usize, high: usize) -> f64 {
    value_of_rank(values, high, low != high, finite_order)
}

/// Most values [`middle_by_counting_avx512`] takes.
const COUNTING_MAX_VALUES: usize = 128;

/// The mean of the values of ranks `low` and `high` (equal, or `high` =
/// `low` + 1) among at most [`COUNTING_MAX_VALUES`] finite values, as
/// [`value_of_rank`] gives it, without a selection's mispredicted branches:
/// the value of rank r is the largest value with at most r values smaller
/// than it (any larger value has all values up to rank r below it), and
/// with AVX-512 every value's count of smaller ones is kept in a lane and
/// built up by one vector compare per 16 values.
///
/// # Safety
/// The CPU supports AVX-512F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn middle_by_counting_avx512(values: &[f32], low: usize, high: usize) -> f64 {
    use std::arch::x86_64::*;
    debug_assert!(values.len() <= COUNTING_MAX_VALUES && high < values.len());
    let parts = values.len().div_ceil(16);
    // The padding lanes count smaller values too but are not counted by
    // others: one with at most r values smaller than it is still no larger
    // than the value of rank r, so it never changes the answer.
    let mut row = [0.0f32; COUNTING_MAX_VALUES];
    row[..values.len()].copy_from_slice(values);
    // SAFETY: each load reads 16 of the row's values.
    let candidates: [__m512; COUNTING_MAX_VALUES / 16] =
        std::array::from_fn(|k| unsafe { _mm512_loadu_ps(row.as_ptr().add(16 * k)) });
    let mut smaller = [_mm512_setzero_si512(); COUNTING_MAX_VALUES / 16];
    let one = _mm512_set1_epi32(1);
    for &v in values {
        let v_lanes = _mm512_set1_ps(v);
        for k in 0..parts {
            let is_smaller = _mm512_cmp_ps_mask::<_CMP_LT_OQ>(v_lanes, candidates[k]);
            smaller[k] = _mm512_mask_add_epi32(smaller[k], is_smaller, smaller[k], one);
        }
    }
    let value_of_rank = |rank: usize| -> f32 {
        let rank = _mm512_set1_epi32(rank as i32);
        (0..parts)
            .map(|k| {
                let at_most = _mm512_cmple_epi32_mask(smaller[k], rank);
                _mm512_mask_reduce_max_ps(at_most, candidates[k])
            })
            .fold(f32::NEG_INFINITY, f32::max)
    };
    0.5 * (value_of_rank(low) as f64 + value_of_rank(high) as f64)
}

/// How a set of finite values falls around a window `[lo, hi]`: the counts
/// below and above it, and the values inside it, copied in their order to
/// the front of a buffer.
#[derive(Debug, PartialEq, Eq)]
struct WindowSplit {
    below: usize,
    above: usize,
    inside: usize,
}

impl WindowSplit {
    /// Room the buffer needs beyond the values' count (whole vector stores).
    const SLACK: usize = 16;

    /// The split on this CPU: [`WindowSplit::run_avx512`] where it runs,
    /// [`WindowSplit::run_portable`] elsewhere (the same split).
    fn run(values: &[f32], lo: f32, hi: f32, kept: &mut [f32]) -> WindowSplit {
        assert!(kept.len() >= values.len() + Self::SLACK);
        #[cfg(target_arch = "x86_64")]
        if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("popcnt") {
            // SAFETY: the CPU supports AVX-512F and POPCNT (checked just above); `kept` has the room (asserted).
            return unsafe { Self::run_avx512(values, lo, hi, kept) };
        }
        Self::run_portable(values, lo, hi, kept)
    }

    /// One value at a time; `kept` holds at least `values.len()` values.
    #[inline(always)]
    fn run_portable(values: &[f32], lo: f32, hi: f32, kept: &mut [f32]) -> WindowSplit {
        let (mut below, mut above, mut inside) = (0, 0, 0);
        for &v in values {
            // Written always, kept when inside: no branch to mispredict.
            kept[inside] = v;
            let (is_below, is_above) = (v < lo, v > hi);
            below += usize::from(is_below);
            above += usize::from(is_above);
            inside += usize::from(!is_below && !is_above);
        }
        WindowSplit { below, above, inside }
    }

    /// 16 values at a time through compare masks and a compress: the same
    /// split as [`WindowSplit::run_portable`].
    ///
    /// # Safety
    /// The CPU supports AVX-512F and POPCNT, and `kept.len() >= values.len() + SLACK`.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,popcnt")]
    #[inline]
    unsafe fn run_avx512(values: &[f32], lo: f32, hi: f32, kept: &mut [f32]) -> WindowSplit {
        use std::arch::x86_64::*;
        let (low, high) = (_mm512_set1_ps(lo), _mm512_set1_ps(hi));
        let (mut below, mut above, mut inside) = (0, 0, 0);
        for start in (0..values.len()).step_by(16) {
            let lanes = (values.len() - start).min(16);
            let valid: __mmask16 = if lanes == 16 { !0 } else { (1 << lanes) - 1 };
            // SAFETY: the masked load reads only the `lanes` values from `start` on.
            let v = unsafe { _mm512_maskz_loadu_ps(valid, values.as_ptr().add(start)) };
            let is_below = _mm512_mask_cmp_ps_mask::<_CMP_LT_OQ>(valid, v, low);
            let is_above = _mm512_mask_cmp_ps_mask::<_CMP_GT_OQ>(valid, v, high);
            let is_inside = valid & !is_below & !is_above;
            // SAFETY: inside ≤ start, so the 16 values stored end before values.len() + SLACK ≤ kept.len().
            unsafe { _mm512_storeu_ps(kept.as_mut_ptr().add(inside), _mm512_maskz_compress_ps(is_inside, v)) };
            below += is_below.count_ones() as usize;
            above += is_above.count_ones() as usize;
            inside += is_inside.count_ones() as usize;
        }
        WindowSplit { below, above, inside }
    }
}

/// MAD noise estimate σ̂ = median(|x|)/Φ⁻¹(0.75), reordering `values`.
pub fn mad_sigma(values: &mut [f32]) -> f64 {
    median_abs(values) / NORMAL_MAD_CONSTANT
}

/// [`mad_sigma`] of each of `n_channels` channels over every frame of a
/// packed range (µV = (stored − offset) × gain), equal to it on the
/// decoded µV, but counted rather than selected: a byte holds one of 255
/// values, so a channel's values are a count per byte value plus its few
/// exception records, and the middle ranks are found by walking those in
/// order of |µV|. Counted in parallel over runs of frames (sums of counts,
/// so the thread count does not matter).
pub fn packed_mad_sigmas(range: PackedRange, n_channels: usize, gain: f64, offset: f64) -> Vec<f64> {
    use rayon::prelude::*;
    const FRAMES_PER_TASK: usize = 2048;
    let n = n_channels.max(1);
    let n_frames = range.len() / n;
    let tallies = (0..n_frames)
        .step_by(FRAMES_PER_TASK)
        .collect::<Vec<_>>()
        .into_par_iter()
        .map(|from| {
            let values = from * n..(from + FRAMES_PER_TASK).min(n_frames) * n;
            let mut counts = vec![0u32; 256 * n];
            for row in range.bytes[values.clone()].chunks_exact(n) {
                for (c, &byte) in row.iter().enumerate() {
                    counts[256 * c + usize::from(byte)] += 1;
                }
            }
            let mut exceptions = Vec::new();
            range.visit_exceptions(values, |index, value| exceptions.push((index % n, value)));
            (counts, exceptions)
        })
        .collect::<Vec<(Vec<u32>, Vec<(usize, i16)>)>>();
    let mut counts = vec![0u32; 256 * n];
    let mut exceptions: Vec<Vec<f32>> = vec![Vec::new(); n];
    let microvolts = |stored: i16| stored_microvolts(stored, gain, offset).abs();
    for (task_counts, task_exceptions) in tallies {
        counts.iter_mut().zip(task_counts).for_each(|(sum, count)| *sum += count);
        for (c, value) in task_exceptions {
            exceptions[c].push(microvolts(value));
        }
    }
    (0..n_channels)
        .map(|c| {
            let bytes = (0..=u8::MAX).filter(|&byte| byte != SENTINEL);
            let mut levels: Vec<(f32, u32)> = bytes
                .map(|byte| (microvolts(i16::from(byte as i8)), counts[256 * c + usize::from(byte)]))
                .filter(|&(_, count)| count > 0)
                .chain(exceptions[c].iter().map(|&v| (v, 1)))
                .collect();
            levels.sort_unstable_by(|a, b| finite_order(&a.0, &b.0));
            let total: u64 = levels.iter().map(|&(_, count)| u64::from(count)).sum();
            // The value of rank r: the level whose counts reach past r.
            let rank = |r: u64| {
                let mut below = 0;
                levels.iter().find(|&&(_, count)| {
                    below += u64::from(count);
                    below > r
                })
            };
            let median = match (rank(total / 2), total % 2) {
                (None, _) => f64::NAN,
                (Some(&(upper, _)), 1) => f64::from(upper),
                (Some(&(upper, _)), _) => {
                    0.5 * (f64::from(rank(total / 2 - 1).map_or(upper, |l| l.0)) + f64::from(upper))
                }
            };
            median / NORMAL_MAD_CONSTANT
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // Counting a packed range's values gives what selecting among the
    // decoded µV gives: odd and even counts, a range that starts inside an
    // index block and spans several counting tasks, exceptions on both
    // sides, an offset that makes |µV| order differ from |stored| order, a
    // channel of two values taking turns (middle ranks that differ) and one
    // of exceptions only.
    #[test]
    fn packed_counting_gives_the_mad_sigma_of_the_decoded_values() {
        use crate::packed::{Packer, RECORD_BYTES};
        let (n_channels, n_frames, gain, offset) = (7usize, 5001usize, 0.37, 2.5);
        let mut rng = crate::testing::TestRng::new(21);
        let stored: Vec<i16> = (0..n_frames * n_channels)
            .map(|i| match i % n_channels {
                5 => [-4, 10][(i / n_channels) % 2],
                6 => 300 + (rng.uniform() * 50.0) as i16,
                c => (rng.normal() * 40.0 * (c + 1) as f64) as i16,
            })
            .collect();
        let little_endian: Vec<u8> = stored.iter().flat_map(|v| v.to_le_bytes()).collect();
        let (mut packer, mut bytes, mut records, mut index) = (Packer::default(), vec![], vec![], vec![]);
        packer.pack(&little_endian, &mut bytes, &mut records, &mut index);
        packer.finish(&mut index);
        let entries: Vec<u64> = index.chunks(8).map(|e| u64::from_le_bytes(e.try_into().unwrap())).collect();
        let missing = std::sync::atomic::AtomicU64::new(0);
        for frames in [0..n_frames, 3..n_frames, 1000..4001] {
            // The range as a read of these frames sees it.
            let (first, last) = (frames.start * n_channels, frames.end * n_channels);
            let block = crate::packed::BLOCK_VALUES as usize;
            let starts: Vec<u64> = entries[first / block..=(last - 1) / block + 1].to_vec();
            let (r0, r1) = (starts[0] as usize, starts[starts.len() - 1] as usize);
            let starts: Vec<u64> = starts.iter().map(|s| s - r0 as u64).collect();
            let range = PackedRange {
                bytes: &bytes[first..last],
                records: &records[r0 * RECORD_BYTES..r1 * RECORD_BYTES],
                starts: &starts,
                first: first as u64,
                missing: &missing,
            };
            let counted = packed_mad_sigmas(range, n_channels, gain, offset);
            for (c, sigma) in counted.iter().enumerate() {
                let mut column: Vec<f32> =
                    (frames.clone()).map(|k| stored_microvolts(stored[k * n_channels + c], gain, offset)).collect();
                assert_eq!(*sigma, mad_sigma(&mut column), "frames {frames:?}, channel {c}");
            }
        }
        assert_eq!(missing.into_inner(), 0);
    }

    // REFERENCES.md N1, explicit case: median|x| = 2.5, σ̂ = 3.706505546264005.
    #[test]
    fn mad_sigma_matches_worked_example() {
        let mut x = [-3.0f32, -1.0, 0.0, 2.0, 5.0, -4.0];
        let sigma = mad_sigma(&mut x);
        assert!((sigma - 3.706505546264005).abs() < 1e-12, "{sigma}");
    }

    #[test]
    fn median_of_odd_and_even_counts() {
        assert_eq!(median_in_place(&mut [3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median_in_place(&mut [4.0, 1.0, 3.0, 2.0]), 2.5);
        assert!(median_in_place(&mut []).is_nan());
        assert!(median_of_finite(&mut []).is_nan());
    }

    // Whatever the window does, the running median is the plain one: sets
    // whose medians drift, jump, repeat exactly, and of odd and even sizes.
    #[test]
    fn running_median_equals_the_plain_median() {
        let mut rng = crate::testing::TestRng::new(8);
        for n in [1usize, 2, 3, 10, 383, 384] {
            // The path this CPU runs, and the portable one.
            let (mut running, mut portable) = (RunningMedian::default(), RunningMedian::default());
            let mut drift = 0.0;
            for set in 0..400 {
                drift += rng.normal() * 0.3;
                let values: Vec<f32> = match set % 100 {
                    // A jump far outside the window.
                    50 => (0..n).map(|_| 1000.0 + rng.normal() as f32).collect(),
                    // All equal, then all equal to another value.
                    60 | 61 => vec![3.0; n],
                    62 => vec![-7.0; n],
                    // Quantized values, with many ties at the median.
                    70 => (0..n).map(|_| (rng.normal() * 2.0).round() as f32).collect(),
                    _ => (0..n).map(|_| (drift + 10.0 * rng.normal()) as f32).collect(),
                };
                let expected = median_of_finite(&mut values.clone());
                assert_eq!(running.median(&values), expected, "n = {n}, set {set}");
                let portable_median = portable.median_with(&values, WindowSplit::run_portable, middle_by_selection);
                assert_eq!(portable_median, expected, "n = {n}, set {set}");
            }
        }
        assert!(RunningMedian::default().median(&[]).is_nan());
    }

    // Counting gives the selection's middle values for every count up to
    // 128: sets below, around and above the padding's 0, with and without
    // ties.
    #[cfg(target_arch = "x86_64")]
    #[test]
    fn counting_middle_equals_the_selection() {
        if !std::is_x86_feature_detected!("avx512f") {
            return;
        }
        let mut rng = crate::testing::TestRng::new(12);
        for n in 1..=COUNTING_MAX_VALUES {
            for shift in [-50.0, 0.0, 50.0] {
                for ties in [false, true] {
                    let values: Vec<f32> = (0..n)
                        .map(|_| rng.normal() * 3.0 + shift)
                        .map(|v| if ties { v.round() as f32 } else { v as f32 })
                        .collect();
                    let (low, high) = if n % 2 == 1 { (n / 2, n / 2) } else { (n / 2 - 1, n / 2) };
                    let expected = middle_by_selection(&mut values.clone(), low, high);
                    // SAFETY: AVX-512F checked above.
                    let counted = unsafe { middle_by_counting_avx512(&values, low, high) };
                    assert_eq!(counted, expected, "n {n}, shift {shift}, ties {ties}");
                }
            }
        }
    }

    // The vector split and the one-at-a-time split agree, values on the
    // window's edges included, for full vectors and every tail length; and
    // both agree with counting by hand.
    #[test]
    fn window_split_paths_agree() {
        let mut rng = crate::testing::TestRng::new(9);
        for n in [0usize, 1, 15, 16, 17, 31, 48, 383, 384] {
            // Quantized values, so many sit exactly on lo = -1 and hi = 2.
            let values: Vec<f32> = (0..n).map(|_| (rng.normal() * 3.0).round() as f32).collect();
            let (lo, hi) = (-1.0, 2.0);
            let expected = WindowSplit {
                below: values.iter().filter(|&&v| v < lo).count(),
                above: values.iter().filter(|&&v| v > hi).count(),
                inside: values.iter().filter(|&&v| (lo..=hi).contains(&v)).count(),
            };
            let kept_by_hand: Vec<f32> = values.iter().copied().filter(|v| (lo..=hi).contains(v)).collect();
            let mut kept = vec![f32::NAN; n + WindowSplit::SLACK];
            assert_eq!(WindowSplit::run_portable(&values, lo, hi, &mut kept), expected, "n = {n}");
            assert_eq!(kept[..expected.inside], kept_by_hand[..], "n = {n}");
            #[cfg(target_arch = "x86_64")]
            if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("popcnt") {
                let mut kept = vec![f32::NAN; n + WindowSplit::SLACK];
                // SAFETY: AVX-512F and POPCNT checked just above; `kept` has the room.
                assert_eq!(unsafe { WindowSplit::run_avx512(&values, lo, hi, &mut kept) }, expected, "n = {n}");
                assert_eq!(kept[..expected.inside], kept_by_hand[..], "n = {n}");
            }
        }
    }

    // The sampled window gives the plain median of |x| exactly: odd and
    // even counts, noise, quantized values with heavy ties (a filtered copy
    // stored in steps), zeros, infinities, NaN (not windowed), and values
    // laid out so that the evenly spaced sample misses the middle (the
    // window misses and the selection over all values answers).
    #[test]
    fn sampled_window_median_equals_the_plain_median() {
        let mut rng = crate::testing::TestRng::new(11);
        for n in [SAMPLED_MIN_VALUES, SAMPLED_MIN_VALUES + 1, 30_000, 30_001] {
            let stride = n / SAMPLE_VALUES;
            // Each set, and whether the window should hold its middle.
            let sets: [(Vec<f32>, bool); 6] = [
                ((0..n).map(|_| rng.normal() as f32 * 20.0).collect(), true),
                ((0..n).map(|_| (rng.normal() * 3.0).round() as f32 * 0.37).collect(), true),
                ((0..n).map(|i| if i % 3 == 0 { 0.0 } else { -1.0 }).collect(), true),
                ((0..n).map(|i| [f32::INFINITY, f32::NEG_INFINITY, 2.0, -1.5, 3.0, 0.5, 0.0][i % 7]).collect(), true),
                ((0..n).map(|i| if i % 5 == 0 { f32::NAN } else { i as f32 }).collect(), false),
                ((0..n).map(|i| if i % stride == 0 { 1000.0 } else { i as f32 * 1e-3 }).collect(), false),
            ];
            for (k, (values, windowed)) in sets.iter().enumerate() {
                let mut magnitudes: Vec<f32> = values.iter().map(|v| v.abs()).collect();
                if !values.iter().any(|v| v.is_nan()) {
                    let expected = median_of_finite(&mut magnitudes.clone());
                    assert_eq!(median_by_sampled_window(&magnitudes).is_some(), *windowed, "n {n}, set {k}");
                    assert_eq!(median_by_sampled_window(&magnitudes).unwrap_or(expected), expected, "n {n}, set {k}");
                }
                let expected = median_by(&mut magnitudes, f32::total_cmp);
                assert_eq!(median_abs(&mut values.clone()).to_bits(), expected.to_bits(), "n {n}, set {k}");
            }
        }
    }

    #[test]
    fn median_of_finite_values_matches_the_total_order_median() {
        let mut rng = crate::testing::TestRng::new(5);
        for n in [1usize, 2, 3, 10, 383, 384] {
            let values: Vec<f32> = (0..n).map(|_| rng.normal() as f32 * 10.0).collect();
            assert_eq!(median_of_finite(&mut values.clone()), median_in_place(&mut values.clone()), "n = {n}");
        }
    }
}
