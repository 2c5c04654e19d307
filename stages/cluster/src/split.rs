//! Splitting a cluster whose spikes form two modes.
//!
//! Two neurons near one electrode with nearly one shape and different
//! amplitudes can fall into one mixture component, since in the space of
//! principal components they lie along one ray, which a full covariance
//! stretches over. Along the cluster's own first principal axis (its
//! direction of largest spread: here the ray) their spikes then form two
//! modes. Hartigan's dip test ([`crate::dip`]) tells one mode from two; a
//! two-Gaussian fit places the boundary between them.

use crate::dip::dip_test;

/// When and where a cluster is split.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SplitRules {
    /// Split when the dip test's p is below this.
    pub alpha: f64,
    /// Each part keeps at least this share of the spikes ...
    pub min_share: f64,
    /// ... and at least this many.
    pub min_spikes: usize,
}

/// A cluster's split: spikes whose projection on `axis` exceeds `boundary`
/// form the new cluster.
#[derive(Debug, Clone, PartialEq)]
pub struct Split {
    pub axis: Vec<f64>,
    pub boundary: f64,
}

impl Split {
    /// Whether a spike (feature row) belongs to the new part.
    pub fn is_new_part(&self, row: &[f64]) -> bool {
        row.iter().zip(&self.axis).map(|(x, a)| x * a).sum::<f64>() > self.boundary
    }
}

/// The split of a cluster (its spikes' feature rows) along its first
/// principal axis, if its spikes form two modes there.
pub fn principal_split(rows: &[&[f64]], rules: &SplitRules) -> Option<Split> {
    let axis = first_principal_axis(rows)?;
    let projections: Vec<f64> = rows.iter().map(|r| r.iter().zip(&axis).map(|(x, a)| x * a).sum()).collect();
    let boundary = boundary(&projections, rules)?;
    Some(Split { axis, boundary })
}

/// The unit direction of largest variance of the rows (power iteration
/// from a fixed start, so the same rows give the same axis), sign fixed so
/// that its largest entry is positive; `None` when the rows do not vary.
fn first_principal_axis(rows: &[&[f64]]) -> Option<Vec<f64>> {
    let n = rows.len();
    let d = rows.first()?.len();
    if n < 2 || d == 0 {
        return None;
    }
    let mean: Vec<f64> = (0..d).map(|j| rows.iter().map(|r| r[j]).sum::<f64>() / n as f64).collect();
    let mut covariance = vec![0.0; d * d];
    for r in rows {
        for i in 0..d {
            let ci = r[i] - mean[i];
            for j in 0..d {
                covariance[i * d + j] += ci * (r[j] - mean[j]);
            }
        }
    }
    let mut v: Vec<f64> = (0..d).map(|i| 1.0 + i as f64 * 1e-3).collect();
    for _ in 0..200 {
        let next: Vec<f64> = (0..d).map(|i| (0..d).map(|j| covariance[i * d + j] * v[j]).sum()).collect();
        let norm = next.iter().map(|x| x * x).sum::<f64>().sqrt();
        if norm <= 0.0 || !norm.is_finite() {
            return None;
        }
        let next: Vec<f64> = next.iter().map(|x| x / norm).collect();
        let change: f64 = next.iter().zip(&v).map(|(a, b)| (a - b).abs()).sum();
        v = next;
        if change < 1e-10 {
            break;
        }
    }
    let largest = v.iter().copied().fold(0.0f64, |m, x| if x.abs() > m.abs() { x } else { m });
    if largest < 0.0 {
        v.iter_mut().for_each(|x| *x = -*x);
    }
    Some(v)
}

/// The value that parts two modes of `values`, if they form two: values
/// above it are one part, the others the second.
pub fn boundary(values: &[f64], rules: &SplitRules) -> Option<f64> {
    let n = values.len();
    if n < 2 * rules.min_spikes.max(4) {
        return None;
    }
    let mut sorted = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    if dip_test(&sorted).1 >= rules.alpha {
        return None;
    }
    let boundary = two_gaussian_boundary(&sorted)?;
    let above = n - sorted.partition_point(|&v| v <= boundary);
    let smaller = above.min(n - above);
    (smaller >= rules.min_spikes && smaller as f64 >= rules.min_share * n as f64).then_some(boundary)
}

/// Fit two Gaussians to sorted values by EM (started from the lower and
/// upper quartiles) and return the point between the two means where the
/// weighted densities are equal; `None` when the fit collapses.
fn two_gaussian_boundary(sorted: &[f64]) -> Option<f64> {
    let n = sorted.len();
    let spread = sorted[n - 1] - sorted[0];
    if spread <= 0.0 {
        return None;
    }
    let floor = (spread * 1e-3).powi(2);
    let (mut mean, mut variance, mut weight) =
        ([sorted[n / 4], sorted[3 * n / 4]], [spread * spread / 16.0; 2], [0.5; 2]);
    let density = |x: f64, m: f64, v: f64, w: f64| w * (-(x - m).powi(2) / (2.0 * v)).exp() / v.sqrt();
    let mut previous = f64::NEG_INFINITY;
    for _ in 0..200 {
        let (mut total, mut sum, mut square, mut likelihood) = ([0.0; 2], [0.0; 2], [0.0; 2], 0.0);
        for &x in sorted {
            let p = [density(x, mean[0], variance[0], weight[0]), density(x, mean[1], variance[1], weight[1])];
            let all = p[0] + p[1];
            if all <= 0.0 {
                continue;
            }
            likelihood += all.ln();
            for k in 0..2 {
                let r = p[k] / all;
                total[k] += r;
                sum[k] += r * x;
                square[k] += r * x * x;
            }
        }
        for k in 0..2 {
            if total[k] < 1e-9 {
                return None;
            }
            mean[k] = sum[k] / total[k];
            variance[k] = (square[k] / total[k] - mean[k] * mean[k]).max(floor);
            weight[k] = total[k] / n as f64;
        }
        if likelihood - previous < 1e-9 * likelihood.abs() {
            break;
        }
        previous = likelihood;
    }
    let (low, high) = if mean[0] <= mean[1] { (0, 1) } else { (1, 0) };
    // Where the lower component stops dominating, scanning up from its mean.
    let steps = 1000;
    (0..=steps).map(|i| mean[low] + (mean[high] - mean[low]) * i as f64 / steps as f64).find(|&x| {
        density(x, mean[high], variance[high], weight[high]) >= density(x, mean[low], variance[low], weight[low])
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use spikeyard_contract::testing::TestRng;

    const RULES: SplitRules = SplitRules { alpha: 0.01, min_share: 0.1, min_spikes: 10 };

    #[test]
    fn two_amplitude_groups_are_parted_between_them() {
        let mut rng = TestRng::new(2);
        let values: Vec<f64> = (0..600).map(|i| if i % 2 == 0 { -78.0 } else { -51.0 } + 6.0 * rng.normal()).collect();
        let boundary = boundary(&values, &RULES).expect("two modes");
        assert!((-68.0..-61.0).contains(&boundary), "{boundary}");
    }

    #[test]
    fn one_mode_skewed_by_the_threshold_is_not_split() {
        // Amplitudes of one neuron near threshold: a normal cut at −35 µV.
        let mut rng = TestRng::new(3);
        let values: Vec<f64> = (0..2000).map(|_| -40.0 + 6.0 * rng.normal()).filter(|&v| v <= -35.0).collect();
        assert_eq!(boundary(&values, &RULES), None);
    }

    // Two groups along one ray of a 3-d space, with round noise: the split
    // runs across the ray, between them.
    #[test]
    fn two_groups_along_a_ray_are_split_across_it() {
        let mut rng = TestRng::new(5);
        let ray = [0.6, 0.64, 0.48];
        let rows: Vec<Vec<f64>> = (0..800)
            .map(|i| {
                let scale = if i % 2 == 0 { 100.0 } else { 75.0 };
                ray.iter().map(|r| scale * r + 6.0 * rng.normal()).collect()
            })
            .collect();
        let refs: Vec<&[f64]> = rows.iter().map(Vec::as_slice).collect();
        let split = principal_split(&refs, &RULES).expect("two modes");
        let cosine: f64 = split.axis.iter().zip(&ray).map(|(a, r)| a * r).sum();
        assert!(cosine > 0.95, "{:?}", split.axis);
        let wrong = rows.iter().enumerate().filter(|(i, r)| split.is_new_part(r) != (i % 2 == 0)).count();
        assert!(wrong < 40, "{wrong} of 800 on the wrong side");
        // One group alone is not split.
        let one: Vec<&[f64]> = refs.iter().step_by(2).copied().collect();
        assert_eq!(principal_split(&one, &RULES), None);
    }

    #[test]
    fn a_small_second_mode_is_not_a_part() {
        let mut rng = TestRng::new(4);
        let values: Vec<f64> =
            (0..1000).map(|i| if i % 50 == 0 { -150.0 } else { -60.0 } + 5.0 * rng.normal()).collect();
        assert_eq!(boundary(&values, &RULES), None);
    }
}
