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
    /// Averaged trough, µV (negative).
    pub amplitude_uv: f64,
}

impl Node {
    /// Distance between the two electrodes, µm.
    pub fn distance_to(&self, other: &Node) -> f64 {
        (self.x_um - other.x_um).hypot(self.y_um - other.y_um)
    }
}

/// The node with the largest trough (lowest channel among equals): the soma.
fn largest_trough(nodes: &[Node]) -> Option<usize> {
    (0..nodes.len()).min_by(|&a, &b| {
        nodes[a].amplitude_uv.total_cmp(&nodes[b].amplitude_uv).then(nodes[a].channel.cmp(&nodes[b].channel))
    })
}

/// A node stays on the ridge with at least this share of the largest
/// trough beside it.
pub const RIDGE_SHARE: f64 = 0.8;

/// The ridge of a footprint: the electrodes where the axon runs. An axon's
/// signal spreads to electrodes beside it with the same latency, so a broad
/// footprint would time the axon on a band of electrodes whose distances
/// along the band are not distances along the axon. Each node's direction
/// of travel is the gradient of latency over its neighbours within
/// `radius_um` (least squares); the node is on the ridge when no neighbour
/// within `across_radius_um` across that direction (within about 27° of
/// square to it: at least twice as far across as along) has a larger
/// trough (by more than 1 ÷ [`RIDGE_SHARE`]: where the footprint is flat
/// across, at a fork or an axon running between two rows, both sides stay).
/// Without a gradient (too
/// few neighbours, or all in one line) every neighbour counts as across;
/// a node without neighbours is not on the ridge. Around the soma (within `radius_um` of the largest trough) the
/// footprint is the soma's and has no ridge: all of it is kept, so that
/// the axon's ridge can be reached from it.
pub fn ridge(nodes: &[Node], radius_um: f64, across_radius_um: f64) -> Vec<bool> {
    let soma = largest_trough(nodes).map(|i| &nodes[i]);
    nodes
        .iter()
        .enumerate()
        .map(|(i, node)| {
            let neighbours: Vec<usize> =
                (0..nodes.len()).filter(|&j| j != i && node.distance_to(&nodes[j]) <= radius_um).collect();
            let (mut sxx, mut sxy, mut syy, mut sxt, mut syt) = (0.0, 0.0, 0.0, 0.0, 0.0);
            for &j in &neighbours {
                let (dx, dy) = (nodes[j].x_um - node.x_um, nodes[j].y_um - node.y_um);
                let dt = nodes[j].latency_ms - node.latency_ms;
                sxx += dx * dx;
                sxy += dx * dy;
                syy += dy * dy;
                sxt += dx * dt;
                syt += dy * dt;
            }
            let det = sxx * syy - sxy * sxy;
            let direction = (det > 1e-6 * (sxx + syy).powi(2))
                .then(|| ((syy * sxt - sxy * syt) / det, (sxx * syt - sxy * sxt) / det))
                .map(|(gx, gy)| (gx, gy, gx.hypot(gy)))
                .filter(|g| g.2 > 0.0)
                .map(|(gx, gy, norm)| (gx / norm, gy / norm));
            // An electrode with no significant neighbour is noise or another cell.
            !neighbours.is_empty()
                && neighbours.iter().all(|&j| {
                    let (dx, dy) = (nodes[j].x_um - node.x_um, nodes[j].y_um - node.y_um);
                    let across = dx.hypot(dy) <= across_radius_um
                        && direction
                            .is_none_or(|(ux, uy)| 2.0 * (dx * ux + dy * uy).abs() <= (dx * uy - dy * ux).abs());
                    let (mine, theirs) = (node.amplitude_uv.abs(), nodes[j].amplitude_uv.abs());
                    !across || mine >= RIDGE_SHARE * theirs
                })
                || soma.is_some_and(|soma| node.distance_to(soma) <= radius_um)
        })
        .collect()
}

/// The axon tree, rooted at the node with the largest trough (the soma):
/// the other nodes visited in order of increasing latency, each linked to
/// the nearest node already in the tree within `link_radius_um` (the
/// latest of equally near ones). Returns (parent index or None for the root and unreached
/// nodes, path length from the root in µm or NaN when unreached), by node.
pub fn track(nodes: &[Node], link_radius_um: f64) -> (Vec<Option<usize>>, Vec<f64>) {
    let mut order: Vec<usize> = (0..nodes.len()).collect();
    let root = largest_trough(nodes);
    order.sort_by(|&a, &b| {
        (Some(b) == root)
            .cmp(&(Some(a) == root))
            .then(nodes[a].latency_ms.total_cmp(&nodes[b].latency_ms))
            .then(nodes[a].channel.cmp(&nodes[b].channel))
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
        let distance = |j: usize| nodes[i].distance_to(&nodes[j]);
        let nearest = placed.iter().copied().filter(|&j| !path[j].is_nan()).min_by(|&a, &b| {
            distance(a)
                .total_cmp(&distance(b))
                .then(nodes[b].latency_ms.total_cmp(&nodes[a].latency_ms))
                .then(a.cmp(&b))
        });
        if let Some(j) = nearest.filter(|&j| distance(j) <= link_radius_um) {
            parent[i] = Some(j);
            path[i] = path[j] + distance(j);
        }
        placed.push(i);
    }
    (parent, path)
}

/// Length along a chain of points from its first one, after a moving
/// average over ±`half` points (shrunk symmetrically at the ends, so the
/// ends stay put): the staircase of electrodes under an oblique axon is
/// longer than the axon, its smoothed line is not.
pub fn smoothed_arc_length(points: &[(f64, f64)], half: usize) -> Vec<f64> {
    let n = points.len();
    let smoothed: Vec<(f64, f64)> = (0..n)
        .map(|i| {
            let h = half.min(i).min(n - 1 - i);
            let window = &points[i - h..=i + h];
            let count = window.len() as f64;
            (window.iter().map(|p| p.0).sum::<f64>() / count, window.iter().map(|p| p.1).sum::<f64>() / count)
        })
        .collect();
    let mut length = vec![0.0; n];
    for i in 1..n {
        length[i] = length[i - 1] + (smoothed[i].0 - smoothed[i - 1].0).hypot(smoothed[i].1 - smoothed[i - 1].1);
    }
    length
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
            nodes.push(Node { channel: nodes.len(), x_um: x, y_um: y, latency_ms: latency, amplitude_uv: -10.0 })
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

    /// A straight axon along y = 40 µm over a 17.5 µm grid, seen on five
    /// rows, its soma above the electrode at (0, 35): beyond the soma's
    /// neighbourhood only the row nearest the axon is its ridge.
    #[test]
    fn ridge_keeps_the_row_under_the_axon() {
        let mut nodes = vec![];
        for row in 0..5 {
            for column in 0..20 {
                let (x, y) = (column as f64 * 17.5, row as f64 * 17.5);
                let r = ((y - 40.0).powi(2) + 9.0).sqrt();
                let soma = if (x, y) == (0.0, 35.0) { 100.0 } else { 0.0 };
                nodes.push(Node {
                    channel: nodes.len(),
                    x_um: x,
                    y_um: y,
                    latency_ms: x / 1e3,
                    amplitude_uv: -100.0 / r - soma,
                });
            }
        }
        let on: Vec<(f64, f64)> =
            ridge(&nodes, 38.5, 26.25).iter().zip(&nodes).filter(|(r, _)| **r).map(|(_, n)| (n.x_um, n.y_um)).collect();
        let beyond: Vec<&(f64, f64)> = on.iter().filter(|p| p.0.hypot(p.1 - 35.0) > 38.5).collect();
        assert_eq!(beyond.len(), 17, "{on:?}");
        assert!(beyond.iter().all(|p| p.1 == 35.0), "{on:?}");
    }

    #[test]
    fn smoothing_removes_most_of_a_staircase() {
        // Points alternately stepping right and diagonally up: the line
        // through them has slope 1/2; its true length from (0,0) to (140,70).
        let mut points = vec![(0.0, 0.0)];
        for i in 0..8 {
            let (x, y) = points[points.len() - 1];
            points.push(if i % 2 == 0 { (x + 17.5, y) } else { (x + 17.5, y + 17.5) });
        }
        let truth = 140.0f64.hypot(70.0);
        let raw = smoothed_arc_length(&points, 0);
        let smooth = smoothed_arc_length(&points, 2);
        assert!((raw[8] - (4.0 * 17.5 + 4.0 * 17.5 * 2f64.sqrt())).abs() < 1e-9);
        assert!((smooth[8] - truth).abs() < (raw[8] - truth).abs() / 3.0, "{} {} {truth}", smooth[8], raw[8]);
    }
}
