//! Unit templates (mean waveforms), their summaries, and the merge of units
//! that are one neuron split across neighbourhoods or by amplitude drift.

use spikeyard_contract::Electrode;

/// Mean waveform of a unit on the electrodes near it.
#[derive(Debug, Clone, PartialEq)]
pub struct Template {
    pub channels: Vec<usize>,
    /// One row per channel, µV, frames −before..=after around the spike.
    pub values: Vec<Vec<f64>>,
    /// Spikes averaged.
    pub n_averaged: usize,
}

/// What a template says about its unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TemplateSummary {
    /// Electrode with the deepest trough.
    pub channel: usize,
    /// Trough there, µV (negative).
    pub trough_uv: f64,
    pub peak_to_peak_uv: f64,
    /// Trough-depth-weighted centre of mass, µm.
    pub x_um: f64,
    pub y_um: f64,
}

impl Template {
    pub fn summarise(&self, electrodes: &[Electrode]) -> TemplateSummary {
        let troughs: Vec<f64> = self.values.iter().map(|row| row.iter().copied().fold(0.0, f64::min)).collect();
        let (best, trough_uv) =
            troughs.iter().enumerate().fold((0, 0.0), |b, (i, &t)| if t < b.1 { (i, t) } else { b });
        let row = &self.values[best];
        let peak_to_peak_uv =
            row.iter().copied().fold(f64::MIN, f64::max) - row.iter().copied().fold(f64::MAX, f64::min);
        // Electrodes with at least a fifth of the deepest trough weigh in, so
        // that noise on far electrodes does not pull the position.
        let (mut x, mut y, mut total) = (0.0, 0.0, 0.0);
        for (&channel, &trough) in self.channels.iter().zip(&troughs) {
            if trough <= 0.2 * trough_uv {
                let weight = -trough;
                x += weight * electrodes[channel].x_um;
                y += weight * electrodes[channel].y_um;
                total += weight;
            }
        }
        let main = self.channels[best];
        let (x_um, y_um) =
            if total > 0.0 { (x / total, y / total) } else { (electrodes[main].x_um, electrodes[main].y_um) };
        TemplateSummary { channel: main, trough_uv, peak_to_peak_uv, x_um, y_um }
    }
}

/// Pearson correlation of two templates over the electrodes they share
/// (waveforms concatenated); `None` when they share none.
pub fn shared_correlation(a: &Template, b: &Template) -> Option<f64> {
    let mut xs = Vec::new();
    let mut ys = Vec::new();
    for (i, channel) in a.channels.iter().enumerate() {
        if let Some(j) = b.channels.iter().position(|c| c == channel) {
            xs.extend_from_slice(&a.values[i]);
            ys.extend_from_slice(&b.values[j]);
        }
    }
    if xs.is_empty() {
        return None;
    }
    let n = xs.len() as f64;
    let (mx, my) = (xs.iter().sum::<f64>() / n, ys.iter().sum::<f64>() / n);
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (x, y) in xs.iter().zip(&ys) {
        sxy += (x - mx) * (y - my);
        sxx += (x - mx) * (x - mx);
        syy += (y - my) * (y - my);
    }
    (sxx > 0.0 && syy > 0.0).then(|| sxy / (sxx * syy).sqrt())
}

/// Group units whose templates sit within `max_distance_um` of each other
/// and correlate at least `min_correlation` on shared electrodes (merging is
/// transitive). Returns each unit's group, numbered from 0 in order of
/// each group's first unit.
pub fn merge_groups(
    templates: &[Template],
    summaries: &[TemplateSummary],
    max_distance_um: f64,
    min_correlation: f64,
) -> Vec<usize> {
    let n = templates.len();
    let mut parent: Vec<usize> = (0..n).collect();
    fn root(parent: &mut [usize], mut i: usize) -> usize {
        while parent[i] != i {
            parent[i] = parent[parent[i]];
            i = parent[i];
        }
        i
    }
    for a in 0..n {
        for b in a + 1..n {
            let (sa, sb) = (&summaries[a], &summaries[b]);
            if (sa.x_um - sb.x_um).hypot(sa.y_um - sb.y_um) > max_distance_um {
                continue;
            }
            if shared_correlation(&templates[a], &templates[b]).is_some_and(|r| r >= min_correlation) {
                let (ra, rb) = (root(&mut parent, a), root(&mut parent, b));
                parent[ra.max(rb)] = ra.min(rb);
            }
        }
    }
    let mut numbering = vec![usize::MAX; n];
    let mut next = 0;
    (0..n)
        .map(|i| {
            let r = root(&mut parent, i);
            if numbering[r] == usize::MAX {
                numbering[r] = next;
                next += 1;
            }
            numbering[r]
        })
        .collect()
}

/// Spike-count-weighted mean of several templates, per electrode over the
/// templates that have it.
pub fn combine(templates: &[&Template]) -> Template {
    let mut channels: Vec<usize> = templates.iter().flat_map(|t| t.channels.iter().copied()).collect();
    channels.sort_unstable();
    channels.dedup();
    let length = templates.iter().find_map(|t| t.values.first().map(Vec::len)).unwrap_or(0);
    let values = channels
        .iter()
        .map(|channel| {
            let mut sum = vec![0.0; length];
            let mut weight = 0.0;
            for t in templates {
                if let Some(i) = t.channels.iter().position(|c| c == channel) {
                    for (s, v) in sum.iter_mut().zip(&t.values[i]) {
                        *s += v * t.n_averaged as f64;
                    }
                    weight += t.n_averaged as f64;
                }
            }
            sum.into_iter().map(|s| if weight > 0.0 { s / weight } else { 0.0 }).collect()
        })
        .collect();
    Template { channels, values, n_averaged: templates.iter().map(|t| t.n_averaged).sum() }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn template(channels: &[usize], scale: f64, shift: usize) -> Template {
        let shape = |k: usize| -(-(k as f64 - 5.0 - shift as f64).powi(2) / 4.0).exp();
        Template {
            channels: channels.to_vec(),
            values: channels.iter().map(|_| (0..16).map(|k| scale * shape(k)).collect()).collect(),
            n_averaged: 10,
        }
    }

    fn electrodes() -> Vec<Electrode> {
        (0..6).map(|c| Electrode { channel: c, x_um: c as f64 * 20.0, y_um: 0.0, label: None, group: None }).collect()
    }

    #[test]
    fn same_shape_nearby_merges_and_a_different_shape_does_not() {
        let templates = vec![template(&[0, 1, 2], 50.0, 0), template(&[1, 2, 3], 40.0, 0), template(&[1, 2], 45.0, 4)];
        let summaries: Vec<_> = templates.iter().map(|t| t.summarise(&electrodes())).collect();
        assert_eq!(merge_groups(&templates, &summaries, 40.0, 0.9), vec![0, 0, 1]);
        // Too far apart: no merge even with the same shape.
        assert_eq!(merge_groups(&templates, &summaries, 5.0, 0.9), vec![0, 1, 2]);
    }

    #[test]
    fn correlation_of_a_scaled_copy_is_one() {
        let (a, b) = (template(&[0, 1], 10.0, 0), template(&[1, 2], 30.0, 0));
        assert!((shared_correlation(&a, &b).unwrap() - 1.0).abs() < 1e-12);
        assert!(shared_correlation(&a, &template(&[4], 1.0, 0)).is_none());
    }

    #[test]
    fn summary_finds_the_deepest_electrode_and_centre() {
        let mut t = template(&[0, 1, 2], 10.0, 0);
        for (row, scale) in t.values.iter_mut().zip([1.0, 3.0, 1.0]) {
            row.iter_mut().for_each(|v| *v *= scale);
        }
        let s = t.summarise(&electrodes());
        assert_eq!(s.channel, 1);
        assert!((s.trough_uv + 30.0).abs() < 1e-9 && (s.x_um - 20.0).abs() < 1e-9, "{s:?}");
    }

    #[test]
    fn combined_template_weights_by_spike_count() {
        let a = Template { channels: vec![0], values: vec![vec![1.0, 1.0]], n_averaged: 1 };
        let b = Template { channels: vec![0, 1], values: vec![vec![4.0, 4.0], vec![2.0, 2.0]], n_averaged: 3 };
        let c = combine(&[&a, &b]);
        assert_eq!(c.channels, vec![0, 1]);
        assert_eq!(c.values, vec![vec![3.25, 3.25], vec![2.0, 2.0]]);
        assert_eq!(c.n_averaged, 4);
    }
}
