//! Features parameters: the serde mirror of `[stage.params]` and its validated form.

use serde::{Deserialize, Serialize};

/// `[stage.params]` of the features stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct FeaturesParams {
    /// Snippet start before the event's extremum, ms. Default 0.5.
    pub before_ms: f64,
    /// Snippet end after the event's extremum, ms. Default 1.0.
    pub after_ms: f64,
    /// Electrodes within this distance of the event's electrode join its snippet, µm. Default 100.
    pub neighbour_radius_um: f64,
    /// At most this many electrodes per snippet, nearest first (the event's own included). Default 7.
    pub max_channels: usize,
    /// Principal components kept per electrode. Default 3.
    pub n_components: usize,
    /// Events (a seeded random subset) used to fit the PCA. Default 20000.
    pub fit_events: usize,
    /// Core length of a processing chunk, s. Default 1.
    pub chunk_seconds: f64,
}

impl Default for FeaturesParams {
    fn default() -> Self {
        FeaturesParams {
            before_ms: 0.5,
            after_ms: 1.0,
            neighbour_radius_um: 100.0,
            max_channels: 7,
            n_components: 3,
            fit_events: 20000,
            chunk_seconds: 1.0,
        }
    }
}

/// Parameters in frames for one sample rate.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidFeaturesParams {
    pub before_frames: usize,
    pub after_frames: usize,
    pub neighbour_radius_um: f64,
    pub max_channels: usize,
    pub n_components: usize,
    pub fit_events: usize,
    pub chunk_frames: usize,
}

impl ValidFeaturesParams {
    pub fn snippet_frames(&self) -> usize {
        self.before_frames + self.after_frames + 1
    }
}

impl FeaturesParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule.
    pub fn check(&self, sample_rate_hz: f64) -> Result<ValidFeaturesParams, String> {
        let mut problems = Vec::new();
        let frames = |key: &str, ms: f64, problems: &mut Vec<String>| {
            if !(ms.is_finite() && ms > 0.0) {
                problems.push(format!("{key} is {ms}, but it must be greater than 0"));
                return 1;
            }
            ((ms * 1e-3 * sample_rate_hz).round() as usize).max(1)
        };
        let before_frames = frames("before_ms", self.before_ms, &mut problems);
        let after_frames = frames("after_ms", self.after_ms, &mut problems);
        let chunk_frames = frames("chunk_seconds", self.chunk_seconds * 1e3, &mut problems);
        if !(self.neighbour_radius_um.is_finite() && self.neighbour_radius_um >= 0.0) {
            problems.push(format!("neighbour_radius_um is {}, but it must be 0 or more", self.neighbour_radius_um));
        }
        if !(1..=64).contains(&self.max_channels) {
            problems.push(format!("max_channels is {}, but it must be 1 to 64", self.max_channels));
        }
        let snippet = before_frames + after_frames + 1;
        if self.n_components == 0 || self.n_components > snippet {
            problems.push(format!(
                "n_components is {}, but it must be 1 to the snippet length ({snippet})",
                self.n_components
            ));
        }
        if self.fit_events < 10 {
            problems.push(format!("fit_events is {}, but it must be at least 10", self.fit_events));
        }
        if !problems.is_empty() {
            return Err(problems.join("; "));
        }
        Ok(ValidFeaturesParams {
            before_frames,
            after_frames,
            neighbour_radius_um: self.neighbour_radius_um,
            max_channels: self.max_channels,
            n_components: self.n_components,
            fit_events: self.fit_events,
            chunk_frames,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        let valid = FeaturesParams::default().check(20000.0).unwrap();
        assert_eq!((valid.before_frames, valid.after_frames, valid.snippet_frames()), (10, 20, 31));
    }

    #[test]
    fn too_many_components_are_refused() {
        let params = FeaturesParams { n_components: 40, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("n_components is 40"));
    }

    #[test]
    fn zero_channels_are_refused() {
        let params = FeaturesParams { max_channels: 0, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("max_channels is 0"));
    }
}
