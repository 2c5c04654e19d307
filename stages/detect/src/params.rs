//! Detect parameters: the serde mirror of `[stage.params]` and its validated form.

use serde::{Deserialize, Serialize};

/// Which threshold crossings count.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Polarity {
    /// Downward crossings of −threshold (the usual extracellular trough).
    Negative,
    /// Upward crossings of +threshold.
    Positive,
    Both,
}

/// `[stage.params]` of the detect stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct DetectParams {
    /// Threshold as a multiple of the channel's MAD noise σ. Default 5.
    pub threshold_sigma: f64,
    /// "negative" (default), "positive" or "both".
    pub polarity: Polarity,
    /// After a detection, the same channel ignores crossings for this long, ms. Default 1.
    pub dead_time_ms: f64,
    /// The event is placed at the extremum within this long after the crossing, ms. Default 0.5.
    pub peak_search_ms: f64,
    /// Events on electrodes closer than this (µm) and closer in time than
    /// `merge_window_ms` are one spike, kept on the electrode of largest |amplitude|;
    /// 0 turns merging off. Default 100.
    pub merge_radius_um: f64,
    /// See `merge_radius_um`, ms. Default 0.4.
    pub merge_window_ms: f64,
    /// Number of windows spread over the recording for the noise estimate. Default 10.
    pub noise_windows: usize,
    /// Length of each noise window, s. Default 1.
    pub noise_window_seconds: f64,
    /// Core length of a processing chunk, s. Default 1.
    pub chunk_seconds: f64,
    /// Skip channels the filter stage's QC marked dead or noisy. Default true.
    pub skip_flagged_channels: bool,
}

impl Default for DetectParams {
    fn default() -> Self {
        DetectParams {
            threshold_sigma: 5.0,
            polarity: Polarity::Negative,
            dead_time_ms: 1.0,
            peak_search_ms: 0.5,
            merge_radius_um: 100.0,
            merge_window_ms: 0.4,
            noise_windows: 10,
            noise_window_seconds: 1.0,
            chunk_seconds: 1.0,
            skip_flagged_channels: true,
        }
    }
}

/// Parameters converted to frames for one sample rate.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidDetectParams {
    pub threshold_sigma: f64,
    pub polarity: Polarity,
    pub dead_frames: u64,
    pub peak_frames: usize,
    pub merge_radius_um: f64,
    pub merge_frames: u64,
    pub noise_windows: usize,
    pub noise_window_frames: usize,
    pub chunk_frames: usize,
    pub skip_flagged_channels: bool,
}

impl DetectParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule, with key, value and allowed range.
    pub fn check(&self, sample_rate_hz: f64) -> Result<ValidDetectParams, String> {
        let mut problems = Vec::new();
        if !(self.threshold_sigma.is_finite() && self.threshold_sigma > 0.0) {
            problems.push(format!("threshold_sigma is {}, but it must be greater than 0", self.threshold_sigma));
        }
        let frames = |key: &str, ms: f64, minimum: f64, problems: &mut Vec<String>| -> u64 {
            if !(ms.is_finite() && ms >= minimum) {
                problems.push(format!("{key} is {ms}, but it must be at least {minimum}"));
                return 0;
            }
            (ms * 1e-3 * sample_rate_hz).round() as u64
        };
        let dead_frames = frames("dead_time_ms", self.dead_time_ms, 0.0, &mut problems);
        let peak_frames = frames("peak_search_ms", self.peak_search_ms, 0.0, &mut problems).max(1) as usize;
        let merge_frames = frames("merge_window_ms", self.merge_window_ms, 0.0, &mut problems);
        if !(self.merge_radius_um.is_finite() && self.merge_radius_um >= 0.0) {
            problems.push(format!("merge_radius_um is {}, but it must be 0 or more", self.merge_radius_um));
        }
        if self.noise_windows == 0 {
            problems.push("noise_windows is 0, but it must be at least 1".into());
        }
        let noise_window_frames =
            frames("noise_window_seconds", self.noise_window_seconds * 1e3, 1e3 / sample_rate_hz, &mut problems)
                as usize;
        let chunk_frames =
            frames("chunk_seconds", self.chunk_seconds * 1e3, 1e3 / sample_rate_hz, &mut problems) as usize;
        if !problems.is_empty() {
            return Err(problems.join("; "));
        }
        Ok(ValidDetectParams {
            threshold_sigma: self.threshold_sigma,
            polarity: self.polarity,
            dead_frames,
            peak_frames,
            merge_radius_um: self.merge_radius_um,
            merge_frames,
            noise_windows: self.noise_windows,
            noise_window_frames,
            chunk_frames,
            skip_flagged_channels: self.skip_flagged_channels,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid_and_in_frames() {
        let valid = DetectParams::default().check(20000.0).unwrap();
        assert_eq!((valid.dead_frames, valid.peak_frames, valid.merge_frames), (20, 10, 8));
    }

    #[test]
    fn non_positive_threshold_is_refused() {
        let params = DetectParams { threshold_sigma: 0.0, ..Default::default() };
        assert!(params.check(20000.0).unwrap_err().contains("threshold_sigma is 0"));
    }

    #[test]
    fn negative_times_are_refused() {
        let params = DetectParams { dead_time_ms: -1.0, merge_radius_um: -3.0, ..Default::default() };
        let message = params.check(20000.0).unwrap_err();
        assert!(message.contains("dead_time_ms") && message.contains("merge_radius_um"), "{message}");
    }
}
