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

/// How two templates compare once aligned.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Alignment {
    /// Frames by which `b` is late: `b` at lag k + shift matches `a` at lag k.
    pub shift: i64,
    /// Pearson correlation of the waveforms, concatenated, on the shared
    /// electrodes where either shows the neuron.
    pub correlation: f64,
    /// Smaller over larger Euclidean norm of the two on those electrodes
    /// and frames: 1 for equal amplitudes, 0.5 when one is half the other.
    pub amplitude_ratio: f64,
}

/// Peak-to-peak of a waveform.
fn peak_to_peak(row: &[f64]) -> f64 {
    row.iter().copied().fold(f64::MIN, f64::max) - row.iter().copied().fold(f64::MAX, f64::min)
}

/// The electrodes two templates share where either shows the neuron (a
/// peak-to-peak at least a fifth of the largest among them), as (channel,
/// a's row, b's row). Electrodes of noise alone would dilute a comparison
/// by the noise of a template averaged from few spikes.
fn visible_shared<'t>(a: &'t Template, b: &'t Template) -> Vec<(usize, &'t [f64], &'t [f64])> {
    let shared: Vec<(usize, &[f64], &[f64], f64)> = a
        .channels
        .iter()
        .enumerate()
        .filter_map(|(i, &channel)| {
            let j = b.channels.iter().position(|&c| c == channel)?;
            let (ra, rb) = (a.values[i].as_slice(), b.values[j].as_slice());
            Some((channel, ra, rb, peak_to_peak(ra).max(peak_to_peak(rb))))
        })
        .collect();
    let largest = shared.iter().map(|s| s.3).fold(0.0, f64::max);
    shared.into_iter().filter(|s| s.3 >= 0.2 * largest).map(|(c, ra, rb, _)| (c, ra, rb)).collect()
}

/// Align `b` on `a` within ±`max_shift` frames over the electrodes they
/// share where either shows the neuron, choosing the shift of highest
/// correlation (the earlier shift on ties); `None` when they share no
/// electrode or a waveform is flat.
pub fn align(a: &Template, b: &Template, max_shift: usize) -> Option<Alignment> {
    let pairs: Vec<(&[f64], &[f64])> = visible_shared(a, b).into_iter().map(|(_, ra, rb)| (ra, rb)).collect();
    let length = pairs.first()?.0.len() as i64;
    let mut best: Option<Alignment> = None;
    for shift in -(max_shift as i64)..=max_shift as i64 {
        let frames = (-shift).max(0)..length.min(length - shift);
        if frames.is_empty() {
            continue;
        }
        let (mut n, mut sx, mut sy, mut sxx, mut syy, mut sxy) = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
        for (x, y) in &pairs {
            for k in frames.clone() {
                let (x, y) = (x[k as usize], y[(k + shift) as usize]);
                n += 1.0;
                sx += x;
                sy += y;
                sxx += x * x;
                syy += y * y;
                sxy += x * y;
            }
        }
        let (vx, vy) = (sxx - sx * sx / n, syy - sy * sy / n);
        if vx <= 0.0 || vy <= 0.0 {
            continue;
        }
        let correlation = (sxy - sx * sy / n) / (vx * vy).sqrt();
        if best.is_none_or(|b| correlation > b.correlation) {
            let (nx, ny) = (sxx.sqrt(), syy.sqrt());
            best = Some(Alignment { shift, correlation, amplitude_ratio: nx.min(ny) / nx.max(ny) });
        }
    }
    best
}

/// When two units may be one neuron, judged on their templates.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MergeRules {
    /// Template positions at most this far apart, µm.
    pub max_distance_um: f64,
    /// Aligned correlation at least this.
    pub min_correlation: f64,
    /// Aligned amplitude ratio at least this.
    pub min_amplitude_ratio: f64,
    /// Alignments tried within ± this many frames.
    pub max_shift_frames: usize,
}

/// A pair of units whose templates pass [`MergeRules`], with the axis on
/// which their spikes are compared before they are merged.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    pub a: usize,
    pub b: usize,
    pub alignment: Alignment,
    /// Electrodes of the axis: shared ones where either template's
    /// peak-to-peak is at least a fifth of the largest among them.
    pub channels: Vec<usize>,
    /// a − b (aligned) on those electrodes, frame-major (frame k, then the
    /// electrodes in order) over a's frames, 0 where b has no frame.
    pub axis: Vec<f64>,
}

/// Every pair of units that [`MergeRules`] lets through, in order of (a, b).
pub fn candidate_pairs(templates: &[Template], summaries: &[TemplateSummary], rules: &MergeRules) -> Vec<Candidate> {
    let n = templates.len();
    let pairs: Vec<(usize, usize)> = (0..n)
        .flat_map(|a| (a + 1..n).map(move |b| (a, b)))
        .filter(|&(a, b)| {
            let (sa, sb) = (&summaries[a], &summaries[b]);
            (sa.x_um - sb.x_um).hypot(sa.y_um - sb.y_um) <= rules.max_distance_um
        })
        .collect();
    pairs
        .into_iter()
        .filter_map(|(a, b)| {
            let alignment = align(&templates[a], &templates[b], rules.max_shift_frames)?;
            if alignment.correlation < rules.min_correlation || alignment.amplitude_ratio < rules.min_amplitude_ratio {
                return None;
            }
            let (ta, tb) = (&templates[a], &templates[b]);
            let rows = visible_shared(ta, tb);
            let length = ta.values.first().map_or(0, Vec::len) as i64;
            let mut axis = vec![0.0; length as usize * rows.len()];
            for k in 0..length {
                let kb = k + alignment.shift;
                for (p, (_, ra, rb)) in rows.iter().enumerate() {
                    let b_value = if (0..length).contains(&kb) { rb[kb as usize] } else { 0.0 };
                    axis[k as usize * rows.len() + p] = ra[k as usize] - b_value;
                }
            }
            Some(Candidate { a, b, alignment, channels: rows.iter().map(|r| r.0).collect(), axis })
        })
        .collect()
}

/// Group units linked by accepted pairs (merging is transitive). Returns
/// each unit's group, numbered from 0 in order of each group's first unit.
pub fn merge_groups(n_units: usize, accepted: impl IntoIterator<Item = (usize, usize)>) -> Vec<usize> {
    let mut parent: Vec<usize> = (0..n_units).collect();
    fn root(parent: &mut [usize], mut i: usize) -> usize {
        while parent[i] != i {
            parent[i] = parent[parent[i]];
            i = parent[i];
        }
        i
    }
    for (a, b) in accepted {
        let (ra, rb) = (root(&mut parent, a), root(&mut parent, b));
        parent[ra.max(rb)] = ra.min(rb);
    }
    let mut numbering = vec![usize::MAX; n_units];
    let mut next = 0;
    (0..n_units)
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
/// templates that have it. Each comes with its shift: its lag k + shift is
/// the result's lag k (frames beyond its ends take its end values).
pub fn combine(templates: &[(&Template, i64)]) -> Template {
    let mut channels: Vec<usize> = templates.iter().flat_map(|(t, _)| t.channels.iter().copied()).collect();
    channels.sort_unstable();
    channels.dedup();
    let length = templates.iter().find_map(|(t, _)| t.values.first().map(Vec::len)).unwrap_or(0);
    let values = channels
        .iter()
        .map(|channel| {
            let mut sum = vec![0.0; length];
            let mut weight = 0.0;
            for (t, shift) in templates {
                if let Some(i) = t.channels.iter().position(|c| c == channel) {
                    let row = &t.values[i];
                    for (k, s) in sum.iter_mut().enumerate() {
                        let at = (k as i64 + shift).clamp(0, row.len() as i64 - 1) as usize;
                        *s += row[at] * t.n_averaged as f64;
                    }
                    weight += t.n_averaged as f64;
                }
            }
            sum.into_iter().map(|s| if weight > 0.0 { s / weight } else { 0.0 }).collect()
        })
        .collect();
    Template { channels, values, n_averaged: templates.iter().map(|(t, _)| t.n_averaged).sum() }
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

    fn candidates(templates: &[Template], max_distance_um: f64) -> Vec<(usize, usize, i64)> {
        let summaries: Vec<_> = templates.iter().map(|t| t.summarise(&electrodes())).collect();
        let rules = MergeRules { max_distance_um, min_correlation: 0.9, min_amplitude_ratio: 0.6, max_shift_frames: 3 };
        candidate_pairs(templates, &summaries, &rules).iter().map(|c| (c.a, c.b, c.alignment.shift)).collect()
    }

    #[test]
    fn same_shape_and_amplitude_nearby_is_a_candidate_even_when_misaligned() {
        // Unit 2 is unit 0's shape two frames late; unit 3 is a third of unit 0's size.
        let templates = vec![
            template(&[0, 1, 2], 50.0, 0),
            template(&[1, 2, 3], 40.0, 0),
            template(&[1, 2], 45.0, 2),
            template(&[0, 1, 2], 15.0, 0),
        ];
        assert_eq!(candidates(&templates, 40.0), vec![(0, 1, 0), (0, 2, 2), (1, 2, 2)]);
        // Too far apart: no candidate even with the same shape.
        assert!(candidates(&templates, 5.0).is_empty());
    }

    #[test]
    fn alignment_of_a_scaled_copy_has_correlation_one_and_its_amplitude_ratio() {
        let (a, b) = (template(&[0, 1], 10.0, 0), template(&[1, 2], 30.0, 1));
        let alignment = align(&a, &b, 2).unwrap();
        assert_eq!(alignment.shift, 1);
        assert!((alignment.correlation - 1.0).abs() < 1e-9 && (alignment.amplitude_ratio - 1.0 / 3.0).abs() < 1e-9);
        assert!(align(&a, &template(&[4], 1.0, 0), 2).is_none());
    }

    #[test]
    fn merging_is_transitive_and_numbered_by_first_unit() {
        assert_eq!(merge_groups(5, [(3, 1), (4, 3)]), vec![0, 1, 2, 1, 1]);
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
        let c = combine(&[(&a, 0), (&b, 0)]);
        assert_eq!(c.channels, vec![0, 1]);
        assert_eq!(c.values, vec![vec![3.25, 3.25], vec![2.0, 2.0]]);
        assert_eq!(c.n_averaged, 4);
        // Shifted by one frame, the end value repeats.
        let d = Template { channels: vec![0], values: vec![vec![1.0, 2.0, 3.0]], n_averaged: 1 };
        assert_eq!(combine(&[(&d, 1)]).values, vec![vec![2.0, 3.0, 3.0]]);
        assert_eq!(combine(&[(&d, -1)]).values, vec![vec![1.0, 1.0, 2.0]]);
    }
}
