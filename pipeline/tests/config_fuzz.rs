//! Property test: arbitrary config text is parsed or refused, never a panic.

use proptest::prelude::*;
use spikeyard::config::PipelineConfig;

proptest! {
    #![proptest_config(ProptestConfig { cases: 512, ..ProptestConfig::default() })]

    #[test]
    fn arbitrary_config_text_never_panics(text in "\\PC{0,400}") {
        let _ = PipelineConfig::parse(&text, "fuzz.toml", None);
    }

    #[test]
    fn default_config_with_a_line_replaced_never_panics(line in 0usize..120, replacement in "[a-z_\\[\\]=\".0-9 -]{0,40}") {
        let mut lines: Vec<&str> = spikeyard::config::DEFAULT_CONFIG.lines().collect();
        if line < lines.len() {
            lines[line] = &replacement;
        }
        let text = lines.join("\n");
        if let Ok(config) = PipelineConfig::parse(&text, "fuzz.toml", None) {
            for stage in &config.stages {
                if let Some(builtin) = spikeyard::stages::builtin(&stage.name) {
                    let _ = (builtin.check)(&stage.params, 20000.0);
                }
            }
        }
    }
}
