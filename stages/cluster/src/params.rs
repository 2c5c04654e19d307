//! Cluster parameters: the serde mirror of `[stage.params]` and its validated form.

use crate::burst::BurstRules;
use crate::echo::EchoRules;
use crate::merge::MergeRules;
use crate::model::Method;
use crate::split::SplitRules;
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
    /// A mixture component whose fitting events form two modes along its
    /// first principal axis (Hartigan's dip test p below this, each part
    /// holding at least a tenth of them and min_unit_spikes) is split in
    /// two. Default 0.01.
    pub split_dip_alpha: f64,
    /// Units closer than this (template positions, µm), and ... Default 40.
    pub merge_distance_um: f64,
    /// ... whose mean waveforms on shared electrodes, aligned within
    /// ±merge_max_shift_ms, correlate at least this much ... Default 0.9.
    pub merge_min_correlation: f64,
    /// ... and whose amplitudes there (Euclidean norms) are at least this
    /// ratio of each other ... Default 0.6.
    pub merge_min_amplitude_ratio: f64,
    /// ... are merged unless their spikes, projected on the difference of
    /// the two waveforms, are two modes: Hartigan's dip test p below this.
    /// Default 0.05.
    pub merge_dip_alpha: f64,
    /// Templates are aligned within ± this, ms. Default 0.2.
    pub merge_max_shift_ms: f64,
    /// Spikes per unit (a seeded random subset) projected for the dip test. Default 300.
    pub merge_test_spikes: usize,
    /// A smaller unit is a larger one's burst tail (its spikes shrunk within
    /// its bursts), and merged into it, when their templates pass the merge
    /// rules with an amplitude ratio of at least burst_min_amplitude_ratio
    /// and at least 80 % of its spikes follow the larger unit's through
    /// intervals of at most burst_max_isi_ms, at most 40 % being followed
    /// by one. Defaults 20 and 0.4.
    pub burst_max_isi_ms: f64,
    pub burst_min_amplitude_ratio: f64,
    /// A unit is an echo of another (its spikes seen again along the axon or
    /// on far electrodes) when at least echo_min_locked_fraction of its
    /// spikes follow or precede the other's at one lag within
    /// ±echo_jitter_ms, that window holds at least echo_min_peak_share of
    /// the pair's cross-correlogram within ±echo_max_lag_ms. Defaults 5.0,
    /// 0.2, 0.5, 0.5.
    pub echo_max_lag_ms: f64,
    pub echo_jitter_ms: f64,
    pub echo_min_locked_fraction: f64,
    pub echo_min_peak_share: f64,
    /// A unit with fewer spikes is a fragment, not a unit: its spikes join a
    /// unit whose template explains it (the merge rules without the dip
    /// test), or stay unassigned. An echo needs as many spikes locked to its
    /// source. Default 10.
    pub min_unit_spikes: usize,
    /// Spikes of one unit closer than this are one spike counted twice; the later is dropped, ms. Default 0.3.
    pub duplicate_window_ms: f64,
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
            split_dip_alpha: 0.01,
            merge_distance_um: 40.0,
            merge_min_correlation: 0.9,
            merge_min_amplitude_ratio: 0.6,
            merge_dip_alpha: 0.05,
            merge_max_shift_ms: 0.2,
            merge_test_spikes: 300,
            burst_max_isi_ms: 20.0,
            burst_min_amplitude_ratio: 0.4,
            echo_max_lag_ms: 5.0,
            echo_jitter_ms: 0.2,
            echo_min_locked_fraction: 0.5,
            echo_min_peak_share: 0.5,
            min_unit_spikes: 10,
            duplicate_window_ms: 0.3,
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
    pub merge_min_amplitude_ratio: f64,
    pub merge_dip_alpha: f64,
    pub merge_max_shift_frames: usize,
    pub merge_test_spikes: usize,
    pub split: SplitRules,
    pub burst: BurstRules,
    pub burst_min_amplitude_ratio: f64,
    pub echo: EchoRules,
    pub min_unit_spikes: usize,
    pub duplicate_frames: u64,
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
        for (key, value) in [
            ("merge_min_amplitude_ratio", self.merge_min_amplitude_ratio),
            ("merge_dip_alpha", self.merge_dip_alpha),
            ("split_dip_alpha", self.split_dip_alpha),
            ("burst_min_amplitude_ratio", self.burst_min_amplitude_ratio),
            ("echo_min_locked_fraction", self.echo_min_locked_fraction),
            ("echo_min_peak_share", self.echo_min_peak_share),
        ] {
            if !(0.0..=1.0).contains(&value) {
                problems.push(format!("{key} is {value}, but it must be in [0, 1]"));
            }
        }
        at_least_one("merge_test_spikes", self.merge_test_spikes, &mut problems);
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
        let merge_max_shift_frames = frames("merge_max_shift_ms", self.merge_max_shift_ms, &mut problems);
        let burst_max_isi_frames = frames("burst_max_isi_ms", self.burst_max_isi_ms, &mut problems) as u64;
        let echo_max_lag_frames = frames("echo_max_lag_ms", self.echo_max_lag_ms, &mut problems) as u64;
        let echo_jitter_frames = frames("echo_jitter_ms", self.echo_jitter_ms, &mut problems) as u64;
        if echo_jitter_frames > echo_max_lag_frames {
            problems.push(format!(
                "echo_jitter_ms is {}, but it must not exceed echo_max_lag_ms ({})",
                self.echo_jitter_ms, self.echo_max_lag_ms
            ));
        }
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
            merge_min_amplitude_ratio: self.merge_min_amplitude_ratio,
            merge_dip_alpha: self.merge_dip_alpha,
            merge_max_shift_frames,
            merge_test_spikes: self.merge_test_spikes,
            split: SplitRules { alpha: self.split_dip_alpha, min_share: 0.1, min_spikes: self.min_unit_spikes },
            burst: BurstRules { max_isi_frames: burst_max_isi_frames, min_following: 0.8, max_followed: 0.4 },
            burst_min_amplitude_ratio: self.burst_min_amplitude_ratio,
            echo: EchoRules {
                max_lag_frames: echo_max_lag_frames,
                jitter_frames: echo_jitter_frames,
                min_locked_fraction: self.echo_min_locked_fraction,
                min_peak_share: self.echo_min_peak_share,
                min_locked_spikes: self.min_unit_spikes,
            },
            min_unit_spikes: self.min_unit_spikes,
            duplicate_frames,
            template_spikes: self.template_spikes,
            template_before_frames,
            template_after_frames,
            template_radius_um: self.template_radius_um,
            chunk_frames,
        })
    }
}

impl ValidClusterParams {
    /// The template rules of a merge.
    pub fn merge_rules(&self) -> MergeRules {
        MergeRules {
            max_distance_um: self.merge_distance_um,
            min_correlation: self.merge_min_correlation,
            min_amplitude_ratio: self.merge_min_amplitude_ratio,
            max_shift_frames: self.merge_max_shift_frames,
        }
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
    fn fractions_outside_zero_to_one_are_refused() {
        let params = ClusterParams { merge_dip_alpha: 1.5, echo_min_locked_fraction: -0.1, ..Default::default() };
        let message = params.check(20000.0).unwrap_err();
        assert!(message.contains("merge_dip_alpha is 1.5") && message.contains("echo_min_locked_fraction is -0.1"));
    }

    #[test]
    fn echo_jitter_beyond_the_lag_span_is_refused() {
        let params = ClusterParams { echo_jitter_ms: 6.0, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("echo_jitter_ms is 6, but it must not exceed"));
    }

    #[test]
    fn zero_units_is_refused() {
        let params = ClusterParams { max_units_per_channel: 0, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("max_units_per_channel is 0"));
    }
}
