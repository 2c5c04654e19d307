//! Detection checked against outside facts (REFERENCES.md N1, N3) and
//! against itself under different chunkings.

use spikeyard_contract::testing::{write_f32_recording, TestRng};
use spikeyard_contract::{noise, ProgressReporter, Recording};
use spikeyard_detect::kernel::Event;
use spikeyard_detect::params::DetectParams;
use spikeyard_filter::kernel::{FilterEngine, Scratch};
use spikeyard_filter::params::FilterParams;

fn run_detect(recording: &Recording, params: &DetectParams) -> Vec<Event> {
    let valid = params.check(recording.sample_rate_hz).unwrap();
    let noise_uv = spikeyard_detect::estimate_noise(recording, valid.noise_windows, valid.noise_window_frames).unwrap();
    let mut all = Vec::new();
    let mut progress = ProgressReporter::new(recording.n_frames, "frames");
    let usable = vec![true; recording.n_channels];
    spikeyard_detect::detect(recording, &valid, &noise_uv, &usable, &mut progress, |events: &[Event]| {
        all.extend_from_slice(events);
        Ok::<(), spikeyard_contract::RecordingError>(())
    })
    .unwrap();
    all
}

// REFERENCES.md N1, statistical case: for N(0,1), σ̂ spread ≈ 1.167/√n, so
// |σ̂ − 1| < 0.005 at n = 1e6; adding sparse large spikes barely moves it.
#[test]
fn mad_estimate_of_gaussian_noise_is_within_half_a_percent_and_ignores_spikes() {
    let mut rng = TestRng::new(3);
    let clean: Vec<f32> = (0..1_000_000).map(|_| rng.normal() as f32).collect();
    let sigma = noise::mad_sigma(&mut clean.clone());
    assert!((sigma - 1.0).abs() < 0.005, "{sigma}");
    let mut spiky = clean.clone();
    for i in (0..spiky.len()).step_by(1000) {
        spiky[i] = -20.0;
    }
    let with_spikes = noise::mad_sigma(&mut spiky);
    assert!((with_spikes - sigma).abs() < 0.003, "{with_spikes} vs {sigma}");
    // The standard deviation, by contrast, is pulled up by the spikes.
    let sd = (spiky.iter().map(|v| (*v as f64).powi(2)).sum::<f64>() / spiky.len() as f64).sqrt();
    assert!(sd > 1.15);
}

// REFERENCES.md N3: white noise through the order-3 zero-phase Butterworth
// 300–6000 Hz at 30 kHz crosses −4σ downward at 0.82762/s (sampled-data
// rate, not Rice's continuous 1.1284/s). 600 s expects 497 crossings
// (Poisson SD ≈ 22); allow ±25 %.
#[test]
fn false_crossing_rate_on_filtered_white_noise_matches_the_sampled_data_formula() {
    let fs = 30000.0;
    let seconds = 600.0;
    let n = (fs * seconds) as usize;
    let mut rng = TestRng::new(2024);
    let white: Vec<f32> = (0..n).map(|_| rng.normal() as f32).collect();
    let valid = FilterParams::default().check(fs).unwrap();
    let engine = FilterEngine::new(&valid, fs);
    let mut filtered = vec![0.0f32; n];
    engine.filter_channel(
        &white,
        engine.margin_frames(),
        engine.margin_frames(),
        0,
        &mut filtered,
        &mut Scratch::default(),
    );
    drop(white);
    let dir = tempfile::tempdir().unwrap();
    let recording = Recording::open(&write_f32_recording(dir.path(), "noise", fs, 1, 0.0, &filtered)).unwrap();
    let params = DetectParams { threshold_sigma: 4.0, dead_time_ms: 1.0, ..Default::default() };
    let count = run_detect(&recording, &params).len() as f64;
    let expected = 0.82762 * seconds;
    assert!((count - expected).abs() < 0.25 * expected, "{count} crossings, expected {expected}");
    // And Rice's continuous-time rate would be the wrong yardstick: it predicts 677.
    #[expect(clippy::approx_constant, reason = "REFERENCES.md N2's Rice rate, 1.1284/s, only looks like 2/√π")]
    let rice_rate_per_s = 1.1284;
    assert!(count < rice_rate_per_s * seconds * 0.9);
}

/// Noise plus spikes that straddle chunk edges on neighbouring channels.
fn spiky_recording(dir: &std::path::Path) -> Recording {
    let fs = 20000.0;
    let n_channels = 6;
    let n = 60_000;
    let mut rng = TestRng::new(9);
    let mut samples: Vec<f32> = (0..n * n_channels).map(|_| (8.0 * rng.normal()) as f32).collect();
    let shape = [-0.2f32, -0.6, -1.0, -0.7, -0.3, 0.1, 0.2, 0.1];
    let mut t = 37usize;
    while t + 20 < n {
        let home = (t * 7) % n_channels;
        let neighbour = if home + 1 < n_channels { home + 1 } else { home - 1 };
        for (channel, scale) in [(home, 120.0), (neighbour, 70.0)] {
            for (i, s) in shape.iter().enumerate() {
                samples[(t + i) * n_channels + channel] += s * scale;
            }
        }
        t += 97 + (t % 13);
    }
    Recording::open(&write_f32_recording(dir, "spiky", fs, n_channels, 30.0, &samples)).unwrap()
}

// Chunking must not change answers (STYLE.md §5): chunks of 1 s, 0.0333 s
// and 0.0071 s cut spikes and merge windows in two.
#[test]
fn detection_does_not_depend_on_chunk_size() {
    let dir = tempfile::tempdir().unwrap();
    let recording = spiky_recording(dir.path());
    let whole = run_detect(&recording, &DetectParams { chunk_seconds: 10.0, ..Default::default() });
    assert!(whole.len() > 500, "{}", whole.len());
    for chunk_seconds in [1.0, 0.0333, 0.0071] {
        let chunked = run_detect(&recording, &DetectParams { chunk_seconds, ..Default::default() });
        assert_eq!(chunked, whole, "chunk_seconds {chunk_seconds}");
    }
}

// One spike seen on two neighbouring electrodes is one event, on the larger.
#[test]
fn spike_on_neighbouring_electrodes_becomes_one_event_on_the_largest() {
    let dir = tempfile::tempdir().unwrap();
    let recording = spiky_recording(dir.path());
    let merged = run_detect(&recording, &DetectParams::default());
    let unmerged = run_detect(&recording, &DetectParams { merge_radius_um: 0.0, ..Default::default() });
    assert!(unmerged.len() > merged.len() * 18 / 10, "{} vs {}", unmerged.len(), merged.len());
    // Every kept event sits on the home channel, where the spike is largest.
    let on_home = merged.iter().filter(|e| e.amplitude_uv < -100.0).count();
    assert!(on_home as f64 > 0.97 * merged.len() as f64, "{on_home} of {}", merged.len());
}
