//! The propagation stage: where each unit's signal is seen on the array,
//! and how fast it travels along its axon.
//!
//! Data flow of [`run`]:
//! 1. footprints: spike-triggered averages of the filtered signal of a
//!    seeded subset of each unit's spikes on every electrode, all units in
//!    one pass over the recording; per electrode the averaged trough, its
//!    latency after the spike (parabolic sub-sample interpolation) and
//!    whether it stands out of the noise (`footprints.parquet`);
//! 2. the footprint's ridge ([`fit::ridge`]): the significant electrodes
//!    that are the largest across the direction of travel (the latency
//!    gradient), so that a footprint spread sideways by the axon's field
//!    is timed along the axon, not across a band;
//! 3. tracking ([`fit::track`]): from the largest trough (the soma), ridge
//!    electrodes in order of latency, each linked to the nearest one
//!    already placed; the tree's branches ([`fit::branches`]); distance
//!    along a branch is measured on the chain smoothed over ±2 electrodes
//!    ([`fit::smoothed_arc_length`]);
//! 4. per branch, latency against distance by Theil–Sen
//!    ([`fit::theil_sen`]); velocity = distance ÷ latency (1 µm/ms =
//!    10⁻³ m/s). A branch is reported only when it is long enough, its
//!    latency rises with distance beyond doubt (Sen's interval above 0) and
//!    by at least `min_latency_span_ms`, and the line fits
//!    (`min_r_squared`); electrodes within `soma_exclusion_um` of the soma
//!    are not timed. A unit without a measurable axon has no row;
//! 5. the 95 % interval: a bootstrap over the averaged spikes
//!    ([`bootstrap_intervals`], a second pass that reads only a few samples
//!    around each timed electrode's trough), which measures the noise of
//!    the latencies, not the bias of the method (`propagation.parquet`,
//!    and the timed electrodes of each branch in
//!    `propagation_paths.parquet`).

pub mod fit;
pub mod params;

use arrow_array::{ArrayRef, BooleanArray, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use fit::Node;
use params::PropagationParams;
use rayon::prelude::*;
use spikeyard_contract::events::{for_each_event_window, EventRecord, EventWindow};
use spikeyard_contract::recording::StoredSum;
use spikeyard_contract::runs::group_runs;
use spikeyard_contract::sampling::uniform;
use spikeyard_contract::table::{column, for_each_batch, read_table, write_table};
use spikeyard_contract::{ContractError, Recording, StageFailure, StageReport, StageRequest};
use std::path::Path;
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-propagation";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const FOOTPRINTS_TABLE: &str = "footprints.parquet";
pub const PROPAGATION_TABLE: &str = "propagation.parquet";
pub const PATHS_TABLE: &str = "propagation_paths.parquet";

/// A unit's footprint on every electrode.
#[derive(Debug, Clone, PartialEq)]
pub struct Footprint {
    pub n_spikes: usize,
    /// Per channel: averaged trough (µV), its latency (ms), significant.
    pub electrodes: Vec<(f64, f64, bool)>,
}

/// Bytes of footprint sums held at once. Units are summed in passes of as
/// many as fit, so the stage's memory does not grow with units × electrodes
/// (2000 units on 4096 electrodes would need 6 GB in one pass). A pass
/// reads only the windows that hold its units' spikes, so each spike's
/// rows are still read once in all.
pub const SUMS_BUDGET_BYTES: usize = 256 << 20;

/// Spike-triggered averages of `spikes` (unit, sample; ascending sample) on
/// every electrode, in as few passes over the recording as a budget of
/// `budget_bytes` for the sums held at once allows ([`SUMS_BUDGET_BYTES`];
/// at least one unit per pass). The answer does not depend on the budget.
///
/// # Errors
/// Reading the recording fails.
pub fn footprints(
    recording: &Recording,
    spikes: &[(usize, u64)],
    n_units: usize,
    noise_uv: &[f64],
    params: &PropagationParams,
    origin: &Path,
    budget_bytes: usize,
) -> Result<Vec<Footprint>, StageFailure> {
    let fs = recording.sample_rate_hz;
    let before = (params.before_ms * 1e-3 * fs).round() as usize;
    let after = (params.after_ms * 1e-3 * fs).round() as usize;
    let length = before + after + 1;
    let n_channels = recording.n_channels;
    let chunk_frames = (params.chunk_seconds * fs).round().max(1.0) as usize;
    // Per unit, frame-major: sums[unit][k * n_channels + channel]. Frames
    // stored as i16 (the filtered copy) are summed exactly as the stored
    // numbers, several times cheaper than converting each to µV (in i32,
    // half the bytes of i64, while no unit of a pass has more spikes than
    // an i32 sum holds), and scaled once at the end; other frames are
    // summed in µV.
    let scale = recording.stored_i16_scale();
    let per_pass = (budget_bytes / (n_channels * length * std::mem::size_of::<i64>()).max(1)).max(1);
    let mut prints = Vec::with_capacity(n_units);
    for first in (0..n_units).step_by(per_pass) {
        // This pass's units, numbered from 0, and their spikes.
        let n_units = per_pass.min(n_units - first);
        let spikes: Vec<(usize, u64)> =
            spikes.iter().filter(|s| (first..first + n_units).contains(&s.0)).map(|&(u, t)| (u - first, t)).collect();
        let mut counts = vec![0usize; n_units];
        for &(unit, _) in &spikes {
            counts[unit] += 1;
        }
        let margin = before.max(after) + 1;
        let walk = Walk {
            recording,
            spikes: &spikes,
            n_units,
            size: n_channels * length,
            before,
            chunk_frames,
            margin,
            origin,
        };
        let most = counts.iter().copied().max().unwrap_or(0) as u64;
        let sums = match scale {
            Some(scale) if most <= i32::MAX_TERMS => walk.stored_sums::<i32>(scale, &counts)?,
            Some(scale) => walk.stored_sums::<i64>(scale, &counts)?,
            None => walk.sums(|window, frame, row: &mut [f64]| window.add_row(frame, row))?,
        };
        prints.extend(sums.into_iter().zip(counts).map(|(sum, n)| {
            let electrodes = (0..n_channels)
                .map(|channel| {
                    let average: Vec<f64> =
                        sum.iter().skip(channel).step_by(n_channels).map(|v| v / n.max(1) as f64).collect();
                    let (position, trough) = trough(&average);
                    let latency_ms = (position - before as f64) / fs * 1e3;
                    let standard_error =
                        noise_uv.get(channel).copied().unwrap_or(f64::INFINITY) / (n.max(1) as f64).sqrt();
                    (trough, latency_ms, n > 0 && -trough > params.significance_sigma * standard_error)
                })
                .collect();
            Footprint { n_spikes: n, electrodes }
        }));
    }
    Ok(prints)
}

/// One pass's walk over the windows holding its spikes.
struct Walk<'a> {
    recording: &'a Recording,
    /// (unit of the pass, sample), ascending sample.
    spikes: &'a [(usize, u64)],
    n_units: usize,
    /// Values of one unit's sums: frames × channels.
    size: usize,
    before: usize,
    chunk_frames: usize,
    margin: usize,
    origin: &'a Path,
}

impl Walk<'_> {
    /// Each unit's sums of its spikes' rows, `add_row` adding one frame.
    fn sums<T: Copy + Default + Send>(
        &self,
        add_row: impl Fn(&EventWindow, i64, &mut [T]) + Sync,
    ) -> Result<Vec<Vec<T>>, StageFailure> {
        let mut sums = vec![vec![T::default(); self.size]; self.n_units];
        let n_channels = self.recording.n_channels;
        let events = self
            .spikes
            .iter()
            .enumerate()
            .map(|(i, &(_, sample))| Ok(EventRecord { index: i as u64, sample, channel: 0, amplitude_uv: 0.0 }));
        for_each_event_window(self.recording, events, self.origin, self.chunk_frames, self.margin, |window| {
            add_spike_rows(&mut sums, window, self.spikes, self.before, n_channels, |frame, row| {
                add_row(window, frame, row)
            });
            Ok::<(), StageFailure>(())
        })?;
        Ok(sums)
    }

    /// [`Walk::sums`] of the stored i16 numbers in `T`, which must hold
    /// `counts` rows, scaled to µV unit by unit (each unit's stored sums
    /// freed as its µV sums are made).
    fn stored_sums<T: StoredSum>(
        &self,
        (gain, offset): (f64, f64),
        counts: &[usize],
    ) -> Result<Vec<Vec<f64>>, StageFailure> {
        let stored = self.sums(|window, frame, row: &mut [T]| {
            let added = window.add_stored_row(frame, row);
            debug_assert!(added, "stored_i16_scale promised stored numbers");
        })?;
        Ok(stored
            .into_iter()
            .zip(counts)
            .map(|(stored, &n)| stored.into_iter().map(|s| (s.to_f64() - n as f64 * offset) * gain).collect())
            .collect())
    }
}

/// Add each spike's rows of a window (frames `sample − before ..` on every
/// channel) to its unit's sums, in parallel over runs of offsets: each run
/// adds its rows of every unit's sum, spike after spike in order (the same
/// additions in the same order whatever the thread count).
fn add_spike_rows<T: Send>(
    sums: &mut [Vec<T>],
    window: &EventWindow,
    spikes: &[(usize, u64)],
    before: usize,
    n_channels: usize,
    add_row: impl Fn(i64, &mut [T]) + Sync,
) {
    const ROWS_PER_TASK: usize = 8;
    let runs = group_runs(sums.iter_mut().map(Vec::as_mut_slice), ROWS_PER_TASK * n_channels);
    runs.into_par_iter().enumerate().for_each(|(task, mut rows)| {
        for event in window.events {
            let rows = &mut rows[spikes[event.index as usize].0];
            for (j, row) in rows.chunks_exact_mut(n_channels).enumerate() {
                add_row(event.sample as i64 - before as i64 + (task * ROWS_PER_TASK + j) as i64, row);
            }
        }
    });
}

/// The trough of a waveform: its position in samples, refined by a
/// parabola through the lowest sample and its neighbours, and its value.
fn trough(values: &[f64]) -> (f64, f64) {
    let (k, lowest) = values.iter().enumerate().fold((0, f64::INFINITY), |b, (i, &v)| if v < b.1 { (i, v) } else { b });
    let offset = if k > 0 && k + 1 < values.len() {
        let (a, b, c) = (values[k - 1], values[k], values[k + 1]);
        let curvature = a - 2.0 * b + c;
        if curvature > 0.0 {
            (0.5 * (a - c) / curvature).clamp(-0.5, 0.5)
        } else {
            0.0
        }
    } else {
        0.0
    };
    (k as f64 + offset, lowest)
}

/// A footprint electrode is off the axon's ridge when an electrode beside
/// it across the axon, at most this many pitches away (the next electrode,
/// straight or diagonal), has a larger trough.
pub const ACROSS_PITCHES: f64 = 1.5;

/// One measured branch of one unit.
#[derive(Debug, Clone, PartialEq)]
pub struct Branch {
    pub unit: usize,
    pub branch: usize,
    pub velocity_m_per_s: f64,
    pub n_electrodes: usize,
    pub path_length_um: f64,
    pub r_squared: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    /// The electrodes timed for the fit: channel and distance along the
    /// axon from the footprint's root (its largest trough), µm.
    pub timed: Vec<(usize, f64)>,
}

// slope in ms/µm; 1 µm/ms = 1e-3 m/s.
fn speed(slope_ms_per_um: f64) -> f64 {
    1e-3 / slope_ms_per_um
}

/// The branches of one footprint with a measurable velocity; `positions`
/// by channel; electrodes within `link_radius_pitches` electrode pitches
/// (`pitch_um`) are neighbours when finding
/// the footprint's ridge (where only those within [`ACROSS_PITCHES`]
/// electrode pitches are compared across the axon) and when tracking the
/// axon along it. The 95 % interval
/// is Sen's rank interval of the slope until [`bootstrap_intervals`]
/// replaces it.
pub fn measure_branches(
    unit: usize,
    footprint: &Footprint,
    positions: &[(f64, f64)],
    pitch_um: f64,
    params: &PropagationParams,
) -> Vec<Branch> {
    let radius_um = params.link_radius_pitches * pitch_um;
    if footprint.n_spikes < params.min_spikes {
        return Vec::new();
    }
    let significant: Vec<Node> = footprint
        .electrodes
        .iter()
        .enumerate()
        .filter(|(_, e)| e.2)
        .map(|(channel, e)| Node {
            channel,
            x_um: positions[channel].0,
            y_um: positions[channel].1,
            latency_ms: e.1,
            amplitude_uv: e.0,
        })
        .collect();
    let on_ridge = fit::ridge(&significant, radius_um, ACROSS_PITCHES * pitch_um);
    let nodes: Vec<Node> = significant.into_iter().zip(on_ridge).filter(|(_, r)| *r).map(|(n, _)| n).collect();
    if nodes.len() < params.min_electrodes {
        return Vec::new();
    }
    let (parent, tree_path) = fit::track(&nodes, radius_um);
    let mut result: Vec<Branch> = Vec::new();
    let mut kept_nodes: Vec<usize> = Vec::new();
    for segment in fit::branches(&parent, &tree_path) {
        // Distances along the chain from the root to the branch's end.
        let mut chain = Vec::new();
        let mut node = segment[0];
        while let Some(p) = parent[node] {
            chain.push(p);
            node = p;
        }
        chain.reverse();
        let offset = chain.len();
        chain.extend(&segment);
        let points: Vec<(f64, f64)> = chain.iter().map(|&i| (nodes[i].x_um, nodes[i].y_um)).collect();
        let along = &fit::smoothed_arc_length(&points, 2)[offset..];
        let end = *segment.last().unwrap_or(&segment[0]);
        let length = along[along.len() - 1] - along[0];
        if segment.len() < params.min_electrodes || length < params.min_path_um {
            continue;
        }
        // A side branch must reach away from the branches already kept.
        let reach = kept_nodes.iter().map(|&k| nodes[end].distance_to(&nodes[k])).fold(f64::INFINITY, f64::min);
        if reach < 2.0 * radius_um {
            continue;
        }
        // Electrodes near the root see the soma's spike, which comes at
        // once everywhere around it; only the axon beyond is timed.
        let timed: Vec<(usize, f64)> =
            segment.iter().zip(along).filter(|(_, &a)| a >= params.soma_exclusion_um).map(|(&i, &a)| (i, a)).collect();
        if timed.len() < params.min_electrodes {
            continue;
        }
        let x: Vec<f64> = timed.iter().map(|t| t.1).collect();
        let y: Vec<f64> = timed.iter().map(|t| nodes[t.0].latency_ms).collect();
        let Some(line) = fit::theil_sen(&x, &y) else { continue };
        let span = line.slope * length;
        if line.slope_low <= 0.0 || span < params.min_latency_span_ms || line.r_squared < params.min_r_squared {
            continue;
        }
        kept_nodes.extend(&segment);
        result.push(Branch {
            unit,
            branch: result.len(),
            velocity_m_per_s: speed(line.slope),
            n_electrodes: segment.len(),
            path_length_um: length,
            r_squared: line.r_squared,
            ci_low: speed(line.slope_high),
            ci_high: speed(line.slope_low),
            timed: timed.iter().map(|&(i, a)| (nodes[i].channel, a)).collect(),
        });
    }
    result
}

/// Samples either side of a timed electrode's trough kept per spike for the bootstrap.
const BOOTSTRAP_HALF_WIDTH: usize = 4;

/// Replace each branch's interval by a bootstrap over spikes: a second
/// pass keeps, for every spike of `spikes` (unit, sample; ascending
/// sample) whose unit has a branch, a few samples around the footprint's
/// trough on the timed electrodes; each of `params.bootstrap_resamples`
/// resamples (with replacement, seeded) re-averages them, re-times the
/// troughs and refits the Theil–Sen slope on the same distances. The
/// interval is the 2.5 and 97.5 percentiles of the slope, as velocities
/// (an upper bound is infinite when the slope's lower percentile is not
/// above 0).
///
/// # Errors
/// Reading the recording fails.
pub fn bootstrap_intervals(
    recording: &Recording,
    spikes: &[(usize, u64)],
    prints: &[Footprint],
    branches: &mut [Branch],
    params: &PropagationParams,
    seed: u64,
    origin: &Path,
) -> Result<(), StageFailure> {
    if params.bootstrap_resamples == 0 || branches.is_empty() {
        return Ok(());
    }
    let fs = recording.sample_rate_hz;
    let h = BOOTSTRAP_HALF_WIDTH as i64;
    let width = 2 * BOOTSTRAP_HALF_WIDTH + 1;
    // Per unit with a branch: its timed channels and their trough offsets
    // from the spike (samples).
    let mut wanted: Vec<Option<Vec<(usize, i64)>>> = vec![None; prints.len()];
    for b in branches.iter() {
        let list = wanted[b.unit].get_or_insert_with(Vec::new);
        for &(channel, _) in &b.timed {
            let offset = (prints[b.unit].electrodes[channel].1 * 1e-3 * fs).round() as i64;
            if !list.iter().any(|c| c.0 == channel) {
                list.push((channel, offset));
            }
        }
    }
    let reach = wanted.iter().flatten().flatten().map(|c| c.1.unsigned_abs() as usize).max().unwrap_or(0);
    let mut snippets: Vec<Vec<f32>> = vec![Vec::new(); prints.len()];
    let events = spikes
        .iter()
        .enumerate()
        .filter(|(_, s)| wanted[s.0].is_some())
        .map(|(i, &(_, sample))| Ok(EventRecord { index: i as u64, sample, channel: 0, amplitude_uv: 0.0 }));
    let chunk_frames = (params.chunk_seconds * fs).round().max(1.0) as usize;
    let n_channels = recording.n_channels;
    let margin = reach + BOOTSTRAP_HALF_WIDTH + 1;
    for_each_event_window(recording, events, origin, chunk_frames, margin, |window| {
        for event in window.events {
            let unit = spikes[event.index as usize].0;
            for &(channel, offset) in wanted[unit].iter().flatten() {
                for d in -h..=h {
                    snippets[unit].push(window.value(event.sample as i64 + offset + d, channel, n_channels));
                }
            }
        }
        Ok::<(), StageFailure>(())
    })?;
    let intervals: Vec<Option<Vec<(f64, f64)>>> = (0..prints.len())
        .into_par_iter()
        .map(|unit| {
            let channels = wanted[unit].as_ref()?;
            let row = channels.len() * width;
            let n = snippets[unit].len() / row;
            if n == 0 {
                return None;
            }
            let mine: Vec<&Branch> = branches.iter().filter(|b| b.unit == unit).collect();
            let mut slopes: Vec<Vec<f64>> = vec![Vec::new(); mine.len()];
            let mut average = vec![0.0f64; row];
            let salt = 0xB007_0000_0000 ^ (unit as u64) << 20;
            for resample in 0..params.bootstrap_resamples as u64 {
                average.iter_mut().for_each(|v| *v = 0.0);
                for i in 0..n as u64 {
                    let pick = (uniform(seed, salt ^ resample, i) * n as f64) as usize;
                    for (a, &v) in average.iter_mut().zip(&snippets[unit][pick.min(n - 1) * row..][..row]) {
                        *a += v as f64;
                    }
                }
                let latency = |channel: usize| {
                    let c = channels.iter().position(|c| c.0 == channel).expect("timed channels were collected");
                    let (position, _) = trough(&average[c * width..(c + 1) * width]);
                    (channels[c].1 as f64 + position - h as f64) / fs * 1e3
                };
                for (branch, out) in mine.iter().zip(&mut slopes) {
                    let x: Vec<f64> = branch.timed.iter().map(|t| t.1).collect();
                    let y: Vec<f64> = branch.timed.iter().map(|t| latency(t.0)).collect();
                    if let Some(line) = fit::theil_sen(&x, &y) {
                        out.push(line.slope);
                    }
                }
            }
            Some(
                slopes
                    .into_iter()
                    .map(|mut s| {
                        s.sort_by(f64::total_cmp);
                        let at = |q: f64| s[((q * (s.len() - 1) as f64).round() as usize).min(s.len() - 1)];
                        let (low, high) = (at(0.025), at(0.975));
                        (speed(high), if low > 0.0 { speed(low) } else { f64::INFINITY })
                    })
                    .collect(),
            )
        })
        .collect();
    let mut next = vec![0usize; prints.len()];
    for b in branches.iter_mut() {
        if let Some(list) = &intervals[b.unit] {
            (b.ci_low, b.ci_high) = list[next[b.unit]];
            next[b.unit] += 1;
        }
    }
    Ok(())
}

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let recording = request.open_filtered_or_raw(&mut report, "averaging")?;
    let spikes_path = request.require_artifact("spikes.parquet").map_err(StageFailure::bad_input)?.to_path_buf();
    let noise_path = request.require_artifact("channel_noise.parquet").map_err(StageFailure::bad_input)?.to_path_buf();
    let params: PropagationParams = request.params().map_err(StageFailure::bad_input)?;
    params.check().map_err(|message| request.params_refused(message))?;

    // Two streamed passes over the spikes (millions in hours of recording):
    // each unit's count, then a seeded subset of at most about
    // max_spikes_per_unit per unit, drawn by row.
    let for_each_spike = |visit: &mut dyn FnMut(usize, u64)| {
        for_each_batch(&spikes_path, |batch| {
            let units: &Int32Array = column(&spikes_path, batch, "unit_id")?;
            let samples: &Int64Array = column(&spikes_path, batch, "sample")?;
            for (&u, &s) in units.values().iter().zip(samples.values()) {
                visit(u.max(0) as usize, s.max(0) as u64);
            }
            Ok::<(), StageFailure>(())
        })
    };
    let mut per_unit: Vec<usize> = Vec::new();
    for_each_spike(&mut |unit, _| {
        if unit >= per_unit.len() {
            per_unit.resize(unit + 1, 0);
        }
        per_unit[unit] += 1;
    })?;
    let n_units = per_unit.len();
    let mut chosen: Vec<(usize, u64)> = Vec::new();
    let mut row = 0u64;
    for_each_spike(&mut |unit, sample| {
        let p = params.max_spikes_per_unit as f64 / per_unit[unit] as f64;
        if spikeyard_contract::sampling::keep(request.seed, 0xA705, row, p) {
            chosen.push((unit, sample));
        }
        row += 1;
    })?;
    let mut noise = Vec::new();
    for batch in read_table(&noise_path)? {
        noise.extend(column::<Float64Array>(&noise_path, &batch, "noise_uv")?.values().iter().copied());
    }
    if noise.len() != recording.n_channels {
        return Err(StageFailure::bad_input(ContractError::Format {
            path: noise_path,
            message: format!("{} channels, but the recording has {}", noise.len(), recording.n_channels),
        }));
    }
    let prints = footprints(&recording, &chosen, n_units, &noise, &params, &spikes_path, SUMS_BUDGET_BYTES)?;
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);
    let n_channels = recording.n_channels;
    let footprint_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("amplitude_uv", DataType::Float64, false),
            Field::new("latency_ms", DataType::Float64, false),
            Field::new("significant", DataType::Boolean, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values((0..n_units).flat_map(|u| std::iter::repeat_n(u as i32, n_channels))))
                as ArrayRef,
            Arc::new(Int32Array::from_iter_values((0..n_units).flat_map(|_| 0..n_channels as i32))),
            Arc::new(Float64Array::from_iter_values(prints.iter().flat_map(|p| p.electrodes.iter().map(|e| e.0)))),
            Arc::new(Float64Array::from_iter_values(prints.iter().flat_map(|p| p.electrodes.iter().map(|e| e.1)))),
            Arc::new(BooleanArray::from_iter(prints.iter().flat_map(|p| p.electrodes.iter().map(|e| Some(e.2))))),
        ],
    )
    .expect("footprint columns match their schema");
    write_table(&request.output(FOOTPRINTS_TABLE), &footprint_batch, &metadata)?;

    let positions: Vec<(f64, f64)> = recording.electrodes.iter().map(|e| (e.x_um, e.y_um)).collect();
    let pitch_um = spikeyard_contract::recording::electrode_pitch(&positions);
    let mut found: Vec<Branch> = prints
        .iter()
        .enumerate()
        .flat_map(|(unit, p)| measure_branches(unit, p, &positions, pitch_um, &params))
        .collect();
    bootstrap_intervals(&recording, &chosen, &prints, &mut found, &params, request.seed, &spikes_path)?;
    let [low, high] = params.typical_range_m_per_s;
    let propagation = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("branch", DataType::Int32, false),
            Field::new("velocity_m_per_s", DataType::Float64, false),
            Field::new("n_electrodes", DataType::Int32, false),
            Field::new("path_length_um", DataType::Float64, false),
            Field::new("r_squared", DataType::Float64, false),
            Field::new("ci_low", DataType::Float64, false),
            Field::new("ci_high", DataType::Float64, false),
            Field::new("outside_typical_range", DataType::Boolean, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(found.iter().map(|b| b.unit as i32))) as ArrayRef,
            Arc::new(Int32Array::from_iter_values(found.iter().map(|b| b.branch as i32))),
            Arc::new(Float64Array::from_iter_values(found.iter().map(|b| b.velocity_m_per_s))),
            Arc::new(Int32Array::from_iter_values(found.iter().map(|b| b.n_electrodes as i32))),
            Arc::new(Float64Array::from_iter_values(found.iter().map(|b| b.path_length_um))),
            Arc::new(Float64Array::from_iter_values(found.iter().map(|b| b.r_squared))),
            Arc::new(Float64Array::from_iter_values(found.iter().map(|b| b.ci_low))),
            Arc::new(Float64Array::from_iter_values(found.iter().map(|b| b.ci_high))),
            Arc::new(BooleanArray::from_iter(found.iter().map(|b| Some(!(low..=high).contains(&b.velocity_m_per_s))))),
        ],
    )
    .expect("propagation columns match their schema");
    write_table(&request.output(PROPAGATION_TABLE), &propagation, &metadata)?;
    // The electrodes each branch was timed on, for maps and refits.
    let path_rows: Vec<(&Branch, usize, f64)> =
        found.iter().flat_map(|b| b.timed.iter().map(move |&(channel, along)| (b, channel, along))).collect();
    let paths = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("branch", DataType::Int32, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("x_um", DataType::Float64, false),
            Field::new("y_um", DataType::Float64, false),
            Field::new("distance_um", DataType::Float64, false),
            Field::new("latency_ms", DataType::Float64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(path_rows.iter().map(|r| r.0.unit as i32))) as ArrayRef,
            Arc::new(Int32Array::from_iter_values(path_rows.iter().map(|r| r.0.branch as i32))),
            Arc::new(Int32Array::from_iter_values(path_rows.iter().map(|r| r.1 as i32))),
            Arc::new(Float64Array::from_iter_values(path_rows.iter().map(|r| positions[r.1].0))),
            Arc::new(Float64Array::from_iter_values(path_rows.iter().map(|r| positions[r.1].1))),
            Arc::new(Float64Array::from_iter_values(path_rows.iter().map(|r| r.2))),
            Arc::new(Float64Array::from_iter_values(path_rows.iter().map(|r| prints[r.0.unit].electrodes[r.1].1))),
        ],
    )
    .expect("path columns match their schema");
    write_table(&request.output(PATHS_TABLE), &paths, &metadata)?;
    report.summary.insert("units".into(), n_units.into());
    report.summary.insert("branches".into(), found.len().into());
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;
    use spikeyard_contract::recording::{RecordingWriter, Storage};
    use spikeyard_contract::testing::{write_f32_recording, TestRng};

    // Units summed a few per pass (here one) give the footprints of a
    // single pass, exactly: each unit's sums see the same spikes in the same order.
    #[test]
    fn footprints_do_not_depend_on_how_many_units_share_a_pass() {
        let dir = tempfile::tempdir().unwrap();
        let (fs, n_channels, n_frames) = (10000.0, 6, 20000usize);
        let mut rng = TestRng::new(8);
        let mut samples: Vec<f32> = (0..n_frames * n_channels).map(|_| (5.0 * rng.normal()) as f32).collect();
        // Unit u fires every 997 + 100 u frames with a trough on channel u, later on the next.
        let mut spikes = Vec::new();
        for unit in 0..3usize {
            for sample in (50..n_frames - 100).step_by(997 + 100 * unit) {
                spikes.push((unit, sample as u64));
                samples[sample * n_channels + unit] -= 60.0;
                samples[(sample + 3) * n_channels + unit + 1] -= 40.0;
            }
        }
        spikes.sort_by_key(|s| s.1);
        let recording = Recording::open(&write_f32_recording(dir.path(), "r", fs, n_channels, 20.0, &samples)).unwrap();
        let (params, noise) = (PropagationParams::default(), vec![5.0; n_channels]);
        let origin = Path::new("spikes");
        let one_pass = footprints(&recording, &spikes, 3, &noise, &params, origin, usize::MAX).unwrap();
        let unit_by_unit = footprints(&recording, &spikes, 3, &noise, &params, origin, 1).unwrap();
        assert_eq!(one_pass, unit_by_unit);
        // Stored as packed i16, the sums are exact integers: the same in
        // i32 as in i64, and the footprints those of the µV frames to
        // within the storage step.
        let step = 0.25;
        let mut writer = RecordingWriter::create(
            dir.path(),
            "packed",
            fs,
            &recording.electrodes,
            Storage::PackedI16 { microvolts_per_unit: step },
        )
        .unwrap();
        writer.write_frames(&samples).unwrap();
        let packed = Recording::open(&writer.finish().unwrap()).unwrap();
        let scale = packed.stored_i16_scale().unwrap();
        let walk = Walk {
            recording: &packed,
            spikes: &spikes,
            n_units: 3,
            size: n_channels * 51,
            before: 10,
            chunk_frames: 3000,
            margin: 41,
            origin,
        };
        let counts: Vec<usize> = (0..3).map(|u| spikes.iter().filter(|s| s.0 == u).count()).collect();
        assert_eq!(walk.stored_sums::<i32>(scale, &counts).unwrap(), walk.stored_sums::<i64>(scale, &counts).unwrap());
        let from_packed = footprints(&packed, &spikes, 3, &noise, &params, origin, usize::MAX).unwrap();
        for (a, b) in one_pass.iter().zip(&from_packed) {
            for (x, y) in a.electrodes.iter().zip(&b.electrodes) {
                assert!((x.0 - y.0).abs() <= step && (x.1 - y.1).abs() < 0.02 && x.2 == y.2, "{x:?} against {y:?}");
            }
        }
        for (unit, print) in one_pass.iter().enumerate() {
            assert!(print.n_spikes > 10);
            let (trough, latency_ms, significant) = print.electrodes[unit];
            assert!(
                trough < -50.0 && latency_ms.abs() < 0.05 && significant,
                "unit {unit}: {:?}",
                print.electrodes[unit]
            );
        }
    }
}
