//! Content hashes (BLAKE3, hex) for cache keys and manifests.
//!
//! Hashes are of content, never of timestamps: a recording rewritten with
//! the same bytes keeps its hash, one changed in place loses it.

use std::path::Path;

/// Hash a file's whole content, through memory maps of 16 MiB at a time
/// (so resident memory stays bounded), each hashed in parallel (BLAKE3's
/// tree gives the same hash however the input is split).
///
/// # Errors
/// Any I/O error opening, mapping or reading the file.
pub fn hash_file(path: &Path) -> std::io::Result<String> {
    hash_file_with_progress(path, |_, _| {})
}

/// [`hash_file`], calling `progress(bytes hashed, bytes in all)` after each
/// map (a 100 GB recording takes minutes to read).
///
/// # Errors
/// As [`hash_file`].
pub fn hash_file_with_progress(path: &Path, progress: impl FnMut(u64, u64)) -> std::io::Result<String> {
    hash_file_in_windows(path, 16 << 20, progress)
}

/// `window_bytes` must be a multiple of the page size (map offsets are).
fn hash_file_in_windows(path: &Path, window_bytes: u64, mut progress: impl FnMut(u64, u64)) -> std::io::Result<String> {
    let file = std::fs::File::open(path)?;
    let length = file.metadata()?.len();
    let mut hasher = blake3::Hasher::new();
    let mut offset = 0;
    while offset < length {
        let size = window_bytes.min(length - offset);
        // SAFETY: a read-only map dropped before the next one; a file changed
        // while it is hashed gets a hash of mixed content, as with reads.
        let map = unsafe { memmap2::MmapOptions::new().offset(offset).len(size as usize).map(&file)? };
        hasher.update_rayon(&map);
        offset += size;
        progress(offset, length);
    }
    Ok(hasher.finalize().to_hex().to_string())
}

/// Hash a sequence of labelled parts; the labels and lengths are hashed too,
/// so ("ab","c") and ("a","bc") differ.
pub fn hash_parts<'a>(parts: impl IntoIterator<Item = (&'a str, &'a [u8])>) -> String {
    let mut hasher = blake3::Hasher::new();
    for (label, bytes) in parts {
        hasher.update(&(label.len() as u64).to_le_bytes());
        hasher.update(label.as_bytes());
        hasher.update(&(bytes.len() as u64).to_le_bytes());
        hasher.update(bytes);
    }
    hasher.finalize().to_hex().to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    // The windowed, parallel hash is BLAKE3's hash of the whole content:
    // empty, one partial window, and several windows with a partial last one.
    #[test]
    fn windowed_hash_is_the_hash_of_the_content() {
        let dir = tempfile::tempdir().unwrap();
        for length in [0usize, 100, 3 * 65536 + 17] {
            let content: Vec<u8> = (0..length).map(|i| (i * 7 % 251) as u8).collect();
            let path = dir.path().join(format!("f{length}"));
            std::fs::write(&path, &content).unwrap();
            let expected = blake3::hash(&content).to_hex().to_string();
            let mut reported = Vec::new();
            let hash = hash_file_in_windows(&path, 65536, |done, total| reported.push((done, total))).unwrap();
            assert_eq!(hash, expected, "{length} bytes");
            let windows = length.div_ceil(65536) as u64;
            assert_eq!(reported.len() as u64, windows);
            assert_eq!(reported.last().copied(), (windows > 0).then_some((length as u64, length as u64)));
            assert_eq!(hash_file(&path).unwrap(), expected, "{length} bytes");
        }
    }
}
