//! Mixture models for one electrode neighbourhood: Gaussian mixtures
//! (fitted with linfa-clustering's EM) or k-means, the number of units
//! chosen by the Bayesian information criterion, and a plain predictor.
//!
//! BIC = −2·ln L + p·ln n (Schwarz 1978), p = k·d + k·d(d+1)/2 + (k−1) for a
//! full-covariance mixture. For k-means the likelihood is that of the
//! mixture of k spherical Gaussians at the centroids, weighted by cluster
//! size, sharing one variance σ² = inertia/(n·d), with p = k·d + (k − 1) + 1.

use linfa::prelude::*;
use linfa_clustering::{GaussianMixtureModel, KMeans};
use ndarray::Array2;
use rand_xoshiro::rand_core::SeedableRng;
use rand_xoshiro::Xoshiro256Plus;

/// Regularisation added to covariance diagonals (as scikit-learn's default).
pub const REG_COVARIANCE: f64 = 1e-6;

/// One Gaussian component, ready to evaluate.
#[derive(Debug, Clone, PartialEq)]
pub struct Component {
    pub weight: f64,
    pub mean: Vec<f64>,
    /// Lower Cholesky factor of the covariance, row-major d×d.
    pub cholesky: Vec<f64>,
    pub log_det: f64,
}

/// A fitted mixture for one neighbourhood.
#[derive(Debug, Clone, PartialEq)]
pub struct Mixture {
    pub components: Vec<Component>,
    pub bic: f64,
}

impl Mixture {
    /// Log of weight × density of each component at `x`.
    pub fn weighted_log_densities(&self, x: &[f64], out: &mut Vec<f64>) {
        out.clear();
        out.extend(self.components.iter().map(|c| c.weight.ln() + log_density(c, x)));
    }

    /// The component with the largest posterior probability.
    pub fn predict(&self, x: &[f64]) -> usize {
        let mut scores = Vec::with_capacity(self.components.len());
        self.weighted_log_densities(x, &mut scores);
        scores.iter().enumerate().fold((0, f64::NEG_INFINITY), |best, (i, &s)| if s > best.1 { (i, s) } else { best }).0
    }

    /// ln L of the data under the mixture.
    pub fn log_likelihood(&self, rows: &[Vec<f64>]) -> f64 {
        let mut scores = Vec::new();
        rows.iter()
            .map(|x| {
                self.weighted_log_densities(x, &mut scores);
                let top = scores.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                top + scores.iter().map(|s| (s - top).exp()).sum::<f64>().ln()
            })
            .sum()
    }
}

fn log_density(component: &Component, x: &[f64]) -> f64 {
    let d = component.mean.len() as f64;
    let mahalanobis = spikeyard_contract::linalg::mahalanobis_squared(&component.cholesky, &component.mean, x);
    -0.5 * (d * (2.0 * std::f64::consts::PI).ln() + component.log_det + mahalanobis)
}

pub use spikeyard_contract::linalg::cholesky;

fn component(weight: f64, mean: Vec<f64>, covariance: &[f64]) -> Option<Component> {
    let d = mean.len();
    let (cholesky, log_det) = cholesky(covariance, d)?;
    Some(Component { weight, mean, cholesky, log_det })
}

fn to_array(rows: &[Vec<f64>], d: usize) -> Array2<f64> {
    Array2::from_shape_fn((rows.len(), d), |(i, j)| rows[i][j])
}

fn full_parameters(k: usize, d: usize) -> f64 {
    (k * d + k * d * (d + 1) / 2 + k - 1) as f64
}

/// One Gaussian, fitted in closed form (maximum likelihood covariance plus
/// the regularisation).
pub fn fit_single(rows: &[Vec<f64>], d: usize) -> Option<Mixture> {
    let n = rows.len() as f64;
    let mut mean = vec![0.0; d];
    for row in rows {
        for (m, v) in mean.iter_mut().zip(row) {
            *m += v / n;
        }
    }
    let mut covariance = vec![0.0; d * d];
    for row in rows {
        for i in 0..d {
            for j in 0..d {
                covariance[i * d + j] += (row[i] - mean[i]) * (row[j] - mean[j]) / n;
            }
        }
    }
    for i in 0..d {
        covariance[i * d + i] += REG_COVARIANCE;
    }
    let mut mixture = Mixture { components: vec![component(1.0, mean, &covariance)?], bic: 0.0 };
    mixture.bic = -2.0 * mixture.log_likelihood(rows) + full_parameters(1, d) * n.ln();
    Some(mixture)
}

/// A k-component full-covariance Gaussian mixture by EM (k-means start,
/// best of `runs`), or `None` when EM fails for this k.
pub fn fit_gmm(rows: &[Vec<f64>], d: usize, k: usize, runs: u64, seed: u64) -> Option<Mixture> {
    if k == 1 {
        return fit_single(rows, d);
    }
    let data = DatasetBase::from(to_array(rows, d));
    let model = GaussianMixtureModel::params_with_rng(k, Xoshiro256Plus::seed_from_u64(seed))
        .n_runs(runs)
        .tolerance(1e-3)
        .reg_covariance(REG_COVARIANCE)
        .max_n_iterations(200)
        .fit(&data)
        .ok()?;
    let (weights, means, covariances) = (model.weights(), model.means(), model.covariances());
    let components = (0..k)
        .map(|c| {
            let covariance: Vec<f64> = covariances.index_axis(ndarray::Axis(0), c).iter().copied().collect();
            component(weights[c], means.row(c).to_vec(), &covariance)
        })
        .collect::<Option<Vec<_>>>()?;
    let mut mixture = Mixture { components, bic: 0.0 };
    mixture.bic = -2.0 * mixture.log_likelihood(rows) + full_parameters(k, d) * (rows.len() as f64).ln();
    Some(mixture)
}

/// k-means (best of `runs`) as a mixture of spherical Gaussians with one
/// shared variance, with its BIC (see the module docs).
pub fn fit_kmeans(rows: &[Vec<f64>], d: usize, k: usize, runs: u64, seed: u64) -> Option<Mixture> {
    let data = DatasetBase::from(to_array(rows, d));
    let model =
        KMeans::params_with_rng(k, Xoshiro256Plus::seed_from_u64(seed)).n_runs(runs as usize).fit(&data).ok()?;
    let n = rows.len() as f64;
    // linfa reports the inertia divided by the number of samples.
    let inertia = model.inertia() * n;
    let variance = (inertia / (n * d as f64)).max(REG_COVARIANCE);
    let labels = model.predict(&data);
    let mut counts = vec![0usize; k];
    for &label in labels.iter() {
        counts[label] += 1;
    }
    let mut covariance = vec![0.0; d * d];
    for i in 0..d {
        covariance[i * d + i] = variance;
    }
    let components = (0..k)
        .map(|c| {
            component((counts[c] as f64 / n).max(f64::MIN_POSITIVE), model.centroids().row(c).to_vec(), &covariance)
        })
        .collect::<Option<Vec<_>>>()?;
    let mut mixture = Mixture { components, bic: 0.0 };
    mixture.bic = -2.0 * mixture.log_likelihood(rows) + (k * d + k) as f64 * n.ln();
    Some(mixture)
}

/// DBSCAN (density clusters: `min_points` neighbours within `eps`, in
/// feature units) on the fitting rows; each cluster becomes a Gaussian
/// component (its mean and covariance, weighted by size) so that the other
/// events are assigned by the same rule as for a mixture. Rows DBSCAN calls
/// noise take no part. `None` when it finds no cluster.
pub fn fit_dbscan(rows: &[Vec<f64>], d: usize, eps: f64, min_points: usize) -> Option<Mixture> {
    let labels = linfa_clustering::Dbscan::params(min_points).tolerance(eps).transform(&to_array(rows, d)).ok()?;
    let n_clusters = labels.iter().flatten().copied().max().map_or(0, |m| m + 1);
    let clustered = labels.iter().filter(|l| l.is_some()).count() as f64;
    let components: Vec<Component> = (0..n_clusters)
        .filter_map(|c| {
            let members: Vec<Vec<f64>> =
                rows.iter().zip(labels.iter()).filter(|(_, l)| **l == Some(c)).map(|(r, _)| r.clone()).collect();
            let mut component = fit_single(&members, d)?.components.into_iter().next()?;
            component.weight = members.len() as f64 / clustered;
            Some(component)
        })
        .collect();
    (!components.is_empty()).then_some(Mixture { components, bic: f64::NAN })
}

/// Which model family clusters a neighbourhood.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Full-covariance Gaussian mixtures, k chosen by BIC.
    Gmm,
    /// k-means, k chosen by BIC of the spherical mixture.
    Kmeans,
    /// DBSCAN; the number of units is the number of density clusters.
    Dbscan,
}

/// Try k = 1, 2, ... up to `max_k` with `fit` and keep the lowest BIC (ties
/// to the smaller k); each k gets at least `min_points_per_unit` rows per
/// unit. With `patience` > 0 the sweep stops once that many k in a row have
/// not lowered the BIC (their fits cost the most and, past the optimum,
/// the penalty grows with every unit); 0 tries every k.
pub fn select_by_bic(
    n_rows: usize,
    max_k: usize,
    min_points_per_unit: usize,
    patience: usize,
    fit: impl Fn(usize) -> Option<Mixture>,
) -> Option<Mixture> {
    let largest = max_k.min(n_rows / min_points_per_unit.max(1)).max(1);
    let mut best: Option<Mixture> = None;
    let mut not_better = 0;
    for k in 1..=largest {
        let Some(mixture) = fit(k) else { continue };
        if best.as_ref().is_some_and(|b| b.bic <= mixture.bic) {
            not_better += 1;
            if not_better == patience {
                break;
            }
        } else {
            best = Some(mixture);
            not_better = 0;
        }
    }
    best
}

/// How one neighbourhood is fitted.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupFit {
    pub method: Method,
    pub max_units: usize,
    pub min_points_per_unit: usize,
    pub runs: u64,
    /// See [`select_by_bic`].
    pub bic_patience: usize,
    pub dbscan_eps: f64,
    pub seed: u64,
}

/// Fit one neighbourhood's rows with the configured method.
pub fn fit_group(rows: &[Vec<f64>], d: usize, fit: &GroupFit) -> Option<Mixture> {
    let seed = |k: usize| fit.seed.wrapping_add(k as u64);
    match fit.method {
        Method::Gmm => select_by_bic(rows.len(), fit.max_units, fit.min_points_per_unit, fit.bic_patience, |k| {
            fit_gmm(rows, d, k, fit.runs, seed(k))
        }),
        Method::Kmeans => select_by_bic(rows.len(), fit.max_units, fit.min_points_per_unit, fit.bic_patience, |k| {
            fit_kmeans(rows, d, k, fit.runs, seed(k))
        }),
        Method::Dbscan => fit_dbscan(rows, d, fit.dbscan_eps, fit.min_points_per_unit),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn well_separated_blobs_get_their_own_units() {
        let mut rows = Vec::new();
        let mut rng = spikeyard_contract::testing::TestRng::new(5);
        let mut noise = || 0.5 * rng.normal();
        for centre in [[0.0, 0.0], [10.0, 0.0], [0.0, 10.0]] {
            for _ in 0..200 {
                rows.push(vec![centre[0] + noise(), centre[1] + noise()]);
            }
        }
        for method in [Method::Gmm, Method::Kmeans, Method::Dbscan] {
            let fit = GroupFit {
                method,
                max_units: 6,
                min_points_per_unit: 10,
                runs: 3,
                bic_patience: 2,
                dbscan_eps: 1.0,
                seed: 1,
            };
            let model = fit_group(&rows, 2, &fit).unwrap();
            assert_eq!(model.components.len(), 3, "{method:?}");
            let labels: Vec<usize> = rows.iter().map(|r| model.predict(r)).collect();
            for blob in 0..3 {
                let first = labels[blob * 200];
                assert!(labels[blob * 200..(blob + 1) * 200].iter().all(|&l| l == first));
            }
        }
    }

    // The sweep keeps the lowest BIC; patience stops it after that many k
    // in a row without a lower one (BIC by k: 10, 12, 13, 5).
    #[test]
    fn bic_sweep_stops_after_patience_runs_out() {
        let bics = [10.0, 12.0, 13.0, 5.0];
        let tried = std::cell::RefCell::new(Vec::new());
        let fit = |k: usize| {
            tried.borrow_mut().push(k);
            Some(Mixture { components: Vec::new(), bic: bics[k - 1] })
        };
        assert_eq!(select_by_bic(100, 4, 1, 0, fit).unwrap().bic, 5.0);
        assert_eq!(tried.take(), vec![1, 2, 3, 4]);
        assert_eq!(select_by_bic(100, 4, 1, 2, fit).unwrap().bic, 10.0);
        assert_eq!(tried.take(), vec![1, 2, 3]);
        assert_eq!(select_by_bic(100, 4, 1, 3, fit).unwrap().bic, 5.0);
    }
}
