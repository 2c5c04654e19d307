//! Robust line fits and axon tracking on a unit's footprint.

/// Theil–Sen fit of y against x: slope = median of pairwise slopes,
/// intercept = median of y − slope·x; with Sen's (1968) rank interval for
/// the slope at 95 % (normal approximation of Kendall's S) and the r² of
/// the fitted line. `None` with fewer than 3 points or no spread in x.
pub fn theil_sen(x: &[f64], y: &[f64]) -> Option<LineFit> {
    let n = x.len();
    if n < 3 {
        return None;
    }
    let mut slopes: Vec<f64> = Vec::with_capacity(n * (n - 1) / 2);
    for i in 0..n {
        for j in i + 1..n {
            let dx = x[j] - x[i];
            if dx != 0.0 {
                slopes.push((y[j] - y[i]) / dx);
            }
        }
    }
    if slopes.is_empty() {
        return None;
    }
    slopes.sort_by(f64::total_cmp);
    let median = |v: &[f64]| {
        let m = v.len() / 2;
        if v.len() % 2 == 1 {
            v[m]
        } else {
            0.5 * (v[m - 1] + v[m])
        }
    };
    let slope = median(&slopes);
    let mut residual_base: Vec<f64> = x.iter().zip(y).map(|(xi, yi)| yi - slope * xi).collect();
    residual_base.sort_by(f64::total_cmp);
    let intercept = median(&residual_base);
    // Sen's interval: C = z·√(n(n−1)(2n+5)/18); bounds at ranks (N − C)/2 and (N + C)/2.
    let big_n = slopes.len() as f64;
    let c = 1.959963984540054 * ((n * (n - 1) * (2 * n + 5)) as f64 / 18.0).sqrt();
    let lower_rank = ((big_n - c) / 2.0).floor().max(0.0) as usize;
    let upper_rank = (((big_n + c) / 2.0).ceil() as usize).min(slopes.len() - 1);
    let mean_y = y.iter().sum::<f64>() / n as f64;
    let total: f64 = y.iter().map(|v| (v - mean_y).powi(2)).sum();
    let residual: f64 = x.iter().zip(y).map(|(xi, yi)| (yi - intercept - slope * xi).powi(2)).sum();
    let r_squared = if total > 0.0 { 1.0 - residual / total } else { 0.0 };
    Some(LineFit { slope, intercept, slope_low: slopes[lower_rank], slope_high: slopes[upper_rank], r_squared })
}

/// A robust line.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LineFit {
    pub slope: f64,
    pub intercept: f64,
    /// 95 % interval of the slope.
    pub slope_low: f64,
    pub slope_high: f64,
    pub r_squared: f64,
}

/// A node of the footprint: an electrode with significant signal.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Node {
    pub channel: usize,
    pub x_um: f64,
    pub y_um: f64,
    pub latency_ms: f64,
}

/// The axon tree: nodes visited in order of increasing latency, each linked
/// to the nearest earlier node within `link_radius_um`; the earliest node is
/// the root. Returns (parent index or None for the root and unreached
/// nodes, path length from the root in µm or NaN when unreached), by node.
pub fn track(nodes: &[Node], link_radius_um: f64) -> (Vec<Option<usize>>, Vec<f64>) {
    let mut order: Vec<usize> = (0..nodes.len()).collect();
    order.sort_by(|&a, &b| {
        nodes[a].latency_ms.total_cmp(&nodes[b].latency_ms).then(nodes[a].channel.cmp(&nodes[b].channel))
    });
    let mut parent = vec![None; nodes.len()];
    let mut path = vec![f64::NAN; nodes.len()];
    let mut placed: Vec<usize> = Vec::new();
    for (rank, &i) in order.iter().enumerate() {
        if rank == 0 {
            path[i] = 0.0;
            placed.push(i);
            continue;
        }
        let distance = |j: usize| (nodes[i].x_um - nodes[j].x_um).hypot(nodes[i].y_um - nodes[j].y_um);
        let nearest = placed
            .iter()
            .copied()
            .filter(|&j| !path[j].is_nan())
            .min_by(|&a, &b| distance(a).total_cmp(&distance(b)).then(a.cmp(&b)));
        if let Some(j) = nearest.filter(|&j| distance(j) <= link_radius_um) {
            parent[i] = Some(j);
            path[i] = path[j] + distance(j);
        }
        placed.push(i);
    }
    (parent, path)
}

/// Shortest distances from `source` through the graph of nodes linked when
/// closer than `link_radius_um` (Dijkstra): the distance along the
/// footprint, which a zig-zag through a broad footprint does not inflate.
/// Unreachable nodes get NaN.
pub fn geodesic(nodes: &[Node], source: usize, link_radius_um: f64) -> Vec<f64> {
    let n = nodes.len();
    let mut distance = vec![f64::INFINITY; n];
    let mut done = vec![false; n];
    distance[source] = 0.0;
    for _ in 0..n {
        let Some(i) = (0..n)
            .filter(|&i| !done[i] && distance[i].is_finite())
            .min_by(|&a, &b| distance[a].total_cmp(&distance[b]))
        else {
            break;
        };
        done[i] = true;
        for j in 0..n {
            let d = (nodes[i].x_um - nodes[j].x_um).hypot(nodes[i].y_um - nodes[j].y_um);
            if !done[j] && d <= link_radius_um && distance[i] + d < distance[j] {
                distance[j] = distance[i] + d;
            }
        }
    }
    distance.into_iter().map(|d| if d.is_finite() { d } else { f64::NAN }).collect()
}

/// Branches of a tree: the longest root-to-leaf path first, then for each
/// other leaf (longest first) the part of its path not on an earlier
/// branch, starting at the node where it leaves them. Each branch is a
/// list of node indices from its start outwards.
pub fn branches(parent: &[Option<usize>], path: &[f64]) -> Vec<Vec<usize>> {
    let n = parent.len();
    let mut has_child = vec![false; n];
    for p in parent.iter().flatten() {
        has_child[*p] = true;
    }
    let mut leaves: Vec<usize> = (0..n).filter(|&i| !has_child[i] && !path[i].is_nan()).collect();
    leaves.sort_by(|&a, &b| path[b].total_cmp(&path[a]).then(a.cmp(&b)));
    let mut covered = vec![false; n];
    let mut result = Vec::new();
    for leaf in leaves {
        let mut segment = vec![leaf];
        let mut node = leaf;
        while let Some(p) = parent[node] {
            segment.push(p);
            if covered[p] {
                break;
            }
            node = p;
        }
        segment.reverse();
        for &i in &segment {
            covered[i] = true;
        }
        result.push(segment);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    // REFERENCES.md V4: electrodes at 0, 200, 400, 600 µm with latencies 0,
    // 400, 800, 1200 µs → 0.5 m/s. With ±50 µs (one sample at 20 kHz) on the
    // middle ones least squares gives 0.5128 m/s; Theil–Sen (median of the
    // six pairwise slopes) gives 0.516 m/s, within the one-sample resolution.
    #[test]
    fn theil_sen_slope_of_the_worked_example() {
        let x = [0.0, 200.0, 400.0, 600.0];
        let fit = theil_sen(&x, &[0.0, 0.4, 0.8, 1.2]).unwrap();
        assert!((1e-3 / fit.slope - 0.5).abs() < 1e-12, "{fit:?}");
        assert!((fit.r_squared - 1.0).abs() < 1e-12);
        let jittered = theil_sen(&x, &[0.0, 0.45, 0.75, 1.2]).unwrap();
        assert!((1e-3 / jittered.slope - 0.516129).abs() < 1e-6, "{jittered:?}");
        assert!(jittered.slope_low <= jittered.slope && jittered.slope <= jittered.slope_high);
    }

    #[test]
    fn theil_sen_ignores_an_outlier() {
        let x: Vec<f64> = (0..10).map(|i| i as f64).collect();
        let mut y: Vec<f64> = x.iter().map(|v| 2.0 * v + 1.0).collect();
        y[3] = 100.0;
        let fit = theil_sen(&x, &y).unwrap();
        assert!((fit.slope - 2.0).abs() < 1e-12 && (fit.intercept - 1.0).abs() < 1e-12);
    }

    #[test]
    fn tracking_follows_a_forked_axon() {
        // Root at 0; a trunk along x, forking at x=40 into an upper and a lower arm.
        let mut nodes = vec![];
        let mut add = |x: f64, y: f64, latency: f64| {
            nodes.push(Node { channel: nodes.len(), x_um: x, y_um: y, latency_ms: latency })
        };
        for i in 0..5 {
            add(i as f64 * 10.0, 0.0, i as f64 * 0.01);
        }
        for i in 1..6 {
            add(40.0 + i as f64 * 10.0, i as f64 * 10.0, 0.04 + i as f64 * 0.014);
            add(40.0 + i as f64 * 10.0, -(i as f64) * 10.0, 0.04 + i as f64 * 0.015);
        }
        add(500.0, 500.0, 0.02); // isolated: never reached
        let (parent, path) = track(&nodes, 15.0);
        assert!(path[15].is_nan() && parent[15].is_none());
        let found = branches(&parent, &path);
        assert_eq!(found.len(), 2);
        assert_eq!(found[0].len(), 10, "{found:?}");
        assert_eq!(found[1].len(), 6, "{found:?}");
        assert_eq!(found[1][0], 4, "the second branch starts at the fork");
    }
}
