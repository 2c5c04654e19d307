//! Report parameters: the serde mirror of `[stage.params]`.

use serde::{Deserialize, Serialize};

/// `[stage.params]` of the report stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ReportParams {
    /// Units shown with figures, best first (the rest are in the table). Default 40.
    pub max_units: usize,
    /// Electrodes drawn per unit's mean waveform (its largest). Default 4.
    pub waveform_channels: usize,
    /// Range of the ISI histogram and half-width of the autocorrelogram, ms. Defaults 50, 50.
    pub isi_max_ms: f64,
    pub correlogram_ms: f64,
    /// Bin width of both, ms. Default 1.
    pub bin_ms: f64,
    /// Refractory period marked on the ISI histogram, ms. Default 1.5.
    pub refractory_ms: f64,
    /// Spikes drawn in the amplitude-over-time figure (evenly thinned). Default 1500.
    pub max_amplitude_points: usize,
}

impl Default for ReportParams {
    fn default() -> Self {
        ReportParams {
            max_units: 40,
            waveform_channels: 4,
            isi_max_ms: 50.0,
            correlogram_ms: 50.0,
            bin_ms: 1.0,
            refractory_ms: 1.5,
            max_amplitude_points: 1500,
        }
    }
}

impl ReportParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule.
    pub fn check(&self) -> Result<(), String> {
        let mut problems = Vec::new();
        for (key, value) in [
            ("isi_max_ms", self.isi_max_ms),
            ("correlogram_ms", self.correlogram_ms),
            ("bin_ms", self.bin_ms),
            ("refractory_ms", self.refractory_ms),
        ] {
            if !(value.is_finite() && value > 0.0) {
                problems.push(format!("{key} is {value}, but it must be greater than 0"));
            }
        }
        if self.bin_ms > 0.0
            && (self.isi_max_ms / self.bin_ms > 10_000.0 || self.correlogram_ms / self.bin_ms > 10_000.0)
        {
            problems.push("isi_max_ms or correlogram_ms is more than 10000 bins of bin_ms".into());
        }
        for (key, value) in
            [("waveform_channels", self.waveform_channels), ("max_amplitude_points", self.max_amplitude_points)]
        {
            if value == 0 {
                problems.push(format!("{key} is 0, but it must be at least 1"));
            }
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
    fn defaults_are_valid_and_zero_bins_are_refused() {
        assert!(ReportParams::default().check().is_ok());
        let bad = ReportParams { bin_ms: 0.0, waveform_channels: 0, ..Default::default() };
        let message = bad.check().unwrap_err();
        assert!(message.contains("bin_ms is 0") && message.contains("waveform_channels is 0"), "{message}");
    }
}
