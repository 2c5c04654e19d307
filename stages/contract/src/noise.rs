//! Noise level by the median absolute value (MAD) estimator.
//!
//! σ̂ = median(|x|) / Φ⁻¹(0.75), after Quiroga, Nadasdy & Ben-Shaul (2004),
//! going back to Donoho & Johnstone (1994). Robust to sparse large spikes,
//! which is why detect and QC use it rather than the standard deviation.

/// Φ⁻¹(0.75), the median of |N(0,1)| (scipy.stats.norm.ppf(0.75)).
pub const NORMAL_MAD_CONSTANT: f64 = 0.674_489_750_196_081_7;

/// Median of the absolute values, reordering `values` in place.
/// For an even count it is the mean of the middle two. Empty input gives NaN.
pub fn median_abs(values: &mut [f32]) -> f64 {
    if values.is_empty() {
        return f64::NAN;
    }
    for v in values.iter_mut() {
        *v = v.abs();
    }
    median_in_place(values)
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
        self.median_with(values, WindowSplit::run_portable)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,popcnt")]
    unsafe fn median_avx512(&mut self, values: &[f32]) -> f64 {
        // SAFETY: this function runs only where AVX-512F and POPCNT are supported; `median_with` gives the room.
        self.median_with(values, |values, lo, hi, kept| unsafe { WindowSplit::run_avx512(values, lo, hi, kept) })
    }

    /// `split` is [`WindowSplit::run_portable`] or a faster equivalent; it is
    /// handed a buffer of `values.len() + WindowSplit::SLACK`.
    #[inline(always)]
    fn median_with(&mut self, values: &[f32], split: impl Fn(&[f32], f32, f32, &mut [f32]) -> WindowSplit) -> f64 {
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
            value_of_rank(&mut self.scratch[..inside], rank_high - below, rank_low != rank_high, finite_order)
        } else {
            self.scratch.clear();
            self.scratch.extend_from_slice(values);
            let median = median_of_finite(&mut self.scratch);
            self.half_width = (2.0 * self.half_width).max(1.5 * (median as f32 - centre).abs());
            median
        }
    }
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

#[cfg(test)]
mod tests {
    use super::*;

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
                assert_eq!(portable.median_with(&values, WindowSplit::run_portable), expected, "n = {n}, set {set}");
            }
        }
        assert!(RunningMedian::default().median(&[]).is_nan());
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

    #[test]
    fn median_of_finite_values_matches_the_total_order_median() {
        let mut rng = crate::testing::TestRng::new(5);
        for n in [1usize, 2, 3, 10, 383, 384] {
            let values: Vec<f32> = (0..n).map(|_| rng.normal() as f32 * 10.0).collect();
            assert_eq!(median_of_finite(&mut values.clone()), median_in_place(&mut values.clone()), "n = {n}");
        }
    }
}
