//! Packed i16 storage: a recording of i16 values kept as one byte per value
//! plus a list of the values a byte cannot hold.
//!
//! Filtered signals sit mostly within a few noise σ of zero, so with the
//! filter's storage step (σ/64 of the noisiest channel) about 98 % of the
//! values fit in −127..=127. Three files hold the values, taken in
//! time-major order (value g is frame g / channels, channel g % channels):
//!
//! - the data file: one byte per value, the value itself when it lies in
//!   −127..=127, else −128 ([`SENTINEL`]);
//! - the exceptions file: for each sentinel, in order, a 4-byte record: the
//!   value's position within its block of [`BLOCK_VALUES`] values (u16,
//!   little-endian) and the value (i16, little-endian);
//! - the exceptions index: for each block b, the number of records before
//!   it (u64, little-endian), then the total, so block b's records are
//!   `index[b]..index[b + 1]`.
//!
//! The values read back are exactly the i16 values written, in about 53 %
//! of the bytes on the 384-channel benchmark probe (1 byte per value, plus
//! 4 bytes for the 1.5 % outside ±127). A value's record is found by a
//! binary search within its block's records (a few kilobytes). A sentinel
//! without its record, or an index that does not match the files, is an
//! error naming the file, never a value made up.

/// The byte that stands for "see the exception records".
pub const SENTINEL: u8 = 0x80;
/// Bytes of one exception record: position in the block (u16 LE), value (i16 LE).
pub const RECORD_BYTES: usize = 4;
/// Values per block of the exceptions index (positions in a block fit a u16).
pub const BLOCK_VALUES: u64 = 1 << 12;

/// Position in its block and value of record `k` of `records`.
#[inline]
fn record(records: &[u8], k: usize) -> (u16, i16) {
    let r = &records[k * RECORD_BYTES..(k + 1) * RECORD_BYTES];
    (u16::from_le_bytes([r[0], r[1]]), i16::from_le_bytes([r[2], r[3]]))
}

/// Entries of the exceptions index for `n_values` values.
pub fn index_entries(n_values: u64) -> u64 {
    n_values.div_ceil(BLOCK_VALUES) + 1
}

/// Check a whole exceptions index (u64 LE entries) against the number of
/// values and of records: it starts at 0, never decreases, gives no block
/// more records than values, and ends at the number of records.
pub fn check_index(index: &[u8], n_values: u64, n_records: u64) -> Result<(), String> {
    let expected = index_entries(n_values);
    if index.len() as u64 != 8 * expected {
        return Err(format!("{} bytes, but {n_values} values need {expected} entries of 8 bytes", index.len()));
    }
    let entry = |b: usize| u64::from_le_bytes(index[8 * b..8 * b + 8].try_into().unwrap_or([0; 8]));
    if entry(0) != 0 {
        return Err("the first entry is not 0".into());
    }
    for b in 0..expected as usize - 1 {
        let values = BLOCK_VALUES.min(n_values - b as u64 * BLOCK_VALUES);
        if entry(b + 1) < entry(b) || entry(b + 1) - entry(b) > values {
            return Err(format!("entries {b} and {} do not bound the records of a block", b + 1));
        }
    }
    if entry(expected as usize - 1) != n_records {
        return Err(format!(
            "the index counts {} records, but the exceptions file holds {n_records}",
            entry(expected as usize - 1)
        ));
    }
    Ok(())
}

/// Values handled together when reading a range in order.
const TILE: usize = 64;

/// Bit l set where `tile[l]` is the sentinel (`tile` holds at most [`TILE`] bytes).
#[inline(always)]
fn sentinel_mask(tile: &[u8]) -> u64 {
    #[cfg(target_arch = "x86_64")]
    if tile.len() == TILE {
        use std::arch::x86_64::{__m128i, _mm_cmpeq_epi8, _mm_loadu_si128, _mm_movemask_epi8, _mm_set1_epi8};
        let mut mask = 0u64;
        for quarter in 0..4 {
            // SAFETY: SSE2, which every x86-64 CPU has; an unaligned 16-byte
            // load within the 64 bytes of `tile`.
            let bits = unsafe {
                let v = _mm_loadu_si128(tile.as_ptr().add(16 * quarter).cast::<__m128i>());
                _mm_movemask_epi8(_mm_cmpeq_epi8(v, _mm_set1_epi8(SENTINEL as i8)))
            };
            mask |= u64::from(bits as u16) << (16 * quarter);
        }
        return mask;
    }
    tile.iter().enumerate().fold(0, |mask, (l, &b)| mask | u64::from(b == SENTINEL) << l)
}

/// A range of packed values: `bytes` from global value `first` on; the
/// exception records of the index blocks it touches (`records`); where
/// each of those blocks' records start in `records` (`starts`, one entry
/// more than the blocks); and a place to note the first sentinel whose
/// record is missing.
#[derive(Debug, Clone, Copy)]
pub struct PackedRange<'a> {
    pub bytes: &'a [u8],
    pub records: &'a [u8],
    pub starts: &'a [u64],
    pub first: u64,
    /// 0, or 1 + the global index of the first sentinel without a record.
    pub missing: &'a std::sync::atomic::AtomicU64,
}

impl PackedRange<'_> {
    pub fn len(&self) -> usize {
        self.bytes.len()
    }

    pub fn is_empty(&self) -> bool {
        self.bytes.is_empty()
    }

    /// The records of the block holding value `index` of the range, and
    /// the value's position in that block.
    #[inline]
    fn block_of(&self, index: usize) -> (std::ops::Range<usize>, u16) {
        let global = self.first + index as u64;
        let block = (global / BLOCK_VALUES - self.first / BLOCK_VALUES) as usize;
        (self.starts[block] as usize..self.starts[block + 1] as usize, (global % BLOCK_VALUES) as u16)
    }

    /// Whether record `k` is the one of the sentinel at `index` of the range.
    #[inline]
    fn is_record_of(&self, k: usize, index: usize) -> bool {
        let (own, position) = self.block_of(index);
        own.contains(&k) && record(self.records, k).0 == position
    }

    /// The record of the sentinel at `index` of the range (a binary search
    /// among its block's records), or None after noting it missing.
    #[inline]
    fn record_of(&self, index: usize) -> Option<usize> {
        let (own, position) = self.block_of(index);
        let (mut low, mut high) = (own.start, own.end);
        while low < high {
            let middle = low + (high - low) / 2;
            if record(self.records, middle).0 < position {
                low = middle + 1;
            } else {
                high = middle;
            }
        }
        if low < own.end && record(self.records, low).0 == position {
            return Some(low);
        }
        self.note_missing(self.first + index as u64);
        None
    }

    #[cold]
    fn note_missing(&self, global: u64) {
        use std::sync::atomic::Ordering;
        let _ = self.missing.compare_exchange(0, global + 1, Ordering::Relaxed, Ordering::Relaxed);
    }

    /// The stored value at `index` of the range (0 for a sentinel without a
    /// record, which is noted and makes the visit an error).
    #[inline]
    pub fn value(&self, index: usize) -> i16 {
        let byte = self.bytes[index];
        if byte != SENTINEL {
            return byte as i8 as i16;
        }
        self.record_of(index).map_or(0, |k| record(self.records, k).1)
    }

    /// Call `exception(index, value)` for each sentinel at `values` of the
    /// range, in order, with its record's value (0 for a missing record,
    /// which is noted). Only the sentinels are visited: the bytes are
    /// compared a tile of 64 at a time, and the records followed with a
    /// cursor, as in [`PackedRange::visit_values`].
    #[inline]
    pub fn visit_exceptions(&self, values: std::ops::Range<usize>, mut exception: impl FnMut(usize, i16)) {
        let mut next = None;
        for (t, tile) in self.bytes[values.clone()].chunks(TILE).enumerate() {
            let mut sentinels = sentinel_mask(tile);
            while sentinels != 0 {
                let index = values.start + t * TILE + sentinels.trailing_zeros() as usize;
                sentinels &= sentinels - 1;
                let found = self.next_record(&mut next, index);
                exception(index, found.map_or(0, |r| record(self.records, r).1));
            }
        }
    }

    /// The record of the sentinel at `index`: `next` (the one after the
    /// previous sentinel's) when it fits, else by a search; `next` moves on.
    #[inline]
    fn next_record(&self, next: &mut Option<usize>, index: usize) -> Option<usize> {
        let found = match *next {
            Some(r) if self.is_record_of(r, index) => Some(r),
            _ => self.record_of(index),
        };
        *next = found.map(|r| r + 1);
        found
    }

    /// The stored values at `start..start + out.len() / 2` into `out` as
    /// i16 little-endian (the layout of plain i16 data), a tile of 64 at a
    /// time: every byte widened (vectorized), then the tile's sentinels,
    /// found by a mask, given their records' values (the first by a search,
    /// each next one the record after, checked against its position).
    /// Built for AVX-512 or AVX2 when the CPU has them (`wide_build!`), with
    /// the same bytes out.
    pub fn decode(&self, start: usize, out: &mut [u8]) {
        crate::wide_build!(PackedRange<'_>, self.decode_portable(start: usize, out: &mut [u8]) -> ())
    }

    #[inline(always)]
    fn decode_portable(&self, start: usize, out: &mut [u8]) {
        self.decode_from(start, out, &mut None);
    }

    /// The stored values at `start..start + count`, decoded a piece of 64 at
    /// a time into a buffer on the stack and handed to `each(offset, bytes)`
    /// as i16 little-endian, the record cursor carried from piece to piece.
    #[inline]
    pub fn in_pieces(&self, start: usize, count: usize, mut each: impl FnMut(usize, &[u8])) {
        const PIECE: usize = 64;
        let (mut buffer, mut next) = ([0u8; 2 * PIECE], None);
        for done in (0..count).step_by(PIECE) {
            let bytes = &mut buffer[..2 * PIECE.min(count - done)];
            self.decode_from(start + done, bytes, &mut next);
            each(done, bytes);
        }
    }

    /// [`PackedRange::decode`] with the record cursor given (None to start).
    #[inline(always)]
    fn decode_from(&self, start: usize, out: &mut [u8], next: &mut Option<usize>) {
        let (pairs, _) = out.as_chunks_mut::<2>();
        self.visit_values(start, pairs, next, |o, b| *o = i16::from(b).to_le_bytes(), |o, v| *o = v.to_le_bytes());
    }

    /// Hand the stored values at `start..start + slots.len()` to `slots`, one
    /// each, a tile of 64 at a time: `byte(slot, b)` for every byte as a
    /// signed number (a loop the compiler can vectorize; a sentinel gives
    /// −128), then `exception(slot, value)` for each of the tile's
    /// sentinels, found by a mask, with its record's value (0 for a missing
    /// record, which is noted). `next` is the record cursor: the first
    /// sentinel's record is searched for, each next one is the record after,
    /// checked against its position. Decoding, adding and converting share
    /// this one walk, so none of them goes through a buffer.
    #[inline(always)]
    pub fn visit_values<T>(
        &self,
        start: usize,
        slots: &mut [T],
        next: &mut Option<usize>,
        byte: impl Fn(&mut T, i8),
        exception: impl Fn(&mut T, i16),
    ) {
        let bytes = &self.bytes[start..start + slots.len()];
        for (t, (tile, slots)) in bytes.chunks(TILE).zip(slots.chunks_mut(TILE)).enumerate() {
            for (slot, &b) in slots.iter_mut().zip(tile) {
                byte(slot, b as i8);
            }
            let mut sentinels = sentinel_mask(tile);
            while sentinels != 0 {
                let l = sentinels.trailing_zeros() as usize;
                sentinels &= sentinels - 1;
                let found = self.next_record(next, start + t * TILE + l);
                exception(&mut slots[l], found.map_or(0, |r| record(self.records, r).1));
            }
        }
    }
}

/// `values` to one byte each into `bytes` (the value when within ±127,
/// else [`SENTINEL`]), appending `(first + k, value)` to `outside` for each
/// value `k` that needs an exception record. Always inlined, so the
/// narrowing vectorizes with the caller's instruction set.
#[inline(always)]
pub fn narrow(values: &[i16], bytes: &mut [u8], first: u64, outside: &mut Vec<(u64, i16)>) {
    debug_assert_eq!(values.len(), bytes.len());
    for (v, b) in values.iter().zip(bytes.iter_mut()) {
        *b = if (-127..=127).contains(v) { *v as i8 as u8 } else { SENTINEL };
    }
    for (t, tile) in bytes.chunks(TILE).enumerate() {
        let mut mask = sentinel_mask(tile);
        while mask != 0 {
            let k = t * TILE + mask.trailing_zeros() as usize;
            mask &= mask - 1;
            outside.push((first + k as u64, values[k]));
        }
    }
}

/// Turns the values a piece could not hold in a byte into exception
/// records and index entries, a piece at a time, keeping count of the
/// values and records so far.
#[derive(Debug, Default)]
pub struct Packer {
    values: u64,
    records: u64,
}

impl Packer {
    /// Pack i16 little-endian `values`: one byte each into `bytes`, the
    /// records of the values outside −127..=127 appended to `records`, and
    /// an index entry appended to `index` for each block that starts here.
    pub fn pack(&mut self, values: &[u8], bytes: &mut Vec<u8>, records: &mut Vec<u8>, index: &mut Vec<u8>) {
        let values: Vec<i16> = values.as_chunks::<2>().0.iter().map(|v| i16::from_le_bytes(*v)).collect();
        bytes.resize(values.len(), 0);
        let mut outside = Vec::new();
        narrow(&values, bytes, 0, &mut outside);
        self.add(values.len() as u64, outside, records, index);
    }

    /// The records and index entries of the next `n_values` values, already
    /// narrowed ([`narrow`]): `outside` gives each value that needs a record
    /// as (its place among these `n_values`, ascending; its value).
    pub fn add(
        &mut self,
        n_values: u64,
        outside: impl IntoIterator<Item = (u64, i16)>,
        records: &mut Vec<u8>,
        index: &mut Vec<u8>,
    ) {
        let end = self.values + n_values;
        // The first block that starts here or later.
        let mut next_block = self.values.div_ceil(BLOCK_VALUES) * BLOCK_VALUES;
        for (k, value) in outside {
            let global = self.values + k;
            debug_assert!(global < end && value.unsigned_abs() >= 128);
            while next_block <= global {
                index.extend_from_slice(&self.records.to_le_bytes());
                next_block += BLOCK_VALUES;
            }
            records.extend_from_slice(&((global % BLOCK_VALUES) as u16).to_le_bytes());
            records.extend_from_slice(&value.to_le_bytes());
            self.records += 1;
        }
        while next_block < end {
            index.extend_from_slice(&self.records.to_le_bytes());
            next_block += BLOCK_VALUES;
        }
        self.values = end;
    }

    /// The index's last entry (the number of records), once every value is packed.
    pub fn finish(&self, index: &mut Vec<u8>) {
        index.extend_from_slice(&self.records.to_le_bytes());
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::{AtomicU64, Ordering};

    // Every i16 narrows to itself within ±127 and to the sentinel beyond,
    // and exactly those beyond are listed, in order, from `first` on.
    #[test]
    fn narrowing_keeps_small_values_and_lists_the_rest() {
        let all: Vec<i16> = (i16::MIN..=i16::MAX).collect();
        let (mut bytes, mut outside) = (vec![1u8; all.len()], vec![(0, 0)]);
        narrow(&all, &mut bytes, 5, &mut outside);
        let mut expected_outside = vec![(0, 0)];
        for (k, (v, b)) in all.iter().zip(&bytes).enumerate() {
            let expected = if (-127..=127).contains(v) { *v as i8 as u8 } else { SENTINEL };
            assert_eq!(*b, expected, "{v}");
            if expected == SENTINEL {
                expected_outside.push((5 + k as u64, *v));
            }
        }
        assert_eq!(outside, expected_outside);
    }

    /// Pack `values` in pieces of `piece` values.
    fn pack_all(values: &[i16], piece: usize) -> (Vec<u8>, Vec<u8>, Vec<u8>) {
        let (mut packer, mut bytes, mut records, mut index) = (Packer::default(), Vec::new(), Vec::new(), Vec::new());
        let mut piece_bytes = Vec::new();
        for part in values.chunks(piece) {
            let le: Vec<u8> = part.iter().flat_map(|v| v.to_le_bytes()).collect();
            packer.pack(&le, &mut piece_bytes, &mut records, &mut index);
            bytes.extend_from_slice(&piece_bytes);
        }
        packer.finish(&mut index);
        (bytes, records, index)
    }

    /// Values `start..end` read back as a reader sees them.
    fn read(packed: &(Vec<u8>, Vec<u8>, Vec<u8>), start: u64, end: u64) -> (Vec<i16>, Vec<i16>, u64) {
        let (bytes, records, index) = packed;
        let entry = |b: u64| u64::from_le_bytes(index[8 * b as usize..8 * b as usize + 8].try_into().unwrap());
        let (b0, b1) = (start / BLOCK_VALUES, (end - 1) / BLOCK_VALUES + 1);
        let starts: Vec<u64> = (b0..=b1).map(|b| entry(b) - entry(b0)).collect();
        let records = &records[entry(b0) as usize * RECORD_BYTES..entry(b1) as usize * RECORD_BYTES];
        let (bytes, missing) = (&bytes[start as usize..end as usize], AtomicU64::new(0));
        let range = PackedRange { bytes, records, starts: &starts, first: start, missing: &missing };
        let by_value: Vec<i16> = (0..range.len()).map(|k| range.value(k)).collect();
        let mut walked = vec![0; range.len()];
        range.in_pieces(0, range.len(), |k, bytes| {
            for (j, b) in bytes.chunks_exact(2).enumerate() {
                walked[k + j] = i16::from_le_bytes([b[0], b[1]]);
            }
        });
        // Decoded from a point inside the first tile on, too.
        let skip = range.len().min(3);
        let mut decoded = vec![0; 2 * (range.len() - skip)];
        range.decode(skip, &mut decoded);
        let walked_le: Vec<u8> = walked[skip..].iter().flat_map(|v| v.to_le_bytes()).collect();
        assert_eq!(decoded, walked_le);
        (by_value, walked, missing.load(Ordering::Relaxed))
    }

    // Every i16 round-trips, whether it fits a byte or not (−128 itself
    // included, which must not be mistaken for a sentinel), by value and by
    // walk, over several blocks packed in pieces that straddle them, and in
    // ranges that start and end inside blocks.
    #[test]
    fn packing_round_trips_every_value() {
        let values: Vec<i16> = (0..3 * BLOCK_VALUES as usize + 1000)
            .map(|i| match i % 7 {
                0 => (i as i32 * 31 % 65536 - 32768) as i16,
                1 => [-128, 128, -127, 127][i / 7 % 4],
                _ => (i % 255) as i16 - 127,
            })
            .collect();
        let n = values.len() as u64;
        for piece in [1000, BLOCK_VALUES as usize, 10_007] {
            let packed = pack_all(&values, piece);
            assert_eq!(packed.0.len(), values.len());
            let outside = values.iter().filter(|v| !(-127..=127).contains(*v)).count();
            assert_eq!(packed.1.len(), outside * RECORD_BYTES);
            assert_eq!(check_index(&packed.2, n, outside as u64), Ok(()));
            let b = BLOCK_VALUES;
            for (start, end) in [(0, n), (1, 2), (b + 4464, b + 4465), (b - 6, 2 * b + 8), (n - 5, n)] {
                let (by_value, walked, missing) = read(&packed, start, end);
                assert_eq!(by_value, values[start as usize..end as usize], "piece {piece}, {start}..{end}");
                assert_eq!(walked, by_value, "piece {piece}, {start}..{end}");
                assert_eq!(missing, 0);
            }
        }
    }

    // A sentinel whose record is gone is noted (the first one), and read as 0.
    #[test]
    fn a_missing_record_is_noted() {
        let values = [5i16, 400, -3, -500, 7];
        let (bytes, mut records, mut index) = pack_all(&values, 5);
        records.truncate(RECORD_BYTES); // keep the record of 400 only
        index.truncate(8);
        index.extend_from_slice(&1u64.to_le_bytes());
        let (by_value, walked, missing) = read(&(bytes, records, index), 0, 5);
        assert_eq!(by_value, [5, 400, -3, 0, 7]);
        assert_eq!(walked, by_value);
        assert_eq!(missing, 1 + 3);
    }

    // Indexes that do not fit the values or the records are refused.
    #[test]
    fn bad_indexes_are_refused() {
        let values: Vec<i16> = (0..BLOCK_VALUES as i32 + 10).map(|i| (i % 300) as i16).collect();
        let (_, records, index) = pack_all(&values, 4096);
        let (n, n_records) = (values.len() as u64, (records.len() / RECORD_BYTES) as u64);
        assert_eq!(check_index(&index, n, n_records), Ok(()));
        assert!(check_index(&index[..16], n, n_records).unwrap_err().contains("need 3 entries"));
        assert!(check_index(&index, n, n_records + 1).unwrap_err().contains("holds"));
        let mut shuffled = index.clone();
        shuffled[8..16].copy_from_slice(&(n_records + 5).to_le_bytes());
        assert!(check_index(&shuffled, n, n_records).unwrap_err().contains("do not bound"));
    }
}
