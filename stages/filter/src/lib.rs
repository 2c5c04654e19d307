//! The filter stage: band-pass, optional notch, common median reference,
//! and per-channel QC.
//!
//! Data flow of [`run`]:
//! 1. open the raw recording named in the request and check the parameters
//!    ([`params`]);
//! 2. design the filter once ([`design`], [`kernel::FilterEngine`]);
//! 3. QC pass ([`qc`]): windows spread over the recording are filtered and
//!    measured (MAD noise, RMS, Welch spectrum of the raw signal); channels
//!    are classified ok / dead / noisy; writes `channel_qc.parquet` and
//!    `channel_psd.parquet`;
//! 4. main pass: chunk by chunk (with margins), filter every channel in
//!    parallel, subtract the median of the usable channels, append to
//!    `filtered.bin` (time-major; i16, packed i16 or f32 µV as
//!    `store_filtered_as` says), described by `filtered.toml` in the
//!    contract's recording format, so any later stage reads it with the
//!    same reader as raw data.

pub mod design;
pub mod kernel;
pub mod params;
pub mod qc;

use arrow_array::{ArrayRef, BooleanArray, Float64Array, Int32Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema};
use kernel::{FilterEngine, Lanes, ReferenceScratch, Scratch, BLOCK_LANES};
use params::{FilterParams, FilteredStorage, Reference, ValidFilterParams};
use qc::{ChannelStatus, Welch};
use rayon::prelude::*;
use spikeyard_contract::recording::{
    frames_to_channel_major, to_channel_major, RecordingWriter, SampleEncoder, Storage,
};
use spikeyard_contract::table::write_table;
use spikeyard_contract::{
    noise, Chunk, ContractError, ProgressReporter, Recording, RecordingError, StageFailure, StageReport, StageRequest,
};
use std::sync::Arc;

pub const EXECUTABLE: &str = "spikeyard-filter";
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// File names this stage writes.
pub const FILTERED_RECORDING: &str = "filtered.toml";
pub const CHANNEL_QC_TABLE: &str = "channel_qc.parquet";
pub const CHANNEL_PSD_TABLE: &str = "channel_psd.parquet";

/// Frequency resolution of the QC power spectrum, Hz.
const PSD_RESOLUTION_HZ: f64 = 10.0;

/// One chunk filtered, before any reference, in the layout the filter
/// works in; the buffers are reused from chunk to chunk.
#[derive(Default)]
pub struct FilteredChunk {
    n_channels: usize,
    core_frames: usize,
    /// Block path: per block of [`kernel::BLOCK_LANES`] channels, the
    /// padded range filtered in place; the core starts at `core_row`.
    blocks: Vec<Vec<Lanes>>,
    core_row: usize,
    /// Channel path (FIR designs): the core, channel-major.
    columns: Vec<f32>,
    /// Frames read as µV, for recordings not read in place.
    scratch: Vec<f32>,
}

impl FilteredChunk {
    pub fn core_frames(&self) -> usize {
        self.core_frames
    }

    /// Frames `first..first + count` of the core, every channel, into `tile`,
    /// time-major (`count × n_channels` values). Block by block, so each
    /// block's rows are read as one sequential run rather than twelve or
    /// more interleaved streams a frame at a time (which the prefetchers
    /// lose track of).
    #[inline]
    pub fn rows_into(&self, first: usize, count: usize, tile: &mut [f32]) {
        let n = self.n_channels;
        if self.blocks.is_empty() {
            for (channel, column) in self.columns.chunks_exact(self.core_frames.max(1)).enumerate() {
                for (k, v) in column[first..first + count].iter().enumerate() {
                    tile[k * n + channel] = *v;
                }
            }
            return;
        }
        for (b, rows) in self.blocks.iter().enumerate() {
            let (channel, lanes) = (b * BLOCK_LANES, BLOCK_LANES.min(n - b * BLOCK_LANES));
            let rows = &rows[self.core_row + first..self.core_row + first + count];
            for (k, values) in rows.iter().enumerate() {
                tile[k * n + channel..k * n + channel + lanes].copy_from_slice(&values[..lanes]);
            }
        }
    }

    /// The core of every channel, channel-major (`out[channel * core_frames + frame]`).
    pub fn to_channel_major(&self, out: &mut Vec<f32>) {
        if self.blocks.is_empty() {
            out.clone_from(&self.columns);
            return;
        }
        out.resize(self.n_channels * self.core_frames, 0.0);
        out.par_chunks_mut(BLOCK_LANES * self.core_frames.max(1)).zip(&self.blocks).for_each(|(columns, rows)| {
            for (frame, row) in rows[self.core_row..self.core_row + self.core_frames].iter().enumerate() {
                for (lane, v) in row.iter().take(columns.len() / self.core_frames).enumerate() {
                    columns[lane * self.core_frames + frame] = *v;
                }
            }
        });
    }
}

/// How the filter's output frames become the bytes of the filtered copy:
/// each frame of the core, the reference subtracted, encoded.
struct FrameEncoding<'a> {
    filtered: &'a FilteredChunk,
    reference: Option<&'a kernel::MedianReference>,
    encoder: &'a SampleEncoder,
}

impl FrameEncoding<'_> {
    const TILE_FRAMES: usize = 128;

    /// Frames `first..` of the core into `out`, as many as it holds; returns
    /// how many samples were clipped. The values a packed copy holds as
    /// exceptions go to `outside`, placed among the core's values
    /// ([`SampleEncoder::encode`]). Built for AVX-512 or AVX2 when the CPU
    /// has them (`spikeyard_contract::wide_build!`), with the same bytes out.
    fn encode(&self, first: usize, out: &mut [u8], work: &mut EncodingWork) -> u64 {
        spikeyard_contract::wide_build!(
            FrameEncoding<'_>,
            self.encode_portable(first: usize, out: &mut [u8], work: &mut EncodingWork) -> u64
        )
    }

    #[inline(always)]
    fn encode_portable(&self, first: usize, out: &mut [u8], work: &mut EncodingWork) -> u64 {
        let EncodingWork { tile, reference: scratch, outside } = work;
        let n = self.filtered.n_channels;
        let frame_bytes = n * self.encoder.bytes_per_sample();
        let mut clipped = 0;
        // Tiles small enough to stay in a core's L2 cache.
        for (t, out) in out.chunks_mut(Self::TILE_FRAMES * frame_bytes).enumerate() {
            let count = out.len() / frame_bytes;
            tile.resize(count * n, 0.0);
            self.filtered.rows_into(first + t * Self::TILE_FRAMES, count, tile);
            let tile_first = first + t * Self::TILE_FRAMES;
            for (k, (row, out)) in tile.chunks_exact_mut(n).zip(out.chunks_exact_mut(frame_bytes)).enumerate() {
                if let Some(reference) = self.reference {
                    reference.subtract(row, scratch);
                }
                clipped += self.encoder.encode(row, out, ((tile_first + k) * n) as u64, outside);
            }
        }
        clipped
    }
}

/// One encoding task's buffers: the frames it turns back to time-major,
/// the reference's state, and the values it lists for exception records.
#[derive(Default)]
struct EncodingWork {
    tile: Vec<f32>,
    reference: ReferenceScratch,
    outside: Vec<(u64, i16)>,
}

/// A chunk's bytes for the filtered copy, with each encoding task's
/// buffers (its exception values among them), on their way to the writer
/// thread and back for reuse.
#[derive(Default)]
struct EncodedChunk {
    bytes: Vec<u8>,
    tasks: Vec<EncodingWork>,
    clipped: u64,
}

/// How a chunk's frames lie in a block's rows ([`FilterEngine::filter_block`]):
/// `before` rows of extension first, `rows` in all, the core from `core_row`.
struct BlockRows {
    before: usize,
    rows: usize,
    core_row: usize,
}

/// Frames of extension the filter's margin needs before and after a chunk
/// beyond those it could read (at the recording's ends).
fn padding(engine: &FilterEngine, chunk: &Chunk) -> (usize, usize) {
    let margin = engine.margin_frames() as u64;
    (
        margin.saturating_sub(chunk.core_start - chunk.read_start) as usize,
        margin.saturating_sub(chunk.read_end - chunk.core_end) as usize,
    )
}

impl BlockRows {
    fn of(engine: &FilterEngine, chunk: &Chunk) -> BlockRows {
        let (pad_before, pad_after) = padding(engine, chunk);
        let n = chunk.read_frames();
        let (before, after) = (pad_before.min(n.saturating_sub(1)), pad_after.min(n.saturating_sub(1)));
        BlockRows {
            before,
            rows: before + n + after,
            core_row: before + (chunk.core_start - chunk.read_start) as usize,
        }
    }
}

/// Read frames `chunk.read_start..read_end` and filter every channel, in
/// parallel over blocks of channels (or channels, for FIR designs).
///
/// # Errors
/// Reading the recording fails.
pub fn filter_chunk(
    engine: &FilterEngine,
    recording: &Recording,
    chunk: &Chunk,
    filtered: &mut FilteredChunk,
) -> Result<(), RecordingError> {
    let n_channels = recording.n_channels;
    let core_frames = chunk.core_frames();
    filtered.n_channels = n_channels;
    filtered.core_frames = core_frames;
    if engine.supports_blocks() {
        filtered.columns.clear();
        let BlockRows { before, rows, core_row } = BlockRows::of(engine, chunk);
        filtered.blocks.resize_with(n_channels.div_ceil(BLOCK_LANES), Vec::new);
        for block in filtered.blocks.iter_mut() {
            block.resize(rows, [0.0; BLOCK_LANES]);
        }
        let (blocks, scratch) = (&mut filtered.blocks, &mut filtered.scratch);
        recording.visit_frames(chunk.read_start, chunk.read_end, scratch, |frames| {
            blocks
                .par_iter_mut()
                .enumerate()
                .for_each(|(b, rows)| engine.filter_block(&frames, n_channels, b * BLOCK_LANES, before, rows))
        })?;
        filtered.core_row = core_row;
        return Ok(());
    }
    filtered.blocks.clear();
    let ((pad_before, pad_after), core_offset) =
        (padding(engine, chunk), (chunk.core_start - chunk.read_start) as usize);
    let (mut raw, mut by_channel) = (Vec::new(), Vec::new());
    recording.read_frames(chunk.read_start, chunk.read_end, &mut raw)?;
    to_channel_major(&raw, n_channels, &mut by_channel);
    filtered.columns.resize(n_channels * core_frames, 0.0);
    filtered
        .columns
        .par_chunks_mut(core_frames.max(1))
        .zip(by_channel.par_chunks(chunk.read_frames()))
        .for_each_init(Scratch::default, |scratch, (out, column)| {
            engine.filter_channel(column, pad_before, pad_after, core_offset, out, scratch)
        });
    Ok(())
}

/// Per-channel QC figures.
pub struct ChannelQc {
    pub noise_mad_uv: Vec<f64>,
    pub rms_uv: Vec<f64>,
    /// Mean Welch PSD of the raw signal per channel, µV²/Hz.
    pub psd: Vec<Vec<f64>>,
    pub welch: Arc<Welch>,
    pub status: Vec<ChannelStatus>,
}

/// Measure QC on windows spread over the recording.
///
/// Noise is the median over windows of each window's MAD estimate, which
/// keeps memory to one window and is robust to a window with a burst.
///
/// # Errors
/// Reading the recording fails.
pub fn measure_qc(
    engine: &FilterEngine,
    recording: &Recording,
    params: &ValidFilterParams,
) -> Result<ChannelQc, RecordingError> {
    let n_channels = recording.n_channels;
    let windows = recording.spread_windows(params.qc_windows, params.qc_window_frames, engine.margin_frames());
    let window_frames = windows[0].core_frames();
    let segment = Welch::segment_for(recording.sample_rate_hz, PSD_RESOLUTION_HZ, window_frames);
    let welch = Arc::new(Welch::new(segment, recording.sample_rate_hz));
    let mut window_noise: Vec<Vec<f32>> = vec![Vec::new(); n_channels];
    let mut sum_squares = vec![0.0f64; n_channels];
    let mut psd_sums = vec![vec![0.0f64; welch.n_bins()]; n_channels];
    let mut segments = vec![0usize; n_channels];
    let mut filtered = FilteredChunk::default();
    let (mut raw, mut filtered_columns, mut raw_columns) = (Vec::new(), Vec::new(), Vec::new());
    for window in &windows {
        recording.visit_frames(window.core_start, window.core_end, &mut raw, |frames| {
            frames_to_channel_major(&frames, n_channels, &mut raw_columns)
        })?;
        let per_channel = if engine.supports_blocks() {
            window_by_blocks(engine, recording, window, &raw_columns, &welch, &mut raw)?
        } else {
            filter_chunk(engine, recording, window, &mut filtered)?;
            filtered.to_channel_major(&mut filtered_columns);
            filtered_columns
                .par_chunks_mut(window_frames)
                .zip(raw_columns.par_chunks(window_frames))
                .map_init(Vec::new, |work, (column, raw_column)| WindowFigures::of(column, raw_column, &welch, work))
                .collect()
        };
        for (channel, figures) in per_channel.into_iter().enumerate() {
            window_noise[channel].push(figures.sigma as f32);
            sum_squares[channel] += figures.squares;
            for (s, p) in psd_sums[channel].iter_mut().zip(figures.psd) {
                *s += p;
            }
            segments[channel] += figures.segments;
        }
    }
    let total_frames = (windows.len() * window_frames) as f64;
    let noise_mad_uv: Vec<f64> = window_noise.iter_mut().map(|w| noise::median_in_place(w)).collect();
    let rms_uv: Vec<f64> = sum_squares.iter().map(|s| (s / total_frames).sqrt()).collect();
    let psd = psd_sums
        .into_iter()
        .zip(&segments)
        .map(|(sum, &count)| sum.into_iter().map(|s| s / count.max(1) as f64).collect())
        .collect();
    let status = qc::classify(&noise_mad_uv, &rms_uv, params.dead_below_ratio, params.noisy_above_ratio);
    Ok(ChannelQc { noise_mad_uv, rms_uv, psd, welch, status })
}

/// One channel's QC figures on one window.
struct WindowFigures {
    /// MAD noise of the filtered signal, µV.
    sigma: f64,
    /// Sum of the filtered signal's squares, µV².
    squares: f64,
    /// Sum of the raw signal's segment periodograms ([`Welch::accumulate`]).
    psd: Vec<f64>,
    segments: usize,
}

impl WindowFigures {
    /// From the window's filtered (reordered here) and raw values.
    fn of(filtered: &mut [f32], raw: &[f32], welch: &Welch, work: &mut Vec<rustfft::num_complex::Complex64>) -> Self {
        let squares = qc::sum_in_lanes(filtered, |v| f64::from(v) * f64::from(v));
        let sigma = noise::mad_sigma(filtered);
        let mut psd = vec![0.0; welch.n_bins()];
        let segments = welch.accumulate(raw, &mut psd, work);
        WindowFigures { sigma, squares, psd, segments }
    }
}

/// [`WindowFigures`] of every channel on one window, given its raw core
/// channel-major (`raw_columns`), a block of [`BLOCK_LANES`] channels per
/// task: the block filtered as the main pass filters it ([`filter_chunk`]),
/// its core moved to one column per channel. Only a block's rows and
/// columns are held per thread, not the whole window's filtered values
/// twice over (once in blocks, once by channel).
fn window_by_blocks(
    engine: &FilterEngine,
    recording: &Recording,
    window: &Chunk,
    raw_columns: &[f32],
    welch: &Welch,
    scratch: &mut Vec<f32>,
) -> Result<Vec<WindowFigures>, RecordingError> {
    let n_channels = recording.n_channels;
    let BlockRows { before, rows, core_row } = BlockRows::of(engine, window);
    let core = window.core_frames();
    #[derive(Default)]
    struct BlockScratch {
        rows: Vec<Lanes>,
        columns: Vec<f32>,
        work: Vec<rustfft::num_complex::Complex64>,
    }
    recording.visit_frames(window.read_start, window.read_end, scratch, |frames| {
        let per_block: Vec<Vec<WindowFigures>> = (0..n_channels.div_ceil(BLOCK_LANES))
            .into_par_iter()
            .map_init(BlockScratch::default, |s, b| {
                let (first, lanes) = (b * BLOCK_LANES, BLOCK_LANES.min(n_channels - b * BLOCK_LANES));
                s.rows.resize(rows, [0.0; BLOCK_LANES]);
                engine.filter_block(&frames, n_channels, first, before, &mut s.rows);
                s.columns.resize(lanes * core, 0.0);
                for (k, row) in s.rows[core_row..core_row + core].iter().enumerate() {
                    for (lane, &v) in row[..lanes].iter().enumerate() {
                        s.columns[lane * core + k] = v;
                    }
                }
                let BlockScratch { columns, work, .. } = s;
                columns
                    .chunks_mut(core)
                    .zip(raw_columns[first * core..].chunks(core))
                    .map(|(column, raw_column)| WindowFigures::of(column, raw_column, welch, work))
                    .collect()
            })
            .collect();
        per_block.into_iter().flatten().collect()
    })
}

fn qc_tables(recording: &Recording, params: &ValidFilterParams, qc: &ChannelQc) -> (RecordBatch, RecordBatch) {
    let n = recording.n_channels;
    let welch = &qc.welch;
    let band = |low: f64, high: f64| -> ArrayRef {
        Arc::new(Float64Array::from_iter_values(qc.psd.iter().map(|psd| welch.band_power(psd, low, high))))
    };
    let line = params.line_hz;
    let peak: Vec<f64> = qc
        .psd
        .iter()
        .map(|psd| {
            let (bin, _) = psd
                .iter()
                .enumerate()
                .skip(1)
                .fold((0, f64::MIN), |best, (b, &p)| if p > best.1 { (b, p) } else { best });
            welch.frequency_hz(bin)
        })
        .collect();
    let fields = vec![
        Field::new("channel", DataType::Int32, false),
        Field::new("x_um", DataType::Float64, false),
        Field::new("y_um", DataType::Float64, false),
        Field::new("noise_mad_uv", DataType::Float64, false),
        Field::new("rms_uv", DataType::Float64, false),
        Field::new("line_noise_uv2", DataType::Float64, false),
        Field::new("power_below_band_uv2", DataType::Float64, false),
        Field::new("power_in_band_uv2", DataType::Float64, false),
        Field::new("power_above_band_uv2", DataType::Float64, false),
        Field::new("peak_frequency_hz", DataType::Float64, false),
        Field::new("status", DataType::Utf8, false),
        Field::new("usable", DataType::Boolean, false),
    ];
    let columns: Vec<ArrayRef> = vec![
        Arc::new(Int32Array::from_iter_values((0..n).map(|c| c as i32))),
        Arc::new(Float64Array::from_iter_values(recording.electrodes.iter().map(|e| e.x_um))),
        Arc::new(Float64Array::from_iter_values(recording.electrodes.iter().map(|e| e.y_um))),
        Arc::new(Float64Array::from(qc.noise_mad_uv.clone())),
        Arc::new(Float64Array::from(qc.rms_uv.clone())),
        band(line - 2.0, line + 2.0),
        band(0.5, params.low_hz),
        band(params.low_hz, params.high_hz),
        band(params.high_hz, recording.sample_rate_hz),
        Arc::new(Float64Array::from(peak)),
        Arc::new(StringArray::from_iter_values(qc.status.iter().map(|s| s.name()))),
        Arc::new(BooleanArray::from_iter(qc.status.iter().map(|s| Some(*s == ChannelStatus::Ok)))),
    ];
    let qc_batch = RecordBatch::try_new(Arc::new(Schema::new(fields)), columns).expect("QC columns match their schema");
    let bins = welch.n_bins();
    let psd_fields = vec![
        Field::new("channel", DataType::Int32, false),
        Field::new("frequency_hz", DataType::Float64, false),
        Field::new("psd_uv2_per_hz", DataType::Float64, false),
    ];
    let psd_columns: Vec<ArrayRef> = vec![
        Arc::new(Int32Array::from_iter_values((0..n).flat_map(|c| std::iter::repeat_n(c as i32, bins)))),
        Arc::new(Float64Array::from_iter_values((0..n).flat_map(|_| (0..bins).map(|b| welch.frequency_hz(b))))),
        Arc::new(Float64Array::from_iter_values(qc.psd.iter().flatten().copied())),
    ];
    let psd_batch =
        RecordBatch::try_new(Arc::new(Schema::new(psd_fields)), psd_columns).expect("PSD columns match their schema");
    (qc_batch, psd_batch)
}

/// Dense group index per channel for the median reference.
fn reference_groups(recording: &Recording, by_group: bool) -> Vec<usize> {
    if !by_group {
        return vec![0; recording.n_channels];
    }
    let mut names: Vec<&str> = recording.electrodes.iter().map(|e| e.group.as_deref().unwrap_or("")).collect();
    names.sort_unstable();
    names.dedup();
    recording.electrodes.iter().map(|e| names.binary_search(&e.group.as_deref().unwrap_or("")).unwrap_or(0)).collect()
}

/// Run the stage on a request.
///
/// # Errors
/// Bad recording or parameters ([`StageFailure::bad_input`]) or I/O
/// failures while writing.
pub fn run(request: &StageRequest) -> Result<StageReport, StageFailure> {
    let mut recording = Recording::open(&request.recording).map_err(StageFailure::bad_input)?;
    let params: FilterParams = request.params().map_err(StageFailure::bad_input)?;
    recording.non_finite = params.non_finite;
    let valid = params.check(recording.sample_rate_hz).map_err(|message| request.params_refused(message))?;
    let mut report = StageReport::default();
    for warning in &valid.warnings {
        report.warn(warning.clone());
    }
    let engine = FilterEngine::new(&valid, recording.sample_rate_hz);
    let output = |e: std::io::Error, name: &str| StageFailure::failed(ContractError::io(request.output(name), e));

    let qc = measure_qc(&engine, &recording, &valid).map_err(|e| match e {
        RecordingError::NonFinite { .. } => StageFailure::bad_input(e),
        other => StageFailure::failed(other),
    })?;
    let usable: Vec<bool> = qc.status.iter().map(|s| *s == ChannelStatus::Ok).collect();
    let n_usable = usable.iter().filter(|u| **u).count();
    if n_usable == 0 {
        report.warn("no channel passed QC; the median reference is off");
    }
    let (qc_batch, psd_batch) = qc_tables(&recording, &valid, &qc);
    let metadata = request.table_metadata(EXECUTABLE, VERSION, &params);
    write_table(&request.output(CHANNEL_QC_TABLE), &qc_batch, &metadata).map_err(StageFailure::failed)?;
    write_table(&request.output(CHANNEL_PSD_TABLE), &psd_batch, &metadata).map_err(StageFailure::failed)?;

    let groups = reference_groups(&recording, valid.reference_by_group);
    let chunk_frames = valid.chunk_frames.max(engine.margin_frames());
    let chunks = recording.chunks(chunk_frames, engine.margin_frames());
    let storage = match params.store_filtered_as {
        FilteredStorage::F32 => Storage::F32,
        FilteredStorage::Auto | FilteredStorage::I16 | FilteredStorage::PackedI16 => {
            let noisiest =
                qc.noise_mad_uv.iter().zip(&usable).filter(|(_, u)| **u).map(|(n, _)| *n).fold(0.0, f64::max);
            let microvolts_per_unit = if noisiest > 0.0 { noisiest / 64.0 } else { 0.01 };
            match params.store_filtered_as {
                FilteredStorage::PackedI16 => Storage::PackedI16 { microvolts_per_unit },
                _ => Storage::I16 { microvolts_per_unit },
            }
        }
    };
    let mut writer = RecordingWriter::create(
        &request.output_dir,
        "filtered",
        recording.sample_rate_hz,
        &recording.electrodes,
        storage,
    )
    .map_err(|e| output(e, "filtered.bin"))?;
    let mut progress = ProgressReporter::new(recording.n_frames, "frames");
    let masked_before = recording.masked_samples();
    let reference =
        (valid.reference == Reference::Median && n_usable > 0).then(|| kernel::MedianReference::new(&groups, &usable));
    let encoder = writer.encoder();
    let frame_bytes = recording.n_channels * encoder.bytes_per_sample();
    // A writer thread writes chunk k while chunk k + 1 is read and filtered;
    // at most two encoded chunks are in flight, and their buffers are reused.
    let (to_writer, written) = std::sync::mpsc::sync_channel::<EncodedChunk>(1);
    let (recycle, recycled) = std::sync::mpsc::channel::<EncodedChunk>();
    let (filtering, writing) = std::thread::scope(|scope| {
        let writer_thread = scope.spawn(move || -> std::io::Result<RecordingWriter> {
            for encoded in written {
                let outside = encoded.tasks.iter().flat_map(|task| task.outside.iter().copied());
                writer.write_encoded(&encoded.bytes, outside, encoded.clipped)?;
                let _ = recycle.send(encoded);
            }
            Ok(writer)
        });
        let mut filtered = FilteredChunk::default();
        let filtering = chunks.iter().try_for_each(|chunk| {
            filter_chunk(&engine, &recording, chunk, &mut filtered).map_err(|e| match e {
                RecordingError::NonFinite { .. } => StageFailure::bad_input(e),
                other => StageFailure::failed(other),
            })?;
            // Back to time-major, referenced and encoded, in parallel over runs of frames.
            const FRAMES_PER_TASK: usize = 1024;
            let mut encoded = recycled.try_recv().unwrap_or_default();
            encoded.bytes.resize(filtered.core_frames() * frame_bytes, 0);
            let n_tasks = filtered.core_frames().div_ceil(FRAMES_PER_TASK);
            encoded.tasks.resize_with(n_tasks, EncodingWork::default);
            let filtered = &filtered;
            encoded.clipped = encoded
                .bytes
                .par_chunks_mut(frame_bytes * FRAMES_PER_TASK)
                .zip(encoded.tasks.par_iter_mut())
                .enumerate()
                .map(|(task, (out, work))| {
                    work.outside.clear();
                    let frames = FrameEncoding { filtered, reference: reference.as_ref(), encoder: &encoder };
                    frames.encode(task * FRAMES_PER_TASK, out, work)
                })
                .sum();
            progress.advance(chunk.core_frames() as u64);
            // A closed channel means the writer failed: stop; its own error is reported below.
            to_writer.send(encoded).map_err(|_| output(std::io::Error::other("the writer stopped"), "filtered.bin"))
        });
        drop(to_writer);
        (filtering, writer_thread.join())
    });
    let writer = match writing {
        Ok(Ok(writer)) => writer,
        Ok(Err(e)) => return Err(output(e, "filtered.bin")),
        Err(_) => return Err(output(std::io::Error::other("the writer thread panicked"), "filtered.bin")),
    };
    filtering?;
    if writer.clipped_samples() > 0 {
        report.warn(format!(
            "{} filtered samples beyond ±512 noise σ were clipped when stored as i16 (store_filtered_as = \"f32\" keeps them)",
            writer.clipped_samples()
        ));
    }
    if let Storage::I16 { microvolts_per_unit } | Storage::PackedI16 { microvolts_per_unit } = storage {
        report.summary.insert("filtered_microvolts_per_unit".into(), microvolts_per_unit.into());
    }
    writer.finish().map_err(|e| output(e, FILTERED_RECORDING))?;
    // Chunks overlap by their margins, so a masked sample may be counted twice.
    let masked = recording.masked_samples() - masked_before;
    if masked > 0 {
        report.warn(format!(
            "{masked} NaN or infinite samples were replaced by 0 µV (counted once per read; margins overlap)"
        ));
    }

    let mut sorted_noise: Vec<f32> = qc.noise_mad_uv.iter().map(|&v| v as f32).collect();
    let count = |status: ChannelStatus| qc.status.iter().filter(|s| **s == status).count();
    let summary = &mut report.summary;
    summary.insert("channels".into(), recording.n_channels.into());
    summary.insert("dead_channels".into(), count(ChannelStatus::Dead).into());
    summary.insert("noisy_channels".into(), count(ChannelStatus::Noisy).into());
    summary.insert("median_noise_uv".into(), noise::median_in_place(&mut sorted_noise).into());
    summary.insert("margin_frames".into(), engine.margin_frames().into());
    summary.insert("chunk_frames".into(), chunk_frames.into());
    summary.insert("band_hz".into(), serde_json::json!([valid.low_hz, valid.high_hz]));
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;
    use params::Design;
    use spikeyard_contract::testing::{write_f32_recording, TestRng};

    fn noisy_recording(dir: &std::path::Path, fs: f64, n_channels: usize, seconds: f64) -> Recording {
        let mut rng = TestRng::new(11);
        let n = (fs * seconds) as usize;
        let mut samples = Vec::with_capacity(n * n_channels);
        for frame in 0..n {
            let t = frame as f64 / fs;
            let hum = 40.0 * (2.0 * std::f64::consts::PI * 50.0 * t).sin();
            for channel in 0..n_channels {
                let spike = if frame % 2003 == 100 + channel { -150.0 } else { 0.0 };
                // Channel 0 sits at a 10 mV offset, where a margin too short
                // for the decay of the filter's transient shows at the seams.
                let offset = if channel == 0 { 10_000.0 } else { 20.0 * channel as f64 };
                samples.push((10.0 * rng.normal() + hum + spike + offset) as f32);
            }
        }
        let path = write_f32_recording(dir, "noisy", fs, n_channels, 20.0, &samples);
        Recording::open(&path).unwrap()
    }

    fn filter_in_chunks(engine: &FilterEngine, recording: &Recording, chunk_frames: usize) -> Vec<f32> {
        let (mut filtered, mut all) = (FilteredChunk::default(), Vec::new());
        let mut rows = Vec::new();
        for chunk in recording.chunks(chunk_frames, engine.margin_frames()) {
            filter_chunk(engine, recording, &chunk, &mut filtered).unwrap();
            rows.resize(filtered.core_frames() * recording.n_channels, 0.0);
            filtered.rows_into(0, filtered.core_frames(), &mut rows);
            all.extend_from_slice(&rows);
        }
        all
    }

    // Chunking must not change answers: compare many small chunks (cutting
    // spikes in two) with one chunk holding the whole signal.
    #[test]
    fn chunked_filtering_equals_whole_signal_filtering() {
        let dir = tempfile::tempdir().unwrap();
        let fs = 20000.0;
        let recording = noisy_recording(dir.path(), fs, 3, 4.0);
        let variants = [
            FilterParams::default(),
            FilterParams { notch_hz: 50.0, ..Default::default() },
            FilterParams { design: Design::Fir, ..Default::default() },
            FilterParams { band_hz: [100.0, 3000.0], order: 5, ..Default::default() },
        ];
        for params in variants {
            let valid = params.check(fs).unwrap();
            let engine = FilterEngine::new(&valid, fs);
            let whole = filter_in_chunks(&engine, &recording, recording.n_frames as usize);
            let chunked = filter_in_chunks(&engine, &recording, 1777);
            assert_eq!(whole.len(), chunked.len());
            let rms = (whole.iter().map(|v| (*v as f64).powi(2)).sum::<f64>() / whole.len() as f64).sqrt();
            let worst = whole.iter().zip(&chunked).map(|(a, b)| (a - b).abs() as f64).fold(0.0, f64::max);
            // The recursions run in f32 (round-off near 1e-4 of the rms, which
            // differs between chunkings); a chunking fault is of the order of the rms.
            assert!(worst / rms < 2e-3, "{params:?}: worst {worst}, rms {rms}");
        }
    }

    // QC block by block gives the figures of the whole window filtered and
    // turned channel-major, on windows at both ends of the recording (their
    // margins clipped) and inside it, over a full block and a partial one.
    #[test]
    fn qc_by_blocks_equals_qc_on_the_whole_window() {
        let dir = tempfile::tempdir().unwrap();
        let fs = 20000.0;
        let n_channels = BLOCK_LANES + 5;
        let recording = noisy_recording(dir.path(), fs, n_channels, 1.5);
        let valid = FilterParams::default().check(fs).unwrap();
        let engine = FilterEngine::new(&valid, fs);
        assert!(engine.supports_blocks());
        let windows = recording.spread_windows(3, 4000, engine.margin_frames());
        let welch = Welch::new(Welch::segment_for(fs, PSD_RESOLUTION_HZ, 4000), fs);
        let (mut filtered, mut columns, mut raw, mut scratch) = (FilteredChunk::default(), vec![], vec![], vec![]);
        for window in &windows {
            filter_chunk(&engine, &recording, window, &mut filtered).unwrap();
            filtered.to_channel_major(&mut columns);
            recording.read_frames(window.core_start, window.core_end, &mut scratch).unwrap();
            to_channel_major(&scratch, n_channels, &mut raw);
            let by_blocks = window_by_blocks(&engine, &recording, window, &raw, &welch, &mut scratch).unwrap();
            assert_eq!(by_blocks.len(), n_channels);
            let core = window.core_frames();
            for (c, figures) in by_blocks.iter().enumerate() {
                let expected = WindowFigures::of(
                    &mut columns[c * core..(c + 1) * core],
                    &raw[c * core..(c + 1) * core],
                    &welch,
                    &mut vec![],
                );
                assert_eq!(
                    (figures.sigma, figures.squares, &figures.psd, figures.segments),
                    (expected.sigma, expected.squares, &expected.psd, expected.segments),
                    "window {window:?}, channel {c}"
                );
            }
        }
    }

    // The channel-major view (QC) holds what the frame rows hold, across a
    // full block and a partial one, for the block and the channel paths.
    #[test]
    fn channel_major_view_matches_the_rows() {
        let dir = tempfile::tempdir().unwrap();
        let fs = 20000.0;
        let n_channels = BLOCK_LANES + 5;
        let recording = noisy_recording(dir.path(), fs, n_channels, 0.5);
        for params in [FilterParams::default(), FilterParams { design: Design::Fir, ..Default::default() }] {
            let engine = FilterEngine::new(&params.check(fs).unwrap(), fs);
            let chunk = &recording.chunks(3000, engine.margin_frames())[1];
            let mut filtered = FilteredChunk::default();
            filter_chunk(&engine, &recording, chunk, &mut filtered).unwrap();
            let mut columns = Vec::new();
            filtered.to_channel_major(&mut columns);
            let frames = filtered.core_frames();
            assert_eq!(columns.len(), n_channels * frames);
            let mut row = vec![0.0; n_channels];
            for frame in 0..frames {
                filtered.rows_into(frame, 1, &mut row);
                for (channel, v) in row.iter().enumerate() {
                    assert_eq!(columns[channel * frames + frame], *v, "{:?}", params.design);
                }
            }
        }
    }

    /// RMS of the output over whole periods far from the edges, divided by
    /// the input's.
    fn zero_phase_gain(frequency_hz: f64, fs: f64) -> f64 {
        let valid = FilterParams::default().check(fs).unwrap();
        let engine = FilterEngine::new(&valid, fs);
        let n = (fs * 2.0) as usize;
        let input: Vec<f32> =
            (0..n).map(|i| (2.0 * std::f64::consts::PI * frequency_hz * i as f64 / fs).sin() as f32).collect();
        let mut out = vec![0.0f32; n];
        engine.filter_channel(
            &input,
            engine.margin_frames(),
            engine.margin_frames(),
            0,
            &mut out,
            &mut Scratch::default(),
        );
        // Skip 0.5 s at each end (the slowest pole decays in ≈ 33 samples).
        let period = fs / frequency_hz;
        let periods = ((n as f64 - fs) / period).floor();
        let (start, end) = ((fs * 0.5) as usize, (fs * 0.5 + periods * period).round() as usize);
        let rms =
            |x: &[f32]| (x[start..end].iter().map(|v| (*v as f64).powi(2)).sum::<f64>() / (end - start) as f64).sqrt();
        rms(&out) / rms(&input)
    }

    // REFERENCES.md F4: zero-phase gain |h|² of butter(3,[300,6000],fs=30000),
    // via sosfreqz; tolerance 1e-4 because the test sine is f32 and the
    // window holds whole periods only up to one sample.
    #[test]
    fn zero_phase_gains_match_scipy() {
        for (f, expected) in [(300.0, 0.5), (1000.0, 0.999982378591), (6000.0, 0.5), (50.0, 1.6525738156e-05)] {
            let gain = zero_phase_gain(f, 30000.0);
            assert!((gain - expected).abs() < 1e-4 * expected.max(0.01), "{f} Hz: {gain} vs {expected}");
        }
    }
}
