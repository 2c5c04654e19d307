//! Unit templates (mean waveforms), their summaries, and the merge of units
//! that are one neuron split across neighbourhoods or by amplitude drift.

use rayon::prelude::*;
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

impl TemplateSummary {
    /// Distance between two templates' positions, µm.
    pub fn distance_um(&self, other: &TemplateSummary) -> f64 {
        (self.x_um - other.x_um).hypot(self.y_um - other.y_um)
    }
}

impl Template {
    pub fn summarise(&self, electrodes: &[Electrode]) -> TemplateSummary {
        let troughs: Vec<f64> = self.values.iter().map(|row| row.iter().copied().fold(0.0, f64::min)).collect();
        let (best, trough_uv) =
            troughs.iter().enumerate().fold((0, 0.0), |b, (i, &t)| if t < b.1 { (i, t) } else { b });
        let row = &self.values[best];
        let peak_to_peak_uv = peak_to_peak(row);
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

impl MergeRules {
    /// Whether an alignment has the shape of one neuron (correlation).
    pub fn alike(&self, alignment: &Alignment) -> bool {
        alignment.correlation >= self.min_correlation
    }

    /// Whether it has both the shape and the amplitude of one neuron.
    pub fn accepts(&self, alignment: &Alignment) -> bool {
        self.alike(alignment) && alignment.amplitude_ratio >= self.min_amplitude_ratio
    }
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
    /// electrodes in order) over a's frames, 0 where b has no frame, less
    /// its parts along the two waveforms' slopes (timing, not shape).
    pub axis: Vec<f64>,
    /// Entries of the axis left out (detection electrodes near the sample).
    pub masked: Vec<bool>,
    /// Orthonormal directions removed from the axis (the slopes; zero
    /// where masked).
    pub removed: Vec<Vec<f64>>,
    /// a's and b's templates (b aligned), frame-major like the axis, with
    /// the masked entries and the removed directions taken out (P a, P b).
    pub a_kept: Vec<f64>,
    pub b_kept: Vec<f64>,
}

impl Candidate {
    /// A spike's projection on the axis, from its waveform on the axis
    /// electrodes (frame-major, read at a's timing). A spike that was
    /// averaged into its own unit's template (`own`: whether the unit is b,
    /// and how many spikes that template averaged) is projected on the axis
    /// made without it (leave one out): otherwise each spike leans towards
    /// its own unit's template by its own noise, and two halves of one
    /// neuron would look like two modes.
    ///
    /// With P the projection that drops the masked entries and the removed
    /// directions (symmetric, idempotent) and w = P(a − b): the projection
    /// is x·w, and leaving x out of a's template of n spikes adds
    /// (x·Pa − x·Px)/(n − 1), where x·Px = |masked x|² − Σ (x·r)² over the
    /// removed directions r. One pass over the waveform, no copy.
    pub fn projection(&self, waveform: &[f32], own: Option<(bool, usize)>) -> f64 {
        let (mut on_axis, mut on_a, mut on_b, mut kept_square) = (0.0, 0.0, 0.0, 0.0);
        for (i, (&v, &masked)) in waveform.iter().zip(&self.masked).enumerate() {
            if masked {
                continue;
            }
            let v = v as f64;
            on_axis += v * self.axis[i];
            on_a += v * self.a_kept[i];
            on_b += v * self.b_kept[i];
            kept_square += v * v;
        }
        for r in &self.removed {
            let along: f64 = waveform.iter().zip(r).map(|(&v, &r)| v as f64 * r).sum();
            kept_square -= along * along;
        }
        match own {
            Some((false, n)) if n > 1 => on_axis + (on_a - kept_square) / (n - 1) as f64,
            Some((true, n)) if n > 1 => on_axis - (on_b - kept_square) / (n - 1) as f64,
            _ => on_axis,
        }
    }
}

/// A value at frame k computed from a's and b's rows on one electrode.
type RowValue<'f> = dyn Fn(&[f64], &[f64], i64) -> f64 + 'f;

/// Frames on each side of the spike's own sample that the axis leaves out
/// on the electrodes the two units were detected on (see [`classify_pairs`]).
const DETECTION_GUARD_FRAMES: i64 = 2;

/// Pairs (a < b) of units whose template positions are at most `max_distance_um` apart.
pub fn near_pairs(summaries: &[TemplateSummary], max_distance_um: f64) -> Vec<(usize, usize)> {
    let n = summaries.len();
    (0..n)
        .flat_map(|a| (a + 1..n).map(move |b| (a, b)))
        .filter(|&(a, b)| summaries[a].distance_um(&summaries[b]) <= max_distance_um)
        .collect()
}

/// What the templates say of the pairs of units within the merge distance.
#[derive(Debug, Clone, PartialEq)]
pub struct PairClasses {
    /// Pairs that [`MergeRules`] lets through, in order of (a, b), to be tested.
    pub candidates: Vec<Candidate>,
    /// Pairs of one shape but amplitudes too different for one neuron:
    /// never to be merged, not even through a third unit of middling
    /// amplitude.
    pub apart: Vec<(usize, usize)>,
}

/// Sort the pairs of units within the merge distance into candidates
/// (with the axis each is tested on) and pairs kept apart.
///
/// `detected_on` is each unit's detection electrode and `anchor` the frame
/// of the spike's own sample in a template. When two units were detected
/// on different electrodes, the axis leaves out those electrodes within
/// ±2 frames of each unit's sample: there every spike carries the noise
/// that made its electrode win and marked its sample, which would part
/// one neuron's spikes by where they were detected.
pub fn classify_pairs(
    templates: &[Template],
    summaries: &[TemplateSummary],
    detected_on: &[usize],
    anchor: i64,
    rules: &MergeRules,
) -> PairClasses {
    enum Class {
        Candidate(Box<Candidate>),
        Apart(usize, usize),
        Unlike,
    }
    let classes: Vec<Class> = near_pairs(summaries, rules.max_distance_um)
        .into_par_iter()
        .map(|(a, b)| match align(&templates[a], &templates[b], rules.max_shift_frames) {
            Some(alignment) if rules.accepts(&alignment) => {
                Class::Candidate(Box::new(candidate(templates, detected_on, anchor, a, b, alignment)))
            }
            Some(alignment) if rules.alike(&alignment) => Class::Apart(a, b),
            _ => Class::Unlike,
        })
        .collect();
    let mut classified = PairClasses { candidates: Vec::new(), apart: Vec::new() };
    for class in classes {
        match class {
            Class::Candidate(c) => classified.candidates.push(*c),
            Class::Apart(a, b) => classified.apart.push((a, b)),
            Class::Unlike => {}
        }
    }
    classified
}

/// The candidate pair (a, b) with its axis.
fn candidate(
    templates: &[Template],
    detected_on: &[usize],
    anchor: i64,
    a: usize,
    b: usize,
    alignment: Alignment,
) -> Candidate {
    let (ta, tb) = (&templates[a], &templates[b]);
    let rows = visible_shared(ta, tb);
    let length = ta.values.first().map_or(0, Vec::len) as i64;
    let at = |row: &[f64], k: i64| if (0..length).contains(&k) { row[k as usize] } else { 0.0 };
    let frame_major = |value: &RowValue| -> Vec<f64> {
        (0..length).flat_map(|k| rows.iter().map(move |(_, ra, rb)| value(ra, rb, k))).collect()
    };
    let shift = alignment.shift;
    let mut masked = vec![false; length as usize * rows.len()];
    if detected_on[a] != detected_on[b] {
        for (p, (channel, _, _)) in rows.iter().enumerate() {
            if *channel != detected_on[a] && *channel != detected_on[b] {
                continue;
            }
            for centre in [anchor, anchor - shift] {
                for k in (centre - DETECTION_GUARD_FRAMES).max(0)..=(centre + DETECTION_GUARD_FRAMES).min(length - 1) {
                    masked[k as usize * rows.len() + p] = true;
                }
            }
        }
    }
    let unmasked = |mut values: Vec<f64>| {
        values.iter_mut().zip(&masked).filter(|(_, &m)| m).for_each(|(v, _)| *v = 0.0);
        values
    };
    // Without the two waveforms' slopes: a spike's timing jitter (which
    // electrode's sample marked it) moves it along the slope, and would
    // part one neuron's spikes in two.
    let slope_a = unmasked(frame_major(&|ra, _, k| 0.5 * (at(ra, k + 1) - at(ra, k - 1))));
    let slope_b = unmasked(frame_major(&|_, rb, k| 0.5 * (at(rb, k + shift + 1) - at(rb, k + shift - 1))));
    let removed = orthonormal_basis(&[slope_a, slope_b]);
    let kept = |values: Vec<f64>| {
        let mut values = unmasked(values);
        remove(&mut values, &removed);
        values
    };
    let axis = kept(frame_major(&|ra, rb, k| at(ra, k) - at(rb, k + shift)));
    let a_kept = kept(frame_major(&|ra, _, k| at(ra, k)));
    let b_kept = kept(frame_major(&|_, rb, k| at(rb, k + shift)));
    let channels = rows.iter().map(|r| r.0).collect();
    Candidate { a, b, alignment, channels, axis, masked, removed, a_kept, b_kept }
}

/// An orthonormal basis of `directions` (Gram–Schmidt; negligible ones are skipped).
fn orthonormal_basis(directions: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let dot = |x: &[f64], y: &[f64]| x.iter().zip(y).map(|(a, b)| a * b).sum::<f64>();
    let mut basis: Vec<Vec<f64>> = Vec::new();
    for direction in directions {
        let scale = dot(direction, direction).sqrt();
        let mut d = direction.clone();
        remove(&mut d, &basis);
        let norm = dot(&d, &d).sqrt();
        if norm > 1e-9 * scale && norm > 0.0 {
            d.iter_mut().for_each(|x| *x /= norm);
            basis.push(d);
        }
    }
    basis
}

/// Remove from `vector` its components along the orthonormal `basis`.
fn remove(vector: &mut [f64], basis: &[Vec<f64>]) {
    for b in basis {
        let c: f64 = vector.iter().zip(b).map(|(x, y)| x * y).sum();
        vector.iter_mut().zip(b).for_each(|(x, y)| *x -= c * y);
    }
}

/// Group units linked by accepted pairs, in the order given (merging is
/// transitive), except that two groups holding a `refused` pair between
/// them are never joined: a pair the dip test found to be two neurons
/// cannot be chained together through a third unit. Returns each unit's
/// group, numbered from 0 in order of each group's first unit.
pub fn merge_groups(
    n_units: usize,
    accepted: impl IntoIterator<Item = (usize, usize)>,
    refused: &[(usize, usize)],
) -> Vec<usize> {
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
        if ra == rb {
            continue;
        }
        let apart = refused.iter().any(|&(x, y)| {
            let (rx, ry) = (root(&mut parent, x), root(&mut parent, y));
            (rx == ra && ry == rb) || (rx == rb && ry == ra)
        });
        if !apart {
            parent[ra.max(rb)] = ra.min(rb);
        }
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
        let detected_on = vec![0; templates.len()];
        let classes = classify_pairs(templates, &summaries, &detected_on, 5, &rules);
        classes.candidates.iter().map(|c| (c.a, c.b, c.alignment.shift)).collect()
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
        // Unit 3 has unit 0's shape at a third of its size: kept apart from 0 (and the others).
        let summaries: Vec<_> = templates.iter().map(|t| t.summarise(&electrodes())).collect();
        let rules =
            MergeRules { max_distance_um: 40.0, min_correlation: 0.9, min_amplitude_ratio: 0.6, max_shift_frames: 3 };
        let apart = classify_pairs(&templates, &summaries, &[0; 4], 5, &rules).apart;
        assert_eq!(apart, vec![(0, 3), (1, 3), (2, 3)]);
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
    fn the_axis_ignores_timing_but_keeps_amplitude() {
        // b is a two-thirds copy of a: the axis is along the waveform itself.
        let a = template(&[0, 1], 30.0, 0);
        let b = template(&[0, 1], 20.0, 0);
        let summaries: Vec<_> = [&a, &b].iter().map(|t| t.summarise(&electrodes())).collect();
        let rules =
            MergeRules { max_distance_um: 40.0, min_correlation: 0.9, min_amplitude_ratio: 0.5, max_shift_frames: 0 };
        let candidate = &classify_pairs(&[a.clone(), b], &summaries, &[0, 0], 5, &rules).candidates[0];
        let waveform: Vec<f64> = (0..16).flat_map(|k| [a.values[0][k], a.values[1][k]]).collect();
        let dot = |x: &[f64], y: &[f64]| x.iter().zip(y).map(|(p, q)| p * q).sum::<f64>();
        let cosine = dot(&candidate.axis, &waveform)
            / (dot(&candidate.axis, &candidate.axis) * dot(&waveform, &waveform)).sqrt();
        assert!(cosine > 0.99, "{cosine}");
        // A copy of a a fraction of a frame late projects where a does.
        let late: Vec<f64> = (0..16)
            .flat_map(|k| {
                let v = -30.0 * (-(k as f64 - 5.3).powi(2) / 4.0).exp();
                [v, v]
            })
            .collect();
        let (on_a, on_late) = (dot(&candidate.axis, &waveform), dot(&candidate.axis, &late));
        assert!((on_a - on_late).abs() < 0.02 * on_a.abs(), "{on_a} {on_late}");
    }

    // The one-pass leave-one-out projection against the plain computation:
    // mask, remove the slopes, rebuild a's template without the spike, and
    // project on the difference (detected on different electrodes, shifted).
    #[test]
    fn leave_one_out_projection_matches_the_plain_computation() {
        let mut rng = spikeyard_contract::testing::TestRng::new(8);
        let mut a = template(&[0, 1, 2], 40.0, 0);
        let mut b = template(&[0, 1, 2], 36.0, 1);
        for row in a.values.iter_mut().chain(b.values.iter_mut()) {
            row.iter_mut().for_each(|v| *v += rng.normal());
        }
        let summaries: Vec<_> = [&a, &b].iter().map(|t| t.summarise(&electrodes())).collect();
        let rules =
            MergeRules { max_distance_um: 40.0, min_correlation: 0.8, min_amplitude_ratio: 0.5, max_shift_frames: 2 };
        let c = &classify_pairs(&[a.clone(), b.clone()], &summaries, &[0, 1], 5, &rules).candidates[0];
        assert!(c.masked.iter().any(|&m| m) && c.removed.len() == 2);
        let waveform: Vec<f32> = (0..c.axis.len()).map(|_| (10.0 * rng.normal()) as f32).collect();
        let project = |v: &[f64]| -> Vec<f64> {
            let mut v: Vec<f64> = v.iter().zip(&c.masked).map(|(&x, &m)| if m { 0.0 } else { x }).collect();
            remove(&mut v, &c.removed);
            v
        };
        let x: Vec<f64> = waveform.iter().map(|&v| v as f64).collect();
        let a_raw: Vec<f64> = (0..16).flat_map(|k| a.values.iter().map(move |row| row[k])).collect();
        let b_raw: Vec<f64> = (0..16i64)
            .flat_map(|k| {
                b.values.iter().map(move |row| {
                    if (0..16).contains(&(k + c.alignment.shift)) {
                        row[(k + c.alignment.shift) as usize]
                    } else {
                        0.0
                    }
                })
            })
            .collect();
        let n = 7usize;
        let a_without: Vec<f64> = a_raw.iter().zip(&x).map(|(t, v)| (n as f64 * t - v) / (n - 1) as f64).collect();
        let axis = project(&a_without.iter().zip(&b_raw).map(|(p, q)| p - q).collect::<Vec<_>>());
        let expected: f64 = x.iter().zip(&axis).map(|(p, q)| p * q).sum();
        let got = c.projection(&waveform, Some((false, n)));
        assert!((got - expected).abs() < 1e-9 * expected.abs().max(1.0), "{got} vs {expected}");
        // Without leaving out, it is the plain dot with the axis.
        let plain: f64 = x.iter().zip(&c.axis).map(|(p, q)| p * q).sum();
        assert!((c.projection(&waveform, None) - plain).abs() < 1e-9 * plain.abs().max(1.0));
    }

    #[test]
    fn merging_is_transitive_and_numbered_by_first_unit() {
        assert_eq!(merge_groups(5, [(3, 1), (4, 3)], &[]), vec![0, 1, 2, 1, 1]);
    }

    #[test]
    fn a_refused_pair_is_not_chained_together_through_a_third_unit() {
        // 0–1 accepted first, then 1–2 would join 2 to 0, refused as a pair.
        assert_eq!(merge_groups(3, [(0, 1), (1, 2)], &[(2, 0)]), vec![0, 0, 1]);
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
