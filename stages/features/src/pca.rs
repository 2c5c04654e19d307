//! Principal component analysis by the symmetric eigen-decomposition of the
//! sample covariance (n − 1), with the cyclic Jacobi method: plain, exact to
//! rounding, deterministic, and needs no LAPACK.

use rayon::prelude::*;

/// A fitted PCA.
#[derive(Debug, Clone, PartialEq)]
pub struct Pca {
    pub mean: Vec<f64>,
    /// All eigenvectors as rows, by decreasing eigenvalue; each is signed so
    /// that its largest-magnitude entry is positive.
    pub components: Vec<Vec<f64>>,
    /// Eigenvalues of the covariance (variance along each component).
    pub explained_variance: Vec<f64>,
}

impl Pca {
    /// Fit on `rows` (each of length `dim`). Needs at least two rows.
    pub fn fit(rows: &[Vec<f64>], dim: usize) -> Option<Pca> {
        let n = rows.len();
        if n < 2 || dim == 0 {
            return None;
        }
        let mut mean = vec![0.0; dim];
        for row in rows {
            for (m, v) in mean.iter_mut().zip(row) {
                *m += v;
            }
        }
        for m in mean.iter_mut() {
            *m /= n as f64;
        }
        // The upper triangle, row i of it per task over a block of centred
        // rows at a time: each entry adds its products in row order, as a
        // single loop over the rows would, whatever the threads.
        const BLOCK_ROWS: usize = 512;
        let mut covariance = vec![vec![0.0; dim]; dim];
        let mut centred = Vec::with_capacity(BLOCK_ROWS * dim);
        for block in rows.chunks(BLOCK_ROWS) {
            centred.clear();
            centred.extend(block.iter().flat_map(|row| row.iter().zip(&mean).map(|(v, m)| v - m)));
            covariance.par_iter_mut().enumerate().for_each(|(i, sums)| {
                for d in centred.chunks_exact(dim) {
                    for j in i..dim {
                        sums[j] += d[i] * d[j];
                    }
                }
            });
        }
        for i in 0..dim {
            for j in i..dim {
                covariance[i][j] /= (n - 1) as f64;
                covariance[j][i] = covariance[i][j];
            }
        }
        let (values, vectors) = symmetric_eigen(covariance);
        let mut order: Vec<usize> = (0..dim).collect();
        order.sort_by(|&a, &b| values[b].total_cmp(&values[a]).then(a.cmp(&b)));
        let components = order
            .iter()
            .map(|&k| {
                let mut v: Vec<f64> = (0..dim).map(|i| vectors[i][k]).collect();
                let largest = v.iter().copied().fold(0.0f64, |m, x| if x.abs() > m.abs() { x } else { m });
                if largest < 0.0 {
                    v.iter_mut().for_each(|x| *x = -*x);
                }
                v
            })
            .collect();
        let explained_variance = order.iter().map(|&k| values[k].max(0.0)).collect();
        Some(Pca { mean, components, explained_variance })
    }

    pub fn explained_variance_ratio(&self) -> Vec<f64> {
        let total: f64 = self.explained_variance.iter().sum();
        self.explained_variance.iter().map(|v| v / total).collect()
    }

    /// Scores of `row` on the first `k` components.
    pub fn project(&self, row: &[f64], k: usize, out: &mut [f32]) {
        for (component, o) in self.components.iter().take(k).zip(out.iter_mut()) {
            *o = component.iter().zip(row).zip(&self.mean).map(|((c, v), m)| c * (v - m)).sum::<f64>() as f32;
        }
    }
}

/// Eigenvalues and eigenvectors (columns) of a symmetric matrix, cyclic Jacobi.
pub fn symmetric_eigen(mut a: Vec<Vec<f64>>) -> (Vec<f64>, Vec<Vec<f64>>) {
    let n = a.len();
    let mut v: Vec<Vec<f64>> = (0..n).map(|i| (0..n).map(|j| f64::from(u8::from(i == j))).collect()).collect();
    for _sweep in 0..100 {
        let off: f64 = (0..n)
            .flat_map(|i| (0..n).filter(move |&j| j != i).map(move |j| (i, j)))
            .map(|(i, j)| a[i][j] * a[i][j])
            .sum();
        let scale: f64 = (0..n).map(|i| a[i][i] * a[i][i]).sum::<f64>().max(f64::MIN_POSITIVE);
        if off <= 1e-30 * scale {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                if a[p][q] == 0.0 {
                    continue;
                }
                let theta = (a[q][q] - a[p][p]) / (2.0 * a[p][q]);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let (akp, akq) = (a[k][p], a[k][q]);
                    a[k][p] = c * akp - s * akq;
                    a[k][q] = s * akp + c * akq;
                }
                for k in 0..n {
                    let (apk, aqk) = (a[p][k], a[q][k]);
                    a[p][k] = c * apk - s * aqk;
                    a[q][k] = s * apk + c * aqk;
                }
                for row in v.iter_mut() {
                    let (vkp, vkq) = (row[p], row[q]);
                    row[p] = c * vkp - s * vkq;
                    row[q] = s * vkp + c * vkq;
                }
            }
        }
    }
    ((0..n).map(|i| a[i][i]).collect(), v)
}

#[cfg(test)]
mod tests {
    use super::*;

    // REFERENCES.md P1: the small worked example (numpy 2.4.6, np.cov/eigh/svd).
    #[test]
    fn small_worked_example_matches_numpy() {
        let data = [
            (2.5, 2.4),
            (0.5, 0.7),
            (2.2, 2.9),
            (1.9, 2.2),
            (3.1, 3.0),
            (2.3, 2.7),
            (2.0, 1.6),
            (1.0, 1.1),
            (1.5, 1.6),
            (1.1, 0.9),
        ];
        let rows: Vec<Vec<f64>> = data.iter().map(|&(x, y)| vec![x, y]).collect();
        let pca = Pca::fit(&rows, 2).unwrap();
        assert!((pca.mean[0] - 1.81).abs() < 1e-12 && (pca.mean[1] - 1.91).abs() < 1e-12);
        assert!((pca.explained_variance[0] - 1.284027712173).abs() < 1e-10);
        assert!((pca.explained_variance[1] - 0.049083398938).abs() < 1e-10);
        let ratio = pca.explained_variance_ratio();
        assert!((ratio[0] - 0.963181314349).abs() < 1e-10);
        // Up to sign: PC1 = ±(0.677873398528, 0.735178655544).
        let pc1 = &pca.components[0];
        assert!((pc1[0].abs() - 0.677873398528).abs() < 1e-10 && (pc1[1].abs() - 0.735178655544).abs() < 1e-10);
        assert!(pc1[0] * pc1[1] > 0.0);
        // PC1 scores up to the sign of numpy's svd (Vt[0] = (−0.6779, −0.7352)).
        let expected = [
            -0.827970186201,
            1.77758032528,
            -0.992197494415,
            -0.274210415975,
            -1.675801418645,
            -0.912949103159,
            0.099109437498,
            1.144572163799,
            0.438046136762,
            1.223820555055,
        ];
        for (row, e) in rows.iter().zip(expected) {
            let mut score = [0.0f32];
            pca.project(row, 1, &mut score);
            assert!((score[0] as f64 + e).abs() < 1e-6, "{} vs {}", score[0], -e);
        }
    }

    #[test]
    fn jacobi_diagonalises_a_known_matrix() {
        // Eigenvalues of [[2,1],[1,2]] are 3 and 1.
        let (mut values, _) = symmetric_eigen(vec![vec![2.0, 1.0], vec![1.0, 2.0]]);
        values.sort_by(f64::total_cmp);
        assert!((values[0] - 1.0).abs() < 1e-14 && (values[1] - 3.0).abs() < 1e-14);
    }
}
