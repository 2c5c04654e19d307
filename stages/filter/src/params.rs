//! Filter parameters: the serde mirror of `[stage.params]`, and the
//! validated form the algorithms accept.

use serde::{Deserialize, Serialize};

/// How the band-pass is built.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Design {
    /// Butterworth IIR, run forward and backward (zero phase).
    Butterworth,
    /// Linear-phase windowed-sinc FIR, applied once by FFT convolution and
    /// shifted by its delay (zero phase).
    Fir,
}

/// Which common reference is subtracted after band-pass filtering.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Reference {
    /// Median across usable channels, per sample.
    Median,
    None,
}

/// How the filtered recording is stored for the stages after the filter.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FilteredStorage {
    /// Set by `spikeyard run` before the stage starts: "packed-i16" when
    /// every later stage is a built-in one, else "i16" (a stage of the
    /// user's reads plain contract formats). Run alone, the stage takes it
    /// as "i16".
    Auto,
    /// 16-bit integers, a step of 1/64 of the noisiest usable channel's
    /// noise σ (range ±512 σ; beyond it samples clip and are counted): half
    /// the bytes of f32, with rounding far below the noise.
    I16,
    /// The same 16-bit integers, packed: one byte per value, plus a record
    /// for each value outside ±127 steps (±2 σ of the noisiest channel) in
    /// `filtered.exceptions.bin`. Read back exactly as "i16", in about 57 %
    /// of its bytes on a typical probe ([`spikeyard_contract::packed`]).
    PackedI16,
    /// 32-bit floats, exact.
    F32,
}

/// `[stage.params]` of the filter stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct FilterParams {
    /// Pass band [low, high] in Hz. Default [300, 6000]. A high edge at or
    /// above Nyquist is clamped to 0.95 × Nyquist with a warning.
    pub band_hz: [f64; 2],
    /// Butterworth order per band edge, 1 to 8. Default 3.
    pub order: usize,
    /// "butterworth" (default) or "fir".
    pub design: Design,
    /// FIR length in taps (odd); 0 picks 4 × sample_rate / band low edge. Default 0.
    pub fir_taps: usize,
    /// Notch frequency in Hz (50 or 60 for mains hum); 0 turns it off. Default 0.
    pub notch_hz: f64,
    /// Notch quality factor (−3 dB width = notch_hz / notch_q). Default 30.
    pub notch_q: f64,
    /// "median" (default) or "none".
    pub reference: Reference,
    /// Reference each electrode group (the `group` column of the electrode
    /// table) on its own instead of the whole array. Default false.
    pub reference_by_group: bool,
    /// Core length of a processing chunk in seconds. Default 0.25: a
    /// chunk's filtered blocks (4 bytes a sample) then stay within a
    /// server's last-level cache while they are referenced and encoded,
    /// which on the 384-channel benchmark costs less than the longer
    /// chunks' fewer margins (0.25 s: 4.2 s, 1 s: 4.6 s wall).
    pub chunk_seconds: f64,
    /// Number of windows, spread over the recording, used for channel QC. Default 10.
    pub qc_windows: usize,
    /// Length of each QC window in seconds. Default 1.
    pub qc_window_seconds: f64,
    /// Mains frequency whose power the QC table reports, Hz. Default 50.
    pub line_hz: f64,
    /// A channel whose noise is below this fraction of the array median is dead. Default 0.2.
    pub dead_below_ratio: f64,
    /// A channel whose noise is above this multiple of the array median is noisy. Default 3.
    pub noisy_above_ratio: f64,
    /// NaN or ±Inf in float recordings: "refuse" (stop with the frame and
    /// channel, default) or "zero" (replace by 0 µV, counted in the report).
    pub non_finite: spikeyard_contract::recording::NonFinite,
    /// "auto" (default), "packed-i16", "i16" or "f32": how `filtered.bin` stores the filtered signal.
    pub store_filtered_as: FilteredStorage,
}

impl Default for FilterParams {
    fn default() -> Self {
        FilterParams {
            band_hz: [300.0, 6000.0],
            order: 3,
            design: Design::Butterworth,
            fir_taps: 0,
            notch_hz: 0.0,
            notch_q: 30.0,
            reference: Reference::Median,
            reference_by_group: false,
            chunk_seconds: 0.25,
            qc_windows: 10,
            qc_window_seconds: 1.0,
            line_hz: 50.0,
            dead_below_ratio: 0.2,
            noisy_above_ratio: 3.0,
            non_finite: spikeyard_contract::recording::NonFinite::Refuse,
            store_filtered_as: FilteredStorage::Auto,
        }
    }
}

/// Parameters checked against the recording's sample rate.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidFilterParams {
    pub low_hz: f64,
    pub high_hz: f64,
    pub order: usize,
    pub design: Design,
    pub fir_taps: usize,
    pub notch_hz: Option<f64>,
    pub notch_q: f64,
    pub reference: Reference,
    pub reference_by_group: bool,
    pub chunk_frames: usize,
    pub qc_windows: usize,
    pub qc_window_frames: usize,
    pub line_hz: f64,
    pub dead_below_ratio: f64,
    pub noisy_above_ratio: f64,
    /// What was changed to make the parameters usable (e.g. a clamped band).
    pub warnings: Vec<String>,
}

impl FilterParams {
    /// Check every rule at once; the error lists each broken rule with its
    /// key, value and allowed range.
    ///
    /// # Errors
    /// One line per broken rule.
    pub fn check(&self, sample_rate_hz: f64) -> Result<ValidFilterParams, String> {
        let mut problems = Vec::new();
        let mut warnings = Vec::new();
        let nyquist = sample_rate_hz / 2.0;
        let [low_hz, mut high_hz] = self.band_hz;
        if !(low_hz.is_finite() && low_hz > 0.0) {
            problems.push(format!("band_hz[0] is {low_hz}, but it must be greater than 0"));
        }
        if high_hz >= nyquist {
            let clamped = 0.95 * nyquist;
            warnings.push(format!(
                "band_hz[1] = {high_hz} Hz is at or above Nyquist ({nyquist} Hz); clamped to {clamped} Hz"
            ));
            high_hz = clamped;
        }
        if !(high_hz.is_finite() && high_hz > low_hz) {
            problems.push(format!(
                "band_hz is [{low_hz}, {}], but the high edge must be above the low edge",
                self.band_hz[1]
            ));
        }
        if !(1..=8).contains(&self.order) {
            problems.push(format!("order is {}, but it must be 1 to 8", self.order));
        }
        let fir_taps = if self.fir_taps == 0 {
            ((4.0 * sample_rate_hz / low_hz.max(1.0)).round() as usize) | 1
        } else {
            self.fir_taps
        };
        if self.design == Design::Fir && (fir_taps % 2 == 0 || fir_taps < 3) {
            problems.push(format!("fir_taps is {fir_taps}, but it must be odd and at least 3"));
        }
        let notch_hz = if self.notch_hz == 0.0 {
            None
        } else if self.notch_hz > 0.0 && self.notch_hz < nyquist {
            Some(self.notch_hz)
        } else {
            problems.push(format!(
                "notch_hz is {}, but it must be 0 (off) or between 0 and Nyquist ({nyquist} Hz)",
                self.notch_hz
            ));
            None
        };
        if !(self.notch_q.is_finite() && self.notch_q > 0.0) {
            problems.push(format!("notch_q is {}, but it must be greater than 0", self.notch_q));
        }
        let seconds = |key: &str, value: f64, problems: &mut Vec<String>| {
            let frames = (value * sample_rate_hz).round();
            if !(value.is_finite() && frames >= 1.0) {
                problems.push(format!("{key} is {value}, but it must cover at least one sample"));
                1
            } else {
                frames as usize
            }
        };
        let chunk_frames = seconds("chunk_seconds", self.chunk_seconds, &mut problems);
        let qc_window_frames = seconds("qc_window_seconds", self.qc_window_seconds, &mut problems);
        if self.qc_windows == 0 {
            problems.push("qc_windows is 0, but it must be at least 1".to_string());
        }
        if !(self.line_hz > 0.0 && self.line_hz < nyquist) {
            problems.push(format!("line_hz is {}, but it must be between 0 and Nyquist", self.line_hz));
        }
        if !(self.dead_below_ratio >= 0.0 && self.dead_below_ratio < 1.0) {
            problems.push(format!("dead_below_ratio is {}, but it must be in [0, 1)", self.dead_below_ratio));
        }
        if self.noisy_above_ratio.is_nan() || self.noisy_above_ratio <= 1.0 {
            problems.push(format!("noisy_above_ratio is {}, but it must be above 1", self.noisy_above_ratio));
        }
        if !problems.is_empty() {
            return Err(problems.join("; "));
        }
        Ok(ValidFilterParams {
            low_hz,
            high_hz,
            order: self.order,
            design: self.design,
            fir_taps,
            notch_hz,
            notch_q: self.notch_q,
            reference: self.reference,
            reference_by_group: self.reference_by_group,
            chunk_frames,
            qc_windows: self.qc_windows,
            qc_window_frames,
            line_hz: self.line_hz,
            dead_below_ratio: self.dead_below_ratio,
            noisy_above_ratio: self.noisy_above_ratio,
            warnings,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        let valid = FilterParams::default().check(20000.0).unwrap();
        assert_eq!((valid.low_hz, valid.high_hz), (300.0, 6000.0));
        assert!(valid.warnings.is_empty());
    }

    #[test]
    fn band_above_nyquist_is_clamped_with_a_warning() {
        let valid = FilterParams::default().check(10000.0).unwrap();
        assert_eq!(valid.high_hz, 4750.0);
        assert!(valid.warnings[0].contains("clamped"));
    }

    #[test]
    fn inverted_band_is_refused() {
        let params = FilterParams { band_hz: [3000.0, 300.0], ..Default::default() };
        assert!(params.check(30000.0).unwrap_err().contains("band_hz"));
    }

    #[test]
    fn order_out_of_range_is_refused() {
        let params = FilterParams { order: 0, ..Default::default() };
        assert!(params.check(30000.0).unwrap_err().contains("order is 0"));
    }

    #[test]
    fn every_broken_rule_is_reported_at_once() {
        let params = FilterParams { order: 12, notch_hz: -5.0, qc_windows: 0, ..Default::default() };
        let message = params.check(30000.0).unwrap_err();
        assert!(
            message.contains("order") && message.contains("notch_hz") && message.contains("qc_windows"),
            "{message}"
        );
    }
}
