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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        assert!(MeasuresParams::default().check().is_ok());
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
