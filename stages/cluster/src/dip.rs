//! Hartigan's dip test of unimodality: is a sample of numbers one mode or
//! more?
//!
//! The dip is the largest distance between the sample's empirical
//! distribution function and the closest unimodal distribution function
//! (J. A. Hartigan & P. M. Hartigan 1985, "The dip test of unimodality",
//! Annals of Statistics 13:70–84). It is computed here by the published
//! algorithm AS 217 (P. M. Hartigan 1985, Applied Statistics 34:320–325):
//! the greatest convex minorant and least concave majorant of the
//! distribution function are fitted, and the modal interval between them is
//! narrowed until the dip stops growing. Its p-value is the share of
//! uniform samples of the same size whose dip is at least as large (the
//! uniform is the least favourable unimodal null, as in the paper), drawn
//! here by seeded simulation instead of read from the paper's table.
//!
//! The cluster stage uses it before merging two units: their spikes,
//! projected on the axis that separates their mean waveforms, must form one
//! mode (see `merge`).

use spikeyard_contract::sampling::uniform;
use std::sync::OnceLock;

/// The dip statistic of a sample sorted in ascending order (values between
/// 1/(2n) and 1/4; 1/(2n) for fewer than 4 values or all equal ones).
///
/// # Panics
/// If `sorted` is empty.
pub fn dip_statistic(sorted: &[f64]) -> f64 {
    let n = sorted.len();
    assert!(n > 0, "the dip of an empty sample is undefined");
    debug_assert!(sorted.windows(2).all(|w| w[0] <= w[1]), "the dip needs sorted values");
    let x = sorted;
    // Distances are counted in steps of the distribution function (1/n),
    // doubled; the minimum dip is half a step.
    let mut dip_steps = 1.0f64;
    if n < 4 || x[n - 1] == x[0] {
        return dip_steps / (2.0 * n as f64);
    }
    // previous_on_minorant[j]: the vertex before j on the greatest convex
    // minorant of the points (x[i], i), i ≤ j; next_on_majorant[k]: the
    // vertex after k on the least concave majorant of the points i ≥ k.
    let mut previous_on_minorant = vec![0usize; n];
    for j in 1..n {
        let mut p = j - 1;
        while p != 0 {
            let q = previous_on_minorant[p];
            // Keep p while the slope (in points per unit of x) grows at p.
            if (x[j] - x[p]) * ((p - q) as f64) < (x[p] - x[q]) * ((j - p) as f64) {
                break;
            }
            p = q;
        }
        previous_on_minorant[j] = p;
    }
    let mut next_on_majorant = vec![n - 1; n];
    for k in (0..n - 1).rev() {
        let mut p = k + 1;
        while p != n - 1 {
            let q = next_on_majorant[p];
            // Keep p while the slope shrinks at p.
            if (x[p] - x[k]) * ((q - p) as f64) < (x[q] - x[p]) * ((p - k) as f64) {
                break;
            }
            p = q;
        }
        next_on_majorant[k] = p;
    }

    let (mut low, mut high) = (0usize, n - 1);
    let (mut minorant, mut majorant) = (Vec::with_capacity(n), Vec::with_capacity(n));
    loop {
        // Vertices of the minorant from high down to low, of the majorant
        // from low up to high.
        minorant.clear();
        minorant.push(high);
        while *minorant.last().expect("starts with high") > low {
            minorant.push(previous_on_minorant[*minorant.last().expect("not empty")]);
        }
        majorant.clear();
        majorant.push(low);
        while *majorant.last().expect("starts with low") < high {
            majorant.push(next_on_majorant[*majorant.last().expect("not empty")]);
        }
        let (last_minorant, last_majorant) = (minorant.len() - 1, majorant.len() - 1);

        // The largest distance between the two hulls on [low, high], and the
        // vertices where it is reached: the new modal interval.
        let (mut best_minorant, mut best_majorant) = (last_minorant, last_majorant);
        let mut distance = 1.0f64;
        if last_minorant != 1 || last_majorant != 1 {
            distance = 0.0;
            let (mut g, mut h) = (last_minorant - 1, 1usize);
            loop {
                let (vg, vh) = (minorant[g], majorant[h]);
                if vg > vh {
                    // The next vertex is the majorant's: distance of its
                    // point above the minorant's chord.
                    let base = minorant[g + 1];
                    let d =
                        (vh as f64 - base as f64 + 1.0) - (x[vh] - x[base]) * (vg - base) as f64 / (x[vg] - x[base]);
                    h += 1;
                    if d >= distance {
                        distance = d;
                        best_minorant = g + 1;
                        best_majorant = h - 1;
                    }
                } else {
                    // The next vertex is the minorant's: distance of its
                    // point below the majorant's chord.
                    let base = majorant[h - 1];
                    let d =
                        (x[vg] - x[base]) * (vh - base) as f64 / (x[vh] - x[base]) - (vg as f64 - base as f64 - 1.0);
                    if d >= distance {
                        distance = d;
                        best_minorant = g;
                        best_majorant = h;
                    }
                    g = g.saturating_sub(1);
                }
                h = h.min(last_majorant);
                if minorant[g] == majorant[h] {
                    break;
                }
            }
        }
        if distance < dip_steps {
            break;
        }

        // The dip of each hull on its side of the modal interval: the
        // largest gap between the data and the hull's chords.
        let chord_gap = |from: usize, to: usize, below: bool| -> f64 {
            let mut largest = 1.0f64;
            if to - from > 1 && x[to] != x[from] {
                let points_per_x = (to - from) as f64 / (x[to] - x[from]);
                for (i, &value) in x.iter().enumerate().take(to + 1).skip(from) {
                    let on_chord = (value - x[from]) * points_per_x;
                    let gap = if below { (i - from + 1) as f64 - on_chord } else { on_chord - (i - from) as f64 + 1.0 };
                    largest = largest.max(gap);
                }
            }
            largest
        };
        let lower = (best_minorant..last_minorant)
            .map(|j| chord_gap(minorant[j + 1], minorant[j], true))
            .fold(0.0f64, f64::max);
        let upper = (best_majorant..last_majorant)
            .map(|j| chord_gap(majorant[j], majorant[j + 1], false))
            .fold(0.0f64, f64::max);
        dip_steps = dip_steps.max(lower.max(upper));

        let (new_low, new_high) = (minorant[best_minorant], majorant[best_majorant]);
        if new_low == low && new_high == high {
            break;
        }
        (low, high) = (new_low, new_high);
    }
    dip_steps / (2.0 * n as f64)
}

/// Sample sizes at which the dip of uniform samples is simulated; other
/// sizes interpolate between the two around them (√n·dip varies slowly
/// with n).
const NULL_SIZES: [usize; 20] = [4, 5, 6, 7, 8, 10, 12, 15, 20, 30, 40, 50, 70, 100, 150, 200, 300, 500, 1000, 2000];
/// Uniform samples simulated at each size.
const NULL_REPLICATES: usize = 1000;

/// √n·dip of `NULL_REPLICATES` uniform samples at each of `NULL_SIZES`,
/// ascending; seeded, so the same in every run and thread.
fn null_table() -> &'static Vec<Vec<f64>> {
    static TABLE: OnceLock<Vec<Vec<f64>>> = OnceLock::new();
    TABLE.get_or_init(|| {
        use rayon::prelude::*;
        NULL_SIZES
            .par_iter()
            .map(|&n| {
                let mut scaled: Vec<f64> = (0..NULL_REPLICATES)
                    .map(|r| {
                        let mut sample: Vec<f64> =
                            (0..n).map(|i| uniform(0xD1B, (n * NULL_REPLICATES + r) as u64, i as u64)).collect();
                        sample.sort_by(f64::total_cmp);
                        dip_statistic(&sample) * (n as f64).sqrt()
                    })
                    .collect();
                scaled.sort_by(f64::total_cmp);
                scaled
            })
            .collect()
    })
}

/// Share of the simulated null at table row `row` whose √n·dip is at least `scaled`.
fn tail_share(row: usize, scaled: f64) -> f64 {
    let null = &null_table()[row];
    let below = null.partition_point(|&v| v < scaled);
    (null.len() - below) as f64 / null.len() as f64
}

/// The dip test of a sorted sample: its dip and p-value (the chance that a
/// uniform sample of the same size dips at least as much). Small p-values
/// mean more than one mode.
///
/// # Panics
/// If `sorted` is empty.
pub fn dip_test(sorted: &[f64]) -> (f64, f64) {
    let n = sorted.len();
    let dip = dip_statistic(sorted);
    if n < NULL_SIZES[0] {
        return (dip, 1.0);
    }
    let scaled = dip * (n as f64).sqrt();
    let above = NULL_SIZES.partition_point(|&size| size < n).min(NULL_SIZES.len() - 1);
    if NULL_SIZES[above] <= n || above == 0 {
        return (dip, tail_share(above, scaled));
    }
    let (small, large) = (NULL_SIZES[above - 1] as f64, NULL_SIZES[above] as f64);
    let weight = ((n as f64).ln() - small.ln()) / (large.ln() - small.ln());
    (dip, (1.0 - weight) * tail_share(above - 1, scaled) + weight * tail_share(above, scaled))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sorted(mut values: Vec<f64>) -> Vec<f64> {
        values.sort_by(f64::total_cmp);
        values
    }

    /// Two sine-spread groups of `n` values each, `separation` apart.
    fn two_groups(n: usize, spread: f64, separation: f64) -> Vec<f64> {
        let a = (0..n).map(|i| (i as f64 * 1.1).sin() * spread);
        let b = (0..n).map(|i| separation + (i as f64 * 1.9).sin() * spread);
        sorted(a.chain(b).collect())
    }

    // Dips against the Python package diptest 0.12.0 (a wrapper of the same
    // published algorithm), `diptest.dipstat(np.sort(x))`, computed once on
    // the samples written out here with numpy 2.4.6.
    #[test]
    fn dip_matches_diptest_0_12_on_fixed_samples() {
        let cases: Vec<(&str, Vec<f64>, f64)> = vec![
            ("eight values", vec![1.0, 2.0, 2.5, 3.0, 7.0, 7.5, 8.0, 9.0], 0.16666666666666669),
            ("ties", sorted(vec![1.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0, 3.0, 3.0, 5.0]), 0.15),
            // (i·0.6180339887498949) mod 1, i < 60
            (
                "golden 60",
                sorted((0..60).map(|i| (i as f64 * 0.6180339887498949) % 1.0).collect()),
                0.01631189606246348,
            ),
            // ((k·0.7548776662466927) mod 1 − 0.5)³, k < 200
            (
                "cubic 200",
                sorted((0..200).map(|k| ((k as f64 * 0.7548776662466927) % 1.0 - 0.5).powi(3)).collect()),
                0.004549832509756225,
            ),
            // concat(sin(j·1.3)·0.5, 4 + sin(j·2.1)·0.5), j < 40
            (
                "bimodal 80",
                sorted(
                    (0..40)
                        .map(|j| (j as f64 * 1.3).sin() * 0.5)
                        .chain((0..40).map(|j| 4.0 + (j as f64 * 2.1).sin() * 0.5))
                        .collect(),
                ),
                0.18795055317746184,
            ),
            // concat(sin(m·1.1)·0.7, m < 100; 2.2 + sin(m·1.9)·0.4, m < 30)
            (
                "unequal 130",
                sorted(
                    (0..100)
                        .map(|m| (m as f64 * 1.1).sin() * 0.7)
                        .chain((0..30).map(|m| 2.2 + (m as f64 * 1.9).sin() * 0.4))
                        .collect(),
                ),
                0.06682840838273074,
            ),
            // concat(sin(m·1.1), 2 + sin(m·1.9)), m < 50
            ("close groups 100", two_groups(50, 1.0, 2.0), 0.03596232086574707),
            ("apart groups 100", two_groups(50, 1.0, 3.0), 0.08336321632744255),
            ("sep 1.8, 200", two_groups(100, 0.7, 1.8), 0.05556791150568344),
        ];
        for (name, values, expected) in cases {
            let dip = dip_statistic(&values);
            assert!((dip - expected).abs() < 1e-12, "{name}: {dip} against {expected}");
        }
    }

    // p-values against diptest 0.12.0's `diptest.diptest(x)`, which
    // interpolates the table of Hartigan & Hartigan 1985 extended by
    // simulation; ours are simulated, so they agree to within the
    // simulation's error (1000 replicates: ±0.03 near 0.5).
    #[test]
    fn p_values_agree_with_diptest_0_12() {
        for (values, expected, tolerance) in [
            (two_groups(50, 1.0, 2.0), 0.4752208320391178, 0.05),
            (two_groups(50, 1.0, 2.5), 0.06367079554071553, 0.025),
            (two_groups(100, 0.7, 1.2), 0.0936662523179217, 0.03),
            (two_groups(100, 0.7, 1.8), 0.00011665925080794892, 0.005),
        ] {
            let (_, p) = dip_test(&values);
            assert!((p - expected).abs() < tolerance, "p {p} against {expected}");
        }
    }

    #[test]
    fn uniform_samples_pass_and_the_dip_is_bounded() {
        for n in [4usize, 9, 33, 250, 777] {
            let values = sorted((0..n).map(|i| uniform(5, 6, i as u64)).collect());
            let (dip, p) = dip_test(&values);
            assert!(dip >= 0.5 / n as f64 && dip <= 0.25, "n {n}: dip {dip}");
            assert!(p > 0.01, "n {n}: p {p}");
        }
        assert_eq!(dip_statistic(&[2.0, 2.0, 2.0, 2.0, 2.0]), 0.1);
    }
}
