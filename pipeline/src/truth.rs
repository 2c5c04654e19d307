//! Scoring detections against a simulation's ground truth.
//!
//! A true spike is found when an event lies within ±`window_frames` of it
//! on an electrode within `radius_um` of the unit's main electrode; each
//! event can find one spike only (one-to-one, nearest in time first).
//! Recall is per unit; precision is over all events (an event that finds
//! no spike of any unit is a false detection). Common practice, no single
//! source (REFERENCES.md S1 describes the same matching for sorted units).

use crate::simulate::{template_main_channel, Template, TruthSpike};
use spikeyard_contract::Electrode;
use spikeyard_filter::kernel::{FilterEngine, Scratch};

/// Recall of one ground-truth unit.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitRecall {
    pub unit: usize,
    pub channel: usize,
    /// Trough of the band-passed template on the main channel ÷ noise σ there.
    pub amplitude_sigma: f64,
    pub n_truth: usize,
    pub n_found: usize,
}

impl UnitRecall {
    pub fn recall(&self) -> f64 {
        self.n_found as f64 / self.n_truth.max(1) as f64
    }
}

/// Detection scores of a run.
#[derive(Debug, Clone)]
pub struct DetectionScore {
    pub units: Vec<UnitRecall>,
    pub n_events: usize,
    pub n_events_matched: usize,
}

impl DetectionScore {
    pub fn precision(&self) -> f64 {
        self.n_events_matched as f64 / self.n_events.max(1) as f64
    }
}

/// Depth of a template's trough on its main channel after the band-pass
/// (zero phase), µV (positive).
pub fn filtered_trough_uv(template: &Template, engine: &FilterEngine) -> f64 {
    let (channel, _) = template_main_channel(template);
    let row = template.channels.iter().position(|&c| c == channel).map_or(&[][..], |i| &template.values_uv[i][..]);
    let margin = engine.margin_frames();
    let mut padded = vec![0.0f32; row.len() + 2 * margin];
    padded[margin..margin + row.len()].copy_from_slice(row);
    let mut out = vec![0.0f32; padded.len()];
    engine.filter_channel(&padded, 0, 0, 0, &mut out, &mut Scratch::default());
    -out.iter().copied().fold(0.0f32, f32::min) as f64
}

/// What a simulation knows: its spikes, its units' templates, its array.
pub struct Truth<'a> {
    pub spikes: &'a [TruthSpike],
    pub templates: &'a [Template],
    pub electrodes: &'a [Electrode],
}

/// Match events `(sample, channel)` (sorted by sample) to true spikes.
/// `noise_uv` and `engine` turn each unit's template into an amplitude in σ.
pub fn score_detection(
    events: &[(u64, usize)],
    truth: &Truth,
    noise_uv: &[f64],
    engine: &FilterEngine,
    window_frames: u64,
    radius_um: f64,
) -> DetectionScore {
    let Truth { spikes, templates, electrodes } = *truth;
    let main: Vec<usize> = templates.iter().map(|t| template_main_channel(t).0).collect();
    let near = |unit: usize, channel: usize| {
        let (a, b) = (&electrodes[main[unit]], &electrodes[channel]);
        (a.x_um - b.x_um).hypot(a.y_um - b.y_um) <= radius_um
    };
    let mut used = vec![false; events.len()];
    let mut found = vec![0usize; templates.len()];
    let mut totals = vec![0usize; templates.len()];
    for spike in spikes {
        totals[spike.unit] += 1;
        let low = events.partition_point(|e| e.0 + window_frames < spike.sample);
        let best = events[low..]
            .iter()
            .enumerate()
            .take_while(|(_, e)| e.0 <= spike.sample + window_frames)
            .filter(|(i, e)| !used[low + i] && near(spike.unit, e.1))
            .min_by_key(|(_, e)| e.0.abs_diff(spike.sample));
        if let Some((i, _)) = best {
            used[low + i] = true;
            found[spike.unit] += 1;
        }
    }
    let units = (0..templates.len())
        .map(|unit| UnitRecall {
            unit,
            channel: main[unit],
            amplitude_sigma: filtered_trough_uv(&templates[unit], engine) / noise_uv[main[unit]],
            n_truth: totals[unit],
            n_found: found[unit],
        })
        .collect();
    DetectionScore { units, n_events: events.len(), n_events_matched: used.iter().filter(|u| **u).count() }
}
