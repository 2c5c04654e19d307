//! Property tests: arbitrary descriptions, electrode tables and raw data
//! never make the reader panic; they are accepted or refused with an error.

use proptest::prelude::*;
use spikeyard_contract::recording::read_electrodes;
use spikeyard_contract::Recording;

const VALID: &str = "data = \"d.bin\"\nsample_rate_hz = 20000.0\nchannels = 3\ndtype = \"i16\"\nlayout = \"time-major\"\nmicrovolts_per_unit = 0.195\noffset = 0\nelectrodes = \"e.csv\"\n";

fn folder_with(description: &str, electrodes: &str, data: &[u8]) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("r.toml"), description).unwrap();
    std::fs::write(dir.path().join("e.csv"), electrodes).unwrap();
    std::fs::write(dir.path().join("d.bin"), data).unwrap();
    dir
}

/// Open, then read every frame in two pieces; any outcome but a panic is fine.
fn exercise(dir: &tempfile::TempDir) {
    if let Ok(recording) = Recording::open(&dir.path().join("r.toml")) {
        let mut out = Vec::new();
        let half = recording.n_frames / 2;
        let _ = recording.read_frames(0, half, &mut out);
        let _ = recording.read_frames(half, recording.n_frames, &mut out);
        let _ = recording.read_frames(half, recording.n_frames + 1, &mut out);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn arbitrary_description_text_never_panics(text in "\\PC{0,300}") {
        exercise(&folder_with(&text, "channel,x_um,y_um\n0,0,0\n1,1,0\n2,2,0\n", &[0; 12]));
    }

    #[test]
    fn mutated_description_values_never_panic(
        rate in prop_oneof![Just("0.0".to_string()), Just("-1".to_string()), Just("nan".to_string()), Just("inf".to_string()), any::<f64>().prop_map(|v| format!("{v:?}"))],
        channels in prop_oneof![any::<i64>().prop_map(|v| v.to_string()), Just("1e30".to_string()), Just("\"three\"".to_string())],
        dtype in prop_oneof![Just("i16"), Just("u16"), Just("i32"), Just("f32"), Just("f64"), Just("int12"), Just("")],
        gain in any::<f64>(),
        data in proptest::collection::vec(any::<u8>(), 0..200),
    ) {
        let text = VALID
            .replace("20000.0", &rate)
            .replace("channels = 3", &format!("channels = {channels}"))
            .replace("\"i16\"", &format!("\"{dtype}\""))
            .replace("0.195", &format!("{gain:?}"));
        exercise(&folder_with(&text, "channel,x_um,y_um\n0,0,0\n1,1,0\n2,2,0\n", &data));
    }

    #[test]
    fn arbitrary_electrode_tables_never_panic(table in "[0-9a-z_,.\\-\n ]{0,200}", channels in 0usize..5) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("e.csv");
        std::fs::write(&path, &table).unwrap();
        let _ = read_electrodes(&path, channels);
        let with_header = format!("channel,x_um,y_um\n{table}");
        std::fs::write(&path, with_header).unwrap();
        let _ = read_electrodes(&path, channels.max(1));
    }

    #[test]
    fn arbitrary_float_data_is_read_or_refused(data in proptest::collection::vec(any::<u8>(), 0..240), layout in prop_oneof![Just("time-major"), Just("channel-major")], dtype in prop_oneof![Just("f32"), Just("f64")]) {
        let text = VALID.replace("\"i16\"", &format!("\"{dtype}\"")).replace("time-major", layout);
        exercise(&folder_with(&text, "channel,x_um,y_um\n0,0,0\n1,1,0\n2,2,0\n", &data));
    }
}
