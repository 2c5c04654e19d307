//! The propagation stage: where each unit's signal is seen on the array,
//! and how fast it travels along its axon.
//!
//! Data flow of [`run`]:
//! 1. footprints: spike-triggered averages of the filtered signal of a
//!    seeded subset of each unit's spikes on every electrode, all units in
//!    one pass over the recording; per electrode the averaged trough, its
//!    latency after the spike (parabolic sub-sample interpolation) and
//!    whether it stands out of the noise (`footprints.parquet`);
//! 2. tracking ([`fit::track`]): significant electrodes in order of
//!    latency, each linked to the nearest earlier one; the tree's branches
//!    ([`fit::branches`]);
//! 3. per branch, latency against path length by Theil–Sen with Sen's 95 %
//!    interval ([`fit::theil_sen`]); velocity = path ÷ latency
//!    (1 µm/ms = 10⁻³ m/s). A branch is reported only when it is long
//!    enough, its latency rises with path length beyond doubt (the
//!    interval's lower bound above 0) and by at least
//!    `min_latency_span_ms`, and the line fits (`min_r_squared`): tracking
//!    orders electrodes by latency, so any footprint yields a rising
//!    sequence, and these tests keep somatic footprints out. A unit without
//!    a measurable axon has no row (`propagation.parquet`).

pub mod fit;
pub mod params;

use arrow_array::{ArrayRef, BooleanArray, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use fit::Node;
use params::PropagationParams;
use spikeyard_contract::events::{for_each_event_window, EventRecord};
use spikeyard_contract::table::{column, read_table, write_table};
use spikeyard_contract::{ContractError, Recording, StageFailure, StageReport, StageRequest};
use std::path::Path;
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-propagation";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const FOOTPRINTS_TABLE: &str = "footprints.parquet";
pub const PROPAGATION_TABLE: &str = "propagation.parquet";

/// A unit's footprint on every electrode.
#[derive(Debug, Clone, PartialEq)]
pub struct Footprint {
    pub n_spikes: usize,
    /// Per channel: averaged trough (µV), its latency (ms), significant.
    pub electrodes: Vec<(f64, f64, bool)>,
}

/// Spike-triggered averages of `spikes` (unit, sample; ascending sample) on
/// every electrode, in one pass over the recording.
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
) -> Result<Vec<Footprint>, StageFailure> {
    let fs = recording.sample_rate_hz;
    let before = (params.before_ms * 1e-3 * fs).round() as usize;
    let after = (params.after_ms * 1e-3 * fs).round() as usize;
    let length = before + after + 1;
    let n_channels = recording.n_channels;
    let mut sums = vec![vec![0.0f64; n_channels * length]; n_units];
    let mut counts = vec![0usize; n_units];
    let events = spikes
        .iter()
        .enumerate()
        .map(|(i, &(_, sample))| Ok(EventRecord { index: i as u64, sample, channel: 0, amplitude_uv: 0.0 }));
    let chunk_frames = (params.chunk_seconds * fs).round().max(1.0) as usize;
    for_each_event_window(recording, events, origin, chunk_frames, before.max(after) + 1, |window| {
        for event in window.events {
            let unit = spikes[event.index as usize].0;
            counts[unit] += 1;
            let sum = &mut sums[unit];
            for k in 0..length {
                let frame = event.sample as i64 - before as i64 + k as i64;
                for channel in 0..n_channels {
                    sum[channel * length + k] += window.value(frame, channel, n_channels) as f64;
                }
            }
        }
        Ok::<(), StageFailure>(())
    })?;
    Ok(sums
        .into_iter()
        .zip(counts)
        .map(|(sum, n)| {
            let electrodes = (0..n_channels)
                .map(|channel| {
                    let average: Vec<f64> =
                        sum[channel * length..(channel + 1) * length].iter().map(|v| v / n.max(1) as f64).collect();
                    let (k, trough) =
                        average
                            .iter()
                            .enumerate()
                            .fold((0, f64::INFINITY), |b, (i, &v)| if v < b.1 { (i, v) } else { b });
                    let offset = if k > 0 && k + 1 < length {
                        let (a, b, c) = (average[k - 1], average[k], average[k + 1]);
                        let curvature = a - 2.0 * b + c;
                        if curvature > 0.0 {
                            (0.5 * (a - c) / curvature).clamp(-0.5, 0.5)
                        } else {
                            0.0
                        }
                    } else {
                        0.0
                    };
                    let latency_ms = (k as f64 + offset - before as f64) / fs * 1e3;
                    let standard_error =
                        noise_uv.get(channel).copied().unwrap_or(f64::INFINITY) / (n.max(1) as f64).sqrt();
                    (trough, latency_ms, n > 0 && -trough > params.significance_sigma * standard_error)
                })
                .collect();
            Footprint { n_spikes: n, electrodes }
        })
        .collect())
}

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
}

/// The branches of one footprint with a measurable velocity.
pub fn measure_branches(
    unit: usize,
    footprint: &Footprint,
    recording: &Recording,
    params: &PropagationParams,
) -> Vec<Branch> {
    if footprint.n_spikes < params.min_spikes {
        return Vec::new();
    }
    let nodes: Vec<Node> = footprint
        .electrodes
        .iter()
        .enumerate()
        .filter(|(_, e)| e.2)
        .map(|(channel, e)| Node {
            channel,
            x_um: recording.electrodes[channel].x_um,
            y_um: recording.electrodes[channel].y_um,
            latency_ms: e.1,
        })
        .collect();
    if nodes.len() < params.min_electrodes {
        return Vec::new();
    }
    let (parent, tree_path) = fit::track(&nodes, params.link_radius_um);
    let Some(root) = tree_path.iter().position(|&p| p == 0.0) else { return Vec::new() };
    let along = fit::geodesic(&nodes, root, params.link_radius_um);
    let mut result: Vec<Branch> = Vec::new();
    let mut kept_nodes: Vec<usize> = Vec::new();
    for segment in fit::branches(&parent, &tree_path) {
        let start = along[segment[0]];
        let end = *segment.last().unwrap_or(&segment[0]);
        let length = along[end] - start;
        if segment.len() < params.min_electrodes || length.is_nan() || length < params.min_path_um {
            continue;
        }
        // A side branch must reach away from the branches already kept, not
        // run beside them through a broad footprint.
        let reach = kept_nodes
            .iter()
            .map(|&k| (nodes[end].x_um - nodes[k].x_um).hypot(nodes[end].y_um - nodes[k].y_um))
            .fold(f64::INFINITY, f64::min);
        if reach < 2.0 * params.link_radius_um {
            continue;
        }
        // Electrodes near the root see the soma's spike, which comes at
        // once everywhere around it; only the axon beyond is timed.
        let timed: Vec<usize> = segment.iter().copied().filter(|&i| along[i] >= params.soma_exclusion_um).collect();
        if timed.len() < params.min_electrodes {
            continue;
        }
        let x: Vec<f64> = timed.iter().map(|&i| along[i] - start).collect();
        let y: Vec<f64> = timed.iter().map(|&i| nodes[i].latency_ms).collect();
        let Some(line) = fit::theil_sen(&x, &y) else { continue };
        let span = line.slope * length;
        if line.slope_low <= 0.0 || span < params.min_latency_span_ms || line.r_squared < params.min_r_squared {
            continue;
        }
        kept_nodes.extend(&segment);
        // slope in ms/µm; 1 µm/ms = 1e-3 m/s.
        let speed = |slope: f64| 1e-3 / slope;
        result.push(Branch {
            unit,
            branch: result.len(),
            velocity_m_per_s: speed(line.slope),
            n_electrodes: segment.len(),
            path_length_um: length,
            r_squared: line.r_squared,
            ci_low: speed(line.slope_high),
            ci_high: speed(line.slope_low),
        });
    }
    result
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

    let mut all: Vec<(usize, u64)> = Vec::new();
    for batch in read_table(&spikes_path)? {
        let units: &Int32Array = column(&spikes_path, &batch, "unit_id")?;
        let samples: &Int64Array = column(&spikes_path, &batch, "sample")?;
        all.extend(units.values().iter().zip(samples.values()).map(|(&u, &s)| (u.max(0) as usize, s.max(0) as u64)));
    }
    let n_units = all.iter().map(|s| s.0 + 1).max().unwrap_or(0);
    let mut per_unit = vec![0usize; n_units];
    for s in &all {
        per_unit[s.0] += 1;
    }
    // A seeded subset of at most max_spikes_per_unit per unit.
    let chosen: Vec<(usize, u64)> = all
        .iter()
        .enumerate()
        .filter(|(i, s)| {
            let p = params.max_spikes_per_unit as f64 / per_unit[s.0] as f64;
            spikeyard_contract::sampling::keep(request.seed, 0xA705, *i as u64, p)
        })
        .map(|(_, s)| *s)
        .collect();
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
    let prints = footprints(&recording, &chosen, n_units, &noise, &params, &spikes_path)?;
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

    let found: Vec<Branch> =
        prints.iter().enumerate().flat_map(|(unit, p)| measure_branches(unit, p, &recording, &params)).collect();
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
    report.summary.insert("units".into(), n_units.into());
    report.summary.insert("branches".into(), found.len().into());
    Ok(report)
}
