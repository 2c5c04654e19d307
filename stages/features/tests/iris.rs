//! The PCA routine on Fisher's Iris as shipped by linfa-datasets 0.8.1 (the
//! UCI copy), against scikit-learn 1.9.1 `PCA().fit(X)`: REFERENCES.md P2.

use spikeyard_features::pca::Pca;

#[test]
fn iris_explained_variance_matches_scikit_learn_on_the_linfa_copy() {
    let dataset = linfa_datasets::iris();
    let records = dataset.records();
    let rows: Vec<Vec<f64>> = records.rows().into_iter().map(|r| r.to_vec()).collect();
    assert_eq!(rows.len(), 150);
    let pca = Pca::fit(&rows, 4).unwrap();
    let expected_ratio = [0.924616207174275, 0.05301556785053118, 0.017185139525004636, 0.005183085450189142];
    let expected_variance = [4.224840768320089, 0.24224357162749469, 0.07852390809414371, 0.02368302712599803];
    for (got, want) in pca.explained_variance_ratio().iter().zip(expected_ratio) {
        assert!((got - want).abs() < 1e-9, "{got} vs {want}");
    }
    for (got, want) in pca.explained_variance.iter().zip(expected_variance) {
        assert!((got - want).abs() < 1e-9, "{got} vs {want}");
    }
    let pc1 = [0.361589677381, -0.082268889892, 0.856572105291, 0.358843926248];
    for (got, want) in pca.components[0].iter().zip(pc1) {
        assert!((got - want).abs() < 1e-9, "{got} vs {want} (sign fixed: largest entry positive)");
    }
    let means = [5.843333, 3.054, 3.758667, 1.198667];
    for (got, want) in pca.mean.iter().zip(means) {
        assert!((got - want).abs() < 1e-6);
    }
}
