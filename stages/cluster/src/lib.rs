//! The cluster stage: events become units.
//!
//! Data flow of [`run`]:
//! 1. read `features.parquet` (from the features stage) once to count the
//!    events of each electrode neighbourhood (events are grouped by the
//!    electrode they were detected on), and again to draw a seeded subset
//!    of each group for fitting;
//! 2. per group, in parallel: a mixture model with the number of units
//!    chosen by BIC ([`model`]);
//! 3. every event is assigned to the most probable unit of its group
//!    (streamed);
//! 4. templates: mean filtered waveforms of a seeded subset of each unit's
//!    spikes on the electrodes around it, in one pass over the recording;
//! 5. clusters that are one neuron are merged ([`merge`]): templates alike
//!    in shape and amplitude, whose spikes projected between them form one
//!    mode ([`dip`]); a second pass over the recording projects them;
//! 6. smaller units firing only inside a larger one's bursts join it
//!    ([`burst`]);
//! 7. units whose spikes are another's seen again at a fixed lag (axon,
//!    far electrodes) are folded into it ([`echo`]);
//! 8. fragments (too few spikes) join a unit that explains them or leave
//!    the sort; spikes counted twice within a unit are dropped; units are
//!    numbered by electrode and amplitude;
//! 9. `spikes.parquet`, `units.parquet`, `templates.parquet` and
//!    `unit_echoes.parquet`.
//!
//! Memory: the fitting subsets, one (sample, unit) pair per event, and the
//! templates. The features are streamed.

pub mod burst;
pub mod dip;
pub mod echo;
pub mod merge;
pub mod model;
pub mod params;
pub mod split;

use arrow_array::{
    Array, ArrayRef, FixedSizeListArray, Float32Array, Float64Array, Int32Array, Int64Array, RecordBatch,
};
use arrow_schema::{DataType, Field, Schema};
use echo::Echo;
use merge::{Candidate, Template, TemplateSummary};
use model::Mixture;
use params::{ClusterParams, ValidClusterParams};
use rayon::prelude::*;
use spikeyard_contract::events::{channel_runs, for_each_event_window, ChannelRun, EventRecord};
use spikeyard_contract::sampling::keep;
use spikeyard_contract::table::{column, for_each_batch, write_table, TableWriter};
use spikeyard_contract::{ContractError, ProgressReporter, Recording, StageFailure, StageReport, StageRequest};
use split::Split;
use std::path::Path;
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-cluster";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

pub const SPIKES_TABLE: &str = "spikes.parquet";
pub const UNITS_TABLE: &str = "units.parquet";
pub const TEMPLATES_TABLE: &str = "templates.parquet";
pub const ECHOES_TABLE: &str = "unit_echoes.parquet";

/// One batch of the features table, columns borrowed.
pub struct FeatureBatch<'a> {
    pub events: &'a Int64Array,
    pub samples: &'a Int64Array,
    pub channels: &'a Int32Array,
    pub amplitudes: &'a Float32Array,
    pub x_um: &'a Float32Array,
    pub y_um: &'a Float32Array,
    pub features: &'a Float32Array,
    pub width: usize,
}

impl FeatureBatch<'_> {
    pub fn len(&self) -> usize {
        self.samples.len()
    }
    pub fn is_empty(&self) -> bool {
        self.samples.is_empty()
    }
    pub fn row(&self, i: usize) -> &[f32] {
        &self.features.values()[i * self.width..(i + 1) * self.width]
    }
}

/// Stream the features table batch by batch.
///
/// # Errors
/// The table cannot be read or lacks a column, with its path.
pub fn for_each_feature_batch(
    path: &Path,
    mut visit: impl FnMut(&FeatureBatch) -> Result<(), StageFailure>,
) -> Result<(), StageFailure> {
    for_each_batch(path, |batch| {
        let list: &FixedSizeListArray = column(path, batch, "features")?;
        let features = list.values().as_any().downcast_ref::<Float32Array>().ok_or_else(|| {
            StageFailure::bad_input(ContractError::Format {
                path: path.to_path_buf(),
                message: "features are not float32".into(),
            })
        })?;
        visit(&FeatureBatch {
            events: column(path, batch, "event")?,
            samples: column(path, batch, "sample")?,
            channels: column(path, batch, "channel")?,
            amplitudes: column(path, batch, "amplitude_uv")?,
            x_um: column(path, batch, "x_um")?,
            y_um: column(path, batch, "y_um")?,
            features,
            width: list.value_length() as usize,
        })
    })
}

/// The fitted model of one electrode's group of events.
pub struct GroupModel {
    /// Feature dimensions used (those that vary in the group).
    pub dims: Vec<usize>,
    pub mixture: Mixture,
    /// Per component, its split when its spikes form two modes
    /// ([`split::principal_split`]); the new parts are numbered after the
    /// components, in component order.
    pub splits: Vec<Option<Split>>,
    /// Number of the group's first unit among all groups' units.
    pub first_unit: usize,
}

impl GroupModel {
    /// Units of the group: its components and their split-off parts.
    pub fn n_units(&self) -> usize {
        self.mixture.components.len() + self.splits.iter().flatten().count()
    }

    fn unit_of(&self, row: &[f32]) -> usize {
        let x: Vec<f64> = self.dims.iter().map(|&d| row[d] as f64).collect();
        let component = self.mixture.predict(&x);
        match &self.splits[component] {
            Some(split) if split.is_new_part(&x) => {
                let before = self.splits[..component].iter().flatten().count();
                self.first_unit + self.mixture.components.len() + before
            }
            _ => self.first_unit + component,
        }
    }
}

/// Fit every group's model from its fitting rows (parallel over groups;
/// each group's fit is seeded by the group, so the thread count does not
/// matter).
pub fn fit_groups(fit_rows: &[Vec<Vec<f32>>], params: &ValidClusterParams, seed: u64) -> Vec<Option<GroupModel>> {
    let mut models: Vec<Option<GroupModel>> = fit_rows
        .par_iter()
        .enumerate()
        .map(|(channel, rows)| {
            if rows.is_empty() {
                return None;
            }
            let width = rows[0].len();
            let dims: Vec<usize> = (0..width)
                .filter(|&d| {
                    let first = rows[0][d];
                    rows.iter().any(|r| r[d] != first)
                })
                .collect();
            let data: Vec<Vec<f64>> = rows.iter().map(|r| dims.iter().map(|&d| r[d] as f64).collect()).collect();
            let fit = model::GroupFit {
                method: params.method,
                max_units: params.max_units_per_channel,
                min_points_per_unit: params.min_events_per_unit,
                runs: params.runs,
                bic_patience: params.bic_patience,
                dbscan_eps: params.dbscan_eps,
                seed: seed ^ (channel as u64 + 1).wrapping_mul(0xA076_1D64_78BD_642F),
            };
            let mixture = if dims.is_empty() { None } else { model::fit_group(&data, dims.len(), &fit) };
            // A group too uniform to fit is one unit.
            let mixture = mixture.unwrap_or_else(|| Mixture {
                components: vec![model::Component {
                    weight: 1.0,
                    mean: vec![0.0; dims.len()],
                    cholesky: identity(dims.len()),
                    log_det: 0.0,
                }],
                bic: f64::NAN,
            });
            // A component whose fitting rows form two modes is two units.
            let labels: Vec<usize> = data.iter().map(|x| mixture.predict(x)).collect();
            let splits = (0..mixture.components.len())
                .map(|c| {
                    let rows: Vec<&[f64]> =
                        data.iter().zip(&labels).filter(|(_, &l)| l == c).map(|(x, _)| x.as_slice()).collect();
                    split::principal_split(&rows, &params.split)
                })
                .collect();
            Some(GroupModel { dims, mixture, splits, first_unit: 0 })
        })
        .collect();
    let mut next_unit = 0;
    for model in models.iter_mut().flatten() {
        model.first_unit = next_unit;
        next_unit += model.n_units();
    }
    models
}

fn identity(d: usize) -> Vec<f64> {
    (0..d * d).map(|i| if i % (d + 1) == 0 { 1.0 } else { 0.0 }).collect()
}

/// One assigned spike.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Assigned {
    /// Row of the event in events.parquet.
    pub event: u64,
    pub sample: u64,
    pub channel: u32,
    pub unit: u32,
    pub amplitude_uv: f32,
    pub x_um: f32,
    pub y_um: f32,
}

/// Whether spike `index` (of a unit of `count` spikes) is among those its
/// unit's template averages: a seeded subset of `template_spikes`.
fn in_template(seed: u64, index: usize, count: usize, params: &ValidClusterParams) -> bool {
    keep(seed, 0x7E3D, index as u64, params.template_spikes as f64 / count.max(1) as f64)
}

/// Mean waveforms of a seeded subset of each unit's spikes, one pass over the recording.
fn measure_templates(
    recording: &Recording,
    spikes: &[Assigned],
    n_units: usize,
    unit_channels: &[Vec<usize>],
    params: &ValidClusterParams,
    seed: u64,
    origin: &Path,
) -> Result<Vec<Template>, StageFailure> {
    let mut counts = vec![0usize; n_units];
    for s in spikes {
        counts[s.unit as usize] += 1;
    }
    let length = params.template_before_frames + params.template_after_frames + 1;
    // Per unit, frame-major sums (frame k, then the unit's channels in order),
    // and its channels as runs of consecutive numbers, each read in one go.
    let mut sums: Vec<Vec<f64>> = unit_channels.iter().map(|c| vec![0.0; length * c.len()]).collect();
    let runs: Vec<Vec<ChannelRun>> = unit_channels.iter().map(|c| channel_runs(c.iter().copied())).collect();
    let mut averaged = vec![0usize; n_units];
    let chosen_spikes =
        spikes.iter().enumerate().filter(|(i, s)| in_template(seed, *i, counts[s.unit as usize], params));
    let events = chosen_spikes.map(|(i, s)| {
        Ok(EventRecord { index: i as u64, sample: s.sample, channel: s.channel as usize, amplitude_uv: s.amplitude_uv })
    });
    let margin = params.template_before_frames.max(params.template_after_frames) + 1;
    let n_channels = recording.n_channels;
    let (mut starts, mut order) = (Vec::new(), Vec::new());
    for_each_event_window(recording, events, origin, params.chunk_frames, margin, |window| {
        // The window's events grouped by unit, each group in event order.
        let unit_of = |event: &EventRecord| spikes[event.index as usize].unit as usize;
        starts.clear();
        starts.resize(n_units + 1, 0);
        for event in window.events {
            starts[unit_of(event) + 1] += 1;
        }
        for unit in 0..n_units {
            averaged[unit] += starts[unit + 1];
            starts[unit + 1] += starts[unit];
        }
        order.resize(window.events.len(), 0);
        let mut next = starts.clone();
        for (i, event) in window.events.iter().enumerate() {
            order[next[unit_of(event)]] = i;
            next[unit_of(event)] += 1;
        }
        // In parallel over units, each adding its own spikes in order.
        sums.par_iter_mut().zip(&runs).enumerate().for_each_init(Vec::new, |block, (unit, (sums, runs))| {
            block.resize(sums.len(), 0.0f32);
            for &i in &order[starts[unit]..starts[unit + 1]] {
                let first = window.events[i].sample as i64 - params.template_before_frames as i64;
                window.copy_runs(first, runs, n_channels, block);
                for (s, v) in sums.iter_mut().zip(block.iter()) {
                    *s += *v as f64;
                }
            }
        });
        Ok::<(), StageFailure>(())
    })?;
    Ok(sums
        .into_iter()
        .zip(unit_channels)
        .zip(averaged)
        .map(|((sums, channels), n)| Template {
            channels: channels.clone(),
            values: (0..channels.len())
                .map(|c| sums.iter().skip(c).step_by(channels.len()).map(|v| v / n.max(1) as f64).collect())
                .collect(),
            n_averaged: n,
        })
        .collect())
}

/// A candidate pair's projected spikes: unit a's, then unit b's.
type Projected = (Vec<f64>, Vec<f64>);

/// Projections of a seeded subset of each candidate pair's spikes
/// (`merge_test_spikes` a unit) on the pair's axis, in one pass over the
/// recording: per candidate, a's values and b's (b read at its aligned
/// time). A spike's projection is its waveform on the axis electrodes,
/// dotted with the axis (µV²; the scale does not matter to the dip), left
/// out of its own template ([`Candidate::projection`]).
fn project_on_axes(
    recording: &Recording,
    spikes: &[Assigned],
    templates: &[Template],
    candidates: &[Candidate],
    params: &ValidClusterParams,
    seed: u64,
    origin: &Path,
) -> Result<Vec<Projected>, StageFailure> {
    let mut projections = vec![(Vec::new(), Vec::new()); candidates.len()];
    if candidates.is_empty() {
        return Ok(projections);
    }
    let n_units = templates.len();
    let mut counts = vec![0usize; n_units];
    spikes.iter().for_each(|s| counts[s.unit as usize] += 1);
    let mut tested = vec![false; n_units];
    for c in candidates {
        tested[c.a] = true;
        tested[c.b] = true;
    }
    let runs: Vec<Vec<ChannelRun>> = candidates.iter().map(|c| channel_runs(c.channels.iter().copied())).collect();
    let chosen = spikes.iter().enumerate().filter(|(i, s)| {
        let unit = s.unit as usize;
        tested[unit] && keep(seed, 0xD1F, *i as u64, params.merge_test_spikes as f64 / counts[unit] as f64)
    });
    let events = chosen.map(|(i, s)| {
        Ok(EventRecord { index: i as u64, sample: s.sample, channel: s.channel as usize, amplitude_uv: s.amplitude_uv })
    });
    let before = params.template_before_frames as i64;
    let margin = params.template_before_frames.max(params.template_after_frames) + params.merge_max_shift_frames + 1;
    let n_channels = recording.n_channels;
    let mut by_unit: Vec<Vec<usize>> = vec![Vec::new(); n_units];
    for_each_event_window(recording, events, origin, params.chunk_frames, margin, |window| {
        by_unit.iter_mut().for_each(Vec::clear);
        for (i, event) in window.events.iter().enumerate() {
            by_unit[spikes[event.index as usize].unit as usize].push(i);
        }
        projections.par_iter_mut().zip(candidates).zip(&runs).for_each_init(
            Vec::new,
            |block, (((on_a, on_b), candidate), runs)| {
                block.resize(candidate.axis.len(), 0.0f32);
                let sides = [(candidate.a, false, 0, on_a), (candidate.b, true, candidate.alignment.shift, on_b)];
                for (unit, is_b, shift, out) in sides {
                    for &i in &by_unit[unit] {
                        let event = &window.events[i];
                        window.copy_runs(event.sample as i64 + shift - before, runs, n_channels, block);
                        let own = in_template(seed, event.index as usize, counts[unit], params)
                            .then_some((is_b, templates[unit].n_averaged));
                        out.push(candidate.projection(block, own));
                    }
                }
            },
        );
        Ok::<(), StageFailure>(())
    })?;
    Ok(projections)
}

/// The p-value of Hartigan's dip test (see [`dip`]) on a pair's projected
/// spikes: small when they form more than one mode. The two units' values
/// are first thinned to the same share of each unit's spikes (`n_spikes`),
/// so that the pair is tested in its real proportions: one neuron split by
/// a boundary is two halves of one mode only when both halves weigh what
/// they do. The test can only part the two units when the smaller holds at
/// least a tenth of the values and `min_spikes` of them; below that (a
/// mode of a few spikes is not the dip test's to find) it returns 1 and the
/// templates' likeness decides, as the split rules do for a cluster.
fn dip_p(projected: &Projected, n_spikes: (usize, usize), min_spikes: usize) -> f64 {
    let share = |values: &[f64], n: usize| values.len() as f64 / n.max(1) as f64;
    let common = share(&projected.0, n_spikes.0).min(share(&projected.1, n_spikes.1));
    let thin = |values: &[f64], n: usize| -> Vec<f64> {
        let keep = ((common * n as f64).round() as usize).min(values.len());
        (0..keep).map(|i| values[i * values.len() / keep.max(1)]).collect()
    };
    let (a, b) = (thin(&projected.0, n_spikes.0), thin(&projected.1, n_spikes.1));
    let smaller = a.len().min(b.len());
    if smaller < min_spikes.max(4) || (smaller as f64) < 0.1 * (a.len() + b.len()) as f64 {
        return 1.0;
    }
    let mut values = a;
    values.extend(b);
    values.sort_by(f64::total_cmp);
    dip::dip_test(&values).1
}

/// The templates of merged groups: each group's members aligned on the
/// member averaged from the most spikes, and combined; and each member's
/// shift (its spikes' samples plus the shift are the group's timing).
fn combine_groups(
    templates: &[Template],
    merged: &[usize],
    n_groups: usize,
    max_shift_frames: usize,
) -> (Vec<Template>, Vec<i64>) {
    let mut shifts = vec![0i64; templates.len()];
    let combined = (0..n_groups)
        .map(|group| {
            let members: Vec<usize> = (0..templates.len()).filter(|&m| merged[m] == group).collect();
            let reference =
                *members.iter().max_by_key(|&&m| templates[m].n_averaged).expect("every group has a member");
            for &m in &members {
                shifts[m] = merge::align(&templates[reference], &templates[m], max_shift_frames).map_or(0, |a| a.shift);
            }
            merge::combine(&members.iter().map(|&m| (&templates[m], shifts[m])).collect::<Vec<_>>())
        })
        .collect();
    (combined, shifts)
}

/// Pairs (larger, smaller) of units where the smaller is the larger's
/// burst tail: templates within the merge distance, aligned correlation at
/// least the merge rule's, amplitude ratio at least
/// `burst_min_amplitude_ratio`, and the timing of [`burst::is_burst_tail`].
fn burst_tail_pairs(
    templates: &[Template],
    summaries: &[TemplateSummary],
    trains: &[Vec<u64>],
    params: &ValidClusterParams,
) -> Vec<(usize, usize)> {
    merge::near_pairs(summaries, params.merge_distance_um)
        .into_par_iter()
        .filter_map(|(a, b)| {
            let (head, tail) = if summaries[a].trough_uv <= summaries[b].trough_uv { (a, b) } else { (b, a) };
            if !burst::is_burst_tail(&trains[head], &trains[tail], &params.burst) {
                return None;
            }
            let alignment = merge::align(&templates[head], &templates[tail], params.merge_max_shift_frames)?;
            (params.merge_rules().alike(&alignment) && alignment.amplitude_ratio >= params.burst_min_amplitude_ratio)
                .then_some((head, tail))
        })
        .collect()
}

/// Fold each echo unit's spikes into its source: a spike with a source
/// spike at the echo's lag (± `jitter_frames`) is that spike seen again and
/// is dropped; the others move to the source at the source's time (the
/// spike's time minus the lag, within the recording's `n_frames`).
/// Returns the spikes dropped; `spikes` stay in sample order.
fn fold_echoes(spikes: &mut Vec<Assigned>, folded: &[Option<Echo>], jitter_frames: u64, n_frames: u64) -> usize {
    let mut trains: Vec<Vec<u64>> = vec![Vec::new(); folded.len()];
    for s in spikes.iter() {
        trains[s.unit as usize].push(s.sample);
    }
    let before = spikes.len();
    spikes.retain_mut(|s| {
        let Some(echo) = folded[s.unit as usize] else { return true };
        let at = ((s.sample as f64 - echo.lag_frames).round().max(0.0) as u64).min(n_frames.saturating_sub(1));
        let train = &trains[echo.source];
        let first = train.partition_point(|&t| t + jitter_frames < at);
        if train.get(first).is_some_and(|&t| t <= at + jitter_frames) {
            return false;
        }
        s.unit = echo.source as u32;
        s.sample = at;
        true
    });
    spikes.sort_by_key(|s| (s.sample, s.event));
    before - spikes.len()
}

/// Where each unit ends after echoes and fragments: itself, the unit it
/// joins, or nowhere. Echoes end with their source. A unit left with fewer
/// than `min_unit_spikes` spikes is a fragment: it joins the nearest-shaped
/// unit with enough spikes that passes the merge rules on templates (no
/// dip test: too few spikes to test), or none.
fn settle_fragments(
    templates: &[Template],
    summaries: &[TemplateSummary],
    n_spikes: &[usize],
    folded: &[Option<Echo>],
    params: &ValidClusterParams,
) -> Vec<Option<usize>> {
    let n = templates.len();
    let rules = params.merge_rules();
    let whole = |u: usize| folded[u].is_none() && n_spikes[u] >= params.min_unit_spikes;
    let mut home: Vec<Option<usize>> = (0..n)
        .map(|u| {
            if folded[u].is_some() || whole(u) {
                return Some(u);
            }
            (0..n)
                .filter(|&v| v != u && whole(v))
                .filter(|&v| summaries[u].distance_um(&summaries[v]) <= rules.max_distance_um)
                .filter_map(|v| merge::align(&templates[v], &templates[u], rules.max_shift_frames).map(|a| (v, a)))
                .filter(|(_, a)| rules.accepts(a))
                .max_by(|x, y| x.1.correlation.total_cmp(&y.1.correlation).then(y.0.cmp(&x.0)))
                .map(|(v, _)| v)
        })
        .collect();
    for u in 0..n {
        if let Some(echo) = folded[u] {
            home[u] = home[echo.source];
        }
    }
    home
}

/// A folded echo, as a row of the echoes table.
struct EchoLink {
    unit_id: u32,
    /// Main electrode of the echo.
    channel: usize,
    echo: Echo,
    /// Spikes the echo had before it was folded.
    n_spikes: usize,
}

/// `unit_echoes.parquet`: where and when each unit was seen again.
fn write_echoes(
    path: &Path,
    links: &[EchoLink],
    sample_rate_hz: f64,
    metadata: &[(&str, String)],
) -> Result<(), StageFailure> {
    let ms = |frames: f64| frames * 1e3 / sample_rate_hz;
    let batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("delay_ms", DataType::Float64, false),
            Field::new("jitter_ms", DataType::Float64, false),
            Field::new("locked_spikes", DataType::Int64, false),
            Field::new("echo_spikes", DataType::Int64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(links.iter().map(|l| l.unit_id as i32))) as ArrayRef,
            Arc::new(Int32Array::from_iter_values(links.iter().map(|l| l.channel as i32))),
            Arc::new(Float64Array::from_iter_values(links.iter().map(|l| ms(l.echo.lag_frames)))),
            Arc::new(Float64Array::from_iter_values(links.iter().map(|l| ms(l.echo.jitter_sd_frames)))),
            Arc::new(Int64Array::from_iter_values(links.iter().map(|l| l.echo.locked as i64))),
            Arc::new(Int64Array::from_iter_values(links.iter().map(|l| l.n_spikes as i64))),
        ],
    )
    .expect("echo columns match their schema");
    write_table(path, &batch, metadata)?;
    Ok(())
}

/// Rows of the templates table written at a time.
const TEMPLATE_ROWS_PER_BATCH: usize = 1 << 20;

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let recording = request.open_filtered_or_raw(&mut report, "templates come from")?;
    let features_path = request.require_artifact("features.parquet").map_err(StageFailure::bad_input)?.to_path_buf();
    let params: ClusterParams = request.params().map_err(StageFailure::bad_input)?;
    let valid = params.check(recording.sample_rate_hz).map_err(|message| request.params_refused(message))?;
    let n_channels = recording.n_channels;
    let channel_of = |batch: &FeatureBatch, i: usize| -> Result<usize, StageFailure> {
        let channel = batch.channels.value(i);
        usize::try_from(channel).ok().filter(|c| *c < n_channels).ok_or_else(|| {
            StageFailure::bad_input(ContractError::Format {
                path: features_path.clone(),
                message: format!("channel {channel} does not exist in the recording ({n_channels} channels)"),
            })
        })
    };

    // 1. Count, then draw each group's fitting subset.
    let mut counts = vec![0u64; n_channels];
    for_each_feature_batch(&features_path, |batch| {
        for i in 0..batch.len() {
            counts[channel_of(batch, i)?] += 1;
        }
        Ok(())
    })?;
    let mut fit_rows: Vec<Vec<Vec<f32>>> = vec![Vec::new(); n_channels];
    let mut index = 0u64;
    for_each_feature_batch(&features_path, |batch| {
        for i in 0..batch.len() {
            let channel = channel_of(batch, i)?;
            let probability = valid.fit_events_per_channel as f64 / counts[channel].max(1) as f64;
            if keep(request.seed, 0xF17, index, probability) {
                fit_rows[channel].push(batch.row(i).to_vec());
            }
            index += 1;
        }
        Ok(())
    })?;

    // 2. Fit every group.
    let models = fit_groups(&fit_rows, &valid, request.seed);
    drop(fit_rows);
    let n_local_units = models.iter().flatten().map(GroupModel::n_units).sum::<usize>();
    let n_split = models.iter().flatten().map(|m| m.splits.iter().flatten().count()).sum::<usize>();

    // 3. Assign every event.
    let n_events: u64 = counts.iter().sum();
    let mut progress = ProgressReporter::new(n_events, "events");
    let mut spikes: Vec<Assigned> = Vec::with_capacity(n_events as usize);
    let mut unit_group = vec![0usize; n_local_units];
    for (channel, model) in models.iter().enumerate() {
        if let Some(model) = model {
            for u in 0..model.n_units() {
                unit_group[model.first_unit + u] = channel;
            }
        }
    }
    for_each_feature_batch(&features_path, |batch| {
        let assigned: Vec<Result<Assigned, StageFailure>> = (0..batch.len())
            .into_par_iter()
            .map(|i| {
                let channel = channel_of(batch, i)?;
                let model = models[channel].as_ref().expect("every group with events has a model");
                Ok(Assigned {
                    event: batch.events.value(i).max(0) as u64,
                    sample: batch.samples.value(i).max(0) as u64,
                    channel: channel as u32,
                    unit: model.unit_of(batch.row(i)) as u32,
                    amplitude_uv: batch.amplitudes.value(i),
                    x_um: batch.x_um.value(i),
                    y_um: batch.y_um.value(i),
                })
            })
            .collect();
        for spike in assigned {
            spikes.push(spike?);
        }
        progress.advance(batch.len() as u64);
        Ok(())
    })?;

    // 4. Templates of the local units.
    let electrodes = &recording.electrodes;
    let unit_channels: Vec<Vec<usize>> = unit_group
        .iter()
        .map(|&g| {
            let centre = &electrodes[g];
            electrodes
                .iter()
                .filter(|e| (e.x_um - centre.x_um).hypot(e.y_um - centre.y_um) <= valid.template_radius_um)
                .map(|e| e.channel)
                .collect()
        })
        .collect();
    let local_templates =
        measure_templates(&recording, &spikes, n_local_units, &unit_channels, &valid, request.seed, &features_path)?;
    let local_summaries: Vec<TemplateSummary> = local_templates.iter().map(|t| t.summarise(electrodes)).collect();

    // 5. Merge units that are one neuron: templates alike in shape and
    //    amplitude whose spikes form one mode on the axis between them.
    let anchor = valid.template_before_frames as i64;
    let merge::PairClasses { candidates, apart } =
        merge::classify_pairs(&local_templates, &local_summaries, &unit_group, anchor, &valid.merge_rules());
    let mut local_counts = vec![0usize; n_local_units];
    spikes.iter().for_each(|s| local_counts[s.unit as usize] += 1);
    let projections =
        project_on_axes(&recording, &spikes, &local_templates, &candidates, &valid, request.seed, &features_path)?;
    // Most unimodal pairs first; a refused pair is never chained together.
    let mut tested: Vec<(f64, usize, usize)> = candidates
        .iter()
        .zip(&projections)
        .map(|(c, projected)| {
            (dip_p(projected, (local_counts[c.a], local_counts[c.b]), valid.min_unit_spikes), c.a, c.b)
        })
        .collect();
    tested.sort_by(|x, y| y.0.total_cmp(&x.0).then((x.1, x.2).cmp(&(y.1, y.2))));
    let accepted: Vec<(usize, usize)> =
        tested.iter().filter(|t| t.0 >= valid.merge_dip_alpha).map(|t| (t.1, t.2)).collect();
    let mut refused: Vec<(usize, usize)> =
        tested.iter().filter(|t| t.0 < valid.merge_dip_alpha).map(|t| (t.1, t.2)).collect();
    let (n_refused_by_dip, n_apart) = (refused.len(), apart.len());
    refused.extend(apart);
    let by_dip = merge::merge_groups(n_local_units, accepted.iter().copied(), &refused);
    let n_by_dip = by_dip.iter().copied().max().map_or(0, |m| m + 1);
    // Then smaller units that fire only inside a larger one's bursts.
    let tails = {
        let (templates, _) = combine_groups(&local_templates, &by_dip, n_by_dip, valid.merge_max_shift_frames);
        let summaries: Vec<TemplateSummary> = templates.iter().map(|t| t.summarise(electrodes)).collect();
        let mut trains: Vec<Vec<u64>> = vec![Vec::new(); n_by_dip];
        for s in &spikes {
            trains[by_dip[s.unit as usize]].push(s.sample);
        }
        burst_tail_pairs(&templates, &summaries, &trains, &valid)
    };
    let regroup = merge::merge_groups(n_by_dip, tails.iter().copied(), &[]);
    let merged: Vec<usize> = by_dip.iter().map(|&g| regroup[g]).collect();
    let n_merged = merged.iter().copied().max().map_or(0, |m| m + 1);
    let (templates, shifts) = combine_groups(&local_templates, &merged, n_merged, valid.merge_max_shift_frames);
    let summaries: Vec<TemplateSummary> = templates.iter().map(|t| t.summarise(electrodes)).collect();
    // One timing per unit: each spike moved by its cluster's alignment.
    for spike in spikes.iter_mut() {
        let local = spike.unit as usize;
        spike.sample = spike.sample.saturating_add_signed(shifts[local]).min(recording.n_frames.saturating_sub(1));
        spike.unit = merged[local] as u32;
    }
    spikes.sort_by_key(|s| (s.sample, s.event));

    // 6. Echoes: units whose spikes are another's seen again, folded in.
    let counts_of = |spikes: &[Assigned]| {
        let mut n = vec![0usize; n_merged];
        spikes.iter().for_each(|s| n[s.unit as usize] += 1);
        n
    };
    let n_before_echoes = counts_of(&spikes);
    let trains: Vec<(u64, usize)> = spikes.iter().map(|s| (s.sample, s.unit as usize)).collect();
    let troughs: Vec<f64> = summaries.iter().map(|s| s.trough_uv).collect();
    let echoes = echo::find_echoes(&trains, &n_before_echoes, &troughs, &valid.echo);
    drop(trains);
    let folded = echo::settle(&echoes, n_merged);
    let echo_spikes_dropped = fold_echoes(&mut spikes, &folded, valid.echo.jitter_frames, recording.n_frames);

    // 7. Fragments join a unit that explains them or leave the sort.
    let home = settle_fragments(&templates, &summaries, &counts_of(&spikes), &folded, &valid);
    let before_fragments = spikes.len();
    spikes.retain_mut(|s| match home[s.unit as usize] {
        Some(unit) => {
            s.unit = unit as u32;
            true
        }
        None => false,
    });
    let unassigned = before_fragments - spikes.len();

    // 8. Number units by main electrode and amplitude.
    let mut order: Vec<usize> = (0..n_merged).filter(|&u| home[u] == Some(u)).collect();
    order.sort_by(|&a, &b| {
        summaries[a]
            .channel
            .cmp(&summaries[b].channel)
            .then(summaries[a].trough_uv.total_cmp(&summaries[b].trough_uv))
            .then(a.cmp(&b))
    });
    let n_units = order.len();
    let mut final_id = vec![u32::MAX; n_merged];
    for (id, &g) in order.iter().enumerate() {
        final_id[g] = id as u32;
    }
    let mut merged_from = vec![0usize; n_merged];
    for &g in &merged {
        if let Some(unit) = home[g] {
            merged_from[unit] += 1;
        }
    }
    for spike in spikes.iter_mut() {
        spike.unit = final_id[spike.unit as usize];
    }
    // Spikes in sample order: drop a unit's spike that follows its previous
    // kept spike within the duplicate window.
    let mut last_kept: Vec<Option<u64>> = vec![None; n_units];
    let before = spikes.len();
    spikes.retain(|s| {
        let slot = &mut last_kept[s.unit as usize];
        if slot.is_some_and(|last| s.sample < last + valid.duplicate_frames.max(1)) {
            return false;
        }
        *slot = Some(s.sample);
        true
    });
    let duplicates = before - spikes.len();
    let echo_links: Vec<EchoLink> = (0..n_merged)
        .filter_map(|u| {
            let echo = folded[u]?;
            let unit = home[echo.source]?;
            Some(EchoLink {
                unit_id: final_id[unit],
                channel: summaries[u].channel,
                echo,
                n_spikes: n_before_echoes[u],
            })
        })
        .collect();

    // 9. Tables.
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);
    let fs = recording.sample_rate_hz;
    let spikes_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("sample", DataType::Int64, false),
            Field::new("time_s", DataType::Float64, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("amplitude_uv", DataType::Float32, false),
            Field::new("x_um", DataType::Float32, false),
            Field::new("y_um", DataType::Float32, false),
            Field::new("event", DataType::Int64, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values(spikes.iter().map(|s| s.unit as i32))) as ArrayRef,
            Arc::new(Int64Array::from_iter_values(spikes.iter().map(|s| s.sample as i64))),
            Arc::new(Float64Array::from_iter_values(spikes.iter().map(|s| s.sample as f64 / fs))),
            Arc::new(Int32Array::from_iter_values(spikes.iter().map(|s| s.channel as i32))),
            Arc::new(Float32Array::from_iter_values(spikes.iter().map(|s| s.amplitude_uv))),
            Arc::new(Float32Array::from_iter_values(spikes.iter().map(|s| s.x_um))),
            Arc::new(Float32Array::from_iter_values(spikes.iter().map(|s| s.y_um))),
            Arc::new(Int64Array::from_iter_values(spikes.iter().map(|s| s.event as i64))),
        ],
    )
    .expect("spike columns match their schema");
    write_table(&request.output(SPIKES_TABLE), &spikes_batch, &metadata)?;

    let mut n_spikes = vec![0i64; n_units];
    for s in &spikes {
        n_spikes[s.unit as usize] += 1;
    }
    let duration = recording.duration_s();
    let by_id: Vec<usize> = order.clone();
    let units_batch = RecordBatch::try_new(
        Arc::new(Schema::new(vec![
            Field::new("unit_id", DataType::Int32, false),
            Field::new("channel", DataType::Int32, false),
            Field::new("x_um", DataType::Float64, false),
            Field::new("y_um", DataType::Float64, false),
            Field::new("n_spikes", DataType::Int64, false),
            Field::new("firing_rate_hz", DataType::Float64, false),
            Field::new("amplitude_uv", DataType::Float64, false),
            Field::new("peak_to_peak_uv", DataType::Float64, false),
            Field::new("n_channels", DataType::Int32, false),
            Field::new("merged_from", DataType::Int32, false),
        ])),
        vec![
            Arc::new(Int32Array::from_iter_values((0..n_units).map(|id| id as i32))) as ArrayRef,
            Arc::new(Int32Array::from_iter_values(by_id.iter().map(|&g| summaries[g].channel as i32))),
            Arc::new(Float64Array::from_iter_values(by_id.iter().map(|&g| summaries[g].x_um))),
            Arc::new(Float64Array::from_iter_values(by_id.iter().map(|&g| summaries[g].y_um))),
            Arc::new(Int64Array::from_iter_values((0..n_units).map(|id| n_spikes[id]))),
            Arc::new(Float64Array::from_iter_values((0..n_units).map(|id| n_spikes[id] as f64 / duration))),
            Arc::new(Float64Array::from_iter_values(by_id.iter().map(|&g| summaries[g].trough_uv))),
            Arc::new(Float64Array::from_iter_values(by_id.iter().map(|&g| summaries[g].peak_to_peak_uv))),
            Arc::new(Int32Array::from_iter_values(by_id.iter().map(|&g| templates[g].channels.len() as i32))),
            Arc::new(Int32Array::from_iter_values(by_id.iter().map(|&g| merged_from[g] as i32))),
        ],
    )
    .expect("unit columns match their schema");
    write_table(&request.output(UNITS_TABLE), &units_batch, &metadata)?;

    // Written a batch of about a million rows at a time (the table has 11
    // million rows on a 1024-electrode grid), its four columns filled in one pass.
    let schema = Arc::new(Schema::new(vec![
        Field::new("unit_id", DataType::Int32, false),
        Field::new("channel", DataType::Int32, false),
        Field::new("lag_samples", DataType::Int32, false),
        Field::new("value_uv", DataType::Float32, false),
    ]));
    let mut writer = TableWriter::create(&request.output(TEMPLATES_TABLE), schema.clone(), &metadata)?;
    let (mut unit_ids, mut channels, mut lags, mut values) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for (id, &g) in by_id.iter().enumerate() {
        let t = &templates[g];
        for (&channel, row) in t.channels.iter().zip(&t.values) {
            for (k, &v) in row.iter().enumerate() {
                unit_ids.push(id as i32);
                channels.push(channel as i32);
                lags.push(k as i32 - valid.template_before_frames as i32);
                values.push(v as f32);
            }
        }
        if unit_ids.len() >= TEMPLATE_ROWS_PER_BATCH || id + 1 == by_id.len() {
            let columns: Vec<ArrayRef> = vec![
                Arc::new(Int32Array::from(std::mem::take(&mut unit_ids))),
                Arc::new(Int32Array::from(std::mem::take(&mut channels))),
                Arc::new(Int32Array::from(std::mem::take(&mut lags))),
                Arc::new(Float32Array::from(std::mem::take(&mut values))),
            ];
            writer
                .write(&RecordBatch::try_new(schema.clone(), columns).expect("template columns match their schema"))?;
        }
    }
    writer.finish()?;
    write_echoes(&request.output(ECHOES_TABLE), &echo_links, fs, &metadata)?;

    let summary = &mut report.summary;
    summary.insert("units".into(), n_units.into());
    summary.insert("clusters_split_in_two_modes".into(), n_split.into());
    summary.insert("units_before_merge".into(), n_local_units.into());
    summary.insert("merge_candidates".into(), candidates.len().into());
    summary.insert("merges_refused_as_two_modes".into(), n_refused_by_dip.into());
    summary.insert("pairs_apart_by_amplitude".into(), n_apart.into());
    summary.insert("burst_tails_merged".into(), tails.len().into());
    summary.insert("units_after_merge".into(), n_merged.into());
    summary.insert("echo_units_folded".into(), echo_links.len().into());
    summary.insert("echo_spikes_dropped".into(), echo_spikes_dropped.into());
    summary.insert(
        "fragments_joined".into(),
        (0..n_merged).filter(|&u| folded[u].is_none() && home[u].is_some_and(|h| h != u)).count().into(),
    );
    summary.insert("fragments_unassigned".into(), (0..n_merged).filter(|&u| home[u].is_none()).count().into());
    summary.insert("events_unassigned".into(), unassigned.into());
    summary.insert("spikes".into(), spikes.len().into());
    summary.insert("duplicates_dropped".into(), duplicates.into());
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;
    use spikeyard_contract::testing::{write_f32_recording, TestRng};

    // Templates read each unit's channels as runs (copy_runs), a block per spike, in
    // chunks; they must be the plain mean of the spikes' values, frame by
    // frame and channel by channel, with frames past the recording's ends
    // clamped to them, for spikes on both sides of chunk seams.
    #[test]
    fn templates_are_the_mean_of_each_units_spike_values() {
        let dir = tempfile::tempdir().unwrap();
        let (fs, n_channels, n_frames) = (10000.0, 9, 5000usize);
        let mut rng = TestRng::new(3);
        let samples: Vec<f32> = (0..n_frames * n_channels).map(|_| (10.0 * rng.normal()) as f32).collect();
        let recording = Recording::open(&write_f32_recording(dir.path(), "r", fs, n_channels, 20.0, &samples)).unwrap();
        let params =
            ClusterParams { template_spikes: 1 << 20, chunk_seconds: 0.1, ..Default::default() }.check(fs).unwrap();
        let spikes: Vec<Assigned> = [0, 5, 998, 999, 1000, 1003, 2500, 4990, 4999]
            .iter()
            .enumerate()
            .map(|(i, &sample)| Assigned {
                event: i as u64,
                sample,
                channel: 0,
                unit: (i % 2) as u32,
                amplitude_uv: 0.0,
                x_um: 0.0,
                y_um: 0.0,
            })
            .collect();
        let unit_channels = vec![vec![0, 1, 2, 5, 7, 8], vec![4, 3]];
        let templates = measure_templates(&recording, &spikes, 2, &unit_channels, &params, 1, Path::new("t")).unwrap();
        let before = params.template_before_frames as i64;
        let length = params.template_before_frames + params.template_after_frames + 1;
        for (unit, template) in templates.iter().enumerate() {
            let own: Vec<i64> = spikes.iter().filter(|s| s.unit as usize == unit).map(|s| s.sample as i64).collect();
            assert_eq!(template.n_averaged, own.len());
            assert_eq!(template.values.len(), unit_channels[unit].len());
            for (row, &channel) in template.values.iter().zip(&unit_channels[unit]) {
                assert_eq!(row.len(), length);
                for (k, value) in row.iter().enumerate() {
                    let at = |s: i64| (s - before + k as i64).clamp(0, n_frames as i64 - 1) as usize;
                    let sum: f64 = own.iter().map(|&s| samples[at(s) * n_channels + channel] as f64).sum();
                    let mean = sum / own.len() as f64;
                    assert!((value - mean).abs() < 1e-9, "unit {unit} channel {channel} frame {k}: {value} vs {mean}");
                }
            }
        }
    }
}
