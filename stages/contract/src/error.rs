//! Error types of the contract library. Every variant names the file it is
//! about, so a message read in a log at 3 a.m. says where to look.

use std::path::PathBuf;

/// A recording description that cannot be used, with the file and the problem.
#[derive(Debug, thiserror::Error)]
pub enum RecordingError {
    #[error("{path}: cannot read: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}: {message}")]
    Toml { path: PathBuf, message: String },
    #[error("{path}: {key} is {value}, but it must be {expected}")]
    BadValue { path: PathBuf, key: &'static str, value: String, expected: String },
    #[error("{path}: data file {data} does not exist")]
    MissingData { path: PathBuf, data: PathBuf },
    #[error("{path}: electrode table {electrodes} does not exist")]
    MissingElectrodes { path: PathBuf, electrodes: PathBuf },
    #[error(
        "{path}: {bytes} bytes is not a whole number of {frame_bytes}-byte frames ({channels} channels of {dtype})"
    )]
    PartialFrame { path: PathBuf, bytes: u64, frame_bytes: u64, channels: usize, dtype: &'static str },
    #[error("{path}: the data file is empty (0 frames)")]
    EmptyData { path: PathBuf },
    #[error("{path}: frame {frame}, channel {channel} holds {value}; set the filter stage's non_finite = \"zero\" to replace such samples by 0")]
    NonFinite { path: PathBuf, frame: u64, channel: usize, value: String },
    #[error("{path}: line {line}: {message}")]
    ElectrodeTable { path: PathBuf, line: usize, message: String },
    #[error("{path}: packed data: {message}")]
    Packed { path: PathBuf, message: String },
    #[error("{path}: channel {channel} has no position (the table lists {listed} of {channels} channels)")]
    MissingPosition { path: PathBuf, channel: usize, listed: usize, channels: usize },
}

/// Errors of the stage-facing parts of the contract (requests, tables).
#[derive(Debug, thiserror::Error)]
pub enum ContractError {
    #[error(transparent)]
    Recording(#[from] RecordingError),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}: {message}")]
    Format { path: PathBuf, message: String },
    #[error("{path}: Parquet: {source}")]
    Parquet {
        path: PathBuf,
        #[source]
        source: parquet::errors::ParquetError,
    },
    #[error("{path}: Arrow: {source}")]
    Arrow {
        path: PathBuf,
        #[source]
        source: arrow_schema::ArrowError,
    },
    #[error("request {path}: parameter {key}: {message}")]
    Param { path: PathBuf, key: String, message: String },
    #[error("request {path}: needs input artifact {name}, which no earlier stage produced")]
    MissingArtifact { path: PathBuf, name: String },
}

impl ContractError {
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        ContractError::Io { path: path.into(), source }
    }
}
