//! Unit quality metrics, each a plain function of a unit's spikes.

use crate::stats::{chi2_sf, normal_cdf};
use spikeyard_contract::linalg::{cholesky, mahalanobis_squared};

/// Inter-spike intervals shorter than `refractory_frames`, and all intervals.
pub fn isi_violations(samples: &[u64], refractory_frames: u64) -> (u64, u64) {
    let intervals = samples.len().saturating_sub(1) as u64;
    let violations = samples.windows(2).filter(|w| w[1] - w[0] < refractory_frames).count() as u64;
    (violations, intervals)
}

/// Contamination f of Hill, Mehta & Kleinfeld (2011): the fraction of a
/// unit's N spikes (in T seconds) from an independent source that explains
/// r violations of a refractory period τR, with a censored period τC:
/// r = 2(τR − τC)·N²·f(1 − f)/T, so f = (1 − √(1 − 4c))/2 with
/// c = rT/(2(τR − τC)N²). When 4c > 1 no f explains that many violations;
/// the convention here is f = 1 (the unit cannot be told from noise).
pub fn hill_contamination(n_spikes: u64, duration_s: f64, violations: u64, refractory_s: f64, censored_s: f64) -> f64 {
    let window = refractory_s - censored_s;
    if n_spikes == 0 || window <= 0.0 {
        return f64::NAN;
    }
    let c = violations as f64 * duration_s / (2.0 * window * (n_spikes as f64).powi(2));
    if 4.0 * c > 1.0 {
        1.0
    } else {
        (1.0 - (1.0 - 4.0 * c).sqrt()) / 2.0
    }
}

/// Isolation distance (Harris et al. 2001) and L-ratio
/// (Schmitzer-Torbert et al. 2005) of `cluster` against `others` in a
/// d-dimensional feature space, with the cluster's mean and covariance
/// (n − 1). The isolation distance is the n_C-th smallest squared
/// Mahalanobis distance among the others (`None` when fewer than n_C
/// others); L = Σ (1 − F_χ²,d(D²)) over the others and L-ratio = L / n_C.
/// Both are `None` when the covariance is singular.
pub fn isolation_and_l_ratio(cluster: &[Vec<f64>], others: &[Vec<f64>]) -> (Option<f64>, Option<f64>) {
    let n = cluster.len();
    let Some(d) = cluster.first().map(Vec::len) else { return (None, None) };
    if n <= d || d == 0 {
        return (None, None);
    }
    let mut mean = vec![0.0; d];
    for row in cluster {
        for (m, v) in mean.iter_mut().zip(row) {
            *m += v / n as f64;
        }
    }
    let mut covariance = vec![0.0; d * d];
    for row in cluster {
        for i in 0..d {
            for j in 0..d {
                covariance[i * d + j] += (row[i] - mean[i]) * (row[j] - mean[j]) / (n - 1) as f64;
            }
        }
    }
    let Some((factor, _)) = cholesky(&covariance, d) else { return (None, None) };
    let mut distances: Vec<f64> = others.iter().map(|x| mahalanobis_squared(&factor, &mean, x)).collect();
    // Adding 0.0 turns the −0.0 of an empty sum into 0.0.
    let l = distances.iter().map(|&d2| chi2_sf(d2, d as f64)).sum::<f64>() + 0.0;
    distances.sort_by(f64::total_cmp);
    let isolation = distances.get(n - 1).copied();
    (isolation, Some(l / n as f64))
}

/// Fraction of `n_bins` equal time bins holding at least one spike.
pub fn presence_ratio(samples: &[u64], n_frames: u64, n_bins: usize) -> f64 {
    if n_bins == 0 || n_frames == 0 {
        return f64::NAN;
    }
    let mut occupied = vec![false; n_bins];
    for &s in samples {
        let bin = ((s as u128 * n_bins as u128) / n_frames as u128).min(n_bins as u128 - 1) as usize;
        occupied[bin] = true;
    }
    occupied.iter().filter(|&&o| o).count() as f64 / n_bins as f64
}

/// Estimated fraction of a unit's spikes lost below the detection
/// threshold. `ratios` are |amplitude| / threshold of detected spikes (all
/// ≥ 1). The amplitudes are modelled as normal and observed only above 1;
/// the normal's mean and spread are fitted by maximum likelihood of that
/// truncated normal (a coarse-to-fine grid search), and the lost fraction
/// is Φ((1 − μ)/σ). `NaN` with fewer than 10 spikes.
pub fn fraction_below_threshold(ratios: &[f64]) -> f64 {
    if ratios.len() < 10 {
        return f64::NAN;
    }
    let n = ratios.len() as f64;
    let mean = ratios.iter().sum::<f64>() / n;
    let centred_squares = ratios.iter().map(|r| (r - mean).powi(2)).sum::<f64>();
    let sd = (centred_squares / n).sqrt().max(1e-3);
    let log_likelihood = |mu: f64, sigma: f64| -> f64 {
        let kept = 1.0 - normal_cdf((1.0 - mu) / sigma);
        if kept <= 1e-300 {
            return f64::NEG_INFINITY;
        }
        // Σ(r − μ)² = Σ(r − mean)² + n·(mean − μ)²: one pass over the spikes
        // in all, not one per point of the grid search.
        let squares = centred_squares + n * (mean - mu).powi(2);
        -n * (sigma.ln() + kept.ln()) - squares / (2.0 * sigma * sigma)
    };
    // Start from the moments; refine on shrinking grids.
    let (mut best_mu, mut best_sigma) = (mean, sd);
    let (mut mu_step, mut sigma_step) = (2.0 * sd, 0.5 * sd);
    for _ in 0..40 {
        let mut best = (log_likelihood(best_mu, best_sigma), best_mu, best_sigma);
        for i in -4..=4 {
            for j in -4..=4 {
                let (mu, sigma) = (best_mu + i as f64 * mu_step / 4.0, best_sigma + j as f64 * sigma_step / 4.0);
                if sigma <= 1e-4 {
                    continue;
                }
                let value = log_likelihood(mu, sigma);
                if value > best.0 {
                    best = (value, mu, sigma);
                }
            }
        }
        (best_mu, best_sigma) = (best.1, best.2);
        mu_step *= 0.6;
        sigma_step *= 0.6;
    }
    normal_cdf((1.0 - best_mu) / best_sigma)
}

#[cfg(test)]
mod tests {
    use super::*;

    // REFERENCES.md Q1, case 1: N=3000, T=600 s, τR=1.5 ms, τC=0, r=5 → f = 0.12732200375003505;
    // τR=2 ms with τC=0.5 ms gives the same.
    #[test]
    fn hill_contamination_matches_the_worked_example() {
        let f = hill_contamination(3000, 600.0, 5, 1.5e-3, 0.0);
        assert!((f - 0.12732200375003505).abs() < 1e-12, "{f}");
        assert!((hill_contamination(3000, 600.0, 5, 2e-3, 0.5e-3) - f).abs() < 1e-12);
        // Case 2 (inverse): f=0.1, N=2000, T=1000 s, τR−τC=2 ms gives r=1.44.
        let r: f64 = 2.0 * 2e-3 * 2000f64.powi(2) * 0.1 * 0.9 / 1000.0;
        assert!((r - 1.44).abs() < 1e-12);
        assert_eq!(hill_contamination(10, 1.0, 50, 1.5e-3, 0.0), 1.0, "heavy contamination has no root");
    }

    // REFERENCES.md Q2 and Q3: the cube dataset (numpy np.cov, scipy chi2.sf).
    #[test]
    fn isolation_distance_and_l_ratio_match_the_fixture() {
        let cube: Vec<Vec<f64>> = (0..8)
            .map(|i| {
                vec![
                    if i & 1 == 0 { -1.0 } else { 1.0 },
                    if i & 2 == 0 { -1.0 } else { 1.0 },
                    if i & 4 == 0 { -1.0 } else { 1.0 },
                ]
            })
            .collect();
        let others: Vec<Vec<f64>> = [
            [3.0, 0.0, 0.0],
            [0.0, 4.0, 0.0],
            [0.0, 0.0, -5.0],
            [2.0, 2.0, 2.0],
            [-3.0, -3.0, 0.0],
            [6.0, 0.0, 0.0],
            [0.0, -2.0, 3.0],
            [4.0, 4.0, 4.0],
            [-6.0, 2.0, 1.0],
            [10.0, 0.0, 0.0],
        ]
        .iter()
        .map(|p| p.to_vec())
        .collect();
        let (isolation, l_ratio) = isolation_and_l_ratio(&cube, &others);
        assert!((isolation.unwrap() - 35.875).abs() < 1e-12);
        assert!((l_ratio.unwrap() - 0.009692584866899624).abs() < 1e-12, "{l_ratio:?}");
        // Fewer others than cluster members: no isolation distance.
        assert_eq!(isolation_and_l_ratio(&cube, &others[..5]).0, None);
    }

    #[test]
    fn isi_violations_count_short_intervals() {
        assert_eq!(isi_violations(&[0, 10, 50, 55, 200], 30), (2, 4));
        assert_eq!(isi_violations(&[], 30), (0, 0));
    }

    #[test]
    fn presence_ratio_counts_occupied_bins() {
        assert_eq!(presence_ratio(&[0, 5, 95], 100, 10), 0.2);
        assert_eq!(presence_ratio(&[99], 100, 10), 0.1);
    }

    #[test]
    fn fraction_below_threshold_recovers_a_truncated_normal() {
        // Amplitudes N(1.5, 0.5) truncated at 1: Φ(−1) = 0.1587 are lost.
        let mut rng = spikeyard_contract::testing::TestRng::new(4);
        let ratios: Vec<f64> = (0..20000).map(|_| 1.5 + 0.5 * rng.normal()).filter(|&r| r >= 1.0).collect();
        let lost = fraction_below_threshold(&ratios);
        assert!((lost - 0.158655).abs() < 0.02, "{lost}");
        // Far above threshold: nothing lost.
        let high: Vec<f64> = (0..2000).map(|_| 5.0 + 0.3 * rng.normal()).collect();
        assert!(fraction_below_threshold(&high) < 1e-6);
    }
}
