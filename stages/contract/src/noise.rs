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
    median_by(values, |a, b| a.partial_cmp(b).unwrap_or(std::cmp::Ordering::Equal))
}

fn median_by(values: &mut [f32], order: impl FnMut(&f32, &f32) -> std::cmp::Ordering) -> f64 {
    let n = values.len();
    if n == 0 {
        return f64::NAN;
    }
    let (lower, upper, _) = values.select_nth_unstable_by(n / 2, order);
    let upper = *upper as f64;
    if n % 2 == 1 {
        upper
    } else {
        let lower_max = lower.iter().copied().fold(f32::NEG_INFINITY, f32::max) as f64;
        0.5 * (lower_max + upper)
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

    #[test]
    fn median_of_finite_values_matches_the_total_order_median() {
        let mut rng = crate::testing::TestRng::new(5);
        for n in [1usize, 2, 3, 10, 383, 384] {
            let values: Vec<f32> = (0..n).map(|_| rng.normal() as f32 * 10.0).collect();
            assert_eq!(median_of_finite(&mut values.clone()), median_in_place(&mut values.clone()), "n = {n}");
        }
    }
}
