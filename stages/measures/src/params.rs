//! Measures parameters: the serde mirror of `[stage.params]` and its validated form.

use serde::{Deserialize, Serialize};

/// `[stage.params]` of the measures stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeasuresParams {
    /// Refractory period for ISI violations and contamination, ms. Default 1.5.
    pub refractory_ms: f64,
    /// Censored period (the detector's dead time on a unit's electrode), ms. Default 1.0.
    pub censored_ms: f64,
    /// Bin width of the presence ratio, s. Default 10.
    pub presence_bin_s: f64,
    /// Bin width of firing_rates.parquet, s. Default 1.
    pub rate_bin_s: f64,
    /// σ of the Gaussian kernel of the smoothed rate, s; 0 leaves it out. Default 5.
    pub smoothing_s: f64,
    /// Events per electrode neighbourhood (a seeded subset) for the feature-space metrics. Default 10000.
    pub isolation_events_per_channel: usize,
    /// A unit whose SNR is below this is labelled `noise`. Default 3.
    pub label_noise_below_snr: f64,
    /// A unit is labelled `single` with SNR at least this ... Default 5.
    pub label_single_min_snr: f64,
    /// ... contamination at most this ... Default 0.1.
    pub label_single_max_contamination: f64,
    /// ... at least this many spikes ... Default 50.
    pub label_single_min_spikes: u64,
    /// ... presence ratio at least this ... Default 0.5.
    pub label_single_min_presence: f64,
    /// ... and isolation distance, where defined, at least this; other units are `multi`. Default 20.
    pub label_single_min_isolation_distance: f64,
}

impl Default for MeasuresParams {
    fn default() -> Self {
        MeasuresParams {
            refractory_ms: 1.5,
            censored_ms: 1.0,
            presence_bin_s: 10.0,
            rate_bin_s: 1.0,
            smoothing_s: 5.0,
            isolation_events_per_channel: 10000,
            label_noise_below_snr: 3.0,
            label_single_min_snr: 5.0,
            label_single_max_contamination: 0.1,
            label_single_min_spikes: 50,
            label_single_min_presence: 0.5,
            label_single_min_isolation_distance: 20.0,
        }
    }
}

impl MeasuresParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule.
    pub fn check(&self) -> Result<(), String> {
        let mut problems = Vec::new();
        let positive = |key: &str, v: f64, problems: &mut Vec<String>| {
            if !(v.is_finite() && v > 0.0) {
                problems.push(format!("{key} is {v}, but it must be greater than 0"));
            }
        };
        positive("refractory_ms", self.refractory_ms, &mut problems);
        positive("presence_bin_s", self.presence_bin_s, &mut problems);
        positive("rate_bin_s", self.rate_bin_s, &mut problems);
        if !(self.censored_ms.is_finite() && self.censored_ms >= 0.0 && self.censored_ms < self.refractory_ms) {
            problems
                .push(format!("censored_ms is {}, but it must be 0 or more and below refractory_ms", self.censored_ms));
        }
        if !(self.smoothing_s.is_finite() && self.smoothing_s >= 0.0) {
            problems.push(format!("smoothing_s is {}, but it must be 0 (off) or more", self.smoothing_s));
        }
        for (key, value) in [
            ("label_noise_below_snr", self.label_noise_below_snr),
            ("label_single_min_snr", self.label_single_min_snr),
            ("label_single_max_contamination", self.label_single_max_contamination),
            ("label_single_min_presence", self.label_single_min_presence),
            ("label_single_min_isolation_distance", self.label_single_min_isolation_distance),
        ] {
            if !(value.is_finite() && value >= 0.0) {
                problems.push(format!("{key} is {value}, but it must be 0 or more"));
            }
        }
        if self.label_single_min_snr < self.label_noise_below_snr {
            problems.push(format!(
                "label_single_min_snr is {}, but it must not be below label_noise_below_snr ({})",
                self.label_single_min_snr, self.label_noise_below_snr
            ));
        }
        if self.isolation_events_per_channel < 10 {
            problems.push(format!(
                "isolation_events_per_channel is {}, but it must be at least 10",
                self.isolation_events_per_channel
            ));
        }
        if problems.is_empty() {
            Ok(())
        } else {
            Err(problems.join("; "))
        }
    }
}

impl MeasuresParams {
    /// The label rules.
    pub fn label_rules(&self) -> crate::label::LabelRules {
        crate::label::LabelRules {
            noise_below_snr: self.label_noise_below_snr,
            single_min_snr: self.label_single_min_snr,
            single_max_contamination: self.label_single_max_contamination,
            single_min_spikes: self.label_single_min_spikes,
            single_min_presence: self.label_single_min_presence,
            single_min_isolation_distance: self.label_single_min_isolation_distance,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        assert!(MeasuresParams::default().check().is_ok());
    }

    #[test]
    fn label_snr_for_single_below_the_noise_line_is_refused() {
        let params = MeasuresParams { label_single_min_snr: 2.0, ..Default::default() };
        assert!(params.check().unwrap_err().contains("label_single_min_snr is 2, but it must not be below"));
    }

    #[test]
    fn censored_period_must_be_shorter_than_the_refractory_period() {
        let params = MeasuresParams { censored_ms: 2.0, ..Default::default() };
        assert!(params.check().unwrap_err().contains("censored_ms is 2"));
    }

    #[test]
    fn zero_bin_width_is_refused() {
        let params = MeasuresParams { rate_bin_s: 0.0, ..Default::default() };
        assert!(params.check().unwrap_err().contains("rate_bin_s is 0"));
    }
}
