//! Streaming access to the detect stage's `events.parquet`, and a walk over
//! the recording that hands each chunk's events to a callback together with
//! the frames around them. Used by every stage that cuts snippets around
//! spikes, so memory stays bounded by one chunk and one batch of events.

use crate::error::ContractError;
use crate::recording::{Frames, Recording};
use crate::table::column;
use arrow_array::{Float32Array, Int32Array, Int64Array};
use parquet::arrow::arrow_reader::{ParquetRecordBatchReader, ParquetRecordBatchReaderBuilder};
use std::path::{Path, PathBuf};

/// One detected event, as `events.parquet` stores it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EventRecord {
    /// Row number in the events table (0-based).
    pub index: u64,
    pub sample: u64,
    pub channel: usize,
    pub amplitude_uv: f32,
}

/// Events read batch by batch, in table order (ascending sample).
pub struct EventStream {
    path: PathBuf,
    reader: ParquetRecordBatchReader,
    buffer: std::vec::IntoIter<EventRecord>,
    next_index: u64,
    /// Rows in the table.
    pub n_events: u64,
}

impl EventStream {
    /// Open an events table.
    ///
    /// # Errors
    /// Missing file or not Parquet, with the path.
    pub fn open(path: &Path) -> Result<Self, ContractError> {
        let file = std::fs::File::open(path).map_err(|e| ContractError::io(path, e))?;
        let parquet = |source| ContractError::Parquet { path: path.to_path_buf(), source };
        let builder = ParquetRecordBatchReaderBuilder::try_new(file).map_err(parquet)?;
        let n_events = builder.metadata().file_metadata().num_rows().max(0) as u64;
        let reader = builder.with_batch_size(65536).build().map_err(parquet)?;
        Ok(EventStream { path: path.to_path_buf(), reader, buffer: Vec::new().into_iter(), next_index: 0, n_events })
    }

    /// The next event.
    ///
    /// # Errors
    /// A batch cannot be decoded or lacks the columns.
    pub fn next_event(&mut self) -> Result<Option<EventRecord>, ContractError> {
        loop {
            if let Some(event) = self.buffer.next() {
                return Ok(Some(event));
            }
            let Some(batch) = self.reader.next() else { return Ok(None) };
            let batch = batch.map_err(|source| ContractError::Arrow { path: self.path.clone(), source })?;
            let samples: &Int64Array = column(&self.path, &batch, "sample")?;
            let channels: &Int32Array = column(&self.path, &batch, "channel")?;
            let amplitudes: &Float32Array = column(&self.path, &batch, "amplitude_uv")?;
            let first = self.next_index;
            let events: Vec<EventRecord> = (0..batch.num_rows())
                .map(|i| EventRecord {
                    index: first + i as u64,
                    sample: samples.value(i).max(0) as u64,
                    channel: channels.value(i).max(0) as usize,
                    amplitude_uv: amplitudes.value(i),
                })
                .collect();
            self.next_index += events.len() as u64;
            self.buffer = events.into_iter();
        }
    }
}

impl Iterator for EventStream {
    type Item = Result<EventRecord, ContractError>;

    fn next(&mut self) -> Option<Self::Item> {
        self.next_event().transpose()
    }
}

/// Frames of one chunk with the events whose sample lies in its core.
pub struct EventWindow<'a> {
    /// Time-major µV frames starting at `first_frame`.
    pub frames: Frames<'a>,
    pub first_frame: u64,
    pub n_frames: usize,
    pub events: &'a [EventRecord],
}

impl EventWindow<'_> {
    /// Position of absolute `frame` among the frames held, clamped to them.
    #[inline]
    fn local(&self, frame: i64) -> usize {
        (frame - self.first_frame as i64).clamp(0, self.n_frames as i64 - 1) as usize
    }

    /// Value at absolute `frame` on `channel`, clamped to the frames held.
    #[inline]
    pub fn value(&self, frame: i64, channel: usize, n_channels: usize) -> f32 {
        self.frames.get(self.local(frame) * n_channels + channel)
    }

    /// Channels `first_channel..first_channel + out.len()` at absolute
    /// `frame` (clamped to the frames held) into `out`, µV: the values
    /// [`EventWindow::value`] gives, read as one run.
    #[inline]
    pub fn copy_channels(&self, frame: i64, first_channel: usize, n_channels: usize, out: &mut [f32]) {
        self.frames.copy_to(self.local(frame) * n_channels + first_channel, out);
    }

    /// Add every channel at absolute `frame` (clamped to the frames held)
    /// to `sums` (one per channel).
    #[inline]
    pub fn add_row(&self, frame: i64, sums: &mut [f64]) {
        self.frames.add_to(self.local(frame) * sums.len(), sums);
    }

    /// [`EventWindow::add_row`] in stored numbers ([`Frames::add_stored_to`]);
    /// false, adding nothing, when the frames are µV.
    #[must_use]
    #[inline]
    pub fn add_stored_row(&self, frame: i64, sums: &mut [i64]) -> bool {
        self.frames.add_stored_to(self.local(frame) * sums.len(), sums)
    }
}

/// Walk the recording chunk by chunk (cores of `chunk_frames`, reads
/// widened by `margin_frames`), calling `visit` for every chunk that holds
/// at least one event (events must be in ascending sample order; `origin`
/// names their source in errors). Chunks without events are not read.
///
/// # Errors
/// Reading fails, an event lies outside the recording or out of order, or
/// `visit` fails.
pub fn for_each_event_window<E: From<ContractError>>(
    recording: &Recording,
    events: impl IntoIterator<Item = Result<EventRecord, ContractError>>,
    origin: &Path,
    chunk_frames: usize,
    margin_frames: usize,
    mut visit: impl FnMut(&EventWindow) -> Result<(), E>,
) -> Result<(), E> {
    let mut events = events.into_iter();
    let mut scratch = Vec::new();
    let mut pending: Option<EventRecord> = events.next().transpose()?;
    let mut batch = Vec::new();
    for chunk in recording.chunks(chunk_frames, margin_frames) {
        batch.clear();
        while let Some(event) = pending {
            if event.sample >= chunk.core_end {
                break;
            }
            if event.channel >= recording.n_channels {
                return Err(ContractError::Format {
                    path: origin.to_path_buf(),
                    message: format!("row {}: channel {} does not exist in the recording", event.index, event.channel),
                }
                .into());
            }
            if event.sample < chunk.core_start {
                return Err(ContractError::Format {
                    path: origin.to_path_buf(),
                    message: format!("row {}: events are not in ascending sample order", event.index),
                }
                .into());
            }
            batch.push(event);
            pending = events.next().transpose()?;
        }
        if batch.is_empty() {
            continue;
        }
        // Only the values the callback looks at are converted (for i16 files).
        recording
            .visit_frames(chunk.read_start, chunk.read_end, &mut scratch, |frames| {
                visit(&EventWindow {
                    frames,
                    first_frame: chunk.read_start,
                    n_frames: chunk.read_frames(),
                    events: &batch,
                })
            })
            .map_err(ContractError::from)??;
    }
    if let Some(event) = pending {
        return Err(ContractError::Format {
            path: origin.to_path_buf(),
            message: format!(
                "row {}: sample {} is past the recording's end ({} frames)",
                event.index, event.sample, recording.n_frames
            ),
        }
        .into());
    }
    Ok(())
}
