//! The measures stage: how much to trust each unit and what it did.
//!
//! Data flow of [`run`]:
//! 1. read the cluster stage's `spikes.parquet` (streamed, keeping 16
//!    bytes a spike), `units.parquet` and
//!    `templates.parquet`, the detect stage's `channel_noise.parquet`, and
//!    the sample rate and length of the recording;
//! 2. per unit ([`metrics`]): SNR (template trough on the main electrode ÷
//!    its MAD noise σ; and peak-to-peak ÷ σ), ISI violations and the
//!    contamination of Hill et al. (2011), presence ratio, the fraction of
//!    spikes lost below threshold, the mean rate with its exact Poisson
//!    95 % interval (Garwood 1936, [`stats`]);
//! 3. isolation distance and L-ratio in the unit's feature space: the
//!    events of the electrode most of its spikes were detected on, from
//!    `features.parquet` (a seeded subset per electrode);
//! 4. `units.parquet` again, with the metric columns added, and
//!    `firing_rates.parquet` (per unit and time bin, with intervals and an
//!    optional Gaussian-smoothed rate).

pub mod label;
pub mod metrics;
pub mod params;
pub mod stats;

use arrow_array::{
    Array, ArrayRef, FixedSizeListArray, Float32Array, Float64Array, Int32Array, Int64Array, RecordBatch, StringArray,
};
use arrow_schema::{DataType, Field, Schema};
use params::MeasuresParams;
use spikeyard_contract::table::{column, for_each_batch, read_table, read_whole_table, write_table};
use spikeyard_contract::{ContractError, StageFailure, StageReport, StageRequest};
use std::collections::HashMap;
use std::path::Path;
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-measures";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const UNITS_TABLE: &str = "units.parquet";
pub const FIRING_RATES_TABLE: &str = "firing_rates.parquet";

/// One sorted spike as the measures need it.
#[derive(Debug, Clone, Copy)]
struct Spike {
    unit: usize,
    sample: u64,
    channel: usize,
    amplitude_uv: f32,
    event: u64,
}

/// Visit `spikes.parquet` (at `path`) a batch at a time, refusing a spike
/// whose unit is not a row of `units.parquet` (`n_units` rows, at
/// `units_path`). Hours of recording hold millions of spikes: the table is
/// never held whole, only what each measure keeps of a spike.
fn for_each_spike(
    path: &Path,
    n_units: usize,
    units_path: &Path,
    mut visit: impl FnMut(Spike),
) -> Result<(), StageFailure> {
    for_each_batch(path, |batch| {
        let units: &Int32Array = column(path, batch, "unit_id")?;
        let samples: &Int64Array = column(path, batch, "sample")?;
        let channels: &Int32Array = column(path, batch, "channel")?;
        let amplitudes: &Float32Array = column(path, batch, "amplitude_uv")?;
        let events: &Int64Array = column(path, batch, "event")?;
        for i in 0..batch.num_rows() {
            let unit = units.value(i).max(0) as usize;
            if unit >= n_units {
                return Err(StageFailure::bad_input(unit_rows_refused(units_path)));
            }
            visit(Spike {
                unit,
                sample: samples.value(i).max(0) as u64,
                channel: channels.value(i).max(0) as usize,
                amplitude_uv: amplitudes.value(i),
                event: events.value(i).max(0) as u64,
            });
        }
        Ok(())
    })
}

fn unit_rows_refused(units_path: &Path) -> ContractError {
    ContractError::Format {
        path: units_path.to_path_buf(),
        message: "unit_id must number the rows 0, 1, 2, ... and cover every unit in spikes.parquet".into(),
    }
}

/// What the measures keep of one unit's spikes, in the table's order: 16
/// bytes a spike.
#[derive(Debug, Default)]
struct Train {
    samples: Vec<u64>,
    /// |amplitude| ÷ the detection threshold of the spike's channel, for
    /// the spikes whose channel has a positive threshold.
    amplitude_ratios: Vec<f64>,
    /// Spikes per channel they were detected on.
    channels: HashMap<usize, usize>,
}

fn f64_column(path: &Path, batch: &RecordBatch, name: &str) -> Result<Vec<f64>, ContractError> {
    Ok(column::<Float64Array>(path, batch, name)?.values().to_vec())
}

/// The sampled events of one electrode: each one's event number, its unit
/// (when it is a sorted spike; filled in once all are drawn) and its
/// `width` features, kept as stored (f32, in one buffer: 84 bytes an event
/// for 21 features, where a vector of f64 per event took about 230).
#[derive(Debug, Default)]
struct FeatureRows {
    events: Vec<u64>,
    units: Vec<Option<usize>>,
    values: Vec<f32>,
    width: usize,
}

impl FeatureRows {
    fn len(&self) -> usize {
        self.events.len()
    }

    fn row(&self, i: usize) -> &[f32] {
        &self.values[i * self.width..(i + 1) * self.width]
    }
}

/// unit, bin start s, bin s, count, rate, interval low, interval high, smoothed rate.
type RateRow = (i32, f64, f64, i64, f64, f64, f64, f64);

/// Gaussian-kernel smoothing of a sequence (σ in samples), edges renormalised.
pub fn smooth(values: &[f64], sigma: f64) -> Vec<f64> {
    let reach = (4.0 * sigma).ceil() as isize;
    let kernel: Vec<f64> = (-reach..=reach).map(|k| (-0.5 * (k as f64 / sigma).powi(2)).exp()).collect();
    (0..values.len() as isize)
        .map(|i| {
            let (mut sum, mut weight) = (0.0, 0.0);
            for (k, w) in (-reach..=reach).zip(&kernel) {
                if let Some(v) = usize::try_from(i + k).ok().and_then(|j| values.get(j)) {
                    sum += w * v;
                    weight += w;
                }
            }
            sum / weight
        })
        .collect()
}

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let recording = request.open_filtered_or_raw(&mut report, "reading the length and rate of")?;
    let need = |name: &str| request.require_artifact(name).map(Path::to_path_buf).map_err(StageFailure::bad_input);
    let (spikes_path, units_path, templates_path, noise_path, features_path) = (
        need("spikes.parquet")?,
        need("units.parquet")?,
        need("templates.parquet")?,
        need("channel_noise.parquet")?,
        need("features.parquet")?,
    );
    let params: MeasuresParams = request.params().map_err(StageFailure::bad_input)?;
    params.check().map_err(|message| request.params_refused(message))?;
    let fs = recording.sample_rate_hz;
    let duration_s = recording.duration_s();

    let units = read_whole_table(&units_path)?;
    let n_units = units.num_rows();
    let main_channel: Vec<usize> =
        column::<Int32Array>(&units_path, &units, "channel")?.values().iter().map(|&c| c.max(0) as usize).collect();
    let unit_ids: Vec<i32> = column::<Int32Array>(&units_path, &units, "unit_id")?.values().to_vec();
    if unit_ids.iter().enumerate().any(|(i, &u)| u != i as i32) {
        return Err(StageFailure::bad_input(unit_rows_refused(&units_path)));
    }
    let mut noise = Vec::new();
    let mut threshold = Vec::new();
    for batch in read_table(&noise_path)? {
        noise.extend(f64_column(&noise_path, &batch, "noise_uv")?);
        threshold.extend(f64_column(&noise_path, &batch, "threshold_uv")?);
    }
    // Template trough and peak-to-peak on each unit's main electrode.
    let mut trough = vec![0.0f64; n_units];
    let mut peak = vec![0.0f64; n_units];
    // Streamed: the table has millions of rows on a dense array.
    for_each_batch(&templates_path, |batch| {
        let ids: &Int32Array = column(&templates_path, batch, "unit_id")?;
        let channels: &Int32Array = column(&templates_path, batch, "channel")?;
        let values: &Float32Array = column(&templates_path, batch, "value_uv")?;
        for i in 0..batch.num_rows() {
            let unit = ids.value(i).max(0) as usize;
            if unit < n_units && channels.value(i) as usize == main_channel[unit] {
                trough[unit] = trough[unit].min(values.value(i) as f64);
                peak[unit] = peak[unit].max(values.value(i) as f64);
            }
        }
        Ok::<(), StageFailure>(())
    })?;

    // Per-unit spike trains, in one streamed pass.
    let mut trains: Vec<Train> = (0..n_units).map(|_| Train::default()).collect();
    for_each_spike(&spikes_path, n_units, &units_path, |spike| {
        let train = &mut trains[spike.unit];
        train.samples.push(spike.sample);
        if let Some(t) = threshold.get(spike.channel).filter(|t| **t > 0.0) {
            train.amplitude_ratios.push((spike.amplitude_uv as f64).abs() / t);
        }
        *train.channels.entry(spike.channel).or_default() += 1;
    })?;
    let refractory_frames = (params.refractory_ms * 1e-3 * fs).round() as u64;
    let n_presence_bins = ((duration_s / params.presence_bin_s).floor() as usize).max(1);
    let noise_at = |c: usize| noise.get(c).copied().unwrap_or(f64::NAN);

    // Feature-space metrics: each unit in the neighbourhood of the electrode
    // most of its spikes were detected on.
    let feature_channel: Vec<usize> = trains
        .iter()
        .map(|train| {
            let most = train.channels.iter().max_by_key(|&(&c, &n)| (n, std::cmp::Reverse(c)));
            most.map_or(0, |(&c, _)| c)
        })
        .collect();
    let wanted: std::collections::BTreeSet<usize> = feature_channel.iter().copied().collect();
    let mut group_counts: HashMap<usize, u64> = HashMap::new();
    let mut rows: HashMap<usize, FeatureRows> = HashMap::new();
    // Two streamed passes: count each electrode's events, then draw the subset.
    for_each_batch(&features_path, |batch| {
        let channels: &Int32Array = column(&features_path, batch, "channel")?;
        for &c in channels.values() {
            *group_counts.entry(c.max(0) as usize).or_default() += 1;
        }
        Ok::<(), StageFailure>(())
    })?;
    for_each_batch(&features_path, |batch| {
        let events: &Int64Array = column(&features_path, batch, "event")?;
        let channels: &Int32Array = column(&features_path, batch, "channel")?;
        let list: &FixedSizeListArray = column(&features_path, batch, "features")?;
        let width = list.value_length() as usize;
        let values = list.values().as_any().downcast_ref::<Float32Array>().ok_or_else(|| {
            StageFailure::bad_input(ContractError::Format {
                path: features_path.clone(),
                message: "features are not float32".into(),
            })
        })?;
        for i in 0..batch.num_rows() {
            let channel = channels.value(i).max(0) as usize;
            let event = events.value(i).max(0) as u64;
            let probability = params.isolation_events_per_channel as f64 / group_counts[&channel] as f64;
            if wanted.contains(&channel) && spikeyard_contract::sampling::keep(request.seed, 0x1507, event, probability)
            {
                let group = rows.entry(channel).or_default();
                group.width = width;
                group.events.push(event);
                group.values.extend_from_slice(&values.values()[i * width..(i + 1) * width]);
            }
        }
        Ok::<(), StageFailure>(())
    })?;
    // The drawn events' units, from a second pass over the spikes.
    let mut unit_of_event: HashMap<u64, Option<usize>> =
        rows.values().flat_map(|group| group.events.iter().map(|&event| (event, None))).collect();
    for_each_spike(&spikes_path, n_units, &units_path, |spike| {
        if let Some(unit) = unit_of_event.get_mut(&spike.event) {
            *unit = Some(spike.unit);
        }
    })?;
    for group in rows.values_mut() {
        group.units = group.events.iter().map(|event| unit_of_event[event]).collect();
    }
    let isolation: Vec<(Option<f64>, Option<f64>)> = (0..n_units)
        .map(|unit| {
            let Some(group) = rows.get(&feature_channel[unit]) else { return (None, None) };
            let events = 0..group.len();
            let dims: Vec<usize> =
                (0..group.width).filter(|&d| events.clone().any(|i| group.row(i)[d] != group.row(0)[d])).collect();
            let project = |i: usize| dims.iter().map(|&d| group.row(i)[d] as f64).collect::<Vec<f64>>();
            let cluster: Vec<Vec<f64>> =
                events.clone().filter(|&i| group.units[i] == Some(unit)).map(project).collect();
            let others: Vec<Vec<f64>> = events.filter(|&i| group.units[i] != Some(unit)).map(project).collect();
            metrics::isolation_and_l_ratio(&cluster, &others)
        })
        .collect();

    let per_unit: Vec<[f64; 9]> = (0..n_units)
        .map(|unit| {
            let Train { samples, amplitude_ratios, .. } = &trains[unit];
            let n = samples.len() as u64;
            let (violations, intervals) = metrics::isi_violations(samples, refractory_frames);
            let contamination = metrics::hill_contamination(
                n,
                duration_s,
                violations,
                params.refractory_ms * 1e-3,
                params.censored_ms * 1e-3,
            );
            let (low, high) = stats::poisson_interval_95(n);
            let sigma = noise_at(main_channel[unit]);
            [
                -trough[unit] / sigma,
                (peak[unit] - trough[unit]) / sigma,
                violations as f64,
                if intervals > 0 { violations as f64 / intervals as f64 } else { f64::NAN },
                contamination,
                metrics::presence_ratio(samples, recording.n_frames, n_presence_bins),
                metrics::fraction_below_threshold(amplitude_ratios),
                low / duration_s,
                high / duration_s,
            ]
        })
        .collect();
    let rules = params.label_rules();
    let labels: Vec<(&str, Option<String>)> = (0..n_units)
        .map(|unit| {
            let m = &per_unit[unit];
            let inputs = label::LabelInputs {
                snr: m[0],
                contamination: m[4],
                n_spikes: trains[unit].samples.len() as u64,
                presence_ratio: m[5],
                isolation_distance: isolation[unit].0,
            };
            label::label(&inputs, &rules)
        })
        .collect();
    let column_of = |k: usize| -> ArrayRef { Arc::new(Float64Array::from_iter_values(per_unit.iter().map(|m| m[k]))) };
    let mut fields: Vec<Field> = units.schema().fields().iter().map(|f| f.as_ref().clone()).collect();
    let mut columns: Vec<ArrayRef> = units.columns().to_vec();
    let added: [(&str, ArrayRef); 14] = [
        ("label", Arc::new(StringArray::from_iter_values(labels.iter().map(|l| l.0)))),
        ("label_reason", Arc::new(StringArray::from_iter(labels.iter().map(|l| l.1.as_deref())))),
        ("snr", column_of(0)),
        ("snr_peak_to_peak", column_of(1)),
        ("isi_violations", Arc::new(Int64Array::from_iter_values(per_unit.iter().map(|m| m[2] as i64)))),
        ("isi_violation_ratio", column_of(3)),
        ("contamination", column_of(4)),
        ("presence_ratio", column_of(5)),
        ("fraction_missing", column_of(6)),
        ("firing_rate_ci_low_hz", column_of(7)),
        ("firing_rate_ci_high_hz", column_of(8)),
        ("isolation_distance", Arc::new(Float64Array::from_iter(isolation.iter().map(|m| m.0)))),
        ("l_ratio", Arc::new(Float64Array::from_iter(isolation.iter().map(|m| m.1)))),
        ("feature_channel", Arc::new(Int32Array::from_iter_values(feature_channel.iter().map(|&c| c as i32)))),
    ];
    for (name, array) in added {
        fields.push(Field::new(
            name,
            array.data_type().clone(),
            array.null_count() > 0 || ["isolation_distance", "l_ratio", "label_reason"].contains(&name),
        ));
        columns.push(array);
    }
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);
    let batch = RecordBatch::try_new(Arc::new(Schema::new(fields)), columns)
        .map_err(|source| StageFailure::failed(ContractError::Arrow { path: units_path.clone(), source }))?;
    write_table(&request.output(UNITS_TABLE), &batch, &metadata)?;

    // Firing rates per bin.
    let bin_frames = (params.rate_bin_s * fs).round().max(1.0) as u64;
    let n_bins = recording.n_frames.div_ceil(bin_frames) as usize;
    let mut rate_rows: Vec<RateRow> = Vec::with_capacity(n_units * n_bins);
    for (unit, train) in trains.iter().enumerate() {
        let mut counts = vec![0u64; n_bins];
        for sample in &train.samples {
            counts[(sample / bin_frames) as usize] += 1;
        }
        let widths: Vec<f64> =
            (0..n_bins).map(|b| ((recording.n_frames - b as u64 * bin_frames).min(bin_frames)) as f64 / fs).collect();
        let rates: Vec<f64> = counts.iter().zip(&widths).map(|(&c, w)| c as f64 / w).collect();
        let smoothed = if params.smoothing_s > 0.0 {
            smooth(&rates, params.smoothing_s / params.rate_bin_s)
        } else {
            vec![f64::NAN; n_bins]
        };
        for b in 0..n_bins {
            let (low, high) = stats::poisson_interval_95(counts[b]);
            rate_rows.push((
                unit as i32,
                b as f64 * bin_frames as f64 / fs,
                widths[b],
                counts[b] as i64,
                rates[b],
                low / widths[b],
                high / widths[b],
                smoothed[b],
            ));
        }
    }
    let rates_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("bin_start_s", DataType::Float64, false),
            Field::new("bin_s", DataType::Float64, false),
            Field::new("count", DataType::Int64, false),
            Field::new("rate_hz", DataType::Float64, false),
            Field::new("ci_low_hz", DataType::Float64, false),
            Field::new("ci_high_hz", DataType::Float64, false),
            Field::new("smoothed_rate_hz", DataType::Float64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(rate_rows.iter().map(|r| r.0))) as ArrayRef,
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.1))),
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.2))),
            Arc::new(Int64Array::from_iter_values(rate_rows.iter().map(|r| r.3))),
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.4))),
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.5))),
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.6))),
            Arc::new(Float64Array::from_iter_values(rate_rows.iter().map(|r| r.7))),
        ],
    )
    .expect("rate columns match their schema");
    write_table(&request.output(FIRING_RATES_TABLE), &rates_batch, &metadata)?;
    report.summary.insert("units".into(), n_units.into());
    for name in ["single", "multi", "noise"] {
        report.summary.insert(format!("units_{name}"), labels.iter().filter(|l| l.0 == name).count().into());
    }
    report
        .summary
        .insert("units_with_isolation_distance".into(), isolation.iter().filter(|m| m.0.is_some()).count().into());
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spikes_table(path: &Path, units: &[i32]) {
        let n = units.len();
        let batch = RecordBatch::try_new(
            Arc::new(Schema::new(vec![
                Field::new("unit_id", DataType::Int32, false),
                Field::new("sample", DataType::Int64, false),
                Field::new("channel", DataType::Int32, false),
                Field::new("amplitude_uv", DataType::Float32, false),
                Field::new("event", DataType::Int64, false),
            ])),
            vec![
                Arc::new(Int32Array::from(units.to_vec())) as ArrayRef,
                Arc::new(Int64Array::from_iter_values((0..n as i64).map(|i| 100 * i))),
                Arc::new(Int32Array::from(vec![3; n])),
                Arc::new(Float32Array::from(vec![-80.0; n])),
                Arc::new(Int64Array::from_iter_values(0..n as i64)),
            ],
        )
        .unwrap();
        write_table(path, &batch, &[]).unwrap();
    }

    // The streamed spikes: every row in order, and a unit that
    // units.parquet does not have is refused, naming that table.
    #[test]
    fn spikes_are_streamed_and_a_unit_without_a_row_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let (spikes, units) = (dir.path().join("spikes.parquet"), dir.path().join("units.parquet"));
        spikes_table(&spikes, &[0, 1, 0]);
        let mut seen = Vec::new();
        for_each_spike(&spikes, 2, &units, |s| seen.push((s.unit, s.sample, s.event))).unwrap();
        assert_eq!(seen, [(0, 0, 0), (1, 100, 1), (0, 200, 2)]);
        spikes_table(&spikes, &[0, 5]);
        let failure = for_each_spike(&spikes, 2, &units, |_| {}).unwrap_err();
        let message = failure.error.to_string();
        assert!(failure.bad_input && message.contains("units.parquet"), "{message}");
        assert!(message.contains("cover every unit in spikes.parquet"), "{message}");
    }

    #[test]
    fn smoothing_keeps_a_constant_and_spreads_a_spike() {
        assert!(smooth(&[2.0; 20], 3.0).iter().all(|v| (v - 2.0).abs() < 1e-12));
        let mut impulse = vec![0.0; 21];
        impulse[10] = 1.0;
        let out = smooth(&impulse, 2.0);
        assert!((out[8] - out[12]).abs() < 1e-15 && out[10] > out[9]);
    }
}
