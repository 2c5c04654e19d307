//! Cluster parameters: the serde mirror of `[stage.params]` and its validated form.

use crate::model::Method;
use serde::{Deserialize, Serialize};

/// `[stage.params]` of the cluster stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ClusterParams {
    /// "gmm" (full-covariance Gaussian mixture, default), "kmeans" or "dbscan".
    pub method: Method,
    /// DBSCAN neighbourhood radius in feature units (PC scores, µV scale). Default 30.
    pub dbscan_eps: f64,
    /// Units tried per electrode neighbourhood, 1..=this, chosen by BIC. Default 6.
    pub max_units_per_channel: usize,
    /// Each tried unit needs at least this many fitting events. Default 20.
    pub min_events_per_unit: usize,
    /// Events (a seeded random subset) per neighbourhood used to fit. Default 4000.
    pub fit_events_per_channel: usize,
    /// k-means starts (k-means++ seeding) of each fit; the one with the
    /// lowest inertia is kept, and for `gmm` EM runs from its labels.
    /// Default 3.
    pub runs: u64,
    /// Larger unit counts are tried until this many in a row fail to lower
    /// the BIC; 0 tries every count up to max_units_per_channel. Default 2.
    pub bic_patience: usize,
    /// Units closer than this (template positions, µm), and ... Default 40.
    pub merge_distance_um: f64,
    /// ... whose mean waveforms on shared electrodes correlate at least this much are one unit. Default 0.9.
    pub merge_min_correlation: f64,
    /// Spikes of one unit closer than this are one spike counted twice; the later is dropped, ms. Default 0.3.
    pub duplicate_window_ms: f64,
    /// Units with fewer spikes are flagged `small` in units.parquet. Default 30.
    pub min_spikes: usize,
    /// Spikes per unit averaged into its template (a seeded random subset). Default 300.
    pub template_spikes: usize,
    /// Template window before and after the spike, ms. Defaults 1.0 and 2.0.
    pub template_before_ms: f64,
    pub template_after_ms: f64,
    /// Templates cover electrodes within this distance of the unit's event electrode, µm. Default 150.
    pub template_radius_um: f64,
    /// Core length of a processing chunk, s. Default 1.
    pub chunk_seconds: f64,
}

impl Default for ClusterParams {
    fn default() -> Self {
        ClusterParams {
            method: Method::Gmm,
            dbscan_eps: 30.0,
            max_units_per_channel: 6,
            min_events_per_unit: 20,
            fit_events_per_channel: 4000,
            runs: 3,
            bic_patience: 2,
            merge_distance_um: 40.0,
            merge_min_correlation: 0.9,
            duplicate_window_ms: 0.3,
            min_spikes: 30,
            template_spikes: 300,
            template_before_ms: 1.0,
            template_after_ms: 2.0,
            template_radius_um: 150.0,
            chunk_seconds: 1.0,
        }
    }
}

/// Parameters in frames for one sample rate.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidClusterParams {
    pub method: Method,
    pub dbscan_eps: f64,
    pub max_units_per_channel: usize,
    pub min_events_per_unit: usize,
    pub fit_events_per_channel: usize,
    pub runs: u64,
    pub bic_patience: usize,
    pub merge_distance_um: f64,
    pub merge_min_correlation: f64,
    pub duplicate_frames: u64,
    pub min_spikes: usize,
    pub template_spikes: usize,
    pub template_before_frames: usize,
    pub template_after_frames: usize,
    pub template_radius_um: f64,
    pub chunk_frames: usize,
}

impl ClusterParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule.
    pub fn check(&self, sample_rate_hz: f64) -> Result<ValidClusterParams, String> {
        let mut problems = Vec::new();
        let at_least_one = |key: &str, value: usize, problems: &mut Vec<String>| {
            if value == 0 {
                problems.push(format!("{key} is 0, but it must be at least 1"));
            }
        };
        at_least_one("max_units_per_channel", self.max_units_per_channel, &mut problems);
        at_least_one("min_events_per_unit", self.min_events_per_unit, &mut problems);
        at_least_one("template_spikes", self.template_spikes, &mut problems);
        at_least_one("runs", self.runs as usize, &mut problems);
        if self.fit_events_per_channel < 10 {
            problems
                .push(format!("fit_events_per_channel is {}, but it must be at least 10", self.fit_events_per_channel));
        }
        if !(self.merge_distance_um.is_finite() && self.merge_distance_um >= 0.0) {
            problems.push(format!("merge_distance_um is {}, but it must be 0 or more", self.merge_distance_um));
        }
        if !(-1.0..=1.0).contains(&self.merge_min_correlation) {
            problems
                .push(format!("merge_min_correlation is {}, but it must be in [-1, 1]", self.merge_min_correlation));
        }
        if !(self.template_radius_um.is_finite() && self.template_radius_um >= 0.0) {
            problems.push(format!("template_radius_um is {}, but it must be 0 or more", self.template_radius_um));
        }
        let frames = |key: &str, ms: f64, problems: &mut Vec<String>| {
            if !(ms.is_finite() && ms >= 0.0) {
                problems.push(format!("{key} is {ms}, but it must be 0 or more"));
                return 0;
            }
            (ms * 1e-3 * sample_rate_hz).round() as usize
        };
        let duplicate_frames = frames("duplicate_window_ms", self.duplicate_window_ms, &mut problems) as u64;
        let template_before_frames = frames("template_before_ms", self.template_before_ms, &mut problems);
        let template_after_frames = frames("template_after_ms", self.template_after_ms, &mut problems);
        let chunk_frames = frames("chunk_seconds", self.chunk_seconds * 1e3, &mut problems).max(1);
        if !(self.dbscan_eps.is_finite() && self.dbscan_eps > 0.0) {
            problems.push(format!("dbscan_eps is {}, but it must be greater than 0", self.dbscan_eps));
        }
        if !problems.is_empty() {
            return Err(problems.join("; "));
        }
        Ok(ValidClusterParams {
            method: self.method,
            dbscan_eps: self.dbscan_eps,
            max_units_per_channel: self.max_units_per_channel,
            min_events_per_unit: self.min_events_per_unit,
            fit_events_per_channel: self.fit_events_per_channel,
            runs: self.runs,
            bic_patience: self.bic_patience,
            merge_distance_um: self.merge_distance_um,
            merge_min_correlation: self.merge_min_correlation,
            duplicate_frames,
            min_spikes: self.min_spikes,
            template_spikes: self.template_spikes,
            template_before_frames,
            template_after_frames,
            template_radius_um: self.template_radius_um,
            chunk_frames,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        let valid = ClusterParams::default().check(20000.0).unwrap();
        assert_eq!((valid.duplicate_frames, valid.template_before_frames, valid.template_after_frames), (6, 20, 40));
    }

    #[test]
    fn correlation_outside_minus_one_to_one_is_refused() {
        let params = ClusterParams { merge_min_correlation: 1.5, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("merge_min_correlation is 1.5"));
    }

    #[test]
    fn zero_units_is_refused() {
        let params = ClusterParams { max_units_per_channel: 0, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("max_units_per_channel is 0"));
    }
}
