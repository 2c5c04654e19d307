//! The detect stage: per-channel MAD noise, threshold crossings, and the
//! merge of one spike seen on neighbouring electrodes into one event.
//!
//! Data flow of [`run`]:
//! 1. open the filtered recording (artifact `filtered.toml`; the raw
//!    recording when no earlier stage filtered) and check the parameters
//!    ([`params`]);
//! 2. noise σ per channel: MAD estimate (Quiroga et al. 2004) on windows
//!    spread over the recording, the median over windows;
//! 3. chunk by chunk, channels in parallel: crossings of ±threshold_sigma·σ
//!    with a dead time, each placed at its extremum ([`kernel::find_crossings`], along frames and across channels);
//! 4. events merged across electrodes within a radius and a time window
//!    ([`kernel::EventMerger`]) and streamed to `events.parquet`;
//! 5. `channel_noise.parquet` records σ and the threshold per channel.

pub mod kernel;
pub mod params;

use arrow_array::{ArrayRef, BooleanArray, Float32Array, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema, SchemaRef};
use kernel::{Event, EventMerger};
use params::{DetectParams, ValidDetectParams};
use rayon::prelude::*;
use spikeyard_contract::recording::{frames_to_channel_major, Frames};
use spikeyard_contract::table::{column, read_table, write_table, TableWriter};
use spikeyard_contract::{
    noise, ContractError, ProgressReporter, Recording, RecordingError, StageFailure, StageReport, StageRequest,
};
use std::path::Path;
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-detect";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const EVENTS_TABLE: &str = "events.parquet";
pub const CHANNEL_NOISE_TABLE: &str = "channel_noise.parquet";
/// The filter stage's outputs this stage reads when present.
pub const FILTERED_RECORDING: &str = "filtered.toml";
pub const CHANNEL_QC_TABLE: &str = "channel_qc.parquet";

/// Schema of `events.parquet`.
pub fn events_schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("sample", DataType::Int64, false),
        Field::new("time_s", DataType::Float64, false),
        Field::new("channel", DataType::Int32, false),
        Field::new("amplitude_uv", DataType::Float32, false),
        Field::new("amplitude_sigma", DataType::Float32, false),
    ]))
}

/// MAD noise σ per channel, µV: the median over spread windows of each
/// window's median(|x|)/0.6745 (on a packed copy, counted:
/// [`noise::packed_mad_sigmas`]).
///
/// # Errors
/// Reading the recording fails.
pub fn estimate_noise(recording: &Recording, windows: usize, window_frames: usize) -> Result<Vec<f64>, RecordingError> {
    let n_channels = recording.n_channels;
    let mut per_window: Vec<Vec<f32>> = vec![Vec::new(); n_channels];
    let (mut frames, mut columns) = (Vec::new(), Vec::new());
    for window in recording.spread_windows(windows, window_frames, 0) {
        let sigmas =
            recording.visit_frames(window.core_start, window.core_end, &mut frames, |frames| match frames {
                Frames::Packed { range, gain, offset } => noise::packed_mad_sigmas(range, n_channels, gain, offset),
                frames => {
                    frames_to_channel_major(&frames, n_channels, &mut columns);
                    columns.par_chunks_mut(window.core_frames()).map(noise::mad_sigma).collect()
                }
            })?;
        for (list, sigma) in per_window.iter_mut().zip(sigmas) {
            list.push(sigma as f32);
        }
    }
    Ok(per_window.iter_mut().map(|w| noise::median_in_place(w)).collect())
}

/// The `usable` flag per channel from a QC table.
///
/// # Errors
/// The table cannot be read or lacks the columns.
pub fn read_usable_channels(path: &Path, n_channels: usize) -> Result<Vec<bool>, ContractError> {
    let mut usable = vec![true; n_channels];
    for batch in read_table(path)? {
        let channels: &Int32Array = column(path, &batch, "channel")?;
        let flags: &BooleanArray = column(path, &batch, "usable")?;
        for (channel, flag) in channels.values().iter().zip(flags.iter()) {
            if let Some(slot) = usable.get_mut(*channel as usize) {
                *slot = flag.unwrap_or(false);
            }
        }
    }
    Ok(usable)
}

/// Channels within `radius_um` of each channel (itself excluded).
pub fn neighbours_within(recording: &Recording, radius_um: f64) -> Vec<Vec<u32>> {
    let electrodes = &recording.electrodes;
    electrodes
        .iter()
        .map(|a| {
            electrodes
                .iter()
                .filter(|b| b.channel != a.channel && (a.x_um - b.x_um).hypot(a.y_um - b.y_um) <= radius_um)
                .map(|b| b.channel as u32)
                .collect()
        })
        .collect()
}

/// Detect events on a whole recording, calling `sink` with each chunk's
/// decided events in (sample, channel) order.
///
/// # Errors
/// Reading fails, or `sink` fails.
pub fn detect<E: From<RecordingError>>(
    recording: &Recording,
    params: &ValidDetectParams,
    noise_uv: &[f64],
    usable: &[bool],
    progress: &mut ProgressReporter,
    mut sink: impl FnMut(&[Event]) -> Result<(), E>,
) -> Result<(), E> {
    let n_channels = recording.n_channels;
    // Channels not usable, or without noise, are off: an infinite threshold.
    let thresholds: Vec<f32> = noise_uv
        .iter()
        .zip(usable)
        .map(|(s, &u)| {
            let t = (s * params.threshold_sigma) as f32;
            if u && t > 0.0 {
                t
            } else {
                f32::INFINITY
            }
        })
        .collect();
    let mut last_crossing: Vec<Option<u64>> = vec![None; n_channels];
    let neighbours = if params.merge_radius_um > 0.0 {
        neighbours_within(recording, params.merge_radius_um)
    } else {
        vec![Vec::new(); n_channels]
    };
    let mut merger = EventMerger::new(neighbours, params.merge_frames);
    let mut frames = Vec::new();
    let mut kept = Vec::new();
    let mut found = Vec::new();
    // One frame before the core (for the first comparison) and the peak search after it.
    for chunk in recording.chunks(params.chunk_frames, params.peak_frames + 1) {
        let core_offset = (chunk.core_start - chunk.read_start) as usize;
        let core = core_offset..core_offset + chunk.core_frames();
        found.clear();
        recording.visit_frames(chunk.read_start, chunk.read_end, &mut frames, |frames| {
            kernel::find_crossings(
                frames,
                n_channels,
                chunk.read_start,
                core,
                &thresholds,
                params.polarity,
                params.peak_frames,
                params.dead_frames,
                &mut last_crossing,
                &mut found,
            )
        })?;
        merger.add(found.iter().copied());
        kept.clear();
        let is_last = chunk.core_end == recording.n_frames;
        merger.decide(if is_last { None } else { Some(chunk.core_end) }, &mut kept);
        sink(&kept)?;
        progress.advance(chunk.core_frames() as u64);
    }
    Ok(())
}

fn events_batch(events: &[Event], sample_rate_hz: f64, noise_uv: &[f64]) -> RecordBatch {
    let columns: Vec<ArrayRef> = vec![
        Arc::new(Int64Array::from_iter_values(events.iter().map(|e| e.sample as i64))),
        Arc::new(Float64Array::from_iter_values(events.iter().map(|e| e.sample as f64 / sample_rate_hz))),
        Arc::new(Int32Array::from_iter_values(events.iter().map(|e| e.channel as i32))),
        Arc::new(Float32Array::from_iter_values(events.iter().map(|e| e.amplitude_uv))),
        Arc::new(Float32Array::from_iter_values(
            events.iter().map(|e| (e.amplitude_uv as f64 / noise_uv[e.channel as usize]) as f32),
        )),
    ];
    RecordBatch::try_new(events_schema(), columns).expect("event columns match their schema")
}

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let recording = request.open_filtered_or_raw(&mut report, "detecting on")?;
    let params: DetectParams = request.params().map_err(StageFailure::bad_input)?;
    let valid = params.check(recording.sample_rate_hz).map_err(|message| request.params_refused(message))?;
    let usable = match (valid.skip_flagged_channels, request.artifact(CHANNEL_QC_TABLE)) {
        (true, Some(path)) => read_usable_channels(path, recording.n_channels).map_err(StageFailure::bad_input)?,
        _ => vec![true; recording.n_channels],
    };
    let noise_uv =
        estimate_noise(&recording, valid.noise_windows, valid.noise_window_frames).map_err(StageFailure::failed)?;
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);
    let noise_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("channel", DataType::Int32, false),
            Field::new("noise_uv", DataType::Float64, false),
            Field::new("threshold_uv", DataType::Float64, false),
            Field::new("usable", DataType::Boolean, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values((0..recording.n_channels).map(|c| c as i32))),
            Arc::new(Float64Array::from(noise_uv.clone())),
            Arc::new(Float64Array::from_iter_values(noise_uv.iter().map(|s| s * valid.threshold_sigma))),
            Arc::new(BooleanArray::from(usable.clone())),
        ],
    )
    .expect("noise columns match their schema");
    write_table(&request.output(CHANNEL_NOISE_TABLE), &noise_batch, &metadata).map_err(StageFailure::failed)?;

    let mut writer =
        TableWriter::create(&request.output(EVENTS_TABLE), events_schema(), &metadata).map_err(StageFailure::failed)?;
    let mut progress = ProgressReporter::new(recording.n_frames, "frames");
    let mut n_events = 0usize;
    detect(&recording, &valid, &noise_uv, &usable, &mut progress, |events: &[Event]| {
        n_events += events.len();
        if events.is_empty() {
            return Ok(());
        }
        writer.write(&events_batch(events, recording.sample_rate_hz, &noise_uv)).map_err(StageFailure::failed)
    })?;
    writer.finish().map_err(StageFailure::failed)?;
    let summary = &mut report.summary;
    summary.insert("events".into(), n_events.into());
    summary.insert("event_rate_hz".into(), (n_events as f64 / recording.duration_s()).into());
    summary.insert("channels_used".into(), usable.iter().filter(|u| **u).count().into());
    Ok(report)
}
