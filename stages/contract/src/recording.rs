//! Recording descriptions: parse and validate once, then read in chunks.
//!
//! A recording is a raw binary file plus a TOML description beside it and an
//! electrode table (CSV). Relative paths are resolved against the
//! description's folder when it is loaded. [`Recording::open`] refuses every
//! description that does not match its data, naming the file and the problem.
//!
//! Reading never maps the whole file: each call maps only the byte ranges it
//! needs and drops the map before returning, so resident memory stays flat
//! however long the recording is.

use crate::error::RecordingError;
use crate::packed::{self, PackedRange};
use serde::Deserialize;
use std::fs::File;
use std::path::{Path, PathBuf};

/// The most channels a description may declare (far above any array built).
pub const MAX_CHANNELS: usize = 1 << 20;

/// Sample types a data file may hold (little-endian).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dtype {
    I16,
    U16,
    I32,
    F32,
    F64,
}

impl Dtype {
    pub const NAMES: [&'static str; 5] = ["i16", "u16", "i32", "f32", "f64"];

    pub fn parse(name: &str) -> Option<Self> {
        Some(match name {
            "i16" => Dtype::I16,
            "u16" => Dtype::U16,
            "i32" => Dtype::I32,
            "f32" => Dtype::F32,
            "f64" => Dtype::F64,
            _ => return None,
        })
    }

    pub fn name(self) -> &'static str {
        match self {
            Dtype::I16 => "i16",
            Dtype::U16 => "u16",
            Dtype::I32 => "i32",
            Dtype::F32 => "f32",
            Dtype::F64 => "f64",
        }
    }

    pub fn bytes(self) -> usize {
        match self {
            Dtype::I16 | Dtype::U16 => 2,
            Dtype::I32 | Dtype::F32 => 4,
            Dtype::F64 => 8,
        }
    }

    /// Decode one little-endian value at the start of `bytes` as f64.
    #[inline]
    fn decode(self, bytes: &[u8]) -> f64 {
        match self {
            Dtype::I16 => i16::from_le_bytes([bytes[0], bytes[1]]) as f64,
            Dtype::U16 => u16::from_le_bytes([bytes[0], bytes[1]]) as f64,
            Dtype::I32 => i32::from_le_bytes(bytes[..4].try_into().unwrap_or([0; 4])) as f64,
            Dtype::F32 => f32::from_le_bytes(bytes[..4].try_into().unwrap_or([0; 4])) as f64,
            Dtype::F64 => f64::from_le_bytes(bytes[..8].try_into().unwrap_or([0; 8])),
        }
    }
}

/// Order of samples in the data file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// t0c0 t0c1 ... t1c0 ...
    TimeMajor,
    /// all of c0, then all of c1, ...
    ChannelMajor,
}

impl Layout {
    /// The name a description uses.
    pub fn name(self) -> &'static str {
        match self {
            Layout::TimeMajor => "time-major",
            Layout::ChannelMajor => "channel-major",
        }
    }
}

/// One electrode: the stored channel it records and where it sits.
#[derive(Debug, Clone, PartialEq)]
pub struct Electrode {
    pub channel: usize,
    pub x_um: f64,
    pub y_um: f64,
    /// The `label` column when the table has one.
    pub label: Option<String>,
    /// The `group` column when the table has one (e.g. a shank or well).
    pub group: Option<String>,
}

/// The description file as written, before validation.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDescription {
    data: String,
    sample_rate_hz: f64,
    channels: i64,
    dtype: String,
    #[serde(default)]
    layout: Option<String>,
    #[serde(default = "one")]
    microvolts_per_unit: f64,
    #[serde(default)]
    offset: f64,
    electrodes: String,
    #[serde(default)]
    packing: Option<String>,
    #[serde(default)]
    exceptions: Option<String>,
    #[serde(default)]
    exceptions_index: Option<String>,
}

/// The exceptions file and its index of packed i16 data ([`crate::packed`]).
#[derive(Debug, Clone)]
pub struct PackedFiles {
    pub exceptions: PathBuf,
    pub index: PathBuf,
}

/// The `packing` value of packed i16 data ([`crate::packed`]).
pub const PACKING_I8_EXCEPTIONS: &str = "i8+exceptions";

fn one() -> f64 {
    1.0
}

/// A validated recording: every field has been checked against its data.
#[derive(Debug, Clone)]
pub struct Recording {
    /// The description file this was loaded from.
    pub description_path: PathBuf,
    /// Absolute or description-relative-resolved path of the raw samples.
    pub data_path: PathBuf,
    pub electrodes_path: PathBuf,
    pub sample_rate_hz: f64,
    pub n_channels: usize,
    pub dtype: Dtype,
    pub layout: Layout,
    pub microvolts_per_unit: f64,
    pub offset: f64,
    pub n_frames: u64,
    /// One per channel, indexed by channel.
    pub electrodes: Vec<Electrode>,
    /// What reading does with NaN or ±Inf in float data.
    pub non_finite: NonFinite,
    /// For packed i16 data ([`crate::packed`]): its exceptions files.
    pub packed: Option<PackedFiles>,
    masked_samples: std::sync::Arc<std::sync::atomic::AtomicU64>,
}

/// A piece of the recording to process: the core frames the caller is
/// responsible for, and the wider range read around them for context.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Chunk {
    pub index: usize,
    /// Frames this chunk produces output for: `core_start..core_end`.
    pub core_start: u64,
    pub core_end: u64,
    /// Frames read for context, clipped to the recording.
    pub read_start: u64,
    pub read_end: u64,
}

impl Chunk {
    pub fn core_frames(&self) -> usize {
        (self.core_end - self.core_start) as usize
    }
    pub fn read_frames(&self) -> usize {
        (self.read_end - self.read_start) as usize
    }
}

impl Recording {
    /// Load and validate a description, its electrode table and its data size.
    ///
    /// # Errors
    /// A [`RecordingError`] naming the file and the problem for every
    /// mismatch listed in the interface contract.
    pub fn open(description_path: &Path) -> Result<Self, RecordingError> {
        let path = description_path.to_path_buf();
        let text =
            std::fs::read_to_string(&path).map_err(|source| RecordingError::Io { path: path.clone(), source })?;
        let raw: RawDescription = toml::from_str(&text)
            .map_err(|e| RecordingError::Toml { path: path.clone(), message: one_line(&e.to_string()) })?;
        let bad = |key: &'static str, value: String, expected: &str| RecordingError::BadValue {
            path: path.clone(),
            key,
            value,
            expected: expected.to_string(),
        };
        if !(raw.sample_rate_hz.is_finite() && raw.sample_rate_hz > 0.0) {
            return Err(bad("sample_rate_hz", raw.sample_rate_hz.to_string(), "greater than 0"));
        }
        if !(1..=MAX_CHANNELS as i64).contains(&raw.channels) {
            return Err(bad("channels", raw.channels.to_string(), &format!("1 to {MAX_CHANNELS}")));
        }
        let n_channels = raw.channels as usize;
        let dtype = Dtype::parse(&raw.dtype).ok_or_else(|| {
            bad("dtype", format!("\"{}\"", raw.dtype), &format!("one of {}", Dtype::NAMES.join(", ")))
        })?;
        let layout = match raw.layout.as_deref() {
            None | Some("time-major") => Layout::TimeMajor,
            Some("channel-major") => Layout::ChannelMajor,
            Some(other) => return Err(bad("layout", format!("\"{other}\""), "\"time-major\" or \"channel-major\"")),
        };
        if !(raw.microvolts_per_unit.is_finite() && raw.microvolts_per_unit != 0.0) {
            return Err(bad("microvolts_per_unit", raw.microvolts_per_unit.to_string(), "a finite, non-zero number"));
        }
        if !raw.offset.is_finite() {
            return Err(bad("offset", raw.offset.to_string(), "a finite number"));
        }
        let folder = path.parent().unwrap_or(Path::new("."));
        let data_path = folder.join(&raw.data);
        let electrodes_path = folder.join(&raw.electrodes);
        let metadata = match std::fs::metadata(&data_path) {
            Ok(m) if m.is_file() => m,
            _ => return Err(RecordingError::MissingData { path, data: data_path }),
        };
        let packed = match raw.packing.as_deref() {
            None | Some("none") => None,
            Some(PACKING_I8_EXCEPTIONS) => {
                if dtype != Dtype::I16 || layout != Layout::TimeMajor {
                    let expected = "used with dtype \"i16\" and layout \"time-major\" only";
                    return Err(bad("packing", format!("\"{PACKING_I8_EXCEPTIONS}\""), expected));
                }
                let file = |key: &'static str, name: &Option<String>| match name {
                    Some(name) if folder.join(name).is_file() => Ok(folder.join(name)),
                    Some(name) => Err(RecordingError::MissingData { path: path.clone(), data: folder.join(name) }),
                    None => Err(bad(key, "missing".into(), "the name of a file of the packed data")),
                };
                Some(PackedFiles {
                    exceptions: file("exceptions", &raw.exceptions)?,
                    index: file("exceptions_index", &raw.exceptions_index)?,
                })
            }
            Some(other) => {
                let expected = format!("\"none\" or \"{PACKING_I8_EXCEPTIONS}\"");
                return Err(bad("packing", format!("\"{other}\""), &expected));
            }
        };
        let sample_bytes = if packed.is_some() { 1 } else { dtype.bytes() };
        let frame_bytes = (n_channels * sample_bytes) as u64;
        let bytes = metadata.len();
        if bytes % frame_bytes != 0 {
            return Err(RecordingError::PartialFrame {
                path: data_path,
                bytes,
                frame_bytes,
                channels: n_channels,
                dtype: if packed.is_some() { "packed i16" } else { dtype.name() },
            });
        }
        if bytes == 0 {
            return Err(RecordingError::EmptyData { path: data_path });
        }
        if let Some(files) = &packed {
            check_packed(files, bytes)?;
        }
        if !electrodes_path.is_file() {
            return Err(RecordingError::MissingElectrodes { path, electrodes: electrodes_path });
        }
        let electrodes = read_electrodes(&electrodes_path, n_channels)?;
        Ok(Recording {
            description_path: path,
            data_path,
            electrodes_path,
            sample_rate_hz: raw.sample_rate_hz,
            n_channels,
            dtype,
            layout,
            microvolts_per_unit: raw.microvolts_per_unit,
            offset: raw.offset,
            n_frames: bytes / frame_bytes,
            electrodes,
            non_finite: NonFinite::Refuse,
            packed,
            masked_samples: Default::default(),
        })
    }

    pub fn duration_s(&self) -> f64 {
        self.n_frames as f64 / self.sample_rate_hz
    }

    /// Split `0..n_frames` into cores of `chunk_frames` with `margin_frames`
    /// of context on each side (clipped to the recording).
    pub fn chunks(&self, chunk_frames: usize, margin_frames: usize) -> Vec<Chunk> {
        plan_chunks(self.n_frames, chunk_frames, margin_frames)
    }

    /// At most `count` windows of `window_frames` (fewer when the recording
    /// is short), spread evenly from its start to its end, each with
    /// `margin_frames` of context. Used to estimate noise and QC figures
    /// from a bounded sample of a long recording.
    pub fn spread_windows(&self, count: usize, window_frames: usize, margin_frames: usize) -> Vec<Chunk> {
        let n_frames = self.n_frames;
        let length = (window_frames as u64).clamp(1, n_frames);
        let count = count.clamp(1, (n_frames / length) as usize);
        (0..count)
            .map(|i| {
                let start = if count == 1 { 0 } else { (n_frames - length) * i as u64 / (count as u64 - 1) };
                Chunk {
                    index: i,
                    core_start: start,
                    core_end: start + length,
                    read_start: start.saturating_sub(margin_frames as u64),
                    read_end: (start + length + margin_frames as u64).min(n_frames),
                }
            })
            .collect()
    }

    /// Read frames `start..end` as microvolts into `out`, time-major
    /// (`out[frame * n_channels + channel]`). `out` is resized to fit.
    ///
    /// NaN and ±Inf in float data are refused, or replaced by 0 µV (and
    /// counted in [`Recording::masked_samples`]) when
    /// [`Recording::non_finite`] says so.
    ///
    /// # Errors
    /// I/O errors mapping the data file, with its path; a range past the end
    /// of the recording; a non-finite sample under [`NonFinite::Refuse`].
    pub fn read_frames(&self, start: u64, end: u64, out: &mut Vec<f32>) -> Result<(), RecordingError> {
        let (gain, offset) = (self.microvolts_per_unit, self.offset);
        // Every value is overwritten below: a reused buffer of the same size is not cleared.
        out.resize(((end.saturating_sub(start)) as usize).saturating_mul(self.n_channels), 0.0);
        if self.packed.is_some() {
            use rayon::prelude::*;
            const SAMPLES_PER_TASK: usize = 1 << 16;
            return self.visit_packed(start, end, |range| {
                let frames = Frames::Packed { range, gain, offset };
                out.par_chunks_mut(SAMPLES_PER_TASK)
                    .enumerate()
                    .for_each(|(task, out)| frames.copy_to(task * SAMPLES_PER_TASK, out))
            });
        }
        if self.dtype == Dtype::F32 && gain == 1.0 && offset == 0.0 && self.layout == Layout::TimeMajor {
            // The common case of an already-scaled f32 file: a straight copy.
            self.visit_stored(start, end, |index, bytes| {
                out[index] = f32::from_le_bytes([bytes[0], bytes[1], bytes[2], bytes[3]])
            })?;
        } else if self.dtype == Dtype::I16 && self.layout == Layout::TimeMajor {
            // The commonest raw format, and the filter stage's own output:
            // one tight loop over the mapped bytes.
            // In parallel over runs of samples: the page faults of the map and
            // the conversion are shared between the cores.
            use rayon::prelude::*;
            const SAMPLES_PER_TASK: usize = 1 << 16;
            self.visit_time_major(start, end, |bytes| {
                out.par_chunks_mut(SAMPLES_PER_TASK).zip(bytes.par_chunks(2 * SAMPLES_PER_TASK)).for_each(
                    |(out, bytes)| {
                        for (o, b) in out.iter_mut().zip(bytes.chunks_exact(2)) {
                            *o = i16_microvolts(b, gain, offset);
                        }
                    },
                )
            })?;
        } else {
            let dtype = self.dtype;
            self.visit_stored(start, end, |index, bytes| out[index] = ((dtype.decode(bytes) - offset) * gain) as f32)?;
        }
        if matches!(self.dtype, Dtype::F32 | Dtype::F64) {
            self.check_finite(start, out)?;
        }
        Ok(())
    }

    /// Frames `start..end` for a caller that looks at a few of their values
    /// (snippets around events): a time-major i16 file is mapped and only the
    /// values looked at are converted, equal to [`Recording::read_frames`]'s;
    /// other formats are read whole into `scratch` first.
    ///
    /// # Errors
    /// As [`Recording::read_frames`].
    pub fn visit_frames<R>(
        &self,
        start: u64,
        end: u64,
        scratch: &mut Vec<f32>,
        visit: impl FnOnce(Frames) -> R,
    ) -> Result<R, RecordingError> {
        let (gain, offset) = (self.microvolts_per_unit, self.offset);
        if self.packed.is_some() {
            return self.visit_packed(start, end, |range| visit(Frames::Packed { range, gain, offset }));
        }
        if self.dtype == Dtype::I16 && self.layout == Layout::TimeMajor {
            return self.visit_time_major(start, end, |bytes| visit(Frames::StoredI16 { bytes, gain, offset }));
        }
        self.read_frames(start, end, scratch)?;
        Ok(visit(Frames::Microvolts(scratch)))
    }

    /// The gain and offset (µV = (stored − offset) × gain) when
    /// [`Recording::visit_frames`] hands over stored i16 numbers (plain or
    /// packed), which [`Frames::add_stored_to`] can sum exactly; `None` when
    /// it hands over µV.
    pub fn stored_i16_scale(&self) -> Option<(f64, f64)> {
        (self.packed.is_some() || (self.dtype == Dtype::I16 && self.layout == Layout::TimeMajor))
            .then_some((self.microvolts_per_unit, self.offset))
    }

    /// Read frames `start..end` as the stored numbers (no gain, no offset),
    /// time-major, for checks of the stored range.
    ///
    /// # Errors
    /// As [`Recording::read_frames`], without the non-finite check.
    pub fn read_stored(&self, start: u64, end: u64, out: &mut Vec<f64>) -> Result<(), RecordingError> {
        out.clear();
        out.resize(((end.saturating_sub(start)) as usize).saturating_mul(self.n_channels), 0.0);
        let dtype = self.dtype;
        self.visit_stored(start, end, |index, bytes| out[index] = dtype.decode(bytes))
    }

    fn check_finite(&self, start: u64, values: &mut [f32]) -> Result<(), RecordingError> {
        let mut masked = 0u64;
        for (index, value) in values.iter_mut().enumerate() {
            if !value.is_finite() {
                match self.non_finite {
                    NonFinite::Refuse => {
                        return Err(RecordingError::NonFinite {
                            path: self.data_path.clone(),
                            frame: start + (index / self.n_channels) as u64,
                            channel: index % self.n_channels,
                            value: value.to_string(),
                        })
                    }
                    NonFinite::Zero => {
                        *value = 0.0;
                        masked += 1;
                    }
                }
            }
        }
        self.masked_samples.fetch_add(masked, std::sync::atomic::Ordering::Relaxed);
        Ok(())
    }

    fn check_range(&self, start: u64, end: u64) -> Result<(), RecordingError> {
        if start > end || end > self.n_frames {
            return Err(RecordingError::Io {
                path: self.data_path.clone(),
                source: std::io::Error::new(
                    std::io::ErrorKind::InvalidInput,
                    format!("frames {start}..{end} requested, but the recording has {} frames", self.n_frames),
                ),
            });
        }
        Ok(())
    }

    /// Call `visit` with the stored bytes of frames `start..end` of a
    /// time-major file (an empty slice for an empty range) and return its
    /// answer.
    fn visit_time_major<R>(&self, start: u64, end: u64, visit: impl FnOnce(&[u8]) -> R) -> Result<R, RecordingError> {
        let io = |source: std::io::Error| RecordingError::Io { path: self.data_path.clone(), source };
        self.check_range(start, end)?;
        let n_frames = (end - start) as usize;
        if n_frames == 0 {
            return Ok(visit(&[]));
        }
        let file = File::open(&self.data_path).map_err(io)?;
        let frame_bytes = self.n_channels * self.dtype.bytes();
        let map = map_range(&file, start * frame_bytes as u64, n_frames * frame_bytes).map_err(io)?;
        Ok(visit(&map))
    }

    /// Call `visit` with the packed range of frames `start..end` (see
    /// [`crate::packed`]) and return its answer; an error instead when a
    /// value looked at lacks its exception record.
    fn visit_packed<R>(&self, start: u64, end: u64, visit: impl FnOnce(PackedRange) -> R) -> Result<R, RecordingError> {
        self.check_range(start, end)?;
        let files = self.packed.as_ref().expect("visit_packed is for packed data");
        let missing = std::sync::atomic::AtomicU64::new(0);
        let (first, last) = (start * self.n_channels as u64, end * self.n_channels as u64);
        if first == last {
            return Ok(visit(PackedRange { bytes: &[], records: &[], starts: &[0], first, missing: &missing }));
        }
        let map = |path: &PathBuf, offset: u64, len: u64| {
            let file = File::open(path).map_err(io_at(path))?;
            map_range(&file, offset, len as usize).map_err(io_at(path))
        };
        let bytes = map(&self.data_path, first, last - first)?;
        // The index entries of the blocks touched, and their records.
        let (b0, b1) = (first / packed::BLOCK_VALUES, (last - 1) / packed::BLOCK_VALUES + 1);
        let entries = map(&files.index, 8 * b0, 8 * (b1 - b0 + 1))?;
        let starts: Vec<u64> =
            entries.chunks_exact(8).map(|e| u64::from_le_bytes(e.try_into().unwrap_or([0; 8]))).collect();
        let (r0, r1) = (starts[0], starts[starts.len() - 1]);
        let starts: Vec<u64> = starts.iter().map(|s| s - r0).collect();
        let record_bytes = packed::RECORD_BYTES as u64;
        let records =
            if r1 == r0 { None } else { Some(map(&files.exceptions, r0 * record_bytes, (r1 - r0) * record_bytes)?) };
        let records: &[u8] = records.as_deref().unwrap_or(&[]);
        let range = PackedRange { bytes: &bytes, records, starts: &starts, first, missing: &missing };
        let answer = visit(range);
        match missing.into_inner() {
            0 => Ok(answer),
            value => Err(RecordingError::Packed {
                path: files.exceptions.clone(),
                message: format!(
                    "value {} (frame {}) is marked as an exception but has no record",
                    value - 1,
                    (value - 1) / self.n_channels as u64
                ),
            }),
        }
    }

    /// Call `put(index, bytes)` for every stored value of frames
    /// `start..end`, where `index` is its time-major position.
    fn visit_stored(&self, start: u64, end: u64, mut put: impl FnMut(usize, &[u8])) -> Result<(), RecordingError> {
        let io = |source: std::io::Error| RecordingError::Io { path: self.data_path.clone(), source };
        self.check_range(start, end)?;
        let n_frames = (end - start) as usize;
        let n_channels = self.n_channels;
        if n_frames == 0 {
            return Ok(());
        }
        if self.packed.is_some() {
            return self.visit_packed(start, end, |range| {
                range.in_pieces(0, range.len(), |k, bytes| {
                    for (j, value) in bytes.chunks_exact(2).enumerate() {
                        put(k + j, value);
                    }
                })
            });
        }
        let item = self.dtype.bytes();
        match self.layout {
            Layout::TimeMajor => {
                return self.visit_time_major(start, end, |map| {
                    for (index, bytes) in map.chunks_exact(item).enumerate() {
                        put(index, bytes);
                    }
                });
            }
            Layout::ChannelMajor => {
                let file = File::open(&self.data_path).map_err(io)?;
                let channel_bytes = self.n_frames * item as u64;
                for channel in 0..n_channels {
                    let map = map_range(&file, channel as u64 * channel_bytes + start * item as u64, n_frames * item)
                        .map_err(io)?;
                    for (frame, bytes) in map.chunks_exact(item).enumerate() {
                        put(frame * n_channels + channel, bytes);
                    }
                }
            }
        }
        Ok(())
    }

    /// Samples replaced by 0 under [`NonFinite::Zero`] so far.
    pub fn masked_samples(&self) -> u64 {
        self.masked_samples.load(std::sync::atomic::Ordering::Relaxed)
    }
}

/// What reading does with NaN or ±Inf in float data.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum NonFinite {
    /// Stop with an error naming the frame and channel (the default).
    #[default]
    Refuse,
    /// Replace by 0 µV and count them.
    Zero,
}

/// Split `0..n_frames` into chunks; see [`Recording::chunks`].
pub fn plan_chunks(n_frames: u64, chunk_frames: usize, margin_frames: usize) -> Vec<Chunk> {
    let chunk_frames = chunk_frames.max(1) as u64;
    let margin = margin_frames as u64;
    let mut chunks = Vec::new();
    let mut core_start = 0u64;
    while core_start < n_frames {
        let core_end = (core_start + chunk_frames).min(n_frames);
        chunks.push(Chunk {
            index: chunks.len(),
            core_start,
            core_end,
            read_start: core_start.saturating_sub(margin),
            read_end: (core_end + margin).min(n_frames),
        });
        core_start = core_end;
    }
    chunks
}

/// An integer that sums stored i16 numbers ([`Frames::add_stored_to`]):
/// i64 for any count, or i32 for up to [`StoredSum::MAX_TERMS`] rows, half
/// the bytes to add through.
pub trait StoredSum: Copy + Default + Send + std::ops::AddAssign + From<i16> + std::ops::Add<Output = Self> {
    /// How many rows of i16 numbers the sum holds without overflowing.
    const MAX_TERMS: u64;
    fn to_f64(self) -> f64;
}

impl StoredSum for i32 {
    const MAX_TERMS: u64 = (i32::MAX as u64) / 32768;
    fn to_f64(self) -> f64 {
        f64::from(self)
    }
}

impl StoredSum for i64 {
    const MAX_TERMS: u64 = (i64::MAX as u64) / 32768;
    fn to_f64(self) -> f64 {
        self as f64
    }
}

/// Time-major frames as [`Recording::visit_frames`] hands them out: in µV
/// already, or the stored i16 values, converted where they are looked at.
#[derive(Debug, Clone, Copy)]
pub enum Frames<'a> {
    Microvolts(&'a [f32]),
    StoredI16 {
        bytes: &'a [u8],
        gain: f64,
        offset: f64,
    },
    /// Packed i16 values ([`crate::packed`]), converted as `StoredI16`.
    Packed {
        range: PackedRange<'a>,
        gain: f64,
        offset: f64,
    },
}

impl Frames<'_> {
    /// How many values (frames × channels).
    pub fn len(&self) -> usize {
        match *self {
            Frames::Microvolts(values) => values.len(),
            Frames::StoredI16 { bytes, .. } => bytes.len() / 2,
            Frames::Packed { range, .. } => range.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The value at time-major position `index`, µV.
    #[inline]
    pub fn get(&self, index: usize) -> f32 {
        match *self {
            Frames::Microvolts(values) => values[index],
            Frames::StoredI16 { bytes, gain, offset } => i16_microvolts(&bytes[2 * index..2 * index + 2], gain, offset),
            Frames::Packed { range, gain, offset } => i16_microvolts(&range.value(index).to_le_bytes(), gain, offset),
        }
    }

    /// The values at positions `start..start + out.len()`, µV, into `out`.
    #[inline(always)]
    pub fn copy_to(&self, start: usize, out: &mut [f32]) {
        let end = start + out.len();
        match *self {
            Frames::Microvolts(values) => out.copy_from_slice(&values[start..end]),
            Frames::StoredI16 { bytes, gain, offset } => {
                for (o, b) in out.iter_mut().zip(bytes[2 * start..2 * end].chunks_exact(2)) {
                    *o = i16_microvolts(b, gain, offset);
                }
            }
            Frames::Packed { range, gain, offset } => copy_packed(range, gain, offset, start, out),
        }
    }

    /// Add the stored i16 numbers (no gain, no offset) at positions
    /// `start..start + sums.len()` to `sums`: exact integer sums, scaled to
    /// µV once by the caller ([`Recording::stored_i16_scale`]). Returns false,
    /// adding nothing, for frames handed over as µV.
    #[must_use]
    #[inline]
    pub fn add_stored_to<T: StoredSum>(&self, start: usize, sums: &mut [T]) -> bool {
        match *self {
            Frames::Microvolts(_) => return false,
            Frames::StoredI16 { bytes, .. } => {
                let (values, _) = bytes[2 * start..2 * (start + sums.len())].as_chunks::<2>();
                for (s, b) in sums.iter_mut().zip(values) {
                    *s += T::from(i16::from_le_bytes(*b));
                }
            }
            Frames::Packed { range, .. } => range.visit_values(
                start,
                sums,
                &mut None,
                |s, b| *s += T::from(i16::from(b)),
                // The sentinel's −128 was added: add the rest of the value.
                |s, v| *s += T::from(v) + T::from(128),
            ),
        }
        true
    }

    /// Ask the CPU to start loading the cache line holding position
    /// `start`, when it lies inside the frames (a hint only: no effect on
    /// results, none on CPUs without a prefetch instruction). For readers that
    /// stride across frames one block of channels at a time, whose lines the
    /// hardware prefetchers do not follow across pages.
    #[inline(always)]
    pub fn prefetch(&self, start: usize) {
        #[cfg(target_arch = "x86_64")]
        {
            let address = match *self {
                Frames::Microvolts(values) => values.get(start).map(|v| v as *const f32 as *const i8),
                Frames::StoredI16 { bytes, .. } => bytes.get(2 * start).map(|b| b as *const u8 as *const i8),
                Frames::Packed { .. } => None,
            };
            if let Some(address) = address {
                // SAFETY: SSE is part of x86_64; a prefetch never faults and
                // the address is inside a live slice.
                unsafe { std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(address) }
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        let _ = start;
    }

    /// Add the values at positions `start..start + sums.len()` to `sums`.
    #[inline]
    pub fn add_to(&self, start: usize, sums: &mut [f64]) {
        let end = start + sums.len();
        match *self {
            Frames::Microvolts(values) => {
                for (s, v) in sums.iter_mut().zip(&values[start..end]) {
                    *s += *v as f64;
                }
            }
            Frames::StoredI16 { bytes, gain, offset } => {
                for (s, b) in sums.iter_mut().zip(bytes[2 * start..2 * end].chunks_exact(2)) {
                    *s += i16_microvolts(b, gain, offset) as f64;
                }
            }
            Frames::Packed { range, gain, offset } => range.in_pieces(start, sums.len(), |k, bytes| {
                Frames::StoredI16 { bytes, gain, offset }.add_to(0, &mut sums[k..k + bytes.len() / 2])
            }),
        }
    }
}

/// [`Frames::copy_to`] for packed frames, converted as the plain i16 arm
/// converts ([`PackedRange::visit_values`]); kept out of line so that the
/// plain arms stay small enough to inline into the callers' loops.
#[inline(never)]
fn copy_packed(range: PackedRange, gain: f64, offset: f64, start: usize, out: &mut [f32]) {
    let microvolts = |stored: i16| stored_microvolts(stored, gain, offset);
    range.visit_values(start, out, &mut None, |o, b| *o = microvolts(i16::from(b)), |o, v| *o = microvolts(v))
}

/// The smallest stored i16 value whose µV (as [`Recording::read_frames`]
/// converts it with this gain and offset) satisfies `holds`, which must be
/// false below some value and true from it on (a comparison with a fixed
/// µV level, for a positive gain); 32768 when no i16 satisfies it. Lets a
/// comparison in µV run on the stored values.
pub fn i16_first_where(gain: f64, offset: f64, holds: impl Fn(f32) -> bool) -> i32 {
    let microvolts = |stored: i32| i16_microvolts(&(stored as i16).to_le_bytes(), gain, offset);
    let (mut low, mut high) = (i32::from(i16::MIN), i32::from(i16::MAX) + 1);
    while low < high {
        let middle = low + (high - low) / 2;
        if holds(microvolts(middle)) {
            high = middle;
        } else {
            low = middle + 1;
        }
    }
    low
}

/// One stored little-endian i16 as µV: the same arithmetic as
/// [`Dtype::decode`] followed by the offset and gain of [`Recording::read_frames`].
#[inline(always)]
fn i16_microvolts(bytes: &[u8], gain: f64, offset: f64) -> f32 {
    stored_microvolts(i16::from_le_bytes([bytes[0], bytes[1]]), gain, offset)
}

/// One stored i16 as µV, as every read of stored values converts it.
#[inline(always)]
pub fn stored_microvolts(stored: i16, gain: f64, offset: f64) -> f32 {
    ((stored as f64 - offset) * gain) as f32
}

/// Check the exceptions files of packed data against the data file's
/// `data_bytes` (one per value): whole records, and an index that fits.
fn check_packed(files: &PackedFiles, data_bytes: u64) -> Result<(), RecordingError> {
    let length = std::fs::metadata(&files.exceptions).map_err(io_at(&files.exceptions))?.len();
    if length % packed::RECORD_BYTES as u64 != 0 {
        let message = format!("{length} bytes is not a whole number of {}-byte records", packed::RECORD_BYTES);
        return Err(RecordingError::Packed { path: files.exceptions.clone(), message });
    }
    // The size first, so a wrong file is not read whole.
    let (index_length, entries) =
        (std::fs::metadata(&files.index).map_err(io_at(&files.index))?.len(), packed::index_entries(data_bytes));
    if index_length != 8 * entries {
        let message = format!("{index_length} bytes, but {data_bytes} values need {entries} entries of 8 bytes");
        return Err(RecordingError::Packed { path: files.index.clone(), message });
    }
    let index = std::fs::read(&files.index).map_err(io_at(&files.index))?;
    packed::check_index(&index, data_bytes, length / packed::RECORD_BYTES as u64)
        .map_err(|message| RecordingError::Packed { path: files.index.clone(), message })
}

/// An I/O error's conversion to a [`RecordingError`] naming `path`.
fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> RecordingError + '_ {
    move |source| RecordingError::Io { path: path.to_path_buf(), source }
}

fn map_range(file: &File, offset: u64, len: usize) -> std::io::Result<memmap2::Mmap> {
    // SAFETY: the map is read-only and private to this call; a file truncated
    // underneath a running stage is outside what any reader can defend
    // against, and the cache hashes inputs before a stage is trusted again.
    let map = unsafe { memmap2::MmapOptions::new().offset(offset).len(len).map(file)? };
    #[cfg(unix)]
    {
        let _ = map.advise(memmap2::Advice::Sequential);
    }
    Ok(map)
}

fn one_line(message: &str) -> String {
    message.split_whitespace().collect::<Vec<_>>().join(" ")
}

/// Read an electrode table: a header with at least `channel,x_um,y_um`
/// (any order, extra columns tolerated) and one row per stored channel.
///
/// # Errors
/// Missing columns, unparsable or non-finite numbers, channels out of range,
/// duplicate channels or positions, and channels without a row.
pub fn read_electrodes(path: &Path, n_channels: usize) -> Result<Vec<Electrode>, RecordingError> {
    let text =
        std::fs::read_to_string(path).map_err(|source| RecordingError::Io { path: path.to_path_buf(), source })?;
    let table_error =
        |line: usize, message: String| RecordingError::ElectrodeTable { path: path.to_path_buf(), line, message };
    let mut lines =
        text.lines().enumerate().map(|(i, l)| (i + 1, l.trim_end_matches('\r'))).filter(|(_, l)| !l.trim().is_empty());
    let (header_line, header) = lines.next().ok_or_else(|| table_error(1, "the table is empty (no header)".into()))?;
    let columns: Vec<String> = header.split(',').map(|c| c.trim().to_string()).collect();
    let find = |name: &str| {
        columns.iter().position(|c| c == name).ok_or_else(|| {
            table_error(header_line, format!("the header has no column {name} (columns: {})", columns.join(",")))
        })
    };
    let (channel_col, x_col, y_col) = (find("channel")?, find("x_um")?, find("y_um")?);
    let label_col = columns.iter().position(|c| c == "label");
    let group_col = columns.iter().position(|c| c == "group");
    let mut slots: Vec<Option<Electrode>> = vec![None; n_channels];
    let mut listed = 0usize;
    let mut seen_positions = std::collections::HashMap::new();
    for (line, row) in lines {
        let fields: Vec<&str> = row.split(',').map(str::trim).collect();
        if fields.len() < columns.len() {
            return Err(table_error(line, format!("{} fields, but the header has {}", fields.len(), columns.len())));
        }
        let channel: usize = fields[channel_col].parse().map_err(|_| {
            table_error(line, format!("channel is \"{}\", but it must be a whole number from 0", fields[channel_col]))
        })?;
        let number = |col: usize, name: &str| -> Result<f64, RecordingError> {
            match fields[col].parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(v),
                _ => Err(table_error(line, format!("{name} is \"{}\", but it must be a finite number", fields[col]))),
            }
        };
        let (x_um, y_um) = (number(x_col, "x_um")?, number(y_col, "y_um")?);
        if channel >= n_channels {
            return Err(table_error(
                line,
                format!(
                    "channel {channel} does not exist: the recording has {n_channels} channels (0..{})",
                    n_channels - 1
                ),
            ));
        }
        if slots[channel].is_some() {
            return Err(table_error(line, format!("channel {channel} is listed twice")));
        }
        let key = (x_um.to_bits(), y_um.to_bits());
        if let Some(other) = seen_positions.insert(key, channel) {
            return Err(table_error(
                line,
                format!("channel {channel} has the same position ({x_um}, {y_um}) µm as channel {other}"),
            ));
        }
        slots[channel] = Some(Electrode {
            channel,
            x_um,
            y_um,
            label: label_col.map(|c| fields[c].to_string()),
            group: group_col.map(|c| fields[c].to_string()),
        });
        listed += 1;
    }
    let mut electrodes = Vec::with_capacity(n_channels);
    for (channel, slot) in slots.into_iter().enumerate() {
        match slot {
            Some(e) => electrodes.push(e),
            None => {
                return Err(RecordingError::MissingPosition {
                    path: path.to_path_buf(),
                    channel,
                    listed,
                    channels: n_channels,
                })
            }
        }
    }
    Ok(electrodes)
}

/// Write an electrode table in the contract's format, with `label` and
/// `group` columns when any electrode has one.
pub fn write_electrodes(path: &Path, electrodes: &[Electrode]) -> std::io::Result<()> {
    let with_label = electrodes.iter().any(|e| e.label.is_some());
    let with_group = electrodes.iter().any(|e| e.group.is_some());
    let mut text = String::from("channel,x_um,y_um");
    text.push_str(if with_label { ",label" } else { "" });
    text.push_str(if with_group { ",group\n" } else { "\n" });
    for e in electrodes {
        text.push_str(&format!("{},{},{}", e.channel, e.x_um, e.y_um));
        for (present, value) in [(with_label, &e.label), (with_group, &e.group)] {
            if present {
                text.push(',');
                text.push_str(value.as_deref().unwrap_or(""));
            }
        }
        text.push('\n');
    }
    std::fs::write(path, text)
}

/// The fields of a description file, for writers (simulator, filter stage).
#[derive(Debug, Clone)]
pub struct DescriptionFields<'a> {
    /// Data file name, relative to the description.
    pub data: &'a str,
    pub sample_rate_hz: f64,
    pub n_channels: usize,
    pub dtype: Dtype,
    pub microvolts_per_unit: f64,
    pub offset: f64,
    /// Electrode table name, relative to the description.
    pub electrodes: &'a str,
    /// For packed i16 data: the exceptions file and its index, relative to the description.
    pub exceptions: Option<[&'a str; 2]>,
}

impl DescriptionFields<'_> {
    /// Write the description as TOML (time-major layout).
    pub fn write(&self, path: &Path) -> std::io::Result<()> {
        let text = format!(
            "data = \"{}\"\nsample_rate_hz = {:?}\nchannels = {}\ndtype = \"{}\"\n\
             layout = \"time-major\"\nmicrovolts_per_unit = {:?}\noffset = {:?}\nelectrodes = \"{}\"\n",
            self.data,
            self.sample_rate_hz,
            self.n_channels,
            self.dtype.name(),
            self.microvolts_per_unit,
            self.offset,
            self.electrodes
        );
        let packing = match self.exceptions {
            Some([exceptions, index]) => format!(
                "packing = \"{PACKING_I8_EXCEPTIONS}\"\nexceptions = \"{exceptions}\"\nexceptions_index = \"{index}\"\n"
            ),
            None => String::new(),
        };
        std::fs::write(path, text + &packing)
    }
}

/// Electrode pitch: the median distance from an electrode to its nearest
/// neighbour, µm (0 with fewer than two electrodes).
pub fn electrode_pitch(points: &[(f64, f64)]) -> f64 {
    let mut nearest: Vec<f64> = points
        .iter()
        .enumerate()
        .map(|(i, a)| {
            points
                .iter()
                .enumerate()
                .filter(|&(j, _)| j != i)
                .map(|(_, b)| (a.0 - b.0).hypot(a.1 - b.1))
                .fold(f64::INFINITY, f64::min)
        })
        .filter(|d| d.is_finite())
        .collect();
    if nearest.is_empty() {
        return 0.0;
    }
    nearest.sort_by(f64::total_cmp);
    nearest[nearest.len() / 2]
}

/// How a written recording stores its microvolts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Storage {
    /// 32-bit floats, exact.
    F32,
    /// 16-bit integers of `microvolts_per_unit` each, rounded; values
    /// beyond ±32767 units are clipped (and counted).
    I16 { microvolts_per_unit: f64 },
    /// The same integers, packed: one byte each plus exception records
    /// ([`crate::packed`]); read back exactly as `I16`.
    PackedI16 { microvolts_per_unit: f64 },
}

/// How much a [`RecordingWriter`] writes between requests to start writeback.
#[cfg(target_os = "linux")]
const WRITEBACK_EVERY_BYTES: u64 = 64 << 20;

/// Microvolts to stored bytes for one [`Storage`].
#[derive(Debug, Clone, Copy)]
pub struct SampleEncoder {
    storage: Storage,
}

impl SampleEncoder {
    /// Bytes each sample takes in the data file.
    pub fn bytes_per_sample(&self) -> usize {
        match self.storage {
            Storage::F32 => 4,
            Storage::I16 { .. } => 2,
            Storage::PackedI16 { .. } => 1,
        }
    }

    /// Encode `samples` into `out` (`bytes_per_sample()` bytes each, little
    /// endian); returns how many were clipped to the i16 range. Packed
    /// storage narrows each i16 to a byte ([`packed::narrow`]) and appends
    /// to `outside` the values that need an exception record, each as
    /// (`first` + its place in `samples`, its value), for
    /// [`RecordingWriter::write_encoded`]; other storages leave it alone.
    /// Always inlined, so it vectorizes with the caller's instruction set.
    #[inline(always)]
    pub fn encode(&self, samples: &[f32], out: &mut [u8], first: u64, outside: &mut Vec<(u64, i16)>) -> u64 {
        debug_assert_eq!(out.len(), samples.len() * self.bytes_per_sample());
        let microvolts_per_unit = match self.storage {
            Storage::F32 => {
                for (v, o) in samples.iter().zip(out.chunks_exact_mut(4)) {
                    o.copy_from_slice(&v.to_le_bytes());
                }
                return 0;
            }
            Storage::I16 { microvolts_per_unit } | Storage::PackedI16 { microvolts_per_unit } => microvolts_per_unit,
        };
        let scale = (1.0 / microvolts_per_unit) as f32;
        // Adding 1.5·2²³ rounds an f32 of magnitude below 2²² to the
        // nearest integer (ties to even), which then sits in the low bits of
        // the sum: integer steps only, no float-to-int cast (whose saturating
        // rule keeps the loop from vectorizing).
        const ROUNDER: f32 = 12_582_912.0;
        let rounder_bits = ROUNDER.to_bits() as i32;
        let to_units = |samples: &[f32], units: &mut [i16]| -> u32 {
            let mut clipped = 0;
            for (v, u) in samples.iter().zip(units.iter_mut()) {
                let v = v * scale;
                clipped += u32::from(!(-32767.0..=32767.0).contains(&v));
                let v = if v.is_nan() { 0.0 } else { v.clamp(-32767.0, 32767.0) };
                *u = ((v + ROUNDER).to_bits() as i32 - rounder_bits) as i16;
            }
            clipped
        };
        let packed = matches!(self.storage, Storage::PackedI16 { .. });
        let bytes = self.bytes_per_sample();
        // Tiles of a fixed size, which the compiler turns into SIMD.
        const TILE: usize = 64;
        let mut units = [0i16; TILE];
        let mut clipped = 0u64;
        for (t, (samples, out)) in samples.chunks(TILE).zip(out.chunks_mut(TILE * bytes)).enumerate() {
            let units = &mut units[..samples.len()];
            clipped += u64::from(to_units(samples, units));
            if packed {
                packed::narrow(units, out, first + (t * TILE) as u64, outside);
            } else {
                for (u, o) in units.iter().zip(out.chunks_exact_mut(2)) {
                    o.copy_from_slice(&u.to_le_bytes());
                }
            }
        }
        clipped
    }
}

/// Writes a time-major microvolt recording (data, electrodes and
/// description) frame block by frame block. The description is written last,
/// by [`RecordingWriter::finish`], so a half-written recording has none.
pub struct RecordingWriter {
    folder: PathBuf,
    stem: String,
    data: std::io::BufWriter<File>,
    sample_rate_hz: f64,
    n_channels: usize,
    storage: Storage,
    clipped: u64,
    bytes: Vec<u8>,
    /// Packed storage: the exceptions file and its index, and buffers for
    /// the packed bytes, records and index entries.
    exceptions: Option<(std::io::BufWriter<File>, std::io::BufWriter<File>)>,
    packer: packed::Packer,
    outside: Vec<(u64, i16)>,
    records: Vec<u8>,
    index: Vec<u8>,
    /// Bytes written so far, and how many of them the disk was asked to
    /// take (see [`RecordingWriter::write_encoded`]).
    written: u64,
    writeback_started: u64,
}

impl RecordingWriter {
    /// Start `<folder>/<stem>.bin`, `<stem>.electrodes.csv`; `<stem>.toml` follows at finish.
    pub fn create(
        folder: &Path,
        stem: &str,
        sample_rate_hz: f64,
        electrodes: &[Electrode],
        storage: Storage,
    ) -> std::io::Result<Self> {
        write_electrodes(&folder.join(format!("{stem}.electrodes.csv")), electrodes)?;
        let data = File::create(folder.join(format!("{stem}.bin")))?;
        let create =
            |name: String| File::create(folder.join(name)).map(|f| std::io::BufWriter::with_capacity(1 << 20, f));
        let exceptions = match storage {
            Storage::PackedI16 { .. } => {
                Some((create(format!("{stem}.exceptions.bin"))?, create(format!("{stem}.exceptions.index"))?))
            }
            _ => None,
        };
        Ok(RecordingWriter {
            folder: folder.to_path_buf(),
            stem: stem.to_string(),
            data: std::io::BufWriter::with_capacity(1 << 20, data),
            sample_rate_hz,
            n_channels: electrodes.len(),
            storage,
            clipped: 0,
            bytes: Vec::new(),
            exceptions,
            packer: packed::Packer::default(),
            outside: Vec::new(),
            records: Vec::new(),
            index: Vec::new(),
            written: 0,
            writeback_started: 0,
        })
    }

    /// How this writer turns microvolts into stored bytes; callers with
    /// several threads encode in parallel and hand the bytes to
    /// [`RecordingWriter::write_encoded`].
    pub fn encoder(&self) -> SampleEncoder {
        SampleEncoder { storage: self.storage }
    }

    /// Append time-major frames of microvolts (`samples.len()` must be a
    /// whole number of frames).
    pub fn write_frames(&mut self, samples: &[f32]) -> std::io::Result<()> {
        debug_assert_eq!(samples.len() % self.n_channels, 0);
        let encoder = self.encoder();
        let (mut bytes, mut outside) = (std::mem::take(&mut self.bytes), std::mem::take(&mut self.outside));
        bytes.resize(samples.len() * encoder.bytes_per_sample(), 0);
        outside.clear();
        let clipped = encoder.encode(samples, &mut bytes, 0, &mut outside);
        let written = self.write_encoded(&bytes, outside.iter().copied(), clipped);
        (self.bytes, self.outside) = (bytes, outside);
        written
    }

    /// Append frames already encoded by [`RecordingWriter::encoder`], of
    /// which `clipped` samples were clipped; for packed storage, `outside`
    /// lists the values that need an exception record as
    /// [`SampleEncoder::encode`] gave them, places counted from the first
    /// value of `bytes` (empty for other storages).
    pub fn write_encoded(
        &mut self,
        bytes: &[u8],
        outside: impl IntoIterator<Item = (u64, i16)>,
        clipped: u64,
    ) -> std::io::Result<()> {
        use std::io::Write;
        let bytes_per_sample = self.encoder().bytes_per_sample();
        debug_assert_eq!(bytes.len() % (self.n_channels * bytes_per_sample), 0);
        self.clipped += clipped;
        if let Some((exceptions, index)) = &mut self.exceptions {
            self.records.clear();
            self.index.clear();
            self.packer.add((bytes.len() / bytes_per_sample) as u64, outside, &mut self.records, &mut self.index);
            exceptions.write_all(&self.records)?;
            index.write_all(&self.index)?;
        }
        self.data.write_all(bytes)?;
        self.written += bytes.len() as u64;
        // Start the disk writes every so often instead of leaving gigabytes
        // dirty for the final sync: the sync at `finish` then waits for the
        // last stretch only.
        #[cfg(target_os = "linux")]
        if self.written - self.writeback_started >= WRITEBACK_EVERY_BYTES {
            use std::os::fd::AsRawFd;
            self.data.flush()?;
            let (start, length) = (self.writeback_started, self.written - self.writeback_started);
            // SAFETY: a system call on this writer's own open descriptor; it
            // only starts writeback of the range and touches no memory of ours.
            // Its result is advice only: `finish` syncs everything anyway.
            let _ = unsafe {
                libc::sync_file_range(
                    self.data.get_ref().as_raw_fd(),
                    start as libc::off64_t,
                    length as libc::off64_t,
                    libc::SYNC_FILE_RANGE_WRITE,
                )
            };
            self.writeback_started = self.written;
        }
        Ok(())
    }

    /// Samples clipped to the i16 range so far.
    pub fn clipped_samples(&self) -> u64 {
        self.clipped
    }

    /// Flush the data and write the description; returns its path.
    pub fn finish(self) -> std::io::Result<PathBuf> {
        use std::io::Write;
        let mut data = self.data;
        data.flush()?;
        data.get_ref().sync_all()?;
        if let Some((mut exceptions, mut index)) = self.exceptions {
            let mut last = Vec::new();
            self.packer.finish(&mut last);
            index.write_all(&last)?;
            for file in [&mut exceptions, &mut index] {
                file.flush()?;
                file.get_ref().sync_all()?;
            }
        }
        let description = self.folder.join(format!("{}.toml", self.stem));
        let (dtype, microvolts_per_unit) = match self.storage {
            Storage::F32 => (Dtype::F32, 1.0),
            Storage::I16 { microvolts_per_unit } | Storage::PackedI16 { microvolts_per_unit } => {
                (Dtype::I16, microvolts_per_unit)
            }
        };
        let exceptions = [format!("{}.exceptions.bin", self.stem), format!("{}.exceptions.index", self.stem)];
        DescriptionFields {
            data: &format!("{}.bin", self.stem),
            sample_rate_hz: self.sample_rate_hz,
            n_channels: self.n_channels,
            dtype,
            microvolts_per_unit,
            offset: 0.0,
            electrodes: &format!("{}.electrodes.csv", self.stem),
            exceptions: matches!(self.storage, Storage::PackedI16 { .. })
                .then(|| [exceptions[0].as_str(), exceptions[1].as_str()]),
        }
        .write(&description)?;
        Ok(description)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn chunks_cover_the_recording_once() {
        let chunks = plan_chunks(10, 4, 2);
        let cores: Vec<_> = chunks.iter().map(|c| (c.core_start, c.core_end)).collect();
        assert_eq!(cores, vec![(0, 4), (4, 8), (8, 10)]);
        assert_eq!((chunks[1].read_start, chunks[1].read_end), (2, 10));
        assert_eq!((chunks[0].read_start, chunks[2].read_end), (0, 10));
    }

    #[test]
    fn spread_windows_are_even_and_inside_the_recording() {
        let dir = tempfile::tempdir().unwrap();
        let description = crate::testing::write_f32_recording(dir.path(), "r", 1000.0, 1, 10.0, &vec![0.0; 100_000]);
        let recording = Recording::open(&description).unwrap();
        let windows = recording.spread_windows(4, 10_000, 500);
        let starts: Vec<u64> = windows.iter().map(|w| w.core_start).collect();
        assert_eq!(starts, vec![0, 30_000, 60_000, 90_000]);
        assert!(windows.iter().all(|w| w.read_end <= 100_000));
        assert_eq!(recording.spread_windows(4, 200_000, 0).len(), 1);
    }
}

#[cfg(test)]
mod layout_tests {
    use super::*;

    /// Write `values` (already in stored order) as `dtype` with a description.
    fn write(dir: &Path, dtype: &str, layout: &str, gain: f64, offset: f64, bytes: Vec<u8>) -> Recording {
        std::fs::write(dir.join("d.bin"), bytes).unwrap();
        std::fs::write(dir.join("e.csv"), "channel,x_um,y_um,label,z_um\n1,10,0,b,0\n0,0,0,a,0\n2,20,0,c,0\n").unwrap();
        let text = format!(
            "data = \"d.bin\"\nsample_rate_hz = 1000.0\nchannels = 3\ndtype = \"{dtype}\"\nlayout = \"{layout}\"\n\
             microvolts_per_unit = {gain:?}\noffset = {offset:?}\nelectrodes = \"e.csv\"\n"
        );
        std::fs::write(dir.join("r.toml"), text).unwrap();
        Recording::open(&dir.join("r.toml")).unwrap()
    }

    fn frames(recording: &Recording, start: u64, end: u64) -> Vec<f32> {
        let mut out = vec![123.0; 2];
        recording.read_frames(start, end, &mut out).unwrap();
        out
    }

    // Stored frames t0 = (1, 2, 3), t1 = (4, 5, 6) in every dtype and layout.
    #[test]
    fn every_dtype_and_layout_reads_the_same_microvolts() {
        let time_major = [1.0f64, 2.0, 3.0, 4.0, 5.0, 6.0];
        let channel_major = [1.0f64, 4.0, 2.0, 5.0, 3.0, 6.0];
        let expected: Vec<f32> = time_major.iter().map(|v| (v * 0.5) as f32).collect();
        for (layout, order) in [("time-major", time_major), ("channel-major", channel_major)] {
            let encodings: Vec<(&str, Vec<u8>)> = vec![
                ("i16", order.iter().flat_map(|v| (*v as i16).to_le_bytes()).collect()),
                ("i32", order.iter().flat_map(|v| (*v as i32).to_le_bytes()).collect()),
                ("f32", order.iter().flat_map(|v| (*v as f32).to_le_bytes()).collect()),
                ("f64", order.iter().flat_map(|v| v.to_le_bytes()).collect()),
            ];
            for (dtype, bytes) in encodings {
                let dir = tempfile::tempdir().unwrap();
                let recording = write(dir.path(), dtype, layout, 0.5, 0.0, bytes);
                assert_eq!(recording.n_frames, 2);
                assert_eq!(frames(&recording, 0, 2), expected, "{dtype} {layout}");
                assert_eq!(frames(&recording, 1, 2), expected[3..].to_vec(), "{dtype} {layout}");
                // Value by value (converted where looked at for i16), and rows
                // added: in µV, and as stored numbers exactly when the frames
                // are handed over as stored i16.
                let (values, sums, stored) = recording
                    .visit_frames(1, 2, &mut Vec::new(), |f| {
                        let (mut sums, mut stored) = (vec![10.0f64; 3], vec![10i64; 3]);
                        f.add_to(0, &mut sums);
                        let added = f.add_stored_to(0, &mut stored);
                        ((0..3).map(|i| f.get(i)).collect::<Vec<f32>>(), sums, added.then_some(stored))
                    })
                    .unwrap();
                assert_eq!(values, expected[3..].to_vec(), "{dtype} {layout}");
                assert_eq!(sums, [12.0, 12.5, 13.0], "{dtype} {layout}");
                let stores_i16 = dtype == "i16" && layout == "time-major";
                assert_eq!(stored, stores_i16.then_some(vec![14, 15, 16]), "{dtype} {layout}");
                assert_eq!(recording.stored_i16_scale(), stores_i16.then_some((0.5, 0.0)), "{dtype} {layout}");
            }
        }
    }

    #[test]
    fn unsigned_data_has_its_offset_removed() {
        let dir = tempfile::tempdir().unwrap();
        let stored = [32768u16, 32769, 32767, 0, 65535, 32768];
        let recording = write(
            dir.path(),
            "u16",
            "time-major",
            0.195,
            32768.0,
            stored.iter().flat_map(|v| v.to_le_bytes()).collect(),
        );
        let expected: Vec<f32> = stored.iter().map(|&v| ((v as f64 - 32768.0) * 0.195) as f32).collect();
        assert_eq!(frames(&recording, 0, 2), expected);
    }

    #[test]
    fn electrode_rows_may_come_in_any_order_with_extra_columns() {
        let dir = tempfile::tempdir().unwrap();
        let recording = write(dir.path(), "i16", "time-major", 1.0, 0.0, vec![0; 12]);
        let xs: Vec<f64> = recording.electrodes.iter().map(|e| e.x_um).collect();
        assert_eq!(xs, vec![0.0, 10.0, 20.0]);
        assert_eq!(recording.electrodes[1].label.as_deref(), Some("b"));
    }

    #[test]
    fn reading_past_the_end_is_an_error_not_a_panic() {
        let dir = tempfile::tempdir().unwrap();
        let recording = write(dir.path(), "i16", "time-major", 1.0, 0.0, vec![0; 12]);
        let mut out = Vec::new();
        let message = recording.read_frames(1, 3, &mut out).unwrap_err().to_string();
        assert!(message.contains("d.bin") && message.contains("has 2 frames"), "{message}");
    }
}

/// The frames a [`Recording::visit_frames`] hands over, channel-major µV
/// (`out[channel * n_frames + frame]`), converted as they are moved: in
/// parallel over runs of frames, each reading tiles of whole frames (one
/// run of values: for packed frames one start of decoding per tile) and
/// writing each column's stretch of the tile. One pass over the stored
/// values, where reading them to µV first and transposing after takes two.
pub fn frames_to_channel_major(frames: &Frames, n_channels: usize, out: &mut Vec<f32>) {
    use rayon::prelude::*;
    const FRAMES_PER_TASK: usize = 1024;
    let n_frames = frames.len() / n_channels.max(1);
    out.clear();
    out.resize(n_frames * n_channels, 0.0);
    if n_frames == 0 {
        return;
    }
    let runs = crate::runs::group_runs(out.chunks_mut(n_frames), FRAMES_PER_TASK);
    runs.into_par_iter().enumerate().for_each_init(Vec::new, |tile, (task, mut columns)| {
        Transpose.run(frames, task * FRAMES_PER_TASK, &mut columns, tile)
    });
}

/// One run of frames of [`frames_to_channel_major`], built for AVX-512 or
/// AVX2 when the CPU has them (`wide_build!`: the conversion to µV is then
/// vectorized), with the same values out.
struct Transpose;

impl Transpose {
    fn run(&self, frames: &Frames, first: usize, columns: &mut [&mut [f32]], tile: &mut Vec<f32>) {
        crate::wide_build!(
            Transpose,
            self.run_portable(frames: &Frames, first: usize, columns: &mut [&mut [f32]], tile: &mut Vec<f32>) -> ()
        )
    }

    #[inline(always)]
    fn run_portable(&self, frames: &Frames, first: usize, columns: &mut [&mut [f32]], tile: &mut Vec<f32>) {
        // 16 frames of f32: each column's stretch is one cache line.
        const TILE_FRAMES: usize = 16;
        let n_channels = columns.len();
        let count = columns.first().map_or(0, |c| c.len());
        for start in (0..count).step_by(TILE_FRAMES) {
            let m = TILE_FRAMES.min(count - start);
            tile.resize(m * n_channels, 0.0);
            frames.copy_to((first + start) * n_channels, tile);
            for (c, column) in columns.iter_mut().enumerate() {
                for (j, o) in column[start..start + m].iter_mut().enumerate() {
                    *o = tile[j * n_channels + c];
                }
            }
        }
    }
}

/// Transpose time-major frames (`frames[frame * n_channels + channel]`)
/// into channel-major columns (`out[channel * n_frames + frame]`).
pub fn to_channel_major(frames: &[f32], n_channels: usize, out: &mut Vec<f32>) {
    frames_to_channel_major(&Frames::Microvolts(frames), n_channels, out);
}

#[cfg(test)]
mod transpose_tests {
    use super::{packed, Dtype, Electrode, Frames, Recording, RecordingWriter, Storage};

    #[test]
    fn channel_major_columns_match_strided_reads() {
        // Two whole blocks of 32 channels and a part one.
        let (n_frames, n_channels) = (130, 70);
        let frames: Vec<f32> = (0..n_frames * n_channels).map(|i| i as f32).collect();
        let mut columns = vec![1.0; 5];
        super::to_channel_major(&frames, n_channels, &mut columns);
        for channel in 0..n_channels {
            let strided: Vec<f32> = frames.iter().skip(channel).step_by(n_channels).copied().collect();
            assert_eq!(&columns[channel * n_frames..(channel + 1) * n_frames], &strided[..]);
        }
    }

    #[test]
    fn i16_storage_rounds_to_its_step_and_counts_clipped_samples() {
        use super::{Dtype, Electrode, Recording, RecordingWriter, Storage};
        let dir = tempfile::tempdir().unwrap();
        let electrodes: Vec<Electrode> = (0..2)
            .map(|channel| Electrode { channel, x_um: channel as f64 * 10.0, y_um: 0.0, label: None, group: None })
            .collect();
        let step = 0.1;
        let mut writer =
            RecordingWriter::create(dir.path(), "f", 1000.0, &electrodes, Storage::I16 { microvolts_per_unit: step })
                .unwrap();
        let samples = [1.234f32, -5.56, 3276.7, -4000.0, 0.04, 0.06];
        writer.write_frames(&samples).unwrap();
        assert_eq!(writer.clipped_samples(), 1);
        let description = writer.finish().unwrap();
        let recording = Recording::open(&description).unwrap();
        assert_eq!((recording.n_frames, recording.dtype), (3, Dtype::I16));
        let mut back = Vec::new();
        recording.read_frames(0, 3, &mut back).unwrap();
        let expected = [1.2f32, -5.6, 3276.7, -3276.7, 0.0, 0.1];
        for (b, e) in back.iter().zip(expected) {
            assert!((b - e).abs() < 1e-3, "{back:?}");
        }
    }

    /// The same frames written as plain and as packed i16 into `dir`.
    fn plain_and_packed(dir: &std::path::Path, n_channels: usize, samples: &[f32]) -> (Recording, Recording) {
        let electrodes: Vec<Electrode> = (0..n_channels)
            .map(|channel| Electrode { channel, x_um: channel as f64, y_um: 0.0, label: None, group: None })
            .collect();
        let step = 0.5;
        let open = |stem: &str, storage: Storage| {
            let mut writer = RecordingWriter::create(dir, stem, 1000.0, &electrodes, storage).unwrap();
            // In two pieces, the second starting inside an index block.
            let cut = samples.len() / n_channels / 3 * n_channels;
            writer.write_frames(&samples[..cut]).unwrap();
            writer.write_frames(&samples[cut..]).unwrap();
            Recording::open(&writer.finish().unwrap()).unwrap()
        };
        (
            open("plain", Storage::I16 { microvolts_per_unit: step }),
            open("packed", Storage::PackedI16 { microvolts_per_unit: step }),
        )
    }

    // Packed i16 reads back exactly as plain i16, whole and in ranges that
    // cut index blocks, through every reader, at about half the bytes.
    #[test]
    fn packed_i16_reads_as_plain_i16() {
        let dir = tempfile::tempdir().unwrap();
        let n_channels = 7;
        let mut rng = crate::testing::TestRng::new(3);
        // Noise of 40 steps (a few % beyond ±127 steps), rare spikes, clipping.
        let samples: Vec<f32> = (0..40_000 * n_channels)
            .map(|i| match i % 997 {
                0 => -20_000.0,
                1 => 300.0,
                _ => (rng.normal() * 20.0) as f32,
            })
            .collect();
        let (plain, packed) = plain_and_packed(dir.path(), n_channels, &samples);
        assert_eq!((packed.n_frames, packed.dtype), (plain.n_frames, Dtype::I16));
        let bytes = |r: &Recording| {
            let files = r.packed.iter().flat_map(|f| [&f.exceptions, &f.index]);
            std::iter::once(&r.data_path).chain(files).map(|p| std::fs::metadata(p).unwrap().len()).sum::<u64>()
        };
        assert!(bytes(&packed) * 10 < bytes(&plain) * 6, "{} against {}", bytes(&packed), bytes(&plain));
        let n = plain.n_frames;
        for (start, end) in [(0, n), (0, 1), (9362, 9363), (9000, 19_000), (n - 3, n), (5, 5)] {
            let (mut a, mut b) = (Vec::new(), Vec::new());
            plain.read_frames(start, end, &mut a).unwrap();
            packed.read_frames(start, end, &mut b).unwrap();
            assert_eq!(a, b, "read_frames {start}..{end}");
            let (mut sa, mut sb) = (Vec::new(), Vec::new());
            plain.read_stored(start, end, &mut sa).unwrap();
            packed.read_stored(start, end, &mut sb).unwrap();
            assert_eq!(sa, sb, "read_stored {start}..{end}");
            let look = |f: Frames| {
                let values: Vec<f32> = (0..f.len()).map(|i| f.get(i)).collect();
                let mut copied = vec![0.0; f.len()];
                f.copy_to(0, &mut copied);
                let mut sums = vec![1.0f64; n_channels.min(f.len())];
                f.add_to(f.len() - sums.len(), &mut sums);
                let mut stored = vec![-3i64; f.len()];
                assert!(f.add_stored_to(0, &mut stored));
                let mut narrow = vec![-3i32; f.len()];
                assert!(f.add_stored_to(0, &mut narrow));
                assert!(stored.iter().zip(&narrow).all(|(&s, &n)| s == i64::from(n)), "i32 sums {start}..{end}");
                (values, copied, sums, stored)
            };
            let a = plain.visit_frames(start, end, &mut Vec::new(), look).unwrap();
            let b = packed.visit_frames(start, end, &mut Vec::new(), look).unwrap();
            assert_eq!(a, b, "visit_frames {start}..{end}");
            let mut by_channel = Vec::new();
            super::to_channel_major(
                &sa.iter().map(|&v| (v * 0.5) as f32).collect::<Vec<_>>(),
                n_channels,
                &mut by_channel,
            );
            for recording in [&plain, &packed] {
                let mut columns = vec![];
                let transpose = |f: Frames| super::frames_to_channel_major(&f, n_channels, &mut columns);
                recording.visit_frames(start, end, &mut Vec::new(), transpose).unwrap();
                assert_eq!(columns, by_channel, "frames_to_channel_major {start}..{end}");
            }
            assert_eq!(a.0, a.1);
            let stored_plus_3: Vec<f64> = a.3.iter().map(|&s| (s + 3) as f64).collect();
            assert_eq!(stored_plus_3, sa, "add_stored_to {start}..{end}");
        }
    }

    // Damaged exceptions files are refused with the file named: a partial
    // record, an index that does not add up, and a sentinel whose record is
    // gone (found when that value is read).
    #[test]
    fn damaged_packed_files_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let samples: Vec<f32> = (0..3000).map(|i| if i % 10 == 0 { 500.0 } else { 1.0 }).collect();
        let (_, packed) = plain_and_packed(dir.path(), 3, &samples);
        let files = packed.packed.clone().unwrap();
        let description = packed.description_path.clone();
        let records = std::fs::read(&files.exceptions).unwrap();
        let refused = |what: &str| {
            let message = Recording::open(&description).unwrap_err().to_string();
            assert!(message.contains(what), "{message}");
        };
        std::fs::write(&files.exceptions, &records[..records.len() - 1]).unwrap();
        refused("exceptions.bin: packed data: 1199 bytes is not a whole number of 4-byte records");
        std::fs::write(&files.exceptions, &records[..records.len() - packed::RECORD_BYTES]).unwrap();
        refused("exceptions.index: packed data: the index counts 300 records, but the exceptions file holds 299");
        std::fs::write(&files.exceptions, &records).unwrap();
        let index = std::fs::read(&files.index).unwrap();
        std::fs::write(&files.index, &index[..8]).unwrap();
        refused("exceptions.index: packed data: 8 bytes, but 3000 values need 2 entries of 8 bytes");
        std::fs::write(&files.index, &index).unwrap();
        // The last record moved to a position that is not a sentinel.
        let mut moved = records.clone();
        let last = moved.len() - packed::RECORD_BYTES;
        moved[last..last + 2].copy_from_slice(&2999u16.to_le_bytes());
        std::fs::write(&files.exceptions, &moved).unwrap();
        let recording = Recording::open(&description).unwrap();
        recording.read_frames(0, 500, &mut Vec::new()).unwrap();
        let message = recording.read_frames(0, 1000, &mut Vec::new()).unwrap_err().to_string();
        assert!(message.contains("value 2990 (frame 996) is marked as an exception but has no record"), "{message}");
        let text = std::fs::read_to_string(&description).unwrap();
        std::fs::write(&description, text.replace("i8+exceptions", "zip")).unwrap();
        refused("packing is \"zip\", but it must be \"none\" or \"i8+exceptions\"");
    }

    // The i16 encoding of many values (whole tiles and a tail) against the
    // plain rule: round half to even in steps, clamp to ±32767, NaN to 0.
    #[test]
    fn i16_encoding_rounds_half_to_even_and_clamps() {
        use super::{SampleEncoder, Storage};
        let encoder = SampleEncoder { storage: Storage::I16 { microvolts_per_unit: 0.5 } };
        let mut samples: Vec<f32> = vec![0.25, 0.75, 1.25, -0.25, -0.75, -1.25, 0.0, -0.0, 16383.75, -16383.75];
        samples.extend([20000.0, -20000.0, f32::NAN, f32::INFINITY, f32::NEG_INFINITY]);
        samples.extend((0..200).map(|i| (i as f32 - 100.0) * 0.123_45));
        // 200, −128 and 127 steps: the first two need a byte's sentinel.
        samples.extend([100.0, -64.0, 63.5]);
        let mut bytes = vec![0u8; 2 * samples.len()];
        let clipped = encoder.encode(&samples, &mut bytes, 0, &mut Vec::new());
        let expected: Vec<i16> = samples
            .iter()
            .map(|&v| {
                let units = v * 2.0;
                if units.is_nan() {
                    0
                } else {
                    units.round_ties_even().clamp(-32767.0, 32767.0) as i16
                }
            })
            .collect();
        let got: Vec<i16> = bytes.chunks_exact(2).map(|b| i16::from_le_bytes([b[0], b[1]])).collect();
        assert_eq!(got, expected);
        assert_eq!(&got[..6], &[0, 2, 2, 0, -2, -2]);
        // ±16383.75 µV (32767.5 steps), ±20000 µV, NaN and ±∞ are beyond
        // ±32767 steps of 0.5 µV.
        assert_eq!(clipped, 7);
        // Packed: the same values, a byte each where they fit, the others
        // listed with their place counted from `first`, across tiles.
        let packed = SampleEncoder { storage: Storage::PackedI16 { microvolts_per_unit: 0.5 } };
        let (mut bytes, mut outside) = (vec![0u8; samples.len()], Vec::new());
        assert_eq!(packed.encode(&samples, &mut bytes, 1000, &mut outside), 7);
        let listed: Vec<(u64, i16)> = expected
            .iter()
            .enumerate()
            .filter(|(_, v)| !(-127..=127).contains(*v))
            .map(|(k, v)| (1000 + k as u64, *v))
            .collect();
        assert_eq!(outside, listed);
        assert!(listed.iter().any(|(k, _)| *k >= 1064), "some beyond the first tile");
        for (b, v) in bytes.iter().zip(&expected) {
            assert_eq!(*b, if (-127..=127).contains(v) { *v as i8 as u8 } else { crate::packed::SENTINEL });
        }
    }

    #[test]
    fn pitch_is_the_typical_nearest_neighbour_distance() {
        let grid: Vec<(f64, f64)> = (0..64).map(|i| ((i % 8) as f64 * 200.0, (i / 8) as f64 * 200.0)).collect();
        assert_eq!(super::electrode_pitch(&grid), 200.0);
        assert_eq!(super::electrode_pitch(&grid[..1]), 0.0);
    }
}
