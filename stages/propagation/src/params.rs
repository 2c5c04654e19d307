//! Propagation parameters: the serde mirror of `[stage.params]`.

use serde::{Deserialize, Serialize};

/// `[stage.params]` of the propagation stage, as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct PropagationParams {
    /// Spikes per unit averaged into its footprint (a seeded subset). Default 300.
    pub max_spikes_per_unit: usize,
    /// Footprint window before and after each spike, ms. Defaults 1.0 and 4.0.
    pub before_ms: f64,
    pub after_ms: f64,
    /// An electrode is significant when its averaged trough exceeds this many
    /// standard errors (its MAD noise σ ÷ √spikes). Default 6.
    pub significance_sigma: f64,
    /// Footprint electrodes closer than this many electrode pitches (the
    /// median nearest-neighbour distance) are neighbours: when finding the
    /// footprint's ridge and when tracking the axon along it. Default 2.2.
    pub link_radius_pitches: f64,
    /// A branch needs at least this many electrodes ... Default 6.
    pub min_electrodes: usize,
    /// ... and at least this path length, µm. Default 60.
    pub min_path_um: f64,
    /// Electrodes closer than this to the footprint's largest trough
    /// (along the footprint) are left out of the timing: the soma's spike
    /// reaches them all at once, µm. Default 40.
    pub soma_exclusion_um: f64,
    /// A branch's latency must rise by at least this much from start to end, ms
    /// (a somatic footprint, seen everywhere at once, does not). Default 0.1.
    pub min_latency_span_ms: f64,
    /// A branch's Theil–Sen line must explain at least this share of the latency variance. Default 0.8.
    pub min_r_squared: f64,
    /// Units with fewer spikes are not measured. Default 30.
    pub min_spikes: usize,
    /// Velocities outside this band (m/s) are flagged `outside_typical_range`
    /// (unmyelinated axons: about 0.1–2 m/s, common practice). Default [0.1, 2.0].
    pub typical_range_m_per_s: [f64; 2],
    /// Bootstrap resamples over spikes for each branch's 95 % interval; 0
    /// keeps Sen's rank interval of the Theil–Sen slope. Default 200.
    pub bootstrap_resamples: usize,
    /// Core length of a processing chunk, s. Default 1.
    pub chunk_seconds: f64,
}

impl Default for PropagationParams {
    fn default() -> Self {
        PropagationParams {
            max_spikes_per_unit: 300,
            before_ms: 1.0,
            after_ms: 4.0,
            significance_sigma: 6.0,
            link_radius_pitches: 2.2,
            min_electrodes: 6,
            min_path_um: 60.0,
            soma_exclusion_um: 40.0,
            min_latency_span_ms: 0.1,
            min_r_squared: 0.8,
            min_spikes: 30,
            typical_range_m_per_s: [0.1, 2.0],
            bootstrap_resamples: 200,
            chunk_seconds: 1.0,
        }
    }
}

impl PropagationParams {
    /// Check every rule; the error lists each broken one.
    ///
    /// # Errors
    /// One clause per broken rule.
    pub fn check(&self) -> Result<(), String> {
        let mut problems = Vec::new();
        for (key, value) in [
            ("before_ms", self.before_ms),
            ("after_ms", self.after_ms),
            ("significance_sigma", self.significance_sigma),
            ("link_radius_pitches", self.link_radius_pitches),
            ("chunk_seconds", self.chunk_seconds),
        ] {
            if !(value.is_finite() && value > 0.0) {
                problems.push(format!("{key} is {value}, but it must be greater than 0"));
            }
        }
        if self.max_spikes_per_unit == 0 {
            problems.push("max_spikes_per_unit is 0, but it must be at least 1".into());
        }
        if self.min_electrodes < 3 {
            problems.push(format!("min_electrodes is {}, but a line fit needs at least 3", self.min_electrodes));
        }
        if !(self.soma_exclusion_um.is_finite() && self.soma_exclusion_um >= 0.0) {
            problems.push(format!("soma_exclusion_um is {}, but it must be 0 or more", self.soma_exclusion_um));
        }
        if !(self.min_latency_span_ms.is_finite() && self.min_latency_span_ms >= 0.0) {
            problems.push(format!("min_latency_span_ms is {}, but it must be 0 or more", self.min_latency_span_ms));
        }
        if !(0.0..=1.0).contains(&self.min_r_squared) {
            problems.push(format!("min_r_squared is {}, but it must be in [0, 1]", self.min_r_squared));
        }
        if !(self.min_path_um.is_finite() && self.min_path_um >= 0.0) {
            problems.push(format!("min_path_um is {}, but it must be 0 or more", self.min_path_um));
        }
        let [low, high] = self.typical_range_m_per_s;
        if !(low.is_finite() && high.is_finite() && 0.0 <= low && low < high) {
            problems
                .push(format!("typical_range_m_per_s is [{low}, {high}], but it must be increasing and not negative"));
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
        assert!(PropagationParams::default().check().is_ok());
    }

    #[test]
    fn a_fit_needs_three_electrodes() {
        let params = PropagationParams { min_electrodes: 2, ..Default::default() };
        assert!(params.check().unwrap_err().contains("min_electrodes is 2"));
    }
}
