//! The features stage: a multi-electrode snippet around every detected
//! event, aligned on its extremum with sub-sample precision, reduced to a
//! few principal components per electrode, with a position estimate.
//!
//! Data flow of [`run`]:
//! 1. open the filtered recording (`filtered.toml`, else the raw one) and
//!    the events (`events.parquet`), check parameters ([`params`]);
//! 2. neighbourhood of every electrode ([`kernel::neighbourhoods`]);
//! 3. fitting pass: snippets of a seeded random subset of events, on every
//!    electrode of their neighbourhood, give one PCA basis for
//!    single-electrode waveforms ([`pca`]);
//! 4. projection pass, chunk by chunk: every event's snippets are projected
//!    (n_components per electrode, nearest electrode first) and its
//!    position estimated; rows stream to `features.parquet`;
//! 5. `pca_components.parquet` and `neighbourhoods.parquet` record the basis
//!    and the electrode order so the features can be interpreted.

pub mod kernel;
pub mod params;
pub mod pca;

use arrow_array::{ArrayRef, FixedSizeListArray, Float32Array, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema, SchemaRef};
use params::{FeaturesParams, ValidFeaturesParams};
use pca::Pca;
use rayon::prelude::*;
use spikeyard_contract::events::{
    channel_runs, for_each_event_window, ChannelRun, EventRecord, EventStream, EventWindow,
};
use spikeyard_contract::table::{write_table, TableWriter};
use spikeyard_contract::{ProgressReporter, Recording, StageFailure, StageReport, StageRequest};
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-features";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const FEATURES_TABLE: &str = "features.parquet";
pub const PCA_TABLE: &str = "pca_components.parquet";
pub const NEIGHBOURHOODS_TABLE: &str = "neighbourhoods.parquet";

/// Salt of the seeded subset of events the PCA is fitted on.
const SALT_PCA_FIT: u64 = 0xFEA7;

/// Schema of `features.parquet` for `width` features per event.
pub fn features_schema(width: usize) -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("event", DataType::Int64, false),
        Field::new("sample", DataType::Int64, false),
        Field::new("time_s", DataType::Float64, false),
        Field::new("channel", DataType::Int32, false),
        Field::new("amplitude_uv", DataType::Float32, false),
        Field::new("subsample_offset", DataType::Float32, false),
        Field::new("x_um", DataType::Float32, false),
        Field::new("y_um", DataType::Float32, false),
        Field::new(
            "features",
            DataType::FixedSizeList(Arc::new(Field::new("item", DataType::Float32, false)), width as i32),
            false,
        ),
    ]))
}

/// Everything needed to turn an event into its features.
pub struct Extractor<'a> {
    pub recording: &'a Recording,
    pub params: &'a ValidFeaturesParams,
    /// Per channel: its neighbourhood ([`kernel::neighbourhoods`]), and
    /// the same channels as runs of consecutive numbers; private, so the
    /// two cannot disagree.
    neighbourhoods: Vec<Vec<(usize, f64)>>,
    runs: Vec<Vec<ChannelRun>>,
}

/// One event's features.
#[derive(Debug, Clone, PartialEq)]
pub struct EventFeatures {
    pub event: EventRecord,
    pub subsample_offset: f32,
    pub x_um: f32,
    pub y_um: f32,
    pub features: Vec<f32>,
}

impl<'a> Extractor<'a> {
    pub fn new(recording: &'a Recording, params: &'a ValidFeaturesParams) -> Self {
        let neighbourhoods =
            kernel::neighbourhoods(&recording.electrodes, params.neighbour_radius_um, params.max_channels);
        let runs = neighbourhoods.iter().map(|list| channel_runs(list.iter().map(|&(channel, _)| channel))).collect();
        Extractor { recording, params, neighbourhoods, runs }
    }

    /// The fractional frame of the event's extremum.
    fn centre(&self, window: &EventWindow, event: &EventRecord) -> f64 {
        let n = self.recording.n_channels;
        let s = event.sample as i64;
        let v = |k: i64| window.value(k, event.channel, n) as f64;
        event.sample as f64 + kernel::subsample_offset(v(s - 1), v(s), v(s + 1))
    }

    /// Aligned snippets of an event on every electrode of its neighbourhood.
    pub fn snippets(&self, window: &EventWindow, event: &EventRecord) -> (f64, Vec<Vec<f64>>) {
        let centre = self.centre(window, event);
        let (base, t) = kernel::snippet_start(centre, self.params.before_frames);
        // The neighbourhood's frames base − 1 ..= base + length + 1, read
        // as runs of channels, one frame-major block.
        let (length, width) = (self.params.snippet_frames(), self.neighbourhoods[event.channel].len());
        let mut block = vec![0.0f32; (length + 3) * width];
        window.copy_runs(base - 1, &self.runs[event.channel], self.recording.n_channels, &mut block);
        let rows = (0..width)
            .map(|rank| {
                let mut row = vec![0.0; length];
                kernel::cut_snippet(&block[rank..], width, t, &mut row);
                row
            })
            .collect();
        (centre, rows)
    }

    /// Features of one event with a fitted basis.
    pub fn features(&self, window: &EventWindow, event: &EventRecord, pca: &Pca) -> EventFeatures {
        let (centre, rows) = self.snippets(window, event);
        self.features_of(event, centre, &rows, pca)
    }

    /// Features of one event from its centre and snippets ([`Extractor::snippets`]).
    pub fn features_of(&self, event: &EventRecord, centre: f64, rows: &[Vec<f64>], pca: &Pca) -> EventFeatures {
        let k = self.params.n_components;
        let mut features = vec![0.0f32; k * self.params.max_channels];
        for (rank, row) in rows.iter().enumerate() {
            pca.project(row, k, &mut features[rank * k..(rank + 1) * k]);
        }
        let troughs: Vec<f64> = rows.iter().map(|r| r.iter().copied().fold(0.0, f64::min)).collect();
        let (x, y) = kernel::centre_of_mass(&self.recording.electrodes, &self.neighbourhoods[event.channel], &troughs);
        EventFeatures {
            event: *event,
            subsample_offset: (centre - event.sample as f64) as f32,
            x_um: x as f32,
            y_um: y as f32,
            features,
        }
    }
}

fn features_batch(rows: &[EventFeatures], width: usize, sample_rate_hz: f64) -> RecordBatch {
    let values = Float32Array::from_iter_values(rows.iter().flat_map(|r| r.features.iter().copied()));
    let list = FixedSizeListArray::try_new(
        Arc::new(Field::new("item", DataType::Float32, false)),
        width as i32,
        Arc::new(values),
        None,
    )
    .expect("feature rows all have the same width");
    let columns: Vec<ArrayRef> = vec![
        Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.event.index as i64))),
        Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.event.sample as i64))),
        Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.event.sample as f64 / sample_rate_hz))),
        Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.event.channel as i32))),
        Arc::new(Float32Array::from_iter_values(rows.iter().map(|r| r.event.amplitude_uv))),
        Arc::new(Float32Array::from_iter_values(rows.iter().map(|r| r.subsample_offset))),
        Arc::new(Float32Array::from_iter_values(rows.iter().map(|r| r.x_um))),
        Arc::new(Float32Array::from_iter_values(rows.iter().map(|r| r.y_um))),
        Arc::new(list),
    ];
    RecordBatch::try_new(features_schema(width), columns).expect("feature columns match their schema")
}

fn pca_batch(pca: &Pca, before_frames: usize) -> RecordBatch {
    let dim = pca.mean.len();
    let rows: Vec<(i32, i32, f64, f64)> = std::iter::once((-1, &pca.mean, f64::NAN))
        .chain(pca.components.iter().zip(&pca.explained_variance).enumerate().map(|(i, (c, v))| (i as i32, c, *v)))
        .flat_map(|(component, values, variance)| {
            values.iter().enumerate().map(move |(j, v)| (component, j as i32 - before_frames as i32, *v, variance))
        })
        .collect();
    debug_assert_eq!(rows.len(), dim * (dim + 1));
    RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("component", DataType::Int32, false),
            Field::new("lag_samples", DataType::Int32, false),
            Field::new("value", DataType::Float64, false),
            Field::new("explained_variance", DataType::Float64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.0))),
            Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.1))),
            Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.2))),
            Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.3))),
        ],
    )
    .expect("PCA columns match their schema")
}

fn neighbourhoods_batch(neighbourhoods: &[Vec<(usize, f64)>]) -> RecordBatch {
    let rows: Vec<(i32, i32, i32, f64)> = neighbourhoods
        .iter()
        .enumerate()
        .flat_map(|(c, list)| list.iter().enumerate().map(move |(rank, &(n, d))| (c as i32, rank as i32, n as i32, d)))
        .collect();
    RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("channel", DataType::Int32, false),
            Field::new("rank", DataType::Int32, false),
            Field::new("neighbour", DataType::Int32, false),
            Field::new("distance_um", DataType::Float64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.0))),
            Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.1))),
            Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| r.2))),
            Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.3))),
        ],
    )
    .expect("neighbourhood columns match their schema")
}

/// The PCA's fitting subset: every fitted event's centre and snippets
/// ([`Extractor::snippets`]), added in event order; the snippets of all of
/// them are the PCA's rows.
#[derive(Default)]
struct FittedSnippets {
    /// Per fitted event: its index, centre, and where its snippets start
    /// in `rows` (they end where the next event's start).
    events: Vec<(u64, f64, usize)>,
    rows: Vec<Vec<f64>>,
}

impl FittedSnippets {
    fn add(&mut self, index: u64, (centre, rows): (f64, Vec<Vec<f64>>)) {
        self.events.push((index, centre, self.rows.len()));
        self.rows.extend(rows);
    }

    /// The centre and snippets of event `index`, if it was fitted.
    fn get(&self, index: u64) -> Option<(f64, &[Vec<f64>])> {
        let i = self.events.binary_search_by_key(&index, |e| e.0).ok()?;
        let (_, centre, first) = self.events[i];
        let end = self.events.get(i + 1).map_or(self.rows.len(), |next| next.2);
        Some((centre, &self.rows[first..end]))
    }
}

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let recording = request.open_filtered_or_raw(&mut report, "cutting snippets from")?;
    let events_path = request.require_artifact("events.parquet").map_err(StageFailure::bad_input)?.to_path_buf();
    let params: FeaturesParams = request.params().map_err(StageFailure::bad_input)?;
    let valid = params.check(recording.sample_rate_hz).map_err(|message| request.params_refused(message))?;
    let extractor = Extractor::new(&recording, &valid);
    let margin = valid.before_frames.max(valid.after_frames) + 4;
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);

    // Fitting pass on a seeded subset. The fitted events' snippets are the
    // PCA's rows; with their centres they are kept for the projection pass,
    // which then does not cut them again.
    let mut events = EventStream::open(&events_path).map_err(StageFailure::bad_input)?;
    let n_events = events.n_events;
    let probability = (valid.fit_events as f64 / n_events.max(1) as f64).min(1.0);
    let mut fitted = FittedSnippets::default();
    for_each_event_window(&recording, &mut events, &events_path, valid.chunk_frames, margin, |window| {
        // In parallel, collected in event order (the same rows whatever the threads).
        let kept: Vec<_> = window
            .events
            .par_iter()
            .filter(|e| spikeyard_contract::sampling::keep(request.seed, SALT_PCA_FIT, e.index, probability))
            .map(|event| (event.index, extractor.snippets(window, event)))
            .collect();
        for (index, snippets) in kept {
            fitted.add(index, snippets);
        }
        Ok::<(), StageFailure>(())
    })?;
    let width = valid.n_components * valid.max_channels;
    let pca = match Pca::fit(&fitted.rows, valid.snippet_frames()) {
        Some(pca) => pca,
        None => {
            report.warn(format!("{n_events} events: too few to fit a PCA; the features table is empty"));
            let mut zero = Pca::fit(
                &[vec![0.0; valid.snippet_frames()], vec![0.0; valid.snippet_frames()]],
                valid.snippet_frames(),
            )
            .expect("two rows fit");
            zero.explained_variance.iter_mut().for_each(|v| *v = 0.0);
            zero
        }
    };
    write_table(&request.output(PCA_TABLE), &pca_batch(&pca, valid.before_frames), &metadata)?;
    write_table(&request.output(NEIGHBOURHOODS_TABLE), &neighbourhoods_batch(&extractor.neighbourhoods), &metadata)?;

    // Projection pass over every event.
    let mut writer = TableWriter::create(&request.output(FEATURES_TABLE), features_schema(width), &metadata)?;
    let mut progress = ProgressReporter::new(n_events, "events");
    let mut events = EventStream::open(&events_path).map_err(StageFailure::bad_input)?;
    for_each_event_window(&recording, &mut events, &events_path, valid.chunk_frames, margin, |window| {
        let rows: Vec<EventFeatures> = window
            .events
            .par_iter()
            .map(|e| match fitted.get(e.index) {
                Some((centre, rows)) => extractor.features_of(e, centre, rows, &pca),
                None => extractor.features(window, e, &pca),
            })
            .collect();
        writer.write(&features_batch(&rows, width, recording.sample_rate_hz))?;
        progress.advance(rows.len() as u64);
        Ok::<(), StageFailure>(())
    })?;
    writer.finish()?;
    let ratio = pca.explained_variance_ratio();
    let kept: f64 = ratio.iter().take(valid.n_components).filter(|r| r.is_finite()).sum();
    report.summary.insert("events".into(), n_events.into());
    report.summary.insert("fit_snippets".into(), fitted.rows.len().into());
    report.summary.insert("variance_explained_by_kept_components".into(), kept.into());
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Each fitted event gets back its own centre and snippets, whatever
    // their count; an event not fitted gets none.
    #[test]
    fn fitted_snippets_are_found_by_event() {
        let mut fitted = FittedSnippets::default();
        let snippets = |index: u64, count: usize| {
            (index as f64 + 0.25, (0..count).map(|k| vec![index as f64, k as f64]).collect::<Vec<_>>())
        };
        for (index, count) in [(2, 3), (5, 1), (6, 7), (40, 2)] {
            fitted.add(index, snippets(index, count));
        }
        for (index, count) in [(2, 3), (5, 1), (6, 7), (40, 2)] {
            let (centre, rows) = snippets(index, count);
            assert_eq!(fitted.get(index), Some((centre, &rows[..])), "event {index}");
        }
        for index in [0, 3, 7, 41] {
            assert_eq!(fitted.get(index), None, "event {index}");
        }
        assert_eq!(fitted.rows.len(), 13);
    }
}
