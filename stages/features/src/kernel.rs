//! Snippet kernels: electrode neighbourhoods, sub-sample alignment of the
//! extremum, snippet cutting by cubic interpolation, and the centre of mass
//! position estimate.

use spikeyard_contract::Electrode;

/// For every channel: itself, then up to `max_channels − 1` other channels
/// within `radius_um`, nearest first (ties by channel number), with distances.
pub fn neighbourhoods(electrodes: &[Electrode], radius_um: f64, max_channels: usize) -> Vec<Vec<(usize, f64)>> {
    electrodes
        .iter()
        .map(|a| {
            let mut near: Vec<(usize, f64)> = electrodes
                .iter()
                .map(|b| (b.channel, (a.x_um - b.x_um).hypot(a.y_um - b.y_um)))
                .filter(|(c, d)| *c == a.channel || *d <= radius_um)
                .collect();
            near.sort_by(|x, y| x.1.total_cmp(&y.1).then(x.0.cmp(&y.0)));
            near.truncate(max_channels);
            near
        })
        .collect()
}

/// Offset (−0.5..0.5 frames) of the extremum of the parabola through three
/// samples around a sampled extremum.
pub fn subsample_offset(before: f64, at: f64, after: f64) -> f64 {
    let curvature = before - 2.0 * at + after;
    if curvature.abs() < f64::EPSILON * (before.abs() + at.abs() + after.abs()).max(1.0) {
        return 0.0;
    }
    (0.5 * (before - after) / curvature).clamp(-0.5, 0.5)
}

/// Where the snippet starting `before` frames ahead of the fractional frame
/// `centre` lies: its first whole frame, and the fraction past it.
pub fn snippet_start(centre: f64, before: usize) -> (i64, f64) {
    let start = centre - before as f64;
    let base = start.floor();
    (base as i64, start - base)
}

/// Cut a snippet from one channel's frames, `column[i * stride]` being the
/// signal at whole frame `base − 1 + i` ([`snippet_start`]): `out[j]` is
/// the signal at `base + t + j`, by Catmull–Rom cubic interpolation (exact
/// at whole frames). `column` holds `out.len() + 3` frames.
pub fn cut_snippet(column: &[f32], stride: usize, t: f64, out: &mut [f64]) {
    let value = |i: usize| column[i * stride] as f64;
    // Frames k − 1 ..= k + 2 around output j's frame k = base + j, slid
    // along: each frame is read once, not four times.
    let mut p = [value(0), value(1), value(2), value(3)];
    for (j, o) in out.iter_mut().enumerate() {
        if j > 0 {
            p = [p[1], p[2], p[3], value(j + 3)];
        }
        let [p0, p1, p2, p3] = p;
        if t == 0.0 {
            *o = p1;
            continue;
        }
        *o = p1 + 0.5 * t * (p2 - p0 + t * (2.0 * p0 - 5.0 * p1 + 4.0 * p2 - p3 + t * (3.0 * (p1 - p2) + p3 - p0)));
    }
}

/// Trough-depth-weighted centre of mass of the electrodes, µm; the first
/// electrode's position when no snippet goes below zero.
pub fn centre_of_mass(electrodes: &[Electrode], channels: &[(usize, f64)], troughs_uv: &[f64]) -> (f64, f64) {
    let (mut x, mut y, mut total) = (0.0, 0.0, 0.0);
    for (&(channel, _), &trough) in channels.iter().zip(troughs_uv) {
        let weight = (-trough).max(0.0);
        x += weight * electrodes[channel].x_um;
        y += weight * electrodes[channel].y_um;
        total += weight;
    }
    if total > 0.0 {
        (x / total, y / total)
    } else {
        let e = &electrodes[channels[0].0];
        (e.x_um, e.y_um)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parabola_finds_the_true_extremum_of_a_sampled_parabola() {
        // y = (t − 0.3)², sampled at −1, 0, 1: the minimum is at +0.3.
        let f = |t: f64| (t - 0.3) * (t - 0.3);
        assert!((subsample_offset(f(-1.0), f(0.0), f(1.0)) - 0.3).abs() < 1e-12);
        assert_eq!(subsample_offset(1.0, 1.0, 1.0), 0.0);
    }

    #[test]
    fn cubic_interpolation_is_exact_at_whole_frames_and_on_quadratics() {
        let n_channels = 2;
        let frames: Vec<f32> = (0..40)
            .flat_map(|k| {
                let t = k as f32;
                [t * t * 0.01, 5.0]
            })
            .collect();
        let mut out = [0.0; 5];
        // Frame 20 less 2 frames before: whole frame 18, read from 17 on.
        let (base, t) = snippet_start(20.0, 2);
        assert_eq!((base, t), (18, 0.0));
        cut_snippet(&frames[17 * n_channels..], n_channels, t, &mut out);
        assert_eq!(out.to_vec(), (18..23).map(|k| frames[k * n_channels] as f64).collect::<Vec<_>>());
        // A quadratic is reproduced exactly by Catmull–Rom between samples.
        let (base, t) = snippet_start(20.25, 2);
        assert_eq!((base, t), (18, 0.25));
        cut_snippet(&frames[17 * n_channels..], n_channels, t, &mut out);
        for (j, v) in out.iter().enumerate() {
            let t = 18.25 + j as f64;
            assert!((v - t * t * 0.01).abs() < 1e-4, "{v} vs {}", t * t * 0.01);
        }
    }

    #[test]
    fn neighbourhood_lists_itself_first_then_nearest() {
        let electrodes: Vec<Electrode> = [(0.0, 0.0), (10.0, 0.0), (0.0, 20.0), (500.0, 0.0)]
            .iter()
            .enumerate()
            .map(|(c, &(x, y))| Electrode { channel: c, x_um: x, y_um: y, label: None, group: None })
            .collect();
        let n = neighbourhoods(&electrodes, 100.0, 3);
        assert_eq!(n[0].iter().map(|x| x.0).collect::<Vec<_>>(), vec![0, 1, 2]);
        assert_eq!(n[3].iter().map(|x| x.0).collect::<Vec<_>>(), vec![3]);
    }

    #[test]
    fn centre_of_mass_weights_by_trough_depth() {
        let electrodes: Vec<Electrode> = [(0.0, 0.0), (30.0, 0.0)]
            .iter()
            .enumerate()
            .map(|(c, &(x, y))| Electrode { channel: c, x_um: x, y_um: y, label: None, group: None })
            .collect();
        let (x, y) = centre_of_mass(&electrodes, &[(0, 0.0), (1, 30.0)], &[-30.0, -10.0]);
        assert!((x - 7.5).abs() < 1e-12 && y == 0.0);
    }
}
