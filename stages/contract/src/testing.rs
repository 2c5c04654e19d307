//! Helpers for tests of stages: write small recordings in the contract's
//! format, and a seeded generator of standard normal samples.

use crate::recording::{write_electrodes, DescriptionFields, Dtype, Electrode};
use std::path::{Path, PathBuf};

/// Write a time-major f32 µV recording of `samples` (frames × `n_channels`)
/// with electrodes on a line at `pitch_um`, and return its description path.
pub fn write_f32_recording(
    folder: &Path,
    name: &str,
    sample_rate_hz: f64,
    n_channels: usize,
    pitch_um: f64,
    samples: &[f32],
) -> PathBuf {
    let electrodes: Vec<Electrode> = (0..n_channels)
        .map(|c| Electrode { channel: c, x_um: c as f64 * pitch_um, y_um: 0.0, label: None, group: None })
        .collect();
    write_electrodes(&folder.join(format!("{name}.csv")), &electrodes).expect("write electrodes");
    let bytes: Vec<u8> = samples.iter().flat_map(|v| v.to_le_bytes()).collect();
    std::fs::write(folder.join(format!("{name}.bin")), bytes).expect("write data");
    let description = folder.join(format!("{name}.toml"));
    DescriptionFields {
        data: &format!("{name}.bin"),
        sample_rate_hz,
        n_channels,
        dtype: Dtype::F32,
        microvolts_per_unit: 1.0,
        offset: 0.0,
        electrodes: &format!("{name}.csv"),
        exceptions: None,
    }
    .write(&description)
    .expect("write description");
    description
}

/// A small seeded generator (xoshiro256**) with Box–Muller normals; enough
/// for tests, and independent of any crate's version.
pub struct TestRng {
    state: [u64; 4],
    spare: Option<f64>,
}

impl TestRng {
    pub fn new(seed: u64) -> Self {
        let mut x = seed;
        let mut next = || {
            x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = x;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^ (z >> 31)
        };
        TestRng { state: [next(), next(), next(), next()], spare: None }
    }

    pub fn next_u64(&mut self) -> u64 {
        let s = &mut self.state;
        let result = s[1].wrapping_mul(5).rotate_left(7).wrapping_mul(9);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    /// Uniform in (0, 1).
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    pub fn normal(&mut self) -> f64 {
        if let Some(v) = self.spare.take() {
            return v;
        }
        let (u1, u2) = (self.uniform(), self.uniform());
        let radius = (-2.0 * u1.ln()).sqrt();
        let angle = 2.0 * std::f64::consts::PI * u2;
        self.spare = Some(radius * angle.sin());
        radius * angle.cos()
    }
}

/// The command-line checks every stage executable must pass: no arguments
/// is a usage error (exit 2), an unreadable request is refused naming it.
pub fn check_stage_command_line(executable: &Path) {
    use std::process::Command;
    let output = Command::new(executable).output().expect("the stage starts");
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--request"));
    let output =
        Command::new(executable).args(["--request", "/nonexistent/request.json"]).output().expect("the stage starts");
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("/nonexistent/request.json"));
}
