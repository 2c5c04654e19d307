//! The report stage: one self-contained HTML page per run (`report.html`),
//! figures as inline SVG, no network, scripts or fonts.
//!
//! It reads whatever tables earlier stages wrote (a swapped-in stage may
//! not write them all; a section without its table says so) and each
//! stage's `manifest.json` and `report.json` next to them (time, memory,
//! parameters, warnings). Sections: the run; the array map (noise per
//! electrode, dead and noisy ones, unit positions); a table of every unit,
//! good units first; per unit (at most `max_units`, best first) its mean
//! waveform on its largest electrodes, ISI histogram, autocorrelogram,
//! amplitude over time and firing rate with its 95 % band; per unit with a
//! measured axon, its latency map with the fitted branches.
//!
//! Spikes are streamed; per shown unit the report keeps spike times (8
//! bytes each) and a thinned set of amplitudes.

pub mod params;
pub mod svg;

use arrow_array::{Array, BooleanArray, Float32Array, Float64Array, Int32Array, Int64Array, RecordBatch, StringArray};
use params::ReportParams;
use spikeyard_contract::table::{column, for_each_batch};
use spikeyard_contract::{ContractError, Recording, StageFailure, StageReport, StageRequest};
use std::collections::BTreeMap;
use std::fmt::Write;
use std::path::{Path, PathBuf};
use svg::{escape, grey, short, Plot, ACCENT, INK, PALE};

pub const EXECUTABLE: &str = "spikeyard-report";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
pub const REPORT_PAGE: &str = "report.html";

/// Values of a float column (64 or 32 bits) by row, None where null or
/// when the column is absent.
fn floats(batch: &RecordBatch, name: &str) -> Vec<Option<f64>> {
    let Some(column) = batch.column_by_name(name) else { return vec![None; batch.num_rows()] };
    if let Some(a) = column.as_any().downcast_ref::<Float64Array>() {
        (0..a.len()).map(|i| a.is_valid(i).then(|| a.value(i))).collect()
    } else if let Some(a) = column.as_any().downcast_ref::<Float32Array>() {
        (0..a.len()).map(|i| a.is_valid(i).then(|| a.value(i) as f64)).collect()
    } else {
        vec![None; batch.num_rows()]
    }
}

/// Visit every batch of an optional table.
fn each_batch(
    request: &StageRequest,
    name: &str,
    mut visit: impl FnMut(&Path, &RecordBatch) -> Result<(), StageFailure>,
) -> Result<bool, StageFailure> {
    let Some(path) = request.artifact(name) else { return Ok(false) };
    let path = path.to_path_buf();
    for_each_batch(&path, |batch| visit(&path, batch))?;
    Ok(true)
}

/// One row of units.parquet, as shown.
#[derive(Debug, Clone, Default)]
struct Unit {
    id: i32,
    channel: i32,
    x_um: f64,
    y_um: f64,
    n_spikes: i64,
    /// `single`, `multi` or `noise` (README); empty when the table has no labels.
    label: String,
    /// The label rules the unit failed.
    label_reason: Option<String>,
    metrics: BTreeMap<&'static str, Option<f64>>,
}

impl Unit {
    fn is_noise(&self) -> bool {
        self.label == "noise"
    }
}

/// The metrics shown in the units table, in order, with their headings.
const METRICS: [(&str, &str); 9] = [
    ("firing_rate_hz", "rate Hz"),
    ("amplitude_uv", "trough µV"),
    ("snr", "SNR"),
    ("isi_violation_ratio", "ISI viol."),
    ("contamination", "contam."),
    ("presence_ratio", "presence"),
    ("fraction_missing", "missed"),
    ("isolation_distance", "iso. dist."),
    ("l_ratio", "L-ratio"),
];

/// Per shown unit: spike times and thinned amplitudes.
#[derive(Debug, Default)]
struct Train {
    times_s: Vec<f64>,
    amplitudes: Vec<(f64, f64)>,
}

/// A stage's record, from its manifest and report.
struct StageRecord {
    name: String,
    cache_key: String,
    upstream: String,
    wall_seconds: f64,
    peak_rss_bytes: f64,
    finished: f64,
    warnings: Vec<String>,
    params: String,
}

fn stage_records(request: &StageRequest) -> Vec<StageRecord> {
    let mut folders: Vec<PathBuf> =
        request.artifacts.values().filter_map(|p| p.parent().map(Path::to_path_buf)).collect();
    folders.sort();
    folders.dedup();
    let mut records: Vec<StageRecord> = folders
        .iter()
        .filter_map(|folder| {
            let read = |file: &str| -> Option<serde_json::Value> {
                serde_json::from_str(&std::fs::read_to_string(folder.join(file)).ok()?).ok()
            };
            let manifest = read("manifest.json")?;
            let mut warnings: Vec<String> = manifest["warnings"]
                .as_array()
                .map(|w| w.iter().filter_map(|v| v.as_str().map(String::from)).collect())
                .unwrap_or_default();
            if let Some(report) = read("report.json") {
                for w in report["warnings"].as_array().into_iter().flatten().filter_map(|v| v.as_str()) {
                    if !warnings.iter().any(|x| x == w) {
                        warnings.push(w.to_string());
                    }
                }
            }
            Some(StageRecord {
                name: manifest["stage"].as_str().unwrap_or("?").to_string(),
                cache_key: manifest["cache_key"].as_str().unwrap_or_default().to_string(),
                upstream: manifest["upstream_cache_key"].as_str().unwrap_or_default().to_string(),
                wall_seconds: manifest["wall_seconds"].as_f64().unwrap_or(f64::NAN),
                peak_rss_bytes: manifest["peak_rss_bytes"].as_f64().unwrap_or(f64::NAN),
                finished: manifest["finished_unix_s"].as_f64().unwrap_or(0.0),
                warnings,
                params: serde_json::to_string_pretty(&manifest["params"]).unwrap_or_default(),
            })
        })
        .collect();
    // Pipeline order: each stage's manifest names the cache key of the one
    // before it; stages outside that chain follow by finishing time.
    records.sort_by(|a, b| a.finished.total_cmp(&b.finished).then(a.name.cmp(&b.name)));
    let mut ordered: Vec<StageRecord> = Vec::with_capacity(records.len());
    while let Some(next) = records.iter().position(|r| {
        ordered.last().map_or(!records.iter().any(|o| o.cache_key == r.upstream), |last| r.upstream == last.cache_key)
    }) {
        ordered.push(records.remove(next));
    }
    ordered.extend(records);
    ordered
}

/// Run the stage on a request.
///
/// # Errors
/// Bad input ([`StageFailure::bad_input`]) or failures while working.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut report = StageReport::default();
    let params: ReportParams = request.params().map_err(StageFailure::bad_input)?;
    params.check().map_err(|message| request.params_refused(message))?;
    let recording = Recording::open(&request.recording).map_err(StageFailure::bad_input)?;
    let mut page = String::new();
    page.push_str(&head(&recording, request));
    page.push_str(&run_section(&recording, &stage_records(request)));

    // Units, best first: single, then multi, then noise, each by SNR.
    let mut units: Vec<Unit> = Vec::new();
    let have_units = each_batch(request, "units.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let channels: &Int32Array = column(path, batch, "channel")?;
        let (x, y) = (floats(batch, "x_um"), floats(batch, "y_um"));
        let spikes = batch.column_by_name("n_spikes").and_then(|c| c.as_any().downcast_ref::<Int64Array>());
        let labels = batch.column_by_name("label").and_then(|c| c.as_any().downcast_ref::<StringArray>());
        let reasons = batch.column_by_name("label_reason").and_then(|c| c.as_any().downcast_ref::<StringArray>());
        let metric_values: Vec<Vec<Option<f64>>> = METRICS.iter().map(|(name, _)| floats(batch, name)).collect();
        for i in 0..batch.num_rows() {
            units.push(Unit {
                id: ids.value(i),
                channel: channels.value(i),
                x_um: x[i].unwrap_or(f64::NAN),
                y_um: y[i].unwrap_or(f64::NAN),
                n_spikes: spikes.map_or(0, |s| s.value(i)),
                label: labels.map_or(String::new(), |l| l.value(i).to_string()),
                label_reason: reasons.filter(|r| r.is_valid(i)).map(|r| r.value(i).to_string()),
                metrics: METRICS.iter().zip(&metric_values).map(|((name, _), v)| (*name, v[i])).collect(),
            });
        }
        Ok(())
    })?;
    let snr = |u: &Unit| u.metrics["snr"].unwrap_or(f64::NEG_INFINITY);
    let rank = |u: &Unit| ["single", "multi", "", "noise"].iter().position(|l| *l == u.label).unwrap_or(2);
    units.sort_by(|a, b| rank(a).cmp(&rank(b)).then(snr(b).total_cmp(&snr(a))).then(a.id.cmp(&b.id)));
    let shown: Vec<&Unit> = units.iter().filter(|u| !u.is_noise()).take(params.max_units).collect();

    page.push_str(&array_section(request, &recording, &units)?);
    page.push_str(&units_table(&units, have_units));
    page.push_str(&unit_sections(request, &recording, &params, &shown)?);
    let axons = propagation_section(request, &recording)?;
    page.push_str(&axons.0);
    page.push_str(
        "<footer><p>Research software: not a medical device, not for diagnosis or patient care. \
         Check these results in the lab before drawing any conclusion.</p></footer></main></body></html>\n",
    );
    let target = request.output(REPORT_PAGE);
    let temporary = request.output(".report.html.partial");
    std::fs::write(&temporary, page.as_bytes())
        .and_then(|_| std::fs::rename(&temporary, &target))
        .map_err(|e| StageFailure::failed(ContractError::Io { path: target.clone(), source: e }))?;
    report.summary.insert("units_shown".into(), shown.len().into());
    report.summary.insert("latency_maps".into(), axons.1.into());
    if !have_units {
        report.warn("units.parquet is not among the inputs: the report has no unit sections");
    }
    Ok(report)
}

const STYLE: &str = "body{margin:0;background:#fbfaf7;color:#1d232a;font:14px/1.45 sans-serif}\
main{max-width:1100px;margin:0 auto;padding:18px 22px}\
h1{font-size:22px;margin:0 0 4px}h2{font-size:17px;margin:26px 0 8px;padding-bottom:3px;border-bottom:2px solid #1d232a}\
h3{font-size:14px;margin:0 0 6px}\
table{border-collapse:collapse;font-size:12px}td,th{padding:2px 7px;text-align:right;border-bottom:1px solid #d9dcdf}\
th{border-bottom:1.5px solid #1d232a}td.l,th.l{text-align:left}\
tr.unsure td{color:#6b7178}\
.cards{display:flex;flex-wrap:wrap;gap:12px}\
.card{border:1px solid #b9bec3;padding:8px 10px;background:#fff;break-inside:avoid;page-break-inside:avoid}\
.figs{display:flex;flex-wrap:wrap;gap:6px}.note{color:#4a5058;font-size:12px}\
pre{font-size:11px;background:#f0efeb;padding:6px;overflow:auto}\
svg.figure{max-width:100%;height:auto}\
@media print{body{background:#fff}.card{border-color:#000}}";

fn head(recording: &Recording, request: &StageRequest) -> String {
    let name = recording.description_path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    format!(
        "<!DOCTYPE html>\n<html xmlns=\"http://www.w3.org/1999/xhtml\" lang=\"en\"><head><meta charset=\"utf-8\"/>\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/>\
         <title>spikeyard report: {}</title><style>{STYLE}</style></head><body><main>\
         <h1>spikeyard run report</h1><p class=\"note\">{} · recording hash {} · {} {}</p>",
        escape(&name),
        escape(&recording.description_path.display().to_string()),
        escape(request.recording_hash.get(..16).unwrap_or(&request.recording_hash)),
        EXECUTABLE,
        VERSION
    )
}

fn run_section(recording: &Recording, stages: &[StageRecord]) -> String {
    let mut s = String::from("<section id=\"run\"><h2>The run</h2>");
    let _ = write!(
        s,
        "<p>{} electrodes, {:.0} Hz, {:.1} s ({} frames), stored as {}.</p>",
        recording.n_channels,
        recording.sample_rate_hz,
        recording.duration_s(),
        recording.n_frames,
        recording.dtype.name()
    );
    s.push_str(
        "<table><tr><th class=\"l\">stage</th><th>wall s</th><th>peak MiB</th><th class=\"l\">warnings</th></tr>",
    );
    for stage in stages {
        let _ = write!(
            s,
            "<tr><td class=\"l\">{}</td><td>{:.1}</td><td>{:.0}</td><td class=\"l\">{}</td></tr>",
            escape(&stage.name),
            stage.wall_seconds,
            stage.peak_rss_bytes / (1u64 << 20) as f64,
            if stage.warnings.is_empty() { "none".to_string() } else { escape(&stage.warnings.join("; ")) }
        );
    }
    s.push_str("</table><details><summary>parameters of each stage</summary>");
    for stage in stages {
        let _ = write!(s, "<h3>{}</h3><pre>{}</pre>", escape(&stage.name), escape(&stage.params));
    }
    s.push_str("</details></section>");
    s
}

/// Scale of the array map: electrodes' extent mapped into at most 640×480 px.
struct MapFrame {
    x0: f64,
    y0: f64,
    scale: f64,
    pitch: f64,
    width: f64,
    height: f64,
}

impl MapFrame {
    fn new(recording: &Recording) -> MapFrame {
        let xs = recording.electrodes.iter().map(|e| e.x_um);
        let ys = recording.electrodes.iter().map(|e| e.y_um);
        let (x0, x1) = xs.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
        let (y0, y1) = ys.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
        let points: Vec<(f64, f64)> = recording.electrodes.iter().map(|e| (e.x_um, e.y_um)).collect();
        let pitch = spikeyard_contract::recording::electrode_pitch(&points).max(1e-3);
        let (span_x, span_y) = ((x1 - x0).max(0.0) + pitch, (y1 - y0).max(0.0) + pitch);
        let scale = (640.0 / span_x).min(480.0 / span_y);
        MapFrame {
            x0: x0 - 0.5 * pitch,
            y0: y0 - 0.5 * pitch,
            scale,
            pitch,
            width: span_x * scale,
            height: span_y * scale,
        }
    }
    fn at(&self, x: f64, y: f64) -> (f64, f64) {
        (10.0 + (x - self.x0) * self.scale, 10.0 + (y - self.y0) * self.scale)
    }
    fn size(&self) -> f64 {
        (0.8 * self.pitch * self.scale).max(1.0)
    }
    fn svg(&self, id: &str, title: &str, body: &str, legend: &str) -> String {
        let height = self.height + 20.0 + 34.0;
        let full = format!("{body}<g transform=\"translate(10,{:.1})\">{legend}</g>", self.height + 26.0);
        svg::svg_element(id, title, (self.width + 20.0).max(360.0), height, &full)
    }
}

fn array_section(request: &StageRequest, recording: &Recording, units: &[Unit]) -> Result<String, StageFailure> {
    let n = recording.n_channels;
    let mut noise = vec![f64::NAN; n];
    let mut status = vec![String::from("ok"); n];
    let have_qc = each_batch(request, "channel_qc.parquet", |path, batch| {
        let channels: &Int32Array = column(path, batch, "channel")?;
        let mad = floats(batch, "noise_mad_uv");
        let states: &StringArray = column(path, batch, "status")?;
        for i in 0..batch.num_rows() {
            if let Some(c) = usize::try_from(channels.value(i)).ok().filter(|&c| c < n) {
                noise[c] = mad[i].unwrap_or(f64::NAN);
                status[c] = states.value(i).to_string();
            }
        }
        Ok(())
    })?;
    let frame = MapFrame::new(recording);
    // Shade by noise relative to the array's median, from half of it (light)
    // to three times it (dark), so that ordinary spread stays quiet and
    // outliers stand out.
    let mut finite: Vec<f64> = noise.iter().copied().filter(|v| v.is_finite()).collect();
    finite.sort_by(f64::total_cmp);
    let median = finite.get(finite.len() / 2).copied().unwrap_or(f64::NAN);
    let (low, high) = (0.5 * median, 3.0 * median);
    let size = frame.size();
    let mut body = String::new();
    for (e, (level, state)) in recording.electrodes.iter().zip(noise.iter().zip(&status)) {
        let (x, y) = frame.at(e.x_um, e.y_um);
        let shade = if level.is_finite() && high > low { grey((level - low) / (high - low)) } else { grey(0.0) };
        let (stroke, width) = if state == "noisy" { (INK, 2.0) } else { ("#8b9097", 0.4) };
        let _ = write!(
            body,
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{size:.1}\" height=\"{size:.1}\" fill=\"{shade}\" stroke=\"{stroke}\" stroke-width=\"{width}\"/>",
            x - 0.5 * size,
            y - 0.5 * size
        );
        if state == "dead" {
            let h = 0.5 * size;
            let _ = write!(
                body,
                "<path d=\"M{:.1},{:.1}l{size:.1},{size:.1}m0,-{size:.1}l-{size:.1},{size:.1}\" stroke=\"{INK}\" stroke-width=\"1.2\"/>",
                x - h,
                y - h
            );
        }
    }
    let good: Vec<&Unit> = units.iter().filter(|u| !u.is_noise() && u.x_um.is_finite() && u.y_um.is_finite()).collect();
    let label = good.len() <= 60;
    for u in &good {
        let (x, y) = frame.at(u.x_um, u.y_um);
        let _ = write!(
            body,
            "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"{:.1}\" fill=\"none\" stroke=\"{ACCENT}\" stroke-width=\"1.6\"/>",
            (0.35 * size).clamp(3.0, 9.0)
        );
        if label {
            let _ = write!(body, "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"9\">{}</text>", x + 5.0, y - 5.0, u.id);
        }
    }
    let mut legend = String::new();
    for (i, step) in (0..=4).enumerate() {
        let _ = write!(
            legend,
            "<rect x=\"{}\" y=\"0\" width=\"14\" height=\"10\" fill=\"{}\" stroke=\"#8b9097\" stroke-width=\"0.4\"/>",
            i * 14,
            grey(step as f64 / 4.0)
        );
    }
    let _ = write!(
        legend,
        "<text x=\"76\" y=\"9\">noise (MAD σ) {}–{} µV: ½ to 3 × the array median</text><rect x=\"0\" y=\"16\" width=\"10\" height=\"10\" fill=\"none\" stroke=\"{INK}\" stroke-width=\"2\"/><text x=\"14\" y=\"25\">noisy</text>\
         <path d=\"M50,16l10,10m0,-10l-10,10\" stroke=\"{INK}\" stroke-width=\"1.2\"/><text x=\"64\" y=\"25\">dead</text>\
         <circle cx=\"105\" cy=\"21\" r=\"5\" fill=\"none\" stroke=\"{ACCENT}\" stroke-width=\"1.6\"/><text x=\"113\" y=\"25\">unit{}</text>",
        short(low),
        short(high),
        if label { " (id)" } else { "s (too many to label)" }
    );
    let mut s = String::from("<section id=\"array\"><h2>The array</h2>");
    if !have_qc {
        s.push_str("<p class=\"note\">channel_qc.parquet is not among the inputs: noise levels are not shown.</p>");
    }
    let counts = |name: &str| status.iter().filter(|s| *s == name).count();
    let _ = write!(
        s,
        "<p>{} electrodes: {} dead, {} noisy; {} units not labelled noise.</p>",
        n,
        counts("dead"),
        counts("noisy"),
        good.len()
    );
    s.push_str(&frame.svg(
        "array-map",
        "Array map: noise level per electrode (darker is noisier), dead and noisy electrodes, unit positions",
        &body,
        &legend,
    ));
    s.push_str("</section>");
    Ok(s)
}

fn units_table(units: &[Unit], have_units: bool) -> String {
    let mut s = String::from("<section id=\"units\"><h2>Units</h2>");
    if !have_units {
        s.push_str("<p class=\"note\">units.parquet is not among the inputs.</p></section>");
        return s;
    }
    let (noise, good): (Vec<&Unit>, Vec<&Unit>) = units.iter().partition(|u| u.is_noise());
    let count = |label: &str| good.iter().filter(|u| u.label == label).count();
    let _ = write!(
        s,
        "<p>{} units, best first: {} single (well isolated), {} multi (not well isolated: see why); {} more \
         labelled noise (not a neuron) are listed folded below. Definitions of each measure and label: README, \
         units.parquet.</p>",
        good.len(),
        count("single"),
        count("multi"),
        noise.len()
    );
    s.push_str(&metrics_table(&good));
    if !noise.is_empty() {
        let _ = write!(s, "<details><summary>{} units labelled noise</summary>", noise.len());
        s.push_str(&metrics_table(&noise));
        s.push_str("</details>");
    }
    s.push_str("</section>");
    s
}

fn metrics_table(units: &[&Unit]) -> String {
    let mut s = String::from("<table><tr><th>unit</th><th>label</th><th>electrode</th><th>spikes</th>");
    for (_, heading) in METRICS {
        let _ = write!(s, "<th>{}</th>", escape(heading));
    }
    s.push_str("<th>label rules failed</th></tr>");
    for u in units {
        let _ = write!(
            s,
            "<tr{}><td>{}</td><td>{}</td><td>{}</td><td>{}</td>",
            if u.label == "single" { "" } else { " class=\"unsure\"" },
            u.id,
            escape(&u.label),
            u.channel,
            u.n_spikes
        );
        for (name, _) in METRICS {
            let value = u.metrics[name].filter(|v| v.is_finite());
            let _ = write!(s, "<td>{}</td>", value.map_or("–".to_string(), |v| format!("{v:.3}")));
        }
        let _ = write!(s, "<td>{}</td></tr>", escape(u.label_reason.as_deref().unwrap_or("")));
    }
    s.push_str("</table>");
    s
}

fn unit_sections(
    request: &StageRequest,
    recording: &Recording,
    params: &ReportParams,
    shown: &[&Unit],
) -> Result<String, StageFailure> {
    let index: BTreeMap<i32, usize> = shown.iter().enumerate().map(|(i, u)| (u.id, i)).collect();
    let mut trains: Vec<Train> = (0..shown.len()).map(|_| Train::default()).collect();
    let stride: Vec<usize> =
        shown.iter().map(|u| (u.n_spikes.max(0) as usize).div_ceil(params.max_amplitude_points).max(1)).collect();
    each_batch(request, "spikes.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let times = floats(batch, "time_s");
        let amplitudes = floats(batch, "amplitude_uv");
        for i in 0..batch.num_rows() {
            if let (Some(&k), Some(t)) = (index.get(&ids.value(i)), times[i]) {
                let train = &mut trains[k];
                if train.times_s.len().is_multiple_of(stride[k]) {
                    if let Some(a) = amplitudes[i] {
                        train.amplitudes.push((t, a));
                    }
                }
                train.times_s.push(t);
            }
        }
        Ok(())
    })?;
    // Mean waveforms: (channel → (lag, µV)) for shown units.
    let mut templates: Vec<BTreeMap<i32, Vec<(i64, f64)>>> = vec![BTreeMap::new(); shown.len()];
    each_batch(request, "templates.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let channels: &Int32Array = column(path, batch, "channel")?;
        let lags = batch.column_by_name("lag_samples").and_then(|c| c.as_any().downcast_ref::<Int32Array>());
        let values = floats(batch, "value_uv");
        for i in 0..batch.num_rows() {
            if let (Some(&k), Some(lags), Some(v)) = (index.get(&ids.value(i)), lags, values[i]) {
                templates[k].entry(channels.value(i)).or_default().push((lags.value(i) as i64, v));
            }
        }
        Ok(())
    })?;
    let mut rates: Vec<Vec<[f64; 4]>> = vec![Vec::new(); shown.len()];
    each_batch(request, "firing_rates.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let (start, width) = (floats(batch, "bin_start_s"), floats(batch, "bin_s"));
        let (rate, low, high) = (floats(batch, "rate_hz"), floats(batch, "ci_low_hz"), floats(batch, "ci_high_hz"));
        for i in 0..batch.num_rows() {
            if let Some(&k) = index.get(&ids.value(i)) {
                let mid = start[i].unwrap_or(f64::NAN) + 0.5 * width[i].unwrap_or(0.0);
                rates[k].push([
                    mid,
                    rate[i].unwrap_or(f64::NAN),
                    low[i].unwrap_or(f64::NAN),
                    high[i].unwrap_or(f64::NAN),
                ]);
            }
        }
        Ok(())
    })?;
    let mut s = String::from("<section id=\"unit-figures\"><h2>Units one by one</h2>");
    let _ = write!(
        s,
        "<p class=\"note\">The {} best units not labelled noise (single first, then by SNR). Waveforms: mean on the unit's largest electrodes, \
         offset vertically; ISI histogram with the refractory period dashed; autocorrelogram; amplitude of each spike over \
         time (thinned); firing rate per bin with its exact Poisson 95 % band (grey).</p><div class=\"cards\">",
        shown.len()
    );
    let fs = recording.sample_rate_hz;
    for (k, unit) in shown.iter().enumerate() {
        let id = unit.id;
        let _ = write!(
            s,
            "<div class=\"card\" id=\"unit-{id}\"><h3>unit {id} · electrode {} · {} spikes · SNR {}</h3><div class=\"figs\">",
            unit.channel,
            unit.n_spikes,
            unit.metrics["snr"].map_or("–".into(), |v| format!("{v:.1}"))
        );
        s.push_str(&waveform_figure(id, &templates[k], params.waveform_channels, fs));
        let mut times = trains[k].times_s.clone();
        times.sort_by(f64::total_cmp);
        s.push_str(&isi_figure(id, &times, params));
        s.push_str(&correlogram_figure(id, &times, params));
        s.push_str(&amplitude_figure(id, &trains[k].amplitudes, recording.duration_s()));
        s.push_str(&rate_figure(id, &rates[k]));
        s.push_str("</div></div>");
    }
    s.push_str("</div></section>");
    Ok(s)
}

fn waveform_figure(id: i32, template: &BTreeMap<i32, Vec<(i64, f64)>>, count: usize, fs: f64) -> String {
    let span = |v: &[(i64, f64)]| {
        let (lo, hi) = v.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), p| (a.min(p.1), b.max(p.1)));
        hi - lo
    };
    let mut channels: Vec<(&i32, &Vec<(i64, f64)>)> = template.iter().collect();
    channels.sort_by(|a, b| span(b.1).total_cmp(&span(a.1)).then(a.0.cmp(b.0)));
    channels.truncate(count);
    let largest = channels.first().map_or(1.0, |c| span(c.1)).max(1e-9);
    let lags = channels.iter().flat_map(|c| c.1.iter().map(|p| p.0 as f64 / fs * 1e3));
    let (t0, t1) = lags.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
    let n = channels.len().max(1) as f64;
    let mut plot = Plot::new(250.0, 170.0, (t0, t1), (-(n - 0.4) * largest, 0.6 * largest));
    plot.axes("ms", "µV");
    for (row, (channel, values)) in channels.iter().enumerate() {
        let mut points: Vec<(f64, f64)> =
            values.iter().map(|p| (p.0 as f64 / fs * 1e3, p.1 - row as f64 * largest)).collect();
        points.sort_by(|a, b| a.0.total_cmp(&b.0));
        plot.line(&points, INK, if row == 0 { 1.6 } else { 1.0 }, None);
        let label = format!(
            "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"9\">e{channel}</text>",
            plot.px(t1) - 24.0,
            plot.py(-(row as f64) * largest + 0.25 * largest)
        );
        plot.raw(&label);
    }
    plot.finish(&format!("unit-{id}-waveforms"), &format!("Unit {id}: mean waveform on its largest electrodes"))
}

fn histogram(values: impl Iterator<Item = f64>, start: f64, end: f64, bin: f64) -> Vec<f64> {
    let n = ((end - start) / bin).round().max(1.0) as usize;
    let mut counts = vec![0.0; n];
    for v in values {
        let k = ((v - start) / bin).floor();
        if k >= 0.0 && (k as usize) < n {
            counts[k as usize] += 1.0;
        }
    }
    counts
}

fn isi_figure(id: i32, times: &[f64], params: &ReportParams) -> String {
    let intervals = times.windows(2).map(|w| (w[1] - w[0]) * 1e3);
    let counts = histogram(intervals, 0.0, params.isi_max_ms, params.bin_ms);
    let top = counts.iter().copied().fold(1.0, f64::max);
    let mut plot = Plot::new(220.0, 170.0, (0.0, params.isi_max_ms), (0.0, top * 1.1));
    plot.axes("interval ms", "count").bars(0.0, params.bin_ms, &counts, PALE).marker(params.refractory_ms, "refr.");
    plot.finish(&format!("unit-{id}-isi"), &format!("Unit {id}: inter-spike interval histogram"))
}

fn correlogram_figure(id: i32, times: &[f64], params: &ReportParams) -> String {
    let window = params.correlogram_ms * 1e-3;
    let mut lags = Vec::new();
    for (i, &t) in times.iter().enumerate() {
        for &u in times[i + 1..].iter().take_while(|&&u| u - t <= window) {
            lags.push((u - t) * 1e3);
            lags.push((t - u) * 1e3);
        }
    }
    let w = params.correlogram_ms;
    let counts = histogram(lags.into_iter(), -w, w, params.bin_ms);
    let top = counts.iter().copied().fold(1.0, f64::max);
    let mut plot = Plot::new(220.0, 170.0, (-w, w), (0.0, top * 1.1));
    plot.axes("lag ms", "count").bars(-w, params.bin_ms, &counts, PALE);
    plot.finish(&format!("unit-{id}-correlogram"), &format!("Unit {id}: autocorrelogram"))
}

fn amplitude_figure(id: i32, points: &[(f64, f64)], duration_s: f64) -> String {
    let (lo, hi) = points.iter().fold((0.0f64, f64::NEG_INFINITY), |(a, b), p| (a.min(p.1), b.max(p.1)));
    let mut plot = Plot::new(250.0, 170.0, (0.0, duration_s), (lo * 1.1, hi.max(0.0)));
    plot.axes("time s", "trough µV").dots(points, 1.2, INK);
    plot.finish(&format!("unit-{id}-amplitude"), &format!("Unit {id}: spike amplitude over time"))
}

fn rate_figure(id: i32, rows: &[[f64; 4]]) -> String {
    let x: Vec<f64> = rows.iter().map(|r| r[0]).collect();
    let top = rows.iter().map(|r| r[3]).filter(|v| v.is_finite()).fold(1.0, f64::max);
    let (x0, x1) = (x.first().copied().unwrap_or(0.0), x.last().copied().unwrap_or(1.0));
    let mut plot = Plot::new(250.0, 170.0, (x0, x1), (0.0, top * 1.05));
    let low: Vec<f64> = rows.iter().map(|r| r[2]).collect();
    let high: Vec<f64> = rows.iter().map(|r| r[3]).collect();
    let rate: Vec<(f64, f64)> = rows.iter().map(|r| (r[0], r[1])).collect();
    plot.axes("time s", "rate Hz").band(&x, &low, &high, PALE).line(&rate, INK, 1.2, None);
    plot.finish(&format!("unit-{id}-rate"), &format!("Unit {id}: firing rate with its 95 % interval"))
}

/// Latency maps of the units with a measured axon; returns (HTML, count).
fn propagation_section(request: &StageRequest, recording: &Recording) -> Result<(String, usize), StageFailure> {
    let mut rows: Vec<(i32, i32, f64, f64, f64, bool)> = Vec::new();
    let have = each_batch(request, "propagation.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let branches: &Int32Array = column(path, batch, "branch")?;
        let (v, low, high) = (floats(batch, "velocity_m_per_s"), floats(batch, "ci_low"), floats(batch, "ci_high"));
        let flag =
            batch.column_by_name("outside_typical_range").and_then(|c| c.as_any().downcast_ref::<BooleanArray>());
        for i in 0..batch.num_rows() {
            rows.push((
                ids.value(i),
                branches.value(i),
                v[i].unwrap_or(f64::NAN),
                low[i].unwrap_or(f64::NAN),
                high[i].unwrap_or(f64::NAN),
                flag.is_some_and(|f| f.value(i)),
            ));
        }
        Ok(())
    })?;
    let mut s = String::from("<section id=\"propagation\"><h2>Axons</h2>");
    if !have {
        s.push_str("<p class=\"note\">propagation.parquet is not among the inputs.</p></section>");
        return Ok((s, 0));
    }
    let units: Vec<i32> = {
        let mut u: Vec<i32> = rows.iter().map(|r| r.0).collect();
        u.dedup();
        u
    };
    if units.is_empty() {
        s.push_str("<p>No unit has a measurable axon in this run.</p></section>");
        return Ok((s, 0));
    }
    // Footprints and branch paths of those units only.
    let n = recording.n_channels;
    let mut latency: BTreeMap<i32, Vec<Option<f64>>> = units.iter().map(|&u| (u, vec![None; n])).collect();
    each_batch(request, "footprints.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let channels: &Int32Array = column(path, batch, "channel")?;
        let lat = floats(batch, "latency_ms");
        let significant: &BooleanArray = column(path, batch, "significant")?;
        for i in 0..batch.num_rows() {
            if let (Some(map), Ok(c)) = (latency.get_mut(&ids.value(i)), usize::try_from(channels.value(i))) {
                if c < n && significant.value(i) {
                    map[c] = lat[i];
                }
            }
        }
        Ok(())
    })?;
    let mut paths: BTreeMap<(i32, i32), Vec<(f64, f64)>> = BTreeMap::new();
    each_batch(request, "propagation_paths.parquet", |path, batch| {
        let ids: &Int32Array = column(path, batch, "unit_id")?;
        let branches: &Int32Array = column(path, batch, "branch")?;
        let (x, y) = (floats(batch, "x_um"), floats(batch, "y_um"));
        for i in 0..batch.num_rows() {
            if let (Some(x), Some(y)) = (x[i], y[i]) {
                paths.entry((ids.value(i), branches.value(i))).or_default().push((x, y));
            }
        }
        Ok(())
    })?;
    let _ = write!(
        s,
        "<p class=\"note\">Latency of each electrode's averaged trough after the spike (light: early, dark: late; \
         small dots: no significant signal). Dashed lines: the electrodes each branch was timed on, numbered by branch. \
         Velocities outside the typical range are marked ⚠.</p><div class=\"cards\">"
    );
    let frame = MapFrame::new(recording);
    for unit in &units {
        let map = &latency[unit];
        let values = map.iter().flatten().copied();
        let (lo, hi) = values.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
        let size = frame.size();
        let mut body = String::new();
        for (e, value) in recording.electrodes.iter().zip(map) {
            let (x, y) = frame.at(e.x_um, e.y_um);
            match value {
                Some(v) => {
                    let shade = if hi > lo { grey((v - lo) / (hi - lo)) } else { grey(0.5) };
                    let _ = write!(
                        body,
                        "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{size:.1}\" height=\"{size:.1}\" fill=\"{shade}\"/>",
                        x - 0.5 * size,
                        y - 0.5 * size
                    );
                }
                None => {
                    let _ = write!(body, "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"0.8\" fill=\"#8b9097\"/>");
                }
            }
        }
        for ((_, branch), points) in paths.range((*unit, i32::MIN)..=(*unit, i32::MAX)) {
            let d: String = points
                .iter()
                .enumerate()
                .map(|(i, p)| {
                    let (x, y) = frame.at(p.0, p.1);
                    format!("{}{x:.1},{y:.1}", if i == 0 { 'M' } else { 'L' })
                })
                .collect();
            let _ = write!(
                body,
                "<path d=\"{d}\" fill=\"none\" stroke=\"{ACCENT}\" stroke-width=\"2\" stroke-dasharray=\"5 3\"/>"
            );
            if let Some(last) = points.last() {
                let (x, y) = frame.at(last.0, last.1);
                let _ = write!(
                    body,
                    "<text x=\"{:.1}\" y=\"{:.1}\" font-weight=\"bold\">{branch}</text>",
                    x + 4.0,
                    y - 4.0
                );
            }
        }
        let mut legend = String::new();
        for step in 0..=4 {
            let _ = write!(
                legend,
                "<rect x=\"{}\" y=\"0\" width=\"14\" height=\"10\" fill=\"{}\"/>",
                step * 14,
                grey(step as f64 / 4.0)
            );
        }
        let _ = write!(legend, "<text x=\"76\" y=\"9\">latency {} to {} ms</text>", short(lo), short(hi));
        let _ = write!(s, "<div class=\"card\" id=\"axon-{unit}\"><h3>unit {unit}</h3>");
        s.push_str(&frame.svg(
            &format!("unit-{unit}-latency-map"),
            &format!("Unit {unit}: latency map with the fitted branches"),
            &body,
            &legend,
        ));
        s.push_str("<table><tr><th>branch</th><th>m/s</th><th>95 % interval</th></tr>");
        for r in rows.iter().filter(|r| r.0 == *unit) {
            let _ = write!(
                s,
                "<tr><td>{}</td><td>{:.3}{}</td><td>{:.3} – {:.3}</td></tr>",
                r.1,
                r.2,
                if r.5 { " ⚠" } else { "" },
                r.3,
                r.4
            );
        }
        s.push_str("</table></div>");
    }
    s.push_str("</div></section>");
    Ok((s, units.len()))
}
