//! Content hashes (BLAKE3, hex) for cache keys and manifests.
//!
//! Hashes are of content, never of timestamps: a recording rewritten with
//! the same bytes keeps its hash, one changed in place loses it.

use std::io::Read;
use std::path::Path;

/// Hash a file's whole content, reading it in 1 MiB blocks.
///
/// # Errors
/// Any I/O error opening or reading the file.
pub fn hash_file(path: &Path) -> std::io::Result<String> {
    let mut file = std::fs::File::open(path)?;
    let mut hasher = blake3::Hasher::new();
    let mut buffer = vec![0u8; 1 << 20];
    loop {
        let n = file.read(&mut buffer)?;
        if n == 0 {
            break;
        }
        hasher.update(&buffer[..n]);
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
