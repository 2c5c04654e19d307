//! The clustering models on Fisher's Iris as shipped by linfa-datasets 0.8.1
//! (the UCI copy), against scikit-learn 1.9.1: REFERENCES.md C1 and C2.

use spikeyard_cluster::model::{fit_gmm, fit_group, fit_kmeans, fit_single, GroupFit, Method};

fn iris_rows() -> Vec<Vec<f64>> {
    linfa_datasets::iris().records().rows().into_iter().map(|r| r.to_vec()).collect()
}

// C1: KMeans(n_clusters=3, n_init=10, random_state=0): inertia 78.940841426146
// on the linfa copy, sizes [38, 50, 62].
#[test]
fn kmeans_reaches_the_scikit_learn_optimum() {
    let rows = iris_rows();
    let model = fit_kmeans(&rows, 4, 3, 10, 0).unwrap();
    let mut sizes = vec![0usize; 3];
    for row in &rows {
        sizes[model.predict(row)] += 1;
    }
    sizes.sort_unstable();
    assert_eq!(sizes, vec![38, 50, 62]);
    // The shared variance is inertia / (n·d).
    let variance = model.components[0].cholesky[0].powi(2);
    let inertia = variance * 150.0 * 4.0;
    assert!((inertia - 78.940841426146).abs() < 1e-9 * 78.94, "{inertia}");
}

// C2: GaussianMixture(k, covariance_type='full', n_init=10).bic(X) on the linfa copy:
// k=1 829.234925, k=2 575.640563 (±1e-3), k=3 582.484 (±0.05), k=4,5 above k=2.
#[test]
fn gmm_bic_over_k_matches_scikit_learn_and_selects_two() {
    let rows = iris_rows();
    let one = fit_single(&rows, 4).unwrap();
    assert!((one.bic - 829.234925).abs() < 1e-3, "{}", one.bic);
    // k=1 in closed form: ln L = −379.543015440822.
    assert!((one.log_likelihood(&rows) + 379.543015440822).abs() < 1e-3);
    let two = fit_gmm(&rows, 4, 2, 10, 0).unwrap();
    assert!((two.bic - 575.640563).abs() < 1e-3, "{}", two.bic);
    let three = fit_gmm(&rows, 4, 3, 10, 0).unwrap();
    assert!((three.bic - 582.484).abs() < 0.05, "{}", three.bic);
    for k in [4, 5] {
        let model = fit_gmm(&rows, 4, k, 10, 0).unwrap();
        assert!(model.bic > two.bic, "k={k}: {}", model.bic);
    }
    let fit = GroupFit {
        method: Method::Gmm,
        max_units: 5,
        min_points_per_unit: 10,
        runs: 10,
        bic_patience: 0,
        dbscan_eps: 0.0,
        seed: 0,
    };
    let best = fit_group(&rows, 4, &fit).unwrap();
    assert_eq!(best.components.len(), 2);
}
