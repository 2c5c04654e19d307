//! A label per unit that a reader can act on, decided by stated rules on
//! its measures (the thresholds are `label_*` parameters of the measures
//! stage):
//!
//! - `noise`: not a neuron: the mean waveform's trough on the main
//!   electrode is below `label_noise_below_snr` × that electrode's noise σ;
//! - `single`: a well-isolated single neuron (single-unit activity, in the
//!   trade's words): SNR at least `label_single_min_snr`, contamination (Hill
//!   et al. 2011) at most `label_single_max_contamination`, at least
//!   `label_single_min_spikes` spikes, presence ratio at least
//!   `label_single_min_presence`, and, where it is defined, isolation
//!   distance at least `label_single_min_isolation_distance`;
//! - `multi`: every other unit: spikes of a neuron or of several that the
//!   sort could not isolate well (multi-unit activity).
//!
//! Each unit also gets the reason: the rules it failed.

/// The label rules' thresholds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LabelRules {
    pub noise_below_snr: f64,
    pub single_min_snr: f64,
    pub single_max_contamination: f64,
    pub single_min_spikes: u64,
    pub single_min_presence: f64,
    pub single_min_isolation_distance: f64,
}

/// The measures a label is decided on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LabelInputs {
    pub snr: f64,
    pub contamination: f64,
    pub n_spikes: u64,
    pub presence_ratio: f64,
    pub isolation_distance: Option<f64>,
}

/// The unit's label and, unless it is `single`, the rules it failed.
pub fn label(m: &LabelInputs, rules: &LabelRules) -> (&'static str, Option<String>) {
    // An undefined (NaN) measure fails its rule.
    let at_least = |value: f64, floor: f64| value >= floor;
    if !at_least(m.snr, rules.noise_below_snr) {
        return ("noise", Some(format!("SNR {:.1} < {}", m.snr, rules.noise_below_snr)));
    }
    let mut failed = Vec::new();
    if m.snr < rules.single_min_snr {
        failed.push(format!("SNR {:.1} < {}", m.snr, rules.single_min_snr));
    }
    if !at_least(rules.single_max_contamination, m.contamination) {
        failed.push(format!("contamination {:.2} > {}", m.contamination, rules.single_max_contamination));
    }
    if m.n_spikes < rules.single_min_spikes {
        failed.push(format!("spikes {} < {}", m.n_spikes, rules.single_min_spikes));
    }
    if !at_least(m.presence_ratio, rules.single_min_presence) {
        failed.push(format!("presence {:.2} < {}", m.presence_ratio, rules.single_min_presence));
    }
    if let Some(distance) = m.isolation_distance.filter(|&d| d < rules.single_min_isolation_distance) {
        failed.push(format!("isolation distance {distance:.1} < {}", rules.single_min_isolation_distance));
    }
    if failed.is_empty() {
        ("single", None)
    } else {
        ("multi", Some(failed.join("; ")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const RULES: LabelRules = LabelRules {
        noise_below_snr: 3.0,
        single_min_snr: 5.0,
        single_max_contamination: 0.1,
        single_min_spikes: 50,
        single_min_presence: 0.5,
        single_min_isolation_distance: 20.0,
    };
    const CLEAN: LabelInputs = LabelInputs {
        snr: 12.0,
        contamination: 0.0,
        n_spikes: 400,
        presence_ratio: 1.0,
        isolation_distance: Some(45.0),
    };

    #[test]
    fn a_clean_unit_is_single() {
        assert_eq!(label(&CLEAN, &RULES), ("single", None));
        // An undefined isolation distance does not count against it.
        assert_eq!(label(&LabelInputs { isolation_distance: None, ..CLEAN }, &RULES).0, "single");
    }

    #[test]
    fn each_failed_rule_makes_it_multi_and_is_named() {
        let cases = [
            (LabelInputs { snr: 4.0, ..CLEAN }, "SNR 4.0 < 5"),
            (LabelInputs { contamination: 0.3, ..CLEAN }, "contamination 0.30 > 0.1"),
            (LabelInputs { contamination: f64::NAN, ..CLEAN }, "contamination NaN > 0.1"),
            (LabelInputs { n_spikes: 20, ..CLEAN }, "spikes 20 < 50"),
            (LabelInputs { presence_ratio: 0.2, ..CLEAN }, "presence 0.20 < 0.5"),
            (LabelInputs { isolation_distance: Some(12.0), ..CLEAN }, "isolation distance 12.0 < 20"),
        ];
        for (inputs, reason) in cases {
            assert_eq!(label(&inputs, &RULES), ("multi", Some(reason.to_string())));
        }
        let both = label(&LabelInputs { n_spikes: 20, contamination: 0.5, ..CLEAN }, &RULES);
        assert_eq!(both.1.unwrap(), "contamination 0.50 > 0.1; spikes 20 < 50");
    }

    #[test]
    fn a_waveform_near_the_noise_is_not_a_neuron() {
        assert_eq!(label(&LabelInputs { snr: 2.5, ..CLEAN }, &RULES), ("noise", Some("SNR 2.5 < 3".to_string())));
        assert_eq!(label(&LabelInputs { snr: f64::NAN, ..CLEAN }, &RULES).0, "noise");
    }
}
