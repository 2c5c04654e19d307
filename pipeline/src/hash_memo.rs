//! The recording's data hash, remembered between runs into the same output
//! folder so that a rerun (a resumed run, a changed stage parameter) does
//! not read a 100 GB recording again before anything runs.
//!
//! The hash stays a hash of content ([`spikeyard_contract::hash`]). What is
//! remembered is which file it was taken of: device, inode, size, and the
//! modification and status-change times to the nanosecond. A write to the
//! file changes its status-change time, which no program can set back, so
//! a file that still matches is the file that was hashed; anything else (a
//! copy, a rewrite, another file at the same path) is hashed again. The
//! same check as version-control tools use to skip unchanged files, with
//! their precaution: a file written within the last two seconds before its
//! hash started, or changed while it was hashed, is not remembered.

use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime};

/// The memo's file, in the output folder's stages folder.
pub const MEMO_FILE: &str = "recording-hash.json";

/// A file's identity as the file system reports it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct FileIdentity {
    path: PathBuf,
    device: u64,
    inode: u64,
    bytes: u64,
    modified_ns: i128,
    changed_ns: i128,
}

impl FileIdentity {
    fn of(path: &Path) -> std::io::Result<Self> {
        use std::os::unix::fs::MetadataExt;
        let path = std::fs::canonicalize(path)?;
        let m = std::fs::metadata(&path)?;
        let ns = |seconds: i64, nanoseconds: i64| i128::from(seconds) * 1_000_000_000 + i128::from(nanoseconds);
        Ok(FileIdentity {
            path,
            device: m.dev(),
            inode: m.ino(),
            bytes: m.size(),
            modified_ns: ns(m.mtime(), m.mtime_nsec()),
            changed_ns: ns(m.ctime(), m.ctime_nsec()),
        })
    }
}

#[derive(Debug, Serialize, Deserialize)]
struct Memo {
    file: FileIdentity,
    blake3: String,
}

/// How a data hash was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HashSource {
    /// Read from the memo: the same file as last time.
    Remembered,
    /// Read the whole file (and remembered, where it was settled).
    Computed,
}

/// The BLAKE3 hash of `data`, from the memo in `memo_folder` when it names
/// this very file, else by reading the file (`progress` as for
/// [`spikeyard_contract::hash::hash_file_with_progress`]) and, when
/// `remember` (not for a dry run, which writes nothing), writing the memo.
/// A memo that cannot be read is ignored; one that cannot be written is
/// skipped, as the hash is still right.
///
/// # Errors
/// The data file cannot be read.
pub fn data_hash(
    data: &Path,
    memo_folder: &Path,
    remember: bool,
    progress: impl FnMut(u64, u64),
) -> std::io::Result<(String, HashSource)> {
    let memo_path = memo_folder.join(MEMO_FILE);
    let before = FileIdentity::of(data)?;
    let remembered = std::fs::read(&memo_path).ok().and_then(|bytes| serde_json::from_slice::<Memo>(&bytes).ok());
    if let Some(memo) = remembered.filter(|m| m.file == before) {
        return Ok((memo.blake3, HashSource::Remembered));
    }
    let started = SystemTime::now();
    let blake3 = spikeyard_contract::hash::hash_file_with_progress(data, progress)?;
    let settled = started
        .checked_sub(Duration::from_secs(2))
        .and_then(|t| t.duration_since(SystemTime::UNIX_EPOCH).ok())
        .is_some_and(|t| before.modified_ns < t.as_nanos() as i128 && before.changed_ns < t.as_nanos() as i128);
    if remember && settled && FileIdentity::of(data).is_ok_and(|after| after == before) {
        let memo = Memo { file: before, blake3: blake3.clone() };
        if let Ok(bytes) = serde_json::to_vec_pretty(&memo) {
            let _ = std::fs::create_dir_all(memo_folder)
                .map_err(anyhow::Error::from)
                .and_then(|_| crate::runner::write_atomic(&memo_path, &bytes));
        }
    }
    Ok((blake3, HashSource::Computed))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Set a file's modification time (its status-change time becomes now).
    fn set_modified(path: &Path, when: SystemTime) {
        std::fs::File::options().write(true).open(path).unwrap().set_modified(when).unwrap();
    }

    #[test]
    fn a_settled_file_is_hashed_once_and_any_change_is_hashed_again() {
        let dir = tempfile::tempdir().unwrap();
        let (data, memo) = (dir.path().join("data.bin"), dir.path().join("out"));
        std::fs::write(&data, b"first content").unwrap();
        let hash = |expected: HashSource| {
            let (hash, source) = data_hash(&data, &memo, true, |_, _| {}).unwrap();
            assert_eq!(hash, blake3::hash(&std::fs::read(&data).unwrap()).to_hex().to_string());
            assert_eq!(source, expected);
        };
        // Just written: hashed, but not remembered (a write could still be
        // under way within the same clock tick).
        hash(HashSource::Computed);
        assert!(!memo.join(MEMO_FILE).exists());
        // Its status-change time is now, whatever its modification time says:
        // still not settled.
        set_modified(&data, SystemTime::now() - Duration::from_secs(3600));
        hash(HashSource::Computed);
        assert!(!memo.join(MEMO_FILE).exists());
        // Settled: remembered (not by a dry run), then reused while the
        // file stays the same.
        std::thread::sleep(Duration::from_millis(2100));
        assert_eq!(data_hash(&data, &memo, false, |_, _| {}).unwrap().1, HashSource::Computed);
        assert!(!memo.join(MEMO_FILE).exists());
        hash(HashSource::Computed);
        hash(HashSource::Remembered);
        // Rewritten with other bytes of the same length, its modification
        // time put back: the status-change time still tells.
        let modified = std::fs::metadata(&data).unwrap().modified().unwrap();
        std::fs::write(&data, b"other content").unwrap();
        set_modified(&data, modified);
        hash(HashSource::Computed);
        // A memo that is not one is ignored.
        std::fs::write(memo.join(MEMO_FILE), b"{ not json").unwrap();
        hash(HashSource::Computed);
    }
}
