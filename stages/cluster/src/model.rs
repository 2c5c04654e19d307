//! Mixture models for one electrode neighbourhood: Gaussian mixtures
//! (EM from k-means starts, as scikit-learn's `GaussianMixture` fits them)
//! or k-means (linfa-clustering), the number of units chosen by the
//! Bayesian information criterion, and a plain predictor.
//!
//! BIC = −2·ln L + p·ln n (Schwarz 1978), p = k·d + k·d(d+1)/2 + (k−1) for a
//! full-covariance mixture. For k-means the likelihood is that of the
//! mixture of k spherical Gaussians at the centroids, weighted by cluster
//! size, sharing one variance σ² = inertia/(n·d), with p = k·d + (k − 1) + 1.

use linfa::prelude::*;
use linfa_clustering::KMeans;
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

/// EM stops when the mean log-likelihood per row changes by less than this
/// (scikit-learn's and linfa's default `tol`).
pub const EM_TOLERANCE: f64 = 1e-3;
/// EM iterations allowed.
pub const EM_MAX_ITERATIONS: usize = 200;

/// A k-component full-covariance Gaussian mixture by EM, as scikit-learn's
/// `GaussianMixture(covariance_type='full', init_params='kmeans')` fits
/// one from a single start: the labels of a k-means (k-means++ seeding,
/// best of `runs`) as responsibilities, then EM until the mean
/// log-likelihood per row changes by less than [`EM_TOLERANCE`]. `None`
/// when EM does not converge within [`EM_MAX_ITERATIONS`] or a covariance
/// is not positive definite.
pub fn fit_gmm(rows: &[Vec<f64>], d: usize, k: usize, runs: u64, seed: u64) -> Option<Mixture> {
    if k == 1 {
        return fit_single(rows, d);
    }
    let data = DatasetBase::from(to_array(rows, d));
    let kmeans =
        KMeans::params_with_rng(k, Xoshiro256Plus::seed_from_u64(seed)).n_runs(runs.max(1) as usize).fit(&data).ok()?;
    let labels: Vec<usize> = kmeans.predict(&data).to_vec();
    let mut mixture = Em::new(rows, d, k).run(&labels)?;
    mixture.bic = -2.0 * mixture.log_likelihood(rows) + full_parameters(k, d) * (rows.len() as f64).ln();
    Some(mixture)
}

/// Rows handled together by [`Em`] (two AVX2 registers of f64).
const LANES: usize = 8;
type Block = [f64; LANES];

/// EM on rows laid out by dimension in blocks of [`LANES`] rows (zeros
/// after the last row, which take no part), so that every step of the E-
/// and M-steps works on a block of rows at once. Built for AVX2 when the
/// CPU has it, with the same numbers as the portable build: the loops add
/// and multiply lane by lane, and every sum runs in one fixed order. (Not
/// for AVX-512: there the compiler vectorizes across dimensions with
/// gathers instead, and the stage used about 40 % more CPU time.)
struct Em {
    d: usize,
    k: usize,
    n: usize,
    /// Block b, dimension j at `values[b * d + j]`.
    values: Vec<Block>,
}

impl Em {
    fn new(rows: &[Vec<f64>], d: usize, k: usize) -> Self {
        let n = rows.len();
        let blocks = n.div_ceil(LANES);
        let mut values = vec![[0.0; LANES]; blocks * d];
        for (i, row) in rows.iter().enumerate() {
            for (j, v) in row.iter().enumerate() {
                values[(i / LANES) * d + j][i % LANES] = *v;
            }
        }
        Em { d, k, n, values }
    }

    /// EM from the k-means labels: the mixture after the last M-step, once
    /// the mean log-likelihood per row of the E-step before it changes by
    /// less than [`EM_TOLERANCE`].
    fn run(&self, labels: &[usize]) -> Option<Mixture> {
        let responsibilities = &mut self.responsibilities(labels);
        #[cfg(target_arch = "x86_64")]
        if std::is_x86_feature_detected!("avx2") {
            #[target_feature(enable = "avx2")]
            unsafe fn avx2(em: &Em, responsibilities: &mut [Block]) -> Option<Mixture> {
                em.run_portable(responsibilities)
            }
            // SAFETY: the CPU supports AVX2, checked just above.
            return unsafe { avx2(self, responsibilities) };
        }
        self.run_portable(responsibilities)
    }

    /// Responsibilities 1 for each row's label: component c's of block b
    /// at `[b * k + c]`.
    fn responsibilities(&self, labels: &[usize]) -> Vec<Block> {
        let mut responsibilities = vec![[0.0; LANES]; self.values.len() / self.d * self.k];
        for (i, &label) in labels.iter().enumerate() {
            responsibilities[(i / LANES) * self.k + label][i % LANES] = 1.0;
        }
        responsibilities
    }

    #[inline(always)]
    fn run_portable(&self, responsibilities: &mut [Block]) -> Option<Mixture> {
        let mut mixture = self.maximisation(responsibilities)?;
        let mut fit = f64::NEG_INFINITY;
        for _ in 0..EM_MAX_ITERATIONS {
            let previous = std::mem::replace(&mut fit, self.expectation(&mixture, responsibilities) / self.n as f64);
            mixture = self.maximisation(responsibilities)?;
            if (fit - previous).abs() < EM_TOLERANCE {
                return Some(mixture);
            }
        }
        None
    }

    /// E-step: every row's responsibilities under `mixture`; returns the
    /// sum of the rows' log-likelihoods.
    #[inline(always)]
    fn expectation(&self, mixture: &Mixture, responsibilities: &mut [Block]) -> f64 {
        let (d, k) = (self.d, self.k);
        let whitening: Vec<Whitening> = mixture.components.iter().map(Whitening::of).collect();
        let (mut z, mut scores) = (vec![[0.0; LANES]; d], vec![[0.0; LANES]; k]);
        let mut total = 0.0;
        for (b, (x, r)) in self.values.chunks_exact(d).zip(responsibilities.chunks_exact_mut(k)).enumerate() {
            for (score, w) in scores.iter_mut().zip(&whitening) {
                // z = L⁻¹(x − μ), column by column of L⁻¹.
                z.iter_mut().for_each(|z| *z = [0.0; LANES]);
                for j in 0..d {
                    let centred: Block = std::array::from_fn(|l| x[j][l] - w.mean[j]);
                    for (z, coefficient) in z[j..].iter_mut().zip(&w.columns[j * d + j..(j + 1) * d]) {
                        *z = mul_add(z, &[*coefficient; LANES], &centred);
                    }
                }
                let squares = z.iter().fold([0.0; LANES], |squares, z| mul_add(&squares, z, z));
                *score = std::array::from_fn(|l| w.constant - 0.5 * squares[l]);
            }
            for l in 0..LANES.min(self.n - b * LANES) {
                let top = scores.iter().map(|s| s[l]).fold(f64::NEG_INFINITY, f64::max);
                let norm = top + scores.iter().map(|s| (s[l] - top).exp()).sum::<f64>().ln();
                for (r, s) in r.iter_mut().zip(&scores) {
                    r[l] = (s[l] - norm).exp();
                }
                total += norm;
            }
        }
        total
    }

    /// M-step: each component's weight, mean and covariance (plus
    /// [`REG_COVARIANCE`] on the diagonal) from the responsibilities; a
    /// component's total responsibility gets 10·ε added, as in
    /// scikit-learn, so an empty one has a defined mean.
    #[inline(always)]
    fn maximisation(&self, responsibilities: &[Block]) -> Option<Mixture> {
        let (d, k) = (self.d, self.k);
        let blocks = || self.values.chunks_exact(d).zip(responsibilities.chunks_exact(k));
        let mut components = Vec::with_capacity(k);
        // Lane sums of the lower triangle, row by row.
        let mut sums = vec![[0.0; LANES]; d * (d + 1) / 2];
        for c in 0..k {
            let (mut weights, mut means) = ([0.0; LANES], vec![[0.0; LANES]; d]);
            for (x, r) in blocks() {
                let r = r[c];
                weights = std::array::from_fn(|l| weights[l] + r[l]);
                for (mean, x) in means.iter_mut().zip(x) {
                    *mean = mul_add(mean, &r, x);
                }
            }
            let total = weights.iter().sum::<f64>() + 10.0 * f64::EPSILON;
            let mean: Vec<f64> = means.iter().map(|m| m.iter().sum::<f64>() / total).collect();
            sums.iter_mut().for_each(|s| *s = [0.0; LANES]);
            let mut centred = vec![[0.0; LANES]; d];
            for (x, r) in blocks() {
                for ((centred, x), m) in centred.iter_mut().zip(x).zip(&mean) {
                    *centred = std::array::from_fn(|l| x[l] - m);
                }
                // Row a of the triangle, then the rows after it.
                let mut rest = sums.as_mut_slice();
                for a in 0..d {
                    let (row, after) = std::mem::take(&mut rest).split_at_mut(a + 1);
                    rest = after;
                    let weighted: Block = std::array::from_fn(|l| r[c][l] * centred[a][l]);
                    for (sum, centred) in row.iter_mut().zip(&centred[..=a]) {
                        *sum = mul_add(sum, &weighted, centred);
                    }
                }
            }
            let mut covariance = vec![0.0; d * d];
            let mut entry = 0;
            for a in 0..d {
                for b in 0..=a {
                    let value = sums[entry].iter().sum::<f64>() / total;
                    (covariance[a * d + b], covariance[b * d + a]) = (value, value);
                    entry += 1;
                }
                covariance[a * d + a] += REG_COVARIANCE;
            }
            components.push(component(total / self.n as f64, mean, &covariance)?);
        }
        Some(Mixture { components, bic: 0.0 })
    }
}

/// `sum + a·b`, lane by lane: a whole block read, then a whole block
/// written, which the compiler turns into one vector operation each.
#[inline(always)]
fn mul_add(sum: &Block, a: &Block, b: &Block) -> Block {
    std::array::from_fn(|l| sum[l] + a[l] * b[l])
}

/// A component ready for the E-step: z = L⁻¹(x − μ) as a sum of columns
/// of L⁻¹ (kept transposed, row j holding column j from the diagonal
/// down), so the inner loop is a vector update without divisions.
struct Whitening<'a> {
    mean: &'a [f64],
    columns: Vec<f64>,
    /// ln weight − (d·ln 2π + ln det Σ) / 2.
    constant: f64,
}

impl<'a> Whitening<'a> {
    #[inline(always)]
    fn of(component: &'a Component) -> Self {
        let d = component.mean.len();
        let l = &component.cholesky;
        // Column j of L⁻¹ by forward substitution on the unit vector e_j.
        let mut columns = vec![0.0; d * d];
        for j in 0..d {
            let column = &mut columns[j * d..(j + 1) * d];
            for i in j..d {
                let mut sum = if i == j { 1.0 } else { 0.0 };
                for m in j..i {
                    sum -= l[i * d + m] * column[m];
                }
                column[i] = sum / l[i * d + i];
            }
        }
        let constant = component.weight.ln() - 0.5 * (d as f64 * (2.0 * std::f64::consts::PI).ln() + component.log_det);
        Whitening { mean: &component.mean, columns, constant }
    }
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

    // EM gives the same mixture on the path built for this CPU and on the
    // portable one, for a last block of rows that is only partly filled.
    #[test]
    fn em_paths_agree() {
        let mut rng = spikeyard_contract::testing::TestRng::new(6);
        let rows: Vec<Vec<f64>> =
            (0..203).map(|i| (0..5).map(|j| 4.0 * ((i % 3) * j) as f64 + rng.normal()).collect()).collect();
        let labels: Vec<usize> = (0..rows.len()).map(|i| (i + i / 50) % 3).collect();
        let em = Em::new(&rows, 5, 3);
        let fast = em.run(&labels).unwrap();
        let plain = em.run_portable(&mut em.responsibilities(&labels)).unwrap();
        assert_eq!(fast, plain);
        assert_eq!(fast.components.len(), 3);
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
