//! A simulated multi-electrode array recording with known ground truth.
//!
//! Units sit above a planar array. Each unit's soma is a point current
//! source whose extracellular potential falls off as 1/r (point-source
//! model, REFERENCES.md V5); units with an axon add a line of sources along
//! a path on the array surface, each firing after a delay of path length ÷
//! conduction velocity, with a zero-mean (second-derivative) current shape
//! so that distant segments cancel as membrane currents do. Spike trains
//! are Poisson with an absolute refractory period and occasional bursts of
//! shrinking spikes. Noise is white + 1/f-like (a bank of AR(1) processes)
//! per channel, plus a common-mode process and mains hum shared by all
//! channels. Output is deterministic for a seed, whatever the thread count.
//!
//! The scenarios are invented for spikeyard's demo and tests: a culture well
//! with a sparse 8×8 grid ("sparse-grid") and a dense patch whose axons run
//! across the electrodes at known velocities ("dense-axons").

use arrow_array::{ArrayRef, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use rayon::prelude::*;
use spikeyard_contract::recording::{write_electrodes, DescriptionFields};
use spikeyard_contract::table::{write_table, META_WRITER};
use spikeyard_contract::testing::TestRng;
use spikeyard_contract::{Dtype, Electrode};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Storage gain of simulated recordings, µV per stored unit (i16).
pub const MICROVOLTS_PER_UNIT: f64 = 0.195;

/// An axon: a polyline from the soma along the array surface, with side
/// branches; the spike travels along all of it at one velocity.
#[derive(Debug, Clone)]
pub struct Axon {
    /// Points (x, y) in µm; the first is below the soma.
    pub path_um: Vec<(f64, f64)>,
    pub velocity_m_per_s: f64,
    /// Peak potential (µV) the axon gives on an electrode right under it.
    pub peak_uv: f64,
    /// Side branches: each leaves the trunk at the trunk's point with that
    /// index and follows its own points.
    pub branches: Vec<(usize, Vec<(f64, f64)>)>,
}

impl Axon {
    /// A straight axon without branches.
    pub fn straight(from: (f64, f64), to: (f64, f64), velocity_m_per_s: f64, peak_uv: f64) -> Axon {
        Axon { path_um: vec![from, to], velocity_m_per_s, peak_uv, branches: Vec::new() }
    }

    /// A curved axon without branches: the quadratic Bézier curve from
    /// `from` to `to` pulled towards `control`, as a polyline of 32 pieces.
    pub fn curved(from: (f64, f64), control: (f64, f64), to: (f64, f64), velocity_m_per_s: f64, peak_uv: f64) -> Axon {
        let point = |t: f64| {
            let (a, b, c) = ((1.0 - t) * (1.0 - t), 2.0 * t * (1.0 - t), t * t);
            (a * from.0 + b * control.0 + c * to.0, a * from.1 + b * control.1 + c * to.1)
        };
        Axon {
            path_um: (0..=32).map(|i| point(i as f64 / 32.0)).collect(),
            velocity_m_per_s,
            peak_uv,
            branches: Vec::new(),
        }
    }

    /// Point sources every `step_um` along the trunk and the branches:
    /// (x, y, delay after the soma's spike in ms), and the longest delay.
    fn sources(&self, step_um: f64) -> (Vec<(f64, f64, f64)>, f64) {
        let mut sources = Vec::new();
        let mut longest = 0.0f64;
        // µm / (m/s) = µs; ÷1000 for ms.
        let delay = |travelled_um: f64| travelled_um / self.velocity_m_per_s / 1e3;
        let mut along = |points: &[(f64, f64)], start_um: f64, sources: &mut Vec<(f64, f64, f64)>| {
            let mut travelled = start_um;
            let mut at_point = vec![start_um];
            for pair in points.windows(2) {
                let ((x0, y0), (x1, y1)) = (pair[0], pair[1]);
                let length = (x1 - x0).hypot(y1 - y0);
                let n = (length / step_um).ceil() as usize;
                for i in 0..n {
                    let f = (i as f64 + 0.5) / n as f64;
                    sources.push((x0 + f * (x1 - x0), y0 + f * (y1 - y0), delay(travelled + f * length)));
                }
                travelled += length;
                at_point.push(travelled);
            }
            longest = longest.max(delay(travelled));
            at_point
        };
        let trunk = along(&self.path_um, 0.0, &mut sources);
        for (fork, points) in &self.branches {
            let index = (*fork).min(self.path_um.len() - 1);
            let mut path = vec![self.path_um[index]];
            path.extend(points);
            along(&path, trunk[index], &mut sources);
        }
        (sources, longest)
    }
}

/// One simulated neuron.
#[derive(Debug, Clone)]
pub struct UnitSpec {
    pub x_um: f64,
    pub y_um: f64,
    /// Height of the soma above the array surface, µm.
    pub z_um: f64,
    /// Trough amplitude on the nearest electrode, µV (before noise and filtering).
    pub peak_uv: f64,
    pub rate_hz: f64,
    /// Chance that a spike starts a burst of 2–3 more.
    pub burst_probability: f64,
    /// Width (σ) of the trough, ms.
    pub trough_ms: f64,
    pub axon: Option<Axon>,
}

/// A whole simulated recording.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub name: String,
    pub sample_rate_hz: f64,
    pub duration_s: f64,
    pub electrodes: Vec<Electrode>,
    pub units: Vec<UnitSpec>,
    /// White noise σ per channel, µV.
    pub white_noise_uv: f64,
    /// Channels that record nothing but amplifier noise.
    pub dead_channels: Vec<usize>,
    /// Channels with several times the usual noise.
    pub noisy_channels: Vec<usize>,
    /// Network bursts per second: the whole culture fires together, each
    /// unit (with probability 0.8) 1–4 shrinking spikes within 60 ms.
    pub network_burst_rate_hz: f64,
    pub seed: u64,
}

/// Names of the built-in scenarios.
pub const SCENARIOS: [&str; 4] = ["sparse-grid", "dense-axons", "culture", "dense-culture"];

/// A rectangular grid of electrodes, row by row, labelled RrrCcc.
pub fn grid(n_rows: usize, n_columns: usize, pitch_um: f64) -> Vec<Electrode> {
    (0..n_rows * n_columns)
        .map(|channel| {
            let (row, column) = (channel / n_columns, channel % n_columns);
            Electrode {
                channel,
                x_um: column as f64 * pitch_um,
                y_um: row as f64 * pitch_um,
                label: Some(format!("R{:02}C{:02}", row + 1, column + 1)),
                group: None,
            }
        })
        .collect()
}

impl Scenario {
    /// A built-in scenario by name.
    pub fn named(name: &str, duration_s: f64, seed: u64) -> Option<Scenario> {
        match name {
            "sparse-grid" => Some(Self::sparse_grid(duration_s, seed)),
            "dense-axons" => Some(Self::dense_axons(duration_s, seed)),
            "culture" => Some(Self::culture(duration_s, seed)),
            "dense-culture" => Some(Self::dense_culture(duration_s, seed)),
            _ => None,
        }
    }

    /// A cortical culture on an 8×8 grid at 200 µm pitch, 20 kHz: twelve
    /// units near twelve electrodes, from large to below threshold; one dead
    /// and one noisy channel. The largest unit's axon runs along its row of
    /// electrodes at 0.8 m/s, below the detection threshold but seen in its
    /// spike-triggered average.
    pub fn sparse_grid(duration_s: f64, seed: u64) -> Scenario {
        let electrodes = grid(8, 8, 200.0);
        let peaks = [160.0, 130.0, 115.0, 100.0, 90.0, 80.0, 72.0, 65.0, 60.0, 55.0, 22.0, 15.0];
        let homes = [9usize, 12, 18, 21, 27, 30, 33, 36, 45, 50, 54, 58];
        let mut rng = TestRng::new(seed ^ 0x5EED_0001);
        let units = peaks
            .iter()
            .zip(homes)
            .enumerate()
            .map(|(i, (&peak_uv, home))| {
                let e = &electrodes[home];
                let (x_um, y_um) = (e.x_um + 25.0 * (rng.uniform() - 0.5), e.y_um + 25.0 * (rng.uniform() - 0.5));
                let axon = (i == 0).then(|| Axon {
                    path_um: vec![(x_um, y_um), (e.x_um + 60.0, e.y_um), (1450.0, e.y_um)],
                    velocity_m_per_s: 0.8,
                    peak_uv: 20.0,
                    branches: Vec::new(),
                });
                UnitSpec {
                    x_um,
                    y_um,
                    z_um: 20.0 + 15.0 * rng.uniform(),
                    peak_uv,
                    rate_hz: 2.0 + 10.0 * ((i * 7) % 12) as f64 / 11.0,
                    burst_probability: if i % 4 == 0 { 0.1 } else { 0.0 },
                    trough_ms: 0.10 + 0.06 * rng.uniform(),
                    axon,
                }
            })
            .collect();
        Scenario {
            name: "sparse-grid".into(),
            sample_rate_hz: 20000.0,
            duration_s,
            electrodes,
            units,
            white_noise_uv: 6.0,
            dead_channels: vec![7],
            noisy_channels: vec![42],
            network_burst_rate_hz: 0.0,
            seed,
        }
    }

    /// A dense 16×16 patch at 17.5 µm pitch, 20 kHz: six units, three with
    /// axons across the patch: straight at 0.5 m/s, curved at 1.0 m/s, and
    /// forked in two at 0.3 m/s.
    pub fn dense_axons(duration_s: f64, seed: u64) -> Scenario {
        let electrodes = grid(16, 16, 17.5);
        let mut rng = TestRng::new(seed ^ 0x5EED_0002);
        let positions = [(40.0, 40.0), (220.0, 60.0), (130.0, 200.0), (60.0, 230.0), (200.0, 210.0), (140.0, 110.0)];
        let peaks = [140.0, 110.0, 95.0, 80.0, 70.0, 120.0];
        let axons = [
            Some(Axon::straight((40.0, 40.0), (250.0, 180.0), 0.5, 25.0)),
            Some(Axon::curved((220.0, 60.0), (60.0, 40.0), (30.0, 170.0), 1.0, 25.0)),
            None,
            None,
            Some(Axon {
                path_um: vec![(200.0, 210.0), (150.0, 170.0), (155.0, 30.0)],
                velocity_m_per_s: 0.3,
                peak_uv: 25.0,
                branches: vec![(1, vec![(20.0, 170.0)])],
            }),
            None,
        ];
        let units = positions
            .iter()
            .zip(peaks)
            .zip(axons)
            .map(|((&(x_um, y_um), peak_uv), axon)| UnitSpec {
                x_um,
                y_um,
                z_um: 15.0 + 10.0 * rng.uniform(),
                peak_uv,
                rate_hz: 3.0 + 6.0 * rng.uniform(),
                burst_probability: 0.05,
                trough_ms: 0.10 + 0.05 * rng.uniform(),
                axon,
            })
            .collect();
        Scenario {
            name: "dense-axons".into(),
            sample_rate_hz: 20000.0,
            duration_s,
            electrodes,
            units,
            white_noise_uv: 6.0,
            dead_channels: vec![],
            noisy_channels: vec![],
            network_burst_rate_hz: 0.0,
            seed,
        }
    }

    /// A harder culture on the 8×8 grid at 200 µm, 20 kHz: twenty neurons
    /// on twelve electrodes, eight of which hold two neurons of nearly one
    /// shape and different amplitudes (a third to two thirds of the
    /// larger); amplitudes crowd towards the detection threshold; bursts of
    /// shrinking spikes and network bursts every few seconds; one axon
    /// along a row; the channel order is shuffled, not the grid's.
    pub fn culture(duration_s: f64, seed: u64) -> Scenario {
        let grid_electrodes = grid(8, 8, 200.0);
        let mut rng = TestRng::new(seed ^ 0x5EED_0003);
        let electrodes = shuffled_channels(&grid_electrodes, &mut rng);
        let peaks = [150.0, 120.0, 100.0, 90.0, 80.0, 72.0, 65.0, 60.0, 55.0, 50.0, 46.0, 42.0];
        let homes = [9usize, 12, 18, 21, 27, 30, 33, 36, 45, 50, 53, 58];
        let partner_ratio = [0.3, 0.55, 0.4, 0.65, 0.5, 0.7, 0.6, 0.75];
        let mut units = Vec::new();
        for (i, (&peak_uv, home)) in peaks.iter().zip(homes).enumerate() {
            let e = &grid_electrodes[home];
            let (x_um, y_um) = (e.x_um + 30.0 * (rng.uniform() - 0.5), e.y_um + 30.0 * (rng.uniform() - 0.5));
            let trough_ms = 0.10 + 0.05 * rng.uniform();
            let axon = (i == 1).then(|| Axon::straight((x_um, y_um), (1400.0, e.y_um), 0.6, 22.0));
            units.push(UnitSpec {
                x_um,
                y_um,
                z_um: 20.0 + 10.0 * rng.uniform(),
                peak_uv,
                rate_hz: 1.0 + 7.0 * rng.uniform(),
                burst_probability: if i % 3 == 0 { 0.15 } else { 0.03 },
                trough_ms,
                axon,
            });
            if let Some(&ratio) = partner_ratio.get(i) {
                let angle = std::f64::consts::TAU * rng.uniform();
                units.push(UnitSpec {
                    x_um: x_um + 20.0 * angle.cos(),
                    y_um: y_um + 20.0 * angle.sin(),
                    z_um: 25.0 + 10.0 * rng.uniform(),
                    peak_uv: peak_uv * ratio,
                    rate_hz: 1.0 + 7.0 * rng.uniform(),
                    burst_probability: 0.05,
                    trough_ms: trough_ms + 0.02 * (rng.uniform() - 0.5),
                    axon: None,
                });
            }
        }
        Scenario {
            name: "culture".into(),
            sample_rate_hz: 20000.0,
            duration_s,
            electrodes,
            units,
            white_noise_uv: 6.0,
            dead_channels: vec![],
            noisy_channels: vec![],
            network_burst_rate_hz: 0.2,
            seed,
        }
    }

    /// A dense 32×32 patch at 17.5 µm, 20 kHz: twelve neurons, six with
    /// axons crossing the patch (0.3–1.2 m/s), some close enough to share
    /// electrodes; network bursts; shuffled channel order.
    pub fn dense_culture(duration_s: f64, seed: u64) -> Scenario {
        let grid_electrodes = grid(32, 32, 17.5);
        let mut rng = TestRng::new(seed ^ 0x5EED_0004);
        let electrodes = shuffled_channels(&grid_electrodes, &mut rng);
        let positions = [
            (80.0, 90.0),
            (110.0, 100.0),
            (300.0, 80.0),
            (450.0, 120.0),
            (470.0, 140.0),
            (150.0, 300.0),
            (320.0, 280.0),
            (90.0, 460.0),
            (260.0, 470.0),
            (450.0, 430.0),
            (200.0, 180.0),
            (380.0, 360.0),
        ];
        let peaks = [140.0, 70.0, 120.0, 100.0, 55.0, 90.0, 110.0, 80.0, 65.0, 130.0, 60.0, 75.0];
        let units = positions
            .iter()
            .zip(peaks)
            .enumerate()
            .map(|(i, (&(x_um, y_um), peak_uv))| {
                let axon = (i % 2 == 0).then(|| {
                    let to = (540.0 - x_um * 0.8, 540.0 - y_um * 0.9);
                    let control = (x_um + 100.0 * (rng.uniform() - 0.5), to.1);
                    Axon::curved((x_um, y_um), control, to, 0.3 + 0.18 * i as f64 / 2.0, 25.0)
                });
                UnitSpec {
                    x_um,
                    y_um,
                    z_um: 15.0 + 15.0 * rng.uniform(),
                    peak_uv,
                    rate_hz: 1.0 + 7.0 * rng.uniform(),
                    burst_probability: 0.08,
                    trough_ms: 0.10 + 0.05 * rng.uniform(),
                    axon,
                }
            })
            .collect();
        Scenario {
            name: "dense-culture".into(),
            sample_rate_hz: 20000.0,
            duration_s,
            electrodes,
            units,
            white_noise_uv: 6.0,
            dead_channels: vec![],
            noisy_channels: vec![],
            network_burst_rate_hz: 0.2,
            seed,
        }
    }

    pub fn n_frames(&self) -> u64 {
        (self.duration_s * self.sample_rate_hz).round() as u64
    }
}

/// The same electrodes stored in a shuffled channel order (as many
/// amplifiers number them): channel c sits where `grid` has a random other
/// electrode, labels following positions.
fn shuffled_channels(grid: &[Electrode], rng: &mut TestRng) -> Vec<Electrode> {
    let mut order: Vec<usize> = (0..grid.len()).collect();
    for i in (1..order.len()).rev() {
        order.swap(i, (rng.uniform() * (i + 1) as f64) as usize % (i + 1));
    }
    order.iter().enumerate().map(|(channel, &at)| Electrode { channel, ..grid[at].clone() }).collect()
}

/// Soma waveform (trough at t = 0, normalised to −1), t in ms.
fn soma_shape(t_ms: f64, trough_ms: f64) -> f64 {
    let trough = -(-0.5 * (t_ms / trough_ms).powi(2)).exp();
    let rebound = 0.3 * (-0.5 * ((t_ms - 0.35) / 0.25).powi(2)).exp();
    trough + rebound
}

/// Axonal membrane-current shape: negative second derivative of a Gaussian,
/// zero-mean, peak −1 at t = 0, t in ms.
fn axon_shape(t_ms: f64) -> f64 {
    let width = 0.08;
    let u = t_ms / width;
    -(1.0 - u * u) * (-0.5 * u * u).exp()
}

/// Spacing of the axon's point sources, µm.
const AXON_STEP_UM: f64 = 2.0;
/// Distance above the soma of the return current of its spike, µm.
const SOMA_RETURN_UM: f64 = 40.0;
/// Height of the axon above the array surface, µm.
const AXON_HEIGHT_UM: f64 = 3.0;

/// A unit's template: for each channel where it is visible, µV at frames
/// `-pre..post` around the soma trough.
#[derive(Debug, Clone)]
pub struct Template {
    pub pre_frames: usize,
    pub channels: Vec<usize>,
    /// One row per entry of `channels`.
    pub values_uv: Vec<Vec<f32>>,
}

/// Render a unit's template (noise-free, unfiltered).
pub fn render_template(unit: &UnitSpec, electrodes: &[Electrode], sample_rate_hz: f64) -> Template {
    let frame_ms = 1e3 / sample_rate_hz;
    let pre_frames = (1.0 / frame_ms).ceil() as usize;
    let (axon_sources, axon_ms) = unit.axon.as_ref().map_or((Vec::new(), 0.0), |a| a.sources(AXON_STEP_UM));
    let post_frames = ((2.5 + axon_ms) / frame_ms).ceil() as usize;
    let n = pre_frames + post_frames;
    let distance = |e: &Electrode, x: f64, y: f64, z: f64| ((e.x_um - x).powi(2) + (e.y_um - y).powi(2) + z * z).sqrt();
    // The soma's inward current is balanced by an outward return current
    // higher up the dendrite: two opposite point sources (each φ = I/(4πσr),
    // REFERENCES.md V5), so the somatic spike fades faster than 1/r and the
    // axon's own signal dominates farther away, as on real arrays.
    let soma_geometry = |e: &Electrode| {
        1.0 / distance(e, unit.x_um, unit.y_um, unit.z_um)
            - 1.0 / distance(e, unit.x_um, unit.y_um, unit.z_um + SOMA_RETURN_UM)
    };
    let strongest = electrodes.iter().map(soma_geometry).fold(f64::MIN_POSITIVE, f64::max);
    let soma_scale = unit.peak_uv / strongest;
    // Axon segments lie AXON_HEIGHT_UM above the surface. The current
    // shape is coherent over ≈ 40–80 µm of axon (its duration × velocity),
    // over which Σ step/r for an electrode under the axon is ≈ 2·asinh(30/3)
    // ≈ 6, so dividing by 6 puts the peak near `peak_uv`.
    let axon_scale = unit.axon.as_ref().map_or(0.0, |a| a.peak_uv / 6.0);
    let mut channels = Vec::new();
    let mut values_uv = Vec::new();
    for e in electrodes {
        let soma_factor = soma_scale * soma_geometry(e);
        let near_axon: Vec<(f64, f64)> = axon_sources
            .iter()
            .map(|&(x, y, delay)| (distance(e, x, y, AXON_HEIGHT_UM), delay))
            .filter(|(r, _)| *r < 60.0)
            .collect();
        let row: Vec<f32> = (0..n)
            .map(|k| {
                let t = (k as f64 - pre_frames as f64) * frame_ms;
                let soma = soma_factor * soma_shape(t, unit.trough_ms);
                let axon: f64 =
                    near_axon.iter().map(|(r, delay)| axon_scale * AXON_STEP_UM / r * axon_shape(t - delay)).sum();
                (soma + axon) as f32
            })
            .collect();
        let peak = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
        if peak >= 1.0 {
            channels.push(e.channel);
            values_uv.push(row);
        }
    }
    Template { pre_frames, channels, values_uv }
}

/// One ground-truth spike.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TruthSpike {
    pub unit: usize,
    /// Frame of the soma trough.
    pub sample: u64,
    /// Amplitude factor (1, less within bursts).
    pub scale: f32,
}

/// Spike trains of all units, sorted by sample.
pub fn spike_trains(scenario: &Scenario) -> Vec<TruthSpike> {
    let fs = scenario.sample_rate_hz;
    let n_frames = scenario.n_frames();
    let refractory_s = 0.002;
    let mut spikes = Vec::new();
    for (unit, spec) in scenario.units.iter().enumerate() {
        let mut rng = TestRng::new(scenario.seed.wrapping_mul(1000).wrapping_add(unit as u64 + 1));
        // Rate of the Poisson part, so that the mean rate including the dead time matches.
        let free_rate = spec.rate_hz / (1.0 - spec.rate_hz * refractory_s).max(0.05);
        let mut t = 0.01 + (-rng.uniform().ln()) / free_rate;
        while t < scenario.duration_s - 0.01 {
            spikes.push(TruthSpike { unit, sample: (t * fs).round() as u64, scale: 1.0 });
            let mut last = t;
            if rng.uniform() < spec.burst_probability {
                let extra = 2 + (rng.uniform() * 2.0) as usize;
                for k in 1..=extra {
                    last += 0.004 + 0.004 * rng.uniform();
                    if last >= scenario.duration_s - 0.01 {
                        break;
                    }
                    spikes.push(TruthSpike { unit, sample: (last * fs).round() as u64, scale: 0.85f32.powi(k as i32) });
                }
            }
            t = last + refractory_s + (-rng.uniform().ln()) / free_rate;
        }
    }
    add_network_bursts(scenario, &mut spikes);
    spikes.retain(|s| s.sample < n_frames);
    spikes.sort_by_key(|s| (s.sample, s.unit));
    // A unit's spikes closer than its refractory period: the later goes.
    let refractory = (refractory_s * fs) as u64;
    let mut last: Vec<Option<u64>> = vec![None; scenario.units.len()];
    spikes.retain(|s| {
        let keep = last[s.unit].is_none_or(|l| s.sample >= l + refractory);
        if keep {
            last[s.unit] = Some(s.sample);
        }
        keep
    });
    spikes
}

/// Network bursts at `network_burst_rate_hz` (Poisson): each unit, with
/// probability 0.8, fires 1–4 spikes from 0–40 ms after the burst's start,
/// 5–20 ms apart, shrinking by 0.9 a spike.
fn add_network_bursts(scenario: &Scenario, spikes: &mut Vec<TruthSpike>) {
    if scenario.network_burst_rate_hz <= 0.0 {
        return;
    }
    let fs = scenario.sample_rate_hz;
    let mut rng = TestRng::new(scenario.seed.wrapping_mul(31).wrapping_add(0xB0B5));
    let mut t = (-rng.uniform().ln()) / scenario.network_burst_rate_hz;
    while t < scenario.duration_s - 0.2 {
        for unit in 0..scenario.units.len() {
            if rng.uniform() >= 0.8 {
                continue;
            }
            let mut at = t + 0.04 * rng.uniform();
            let n = 1 + (rng.uniform() * 4.0) as i32;
            for k in 0..n {
                spikes.push(TruthSpike { unit, sample: (at * fs).round() as u64, scale: 0.9f32.powi(k) });
                at += 0.005 + 0.015 * rng.uniform();
            }
        }
        t += (-rng.uniform().ln()) / scenario.network_burst_rate_hz;
    }
}

/// Per-channel noise state carried across chunks.
#[derive(Clone, Default)]
struct NoiseState {
    slow: [f64; 3],
}

/// AR(1) coefficients and innovation scales for the 1/f-like bank
/// (time constants 1, 10, 100 ms; equal variance each).
fn pink_bank(sample_rate_hz: f64, sigma_uv: f64) -> [(f64, f64); 3] {
    [1e-3, 1e-2, 1e-1].map(|tau| {
        let a = (-1.0 / (tau * sample_rate_hz)).exp();
        (a, sigma_uv * (1.0 - a * a).sqrt())
    })
}

/// What [`write_recording`] wrote.
#[derive(Debug, Clone)]
pub struct SimulatedRecording {
    pub description: PathBuf,
    pub truth_units: PathBuf,
    pub truth_spikes: PathBuf,
    pub spikes: Vec<TruthSpike>,
    pub templates: Vec<Template>,
}

/// Frames simulated per block.
const BLOCK_FRAMES: u64 = 20_000;

/// Write the scenario into `folder` as `recording.toml` (+ `.bin`,
/// `electrodes.csv`) with ground truth `truth_units.parquet` and
/// `truth_spikes.parquet`.
///
/// # Errors
/// Writing any file fails.
pub fn write_recording(scenario: &Scenario, folder: &Path) -> anyhow::Result<SimulatedRecording> {
    use anyhow::Context;
    std::fs::create_dir_all(folder).with_context(|| format!("{}: cannot create folder", folder.display()))?;
    let fs = scenario.sample_rate_hz;
    let n_channels = scenario.electrodes.len();
    let n_frames = scenario.n_frames();
    let templates: Vec<Template> =
        scenario.units.iter().map(|u| render_template(u, &scenario.electrodes, fs)).collect();
    let spikes = spike_trains(scenario);
    let data_path = folder.join("recording.bin");
    let file = std::fs::File::create(&data_path).with_context(|| format!("{}: cannot create", data_path.display()))?;
    let mut out = std::io::BufWriter::with_capacity(1 << 22, file);
    let white = scenario.white_noise_uv;
    let bank = pink_bank(fs, 0.8 * white);
    let common_bank = pink_bank(fs, 4.0);
    let mut states = vec![NoiseState::default(); n_channels];
    let mut common_state = NoiseState::default();
    let hum_gain: Vec<f64> = (0..n_channels).map(|c| 0.8 + 0.4 * ((c * 37 % 17) as f64 / 16.0)).collect();
    let mut first_spike = 0usize;
    let mut block = Vec::new();
    let mut start = 0u64;
    while start < n_frames {
        let end = (start + BLOCK_FRAMES).min(n_frames);
        let len = (end - start) as usize;
        let block_index = start / BLOCK_FRAMES;
        // Shared signals: common-mode noise and mains hum.
        let mut rng = TestRng::new(scenario.seed ^ block_index.wrapping_mul(0x9E37_79B9) ^ 0xC0_FFEE);
        let common: Vec<f64> = (0..len)
            .map(|k| {
                let mut value = 2.0 * rng.normal();
                for (state, (a, scale)) in common_state.slow.iter_mut().zip(common_bank) {
                    *state = a * *state + scale * rng.normal();
                    value += *state;
                }
                let t = (start + k as u64) as f64 / fs;
                let hum = 15.0 * (2.0 * std::f64::consts::PI * 50.0 * t).sin()
                    + 4.0 * (2.0 * std::f64::consts::PI * 150.0 * t + 0.3).sin();
                value + hum
            })
            .collect();
        // Per-channel noise, channels in parallel, each from its own seeded stream.
        let columns: Vec<Vec<f64>> = states
            .par_iter_mut()
            .enumerate()
            .map(|(channel, state)| {
                let mut rng = TestRng::new(
                    scenario.seed.wrapping_add(1 + channel as u64).wrapping_mul(0x2545_F491_4F6C_DD1D) ^ block_index,
                );
                let dead = scenario.dead_channels.contains(&channel);
                let gain = if scenario.noisy_channels.contains(&channel) { 5.0 } else { 1.0 };
                (0..len)
                    .map(|k| {
                        if dead {
                            return 0.3 * rng.normal();
                        }
                        let mut value = gain * white * rng.normal();
                        for (s, (a, scale)) in state.slow.iter_mut().zip(bank) {
                            *s = a * *s + scale * rng.normal();
                            value += *s;
                        }
                        value + common[k] * hum_gain[channel] / hum_gain[0]
                    })
                    .collect()
            })
            .collect();
        block.clear();
        block.resize(len * n_channels, 0.0f64);
        for (channel, column) in columns.iter().enumerate() {
            for (k, v) in column.iter().enumerate() {
                block[k * n_channels + channel] = *v;
            }
        }
        // Spikes overlapping the block.
        while first_spike < spikes.len() {
            let s = &spikes[first_spike];
            let template = &templates[s.unit];
            if s.sample + (template.values_uv[0].len() as u64) < start + template.pre_frames as u64 {
                first_spike += 1;
            } else {
                break;
            }
        }
        for s in spikes[first_spike..].iter().take_while(|s| s.sample < end + 1000) {
            let template = &templates[s.unit];
            for (row, &channel) in template.values_uv.iter().zip(&template.channels) {
                if scenario.dead_channels.contains(&channel) {
                    continue;
                }
                for (k, v) in row.iter().enumerate() {
                    let frame = s.sample as i64 - template.pre_frames as i64 + k as i64;
                    if frame >= start as i64 && frame < end as i64 {
                        block[(frame as u64 - start) as usize * n_channels + channel] += (*v * s.scale) as f64;
                    }
                }
            }
        }
        let bytes: Vec<u8> = block
            .iter()
            .flat_map(|v| {
                ((v / MICROVOLTS_PER_UNIT).round().clamp(i16::MIN as f64, i16::MAX as f64) as i16).to_le_bytes()
            })
            .collect();
        out.write_all(&bytes).with_context(|| format!("{}: write failed", data_path.display()))?;
        start = end;
    }
    out.flush().with_context(|| format!("{}: write failed", data_path.display()))?;
    write_electrodes(&folder.join("electrodes.csv"), &scenario.electrodes)
        .with_context(|| format!("{}: cannot write electrodes.csv", folder.display()))?;
    let description = folder.join("recording.toml");
    DescriptionFields {
        data: "recording.bin",
        sample_rate_hz: fs,
        n_channels,
        dtype: Dtype::I16,
        microvolts_per_unit: MICROVOLTS_PER_UNIT,
        offset: 0.0,
        electrodes: "electrodes.csv",
        exceptions: None,
    }
    .write(&description)
    .with_context(|| format!("{}: cannot write", description.display()))?;
    let (truth_units, truth_spikes) = write_truth(scenario, &templates, &spikes, folder)?;
    Ok(SimulatedRecording { description, truth_units, truth_spikes, spikes, templates })
}

/// The channel where a template's trough is deepest, and that depth (µV, negative).
pub fn template_main_channel(template: &Template) -> (usize, f32) {
    template
        .channels
        .iter()
        .zip(&template.values_uv)
        .map(|(&c, row)| (c, row.iter().copied().fold(f32::INFINITY, f32::min)))
        .fold((0, f32::INFINITY), |best, x| if x.1 < best.1 { x } else { best })
}

fn write_truth(
    scenario: &Scenario,
    templates: &[Template],
    spikes: &[TruthSpike],
    folder: &Path,
) -> anyhow::Result<(PathBuf, PathBuf)> {
    let n_units = scenario.units.len();
    let mut counts = vec![0i64; n_units];
    for s in spikes {
        counts[s.unit] += 1;
    }
    let main: Vec<(usize, f32)> = templates.iter().map(template_main_channel).collect();
    let metadata = [(
        META_WRITER,
        format!(
            "spikeyard simulate {} (scenario {}, seed {})",
            env!("CARGO_PKG_VERSION"),
            scenario.name,
            scenario.seed
        ),
    )];
    let units = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("x_um", DataType::Float64, false),
            Field::new("y_um", DataType::Float64, false),
            Field::new("z_um", DataType::Float64, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("trough_uv", DataType::Float64, false),
            Field::new("n_spikes", DataType::Int64, false),
            Field::new("firing_rate_hz", DataType::Float64, false),
            Field::new("axon_velocity_m_per_s", DataType::Float64, true),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(0..n_units as i32)) as ArrayRef,
            Arc::new(Float64Array::from_iter_values(scenario.units.iter().map(|u| u.x_um))),
            Arc::new(Float64Array::from_iter_values(scenario.units.iter().map(|u| u.y_um))),
            Arc::new(Float64Array::from_iter_values(scenario.units.iter().map(|u| u.z_um))),
            Arc::new(Int32Array::from_iter_values(main.iter().map(|m| m.0 as i32))),
            Arc::new(Float64Array::from_iter_values(main.iter().map(|m| m.1 as f64))),
            Arc::new(Int64Array::from(counts.clone())),
            Arc::new(Float64Array::from_iter_values(counts.iter().map(|&c| c as f64 / scenario.duration_s))),
            Arc::new(Float64Array::from_iter(
                scenario.units.iter().map(|u| u.axon.as_ref().map(|a| a.velocity_m_per_s)),
            )),
        ],
    )?;
    let spikes_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("sample", DataType::Int64, false),
            Field::new("time_s", DataType::Float64, false),
            Field::new("amplitude_scale", DataType::Float64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(spikes.iter().map(|s| s.unit as i32))) as ArrayRef,
            Arc::new(Int64Array::from_iter_values(spikes.iter().map(|s| s.sample as i64))),
            Arc::new(Float64Array::from_iter_values(spikes.iter().map(|s| s.sample as f64 / scenario.sample_rate_hz))),
            Arc::new(Float64Array::from_iter_values(spikes.iter().map(|s| s.scale as f64))),
        ],
    )?;
    let units_path = write_table(&folder.join("truth_units.parquet"), &units, &metadata)?;
    let spikes_path = write_table(&folder.join("truth_spikes.parquet"), &spikes_batch, &metadata)?;
    Ok((units_path, spikes_path))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn soma_potential_is_a_sink_and_its_return_source() {
        // REFERENCES.md V5: each point source gives φ = I/(4πσr), so the
        // trough on each electrode is proportional to 1/r_sink − 1/r_return.
        let electrodes: Vec<Electrode> = [0.0, 30.0, 90.0]
            .iter()
            .enumerate()
            .map(|(c, &x)| Electrode { channel: c, x_um: x, y_um: 0.0, label: None, group: None })
            .collect();
        let unit = UnitSpec {
            x_um: 0.0,
            y_um: 0.0,
            z_um: 20.0,
            peak_uv: 100.0,
            rate_hz: 1.0,
            burst_probability: 0.0,
            trough_ms: 0.12,
            axon: None,
        };
        let template = render_template(&unit, &electrodes, 20000.0);
        let trough: Vec<f64> = template.values_uv.iter().map(|row| row[template.pre_frames] as f64).collect();
        let geometry: Vec<f64> =
            [0.0f64, 30.0, 90.0].iter().map(|x| 1.0 / x.hypot(20.0) - 1.0 / x.hypot(60.0)).collect();
        for i in 1..trough.len() {
            assert!((trough[i] / trough[0] - geometry[i] / geometry[0]).abs() < 1e-5, "{trough:?}");
        }
        // The nearest electrode sees about the unit's amplitude (the rebound takes a little off).
        assert!((trough[0] + 100.0).abs() < 15.0, "{trough:?}");
    }

    #[test]
    fn spike_trains_respect_the_refractory_period_and_rate() {
        let scenario = Scenario::sparse_grid(60.0, 5);
        let spikes = spike_trains(&scenario);
        for unit in 0..scenario.units.len() {
            let train: Vec<u64> = spikes.iter().filter(|s| s.unit == unit).map(|s| s.sample).collect();
            assert!(train.windows(2).all(|w| w[1] - w[0] >= 40), "unit {unit}: an interval under 2 ms");
            let rate = train.len() as f64 / 60.0;
            let expected = scenario.units[unit].rate_hz;
            assert!(rate > 0.6 * expected && rate < 1.6 * expected, "unit {unit}: {rate} vs {expected}");
        }
    }

    #[test]
    fn simulation_is_deterministic_for_a_seed() {
        let dir = tempfile::tempdir().unwrap();
        let scenario = Scenario::sparse_grid(1.5, 7);
        write_recording(&scenario, &dir.path().join("a")).unwrap();
        write_recording(&scenario, &dir.path().join("b")).unwrap();
        let a = std::fs::read(dir.path().join("a/recording.bin")).unwrap();
        let b = std::fs::read(dir.path().join("b/recording.bin")).unwrap();
        assert_eq!(a.len(), 30000 * 64 * 2);
        assert!(a == b);
        let other = Scenario::sparse_grid(1.5, 8);
        write_recording(&other, &dir.path().join("c")).unwrap();
        assert!(std::fs::read(dir.path().join("c/recording.bin")).unwrap() != a);
    }
}
