//! Streaming access to the detect stage's `events.parquet`, and a walk over
//! the recording that hands each chunk's events to a callback together with
//! the frames around them. Used by every stage that cuts snippets around
//! spikes, so memory stays bounded by one chunk and one batch of events.

use crate::error::ContractError;
use crate::recording::{Frames, Recording, StoredSum};
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

    /// The frames `first_frame..first_frame + out.len() / row_len` (each
    /// clamped to the frames held) of the channels of `runs` into `out`,
    /// µV, frame-major: frame k's channel at list position p lands at
    /// `out[k * row_len + p]`, where `row_len` is the channels in all runs.
    ///
    /// Runs close together (a span of at most [`SPAN_VALUES`] channels) are
    /// read as that one span per frame, then moved to their places: one
    /// read instead of one per run, which for packed frames is one start
    /// of decoding (and search for the first exception record) per frame.
    pub fn copy_runs(&self, first_frame: i64, runs: &[ChannelRun], n_channels: usize, out: &mut [f32]) {
        let row_len: usize = runs.iter().map(|run| run.len).sum();
        let low = runs.iter().map(|run| run.channel).min().unwrap_or(0);
        let high = runs.iter().map(|run| run.channel + run.len).max().unwrap_or(0);
        let mut span = [0.0f32; SPAN_VALUES];
        for (k, row) in out.chunks_exact_mut(row_len.max(1)).enumerate() {
            let frame = first_frame + k as i64;
            if runs.len() > 1 && high - low <= SPAN_VALUES {
                self.copy_channels(frame, low, n_channels, &mut span[..high - low]);
                for run in runs {
                    row[run.position..][..run.len].copy_from_slice(&span[run.channel - low..][..run.len]);
                }
            } else {
                for run in runs {
                    self.copy_channels(frame, run.channel, n_channels, &mut row[run.position..][..run.len]);
                }
            }
        }
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
    pub fn add_stored_row<T: StoredSum>(&self, frame: i64, sums: &mut [T]) -> bool {
        self.frames.add_stored_to(self.local(frame) * sums.len(), sums)
    }
}

/// The widest span of channels [`EventWindow::copy_runs`] reads in one go.
pub const SPAN_VALUES: usize = 128;

/// Consecutive channel numbers in a list of channels: the first channel,
/// its position in the list, and how many follow on. A list's runs are
/// read in one go each ([`EventWindow::copy_runs`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ChannelRun {
    pub channel: usize,
    pub position: usize,
    pub len: usize,
}

/// The runs of consecutive channel numbers in `channels`, in list order.
pub fn channel_runs(channels: impl IntoIterator<Item = usize>) -> Vec<ChannelRun> {
    let mut runs: Vec<ChannelRun> = Vec::new();
    for (position, channel) in channels.into_iter().enumerate() {
        match runs.last_mut() {
            Some(run) if run.channel + run.len == channel => run.len += 1,
            _ => runs.push(ChannelRun { channel, position, len: 1 }),
        }
    }
    runs
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn channel_runs_split_where_numbers_jump() {
        let run = |channel, position, len| ChannelRun { channel, position, len };
        assert_eq!(channel_runs([0, 1, 2, 5, 7, 8]), vec![run(0, 0, 3), run(5, 3, 1), run(7, 4, 2)]);
        assert_eq!(channel_runs([4, 3]), vec![run(4, 0, 1), run(3, 1, 1)]);
        assert!(channel_runs([]).is_empty());
    }

    // A block of runs holds, value for value, what `value` reads one at a
    // time, frames past either end of the window clamped to it.
    #[test]
    fn copied_runs_hold_the_values_read_one_by_one() {
        let (n_channels, n_frames) = (7, 6);
        let frames: Vec<f32> = (0..n_channels * n_frames).map(|i| i as f32 * 0.5 - 3.0).collect();
        let window = EventWindow { frames: Frames::Microvolts(&frames), first_frame: 10, n_frames, events: &[] };
        for channels in [vec![3, 4, 0, 6, 5, 1], vec![2, 3], vec![6, 0]] {
            check_runs(&window, n_channels, &channels);
        }
        // Runs further apart than one span are read run by run.
        let n_channels = SPAN_VALUES + 3;
        let frames: Vec<f32> = (0..n_channels * n_frames).map(|i| i as f32).collect();
        let window = EventWindow { frames: Frames::Microvolts(&frames), first_frame: 10, n_frames, events: &[] };
        check_runs(&window, n_channels, &[SPAN_VALUES + 1, SPAN_VALUES + 2, 0, 1]);
    }

    fn check_runs(window: &EventWindow, n_channels: usize, channels: &[usize]) {
        let runs = channel_runs(channels.iter().copied());
        for first in [7i64, 10, 12, 14] {
            let mut block = vec![f32::NAN; 5 * channels.len()];
            window.copy_runs(first, &runs, n_channels, &mut block);
            for (k, row) in block.chunks(channels.len()).enumerate() {
                let expected: Vec<f32> =
                    channels.iter().map(|&c| window.value(first + k as i64, c, n_channels)).collect();
                assert_eq!(row, expected.as_slice(), "frame {}", first + k as i64);
            }
        }
    }
}
