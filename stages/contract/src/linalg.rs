//! Small dense linear algebra shared by stages that measure in feature
//! space (no LAPACK): Cholesky factorisation and Mahalanobis distances.

/// Lower Cholesky factor of a symmetric positive-definite d×d matrix
/// (row-major), and ln det; `None` when it is not positive definite.
pub fn cholesky(matrix: &[f64], d: usize) -> Option<(Vec<f64>, f64)> {
    let mut l = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..=i {
            let mut sum = matrix[i * d + j];
            for k in 0..j {
                sum -= l[i * d + k] * l[j * d + k];
            }
            if i == j {
                if sum <= 0.0 || !sum.is_finite() {
                    return None;
                }
                l[i * d + i] = sum.sqrt();
            } else {
                l[i * d + j] = sum / l[j * d + j];
            }
        }
    }
    let log_det = 2.0 * (0..d).map(|i| l[i * d + i].ln()).sum::<f64>();
    Some((l, log_det))
}

/// Squared Mahalanobis distance of `x` from `mean` given the lower
/// Cholesky factor of the covariance.
pub fn mahalanobis_squared(cholesky: &[f64], mean: &[f64], x: &[f64]) -> f64 {
    let d = mean.len();
    // On the stack for the usual feature widths: this runs for every row
    // and component of a mixture fit.
    let (mut stack, mut heap) = ([0.0f64; 32], Vec::new());
    let z: &mut [f64] = if d <= stack.len() {
        &mut stack[..d]
    } else {
        heap.resize(d, 0.0);
        &mut heap
    };
    for i in 0..d {
        let mut sum = x[i] - mean[i];
        for j in 0..i {
            sum -= cholesky[i * d + j] * z[j];
        }
        z[i] = sum / cholesky[i * d + i];
    }
    z.iter().map(|v| v * v).sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cholesky_of_a_known_matrix() {
        // [[4,2],[2,3]] = L·Lᵀ with L = [[2,0],[1,√2]]; det = 8.
        let (l, log_det) = cholesky(&[4.0, 2.0, 2.0, 3.0], 2).unwrap();
        assert!((l[0] - 2.0).abs() < 1e-15 && (l[2] - 1.0).abs() < 1e-15 && (l[3] - 2f64.sqrt()).abs() < 1e-15);
        assert!((log_det - 8f64.ln()).abs() < 1e-14);
        assert!(cholesky(&[1.0, 2.0, 2.0, 1.0], 2).is_none());
        // Mahalanobis with identity covariance is the squared distance.
        let (l, _) = cholesky(&[1.0, 0.0, 0.0, 1.0], 2).unwrap();
        assert_eq!(mahalanobis_squared(&l, &[1.0, 1.0], &[4.0, 5.0]), 25.0);
    }
}
