//! The filtering kernels: zero-phase IIR (forward-backward second-order
//! sections), zero-phase FIR by FFT overlap-save (and by direct
//! convolution, the plain reference), edge padding, and the common median
//! reference.
//!
//! Chunking contract: a channel's output on a chunk's core depends only on
//! the samples within `margin_frames` of it, up to the decay tolerance of
//! the slowest IIR pole, so chunked output equals whole-signal output. At
//! the recording's two ends the signal is extended by odd reflection
//! (2·x₀ − x₁, 2·x₀ − x₂, ...), the same in both cases.

use crate::design::{self, Section};
use crate::params::{Design, ValidFilterParams};
use rustfft::num_complex::Complex64;
use rustfft::{Fft, FftPlanner};
use spikeyard_contract::noise::RunningMedian;
use spikeyard_contract::recording::Frames;
use spikeyard_contract::wide_build;
use std::sync::Arc;

/// Decay of the slowest band-pass pole that sets chunk margins. A margin is
/// twice the frames that pole needs to fall to this, so the transient left
/// at a chunk's core is about its square (1e-8) of the signal at the seam or
/// less: below the rounding of the f32 recursions (1.2e-7), so a longer
/// margin buys nothing. (Chunked filtering of a channel at a 10 mV offset is
/// tested; 1e-2 already fails that test.)
const BANDPASS_DECAY_TOLERANCE: f64 = 1e-4;
/// The notch pole sits so close to the unit circle that a 1e-9 decay would
/// need seconds of margin. Its transient is the missing state of a resonator
/// that only holds the signal near the notch frequency, which the band-pass
/// has already removed, so a looser decay keeps chunked output within 1e-4.
const NOTCH_DECAY_TOLERANCE: f64 = 1e-3;

/// FFT block length above which FIR convolution uses the FFT path.
const DIRECT_FIR_MAX_TAPS: usize = 64;

/// A designed filter, ready to run on any number of channels and threads.
pub struct FilterEngine {
    iir: Cascade,
    fir: Option<FirConvolver>,
    margin_frames: usize,
}

impl FilterEngine {
    /// Design the filter the parameters describe for `sample_rate_hz`.
    pub fn new(params: &ValidFilterParams, sample_rate_hz: f64) -> Self {
        let mut iir = Vec::new();
        let mut margin = 0usize;
        let fir = match params.design {
            Design::Butterworth => {
                let bandpass =
                    design::butterworth_bandpass(params.order, params.low_hz, params.high_hz, sample_rate_hz);
                margin += decay_frames(&bandpass, BANDPASS_DECAY_TOLERANCE);
                iir.extend(bandpass);
                None
            }
            Design::Fir => {
                let taps = design::fir_bandpass(params.fir_taps, params.low_hz, params.high_hz, sample_rate_hz);
                margin += taps.len() / 2;
                Some(FirConvolver::new(taps))
            }
        };
        if let Some(notch_hz) = params.notch_hz {
            let notch = design::notch(notch_hz, params.notch_q, sample_rate_hz);
            margin += decay_frames(&[notch], NOTCH_DECAY_TOLERANCE);
            iir.push(notch);
        }
        FilterEngine { iir: Cascade::new(&iir), fir, margin_frames: margin }
    }

    /// Frames of context needed on each side of a chunk's core.
    pub fn margin_frames(&self) -> usize {
        self.margin_frames
    }

    /// Filter one channel.
    ///
    /// `input` holds the frames read for the chunk; `pad_before` and
    /// `pad_after` are how many frames of odd extension to add where the
    /// read range was cut short by the recording's ends; the output for
    /// `core_offset..core_offset + out.len()` of `input` goes to `out`.
    pub fn filter_channel(
        &self,
        input: &[f32],
        pad_before: usize,
        pad_after: usize,
        core_offset: usize,
        out: &mut [f32],
        scratch: &mut Scratch,
    ) {
        let buffer = &mut scratch.signal;
        let (pad_before, _) = extend_odd(input, pad_before, pad_after, buffer);
        let core_start = pad_before + core_offset;
        if let Some(fir) = &self.fir {
            fir.convolve_centered(buffer, &mut scratch.fir_output, &mut scratch.fft);
            std::mem::swap(buffer, &mut scratch.fir_output);
        }
        let single = &mut scratch.single;
        single.clear();
        single.extend(buffer.iter().map(|&v| [v as f32]));
        self.iir.run(single.iter_mut());
        self.iir.run(single.iter_mut().rev());
        for (o, [v]) in out.iter_mut().zip(&single[core_start..]) {
            *o = *v;
        }
    }
}

/// Channels filtered together by [`FilterEngine::filter_block`]: the inner
/// loops run across them, which the compiler turns into SIMD, instead of
/// along one channel's samples, where each output waits for the previous.
pub const BLOCK_LANES: usize = 32;

/// One frame of a block of channels.
pub type Lanes = [f32; BLOCK_LANES];

impl FilterEngine {
    /// Whether [`FilterEngine::filter_block`] can run this filter (IIR only;
    /// FIR designs go channel by channel through the FFT).
    pub fn supports_blocks(&self) -> bool {
        self.fir.is_none()
    }

    /// Filter a block of up to [`BLOCK_LANES`] channels at once: the same
    /// computation as [`FilterEngine::filter_channel`] on each lane, for
    /// channels `first..` of time-major `frames` (`n_channels` wide). `rows`
    /// gets `before` rows of odd extension, the frames, and the rest of its
    /// rows (`after`) of odd extension, all filtered (unused lanes 0). Each
    /// frame is converted as the forward pass reaches it, so the rows are
    /// written once before the backward pass instead of once more by a
    /// separate copy.
    ///
    /// Built for AVX-512 or AVX2 when the CPU has them (`wide_build!`), with
    /// identical results.
    pub fn filter_block(&self, frames: &Frames, n_channels: usize, first: usize, before: usize, rows: &mut [Lanes]) {
        wide_build!(
            FilterEngine,
            self.filter_block_portable(frames: &Frames, n_channels: usize, first: usize, before: usize, rows: &mut [Lanes]) -> ()
        )
    }

    #[inline(always)]
    fn filter_block_portable(
        &self,
        frames: &Frames,
        n_channels: usize,
        first: usize,
        before: usize,
        rows: &mut [Lanes],
    ) {
        // A cascade of single-precision sections only (every usual band)
        // runs with its section count fixed at compile time: the sections'
        // state then stays in registers from frame to frame, instead of
        // going through memory, whose store-to-load delay would otherwise
        // set the pace of the recursion.
        if self.iir.double.is_empty() {
            match self.iir.single.len() {
                1 => return self.filter_block_fixed::<1>(frames, n_channels, first, before, rows),
                2 => return self.filter_block_fixed::<2>(frames, n_channels, first, before, rows),
                3 => return self.filter_block_fixed::<3>(frames, n_channels, first, before, rows),
                4 => return self.filter_block_fixed::<4>(frames, n_channels, first, before, rows),
                5 => return self.filter_block_fixed::<5>(frames, n_channels, first, before, rows),
                6 => return self.filter_block_fixed::<6>(frames, n_channels, first, before, rows),
                7 => return self.filter_block_fixed::<7>(frames, n_channels, first, before, rows),
                8 => return self.filter_block_fixed::<8>(frames, n_channels, first, before, rows),
                _ => {}
            }
        }
        let iir = &self.iir;
        filter_block_with(frames, n_channels, first, before, rows, || iir.start(), |state, v| iir.push(state, v));
    }

    /// [`FilterEngine::filter_block`] for a cascade of `N` single-precision
    /// sections: the same arithmetic as [`Cascade::push`], section by
    /// section, on state held in a fixed-size array.
    #[inline(always)]
    fn filter_block_fixed<const N: usize>(
        &self,
        frames: &Frames,
        n_channels: usize,
        first: usize,
        before: usize,
        rows: &mut [Lanes],
    ) {
        let coefficients: [[f32; 5]; N] = std::array::from_fn(|s| self.iir.single[s]);
        let start = || [([0.0f32; BLOCK_LANES], [0.0f32; BLOCK_LANES]); N];
        if self.iir.band_pass_form {
            filter_block_with(frames, n_channels, first, before, rows, start, |state, mut v| {
                for (c, (z1, z2)) in coefficients.iter().zip(state.iter_mut()) {
                    step_band_pass(c, z1, z2, &mut v);
                }
                v
            });
        } else {
            filter_block_with(frames, n_channels, first, before, rows, start, |state, mut v| {
                for (c, (z1, z2)) in coefficients.iter().zip(state.iter_mut()) {
                    step(c, z1, z2, &mut v);
                }
                v
            });
        }
    }
}

/// The body of [`FilterEngine::filter_block`], for a cascade given by its
/// zero state (`start`) and its step (`push`: the next output frame).
#[inline(always)]
fn filter_block_with<S>(
    frames: &Frames,
    n_channels: usize,
    first: usize,
    before: usize,
    rows: &mut [Lanes],
    start: impl Fn() -> S,
    push: impl Fn(&mut S, Lanes) -> Lanes,
) {
    let n = frames.len() / n_channels.max(1);
    if n == 0 {
        return;
    }
    let after = rows.len() - before - n;
    debug_assert!(before < n && after < n, "odd extension reaches at most n - 1 frames");
    let lanes = BLOCK_LANES.min(n_channels - first);
    let load = |k: usize| load_lanes(frames, k * n_channels + first, lanes);
    // Odd extension in f64 then rounded, as `extend_odd` does; from the
    // frames, since the forward pass overwrites the rows as it goes.
    let reflect =
        |about: &Lanes, x: &Lanes| -> Lanes { std::array::from_fn(|l| (2.0 * about[l] as f64 - x[l] as f64) as f32) };
    let (head, last) = (load(0), load(n - 1));
    let mut state = start();
    for (i, row) in rows[..before].iter_mut().enumerate() {
        *row = push(&mut state, reflect(&head, &load(before - i)));
    }
    for (k, row) in rows[before..before + n].iter_mut().enumerate() {
        frames.prefetch((k + PREFETCH_FRAMES) * n_channels + first);
        *row = push(&mut state, load(k));
    }
    for (i, row) in rows[before + n..].iter_mut().enumerate() {
        *row = push(&mut state, reflect(&last, &load(n - 2 - i)));
    }
    let mut state = start();
    for row in rows.iter_mut().rev() {
        *row = push(&mut state, *row);
    }
}

/// How far ahead of the forward pass its frames are prefetched: a block
/// reads one cache line per frame, frames apart, which the hardware
/// prefetchers lose at every page boundary.
const PREFETCH_FRAMES: usize = 16;

/// `lanes` values of `frames` from `start` on, then zeros. Always inlined, so
/// that the conversion is compiled with the caller's instruction set (a
/// closure would be a function of its own, built for the baseline).
#[inline(always)]
fn load_lanes(frames: &Frames, start: usize, lanes: usize) -> Lanes {
    let mut row = [0.0; BLOCK_LANES];
    frames.copy_to(start, &mut row[..lanes]);
    row
}

/// Pole radius above which a section runs in double precision: round-off
/// in a recursion grows about as 1 / (1 − r), and a mains notch (r ≈ 0.9998)
/// or a 5 Hz low edge in single precision exceed a tenth of the filtered
/// copy's storage step (test below); the default band's sections (r ≤ 0.97)
/// stay well inside it.
const SINGLE_PRECISION_MAX_RADIUS: f64 = 0.98;

/// IIR sections as b0, b1, b2, a1, a2: those with poles well inside the unit
/// circle (every band-pass section at usual cut-offs) in f32, which runs 8
/// lanes per AVX2 register instead of 4, with round-off near 1e-7 of the
/// signal; the others in f64, after them.
struct Cascade {
    single: Vec<[f32; 5]>,
    double: Vec<[f64; 5]>,
    /// Every single-precision section has the band-pass numerator
    /// b0·(1 − z⁻²) (b1 = 0, b2 = −b0), as every Butterworth band-pass
    /// section does: [`step_band_pass`] then gives the same numbers with
    /// four operations instead of six.
    band_pass_form: bool,
}

impl Cascade {
    fn new(sections: &[Section]) -> Self {
        let coefficients = |s: &Section| [s.b[0], s.b[1], s.b[2], s.a[0], s.a[1]];
        let (double, single): (Vec<&Section>, Vec<&Section>) =
            sections.iter().partition(|s| s.pole_radius() > SINGLE_PRECISION_MAX_RADIUS);
        let single: Vec<[f32; 5]> = single.into_iter().map(|s| coefficients(s).map(|c| c as f32)).collect();
        let band_pass_form = single.iter().all(|&[b0, b1, b2, _, _]| b1 == 0.0 && b2 == -b0);
        Cascade { single, double: double.into_iter().map(coefficients).collect(), band_pass_form }
    }

    /// Run the cascade over a sequence of L-lane frames, in the order the
    /// iterator gives (forward or reverse), zero initial state (transposed
    /// direct form II). One channel is L = 1; the arithmetic per lane is the
    /// same for every L.
    #[inline(always)]
    fn run<'a, const L: usize>(&self, samples: impl Iterator<Item = &'a mut [f32; L]>) {
        let mut state = self.start();
        for sample in samples {
            *sample = self.push(&mut state, *sample);
        }
    }

    /// Zero state for [`Cascade::push`].
    #[inline(always)]
    fn start<const L: usize>(&self) -> CascadeState<L> {
        CascadeState {
            single: vec![([0.0; L], [0.0; L]); self.single.len()],
            double: vec![([0.0; L], [0.0; L]); self.double.len()],
        }
    }

    /// The cascade's output for the next frame `v`.
    #[inline(always)]
    fn push<const L: usize>(&self, state: &mut CascadeState<L>, mut v: [f32; L]) -> [f32; L] {
        if self.band_pass_form {
            for (c, (z1, z2)) in self.single.iter().zip(state.single.iter_mut()) {
                step_band_pass(c, z1, z2, &mut v);
            }
        } else {
            for (c, (z1, z2)) in self.single.iter().zip(state.single.iter_mut()) {
                step(c, z1, z2, &mut v);
            }
        }
        if !self.double.is_empty() {
            let mut w = v.map(f64::from);
            for (c, (z1, z2)) in self.double.iter().zip(state.double.iter_mut()) {
                step(c, z1, z2, &mut w);
            }
            v = w.map(|x| x as f32);
        }
        v
    }
}

/// The two delays of every section of a [`Cascade`], per lane.
struct CascadeState<const L: usize> {
    single: Vec<([f32; L], [f32; L])>,
    double: Vec<([f64; L], [f64; L])>,
}

/// One section, one sample, every lane. Each state update is a fused
/// multiply-add (one rounding, an FMA instruction in the wide builds):
/// the recursion's chain from one sample to the next is then two
/// operations instead of three, and its round-off smaller.
#[inline(always)]
fn step<T: Arithmetic, const L: usize>(c: &[T; 5], z1: &mut [T; L], z2: &mut [T; L], v: &mut [T; L]) {
    let [b0, b1, b2, a1, a2] = *c;
    for l in 0..L {
        let x = v[l];
        let y = b0 * x + z1[l];
        z1[l] = (-a1).fused(y, b1.fused(x, z2[l]));
        z2[l] = (-a2).fused(y, b2 * x);
        v[l] = y;
    }
}

/// [`step`] for a section with b1 = 0 and b2 = −b0, with the same result
/// bit for bit: b1·x + z2 is z2 exactly and b2·x is −(b0·x), so the
/// multiplications they cost can go. (The filter's inner loop is bound by
/// its arithmetic.)
#[inline(always)]
fn step_band_pass<const L: usize>(c: &[f32; 5], z1: &mut [f32; L], z2: &mut [f32; L], v: &mut [f32; L]) {
    let [b0, _, _, a1, a2] = *c;
    for l in 0..L {
        let x = b0 * v[l];
        let y = x + z1[l];
        z1[l] = (-a1).mul_add(y, z2[l]);
        z2[l] = (-a2).mul_add(y, -x);
        v[l] = y;
    }
}

/// The arithmetic of [`step`], in f32 or f64.
trait Arithmetic:
    Copy + std::ops::Add<Output = Self> + std::ops::Mul<Output = Self> + std::ops::Neg<Output = Self>
{
    /// `self · a + b` with one rounding.
    fn fused(self, a: Self, b: Self) -> Self;
}

impl Arithmetic for f32 {
    #[inline(always)]
    fn fused(self, a: f32, b: f32) -> f32 {
        self.mul_add(a, b)
    }
}

impl Arithmetic for f64 {
    #[inline(always)]
    fn fused(self, a: f64, b: f64) -> f64 {
        self.mul_add(a, b)
    }
}

/// Reusable per-thread buffers for [`FilterEngine::filter_channel`].
#[derive(Default)]
pub struct Scratch {
    signal: Vec<f64>,
    single: Vec<[f32; 1]>,
    fir_output: Vec<f64>,
    fft: Vec<Complex64>,
}

/// Frames until the slowest pole's transient falls below `tolerance`,
/// doubled: a cascade's impulse response carries a polynomial factor in
/// front of rⁿ, and twice the single-pole decay covers it for orders ≤ 8.
fn decay_frames(sections: &[Section], tolerance: f64) -> usize {
    let radius = sections.iter().map(Section::pole_radius).fold(0.0, f64::max);
    if radius <= 0.0 {
        return 4;
    }
    2 * (tolerance.ln() / radius.ln()).ceil() as usize
}

/// Copy `input` into `out` as f64 with `before` and `after` frames of odd
/// extension, clamped to what the input can mirror (n − 1 frames); returns
/// the extensions actually added.
pub fn extend_odd(input: &[f32], before: usize, after: usize, out: &mut Vec<f64>) -> (usize, usize) {
    out.clear();
    let n = input.len();
    if n == 0 {
        return (0, 0);
    }
    let before = before.min(n - 1);
    let after = after.min(n - 1);
    let first = input[0] as f64;
    let last = input[n - 1] as f64;
    out.extend((1..=before).rev().map(|i| 2.0 * first - input[i] as f64));
    out.extend(input.iter().map(|&v| v as f64));
    out.extend((1..=after).map(|i| 2.0 * last - input[n - 1 - i] as f64));
    (before, after)
}

/// Symmetric FIR applied centred (zero phase), by FFT overlap-save for long
/// filters and directly for short ones.
pub struct FirConvolver {
    taps: Vec<f64>,
    block: usize,
    spectrum: Vec<Complex64>,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
}

impl FirConvolver {
    /// Plan the FFTs once; the convolver is shared by all worker threads.
    pub fn new(taps: Vec<f64>) -> Self {
        let block = (4 * taps.len()).next_power_of_two().max(1024);
        let mut planner = FftPlanner::new();
        let forward = planner.plan_fft_forward(block);
        let inverse = planner.plan_fft_inverse(block);
        let mut spectrum: Vec<Complex64> = taps
            .iter()
            .map(|&t| Complex64::new(t, 0.0))
            .chain(std::iter::repeat(Complex64::new(0.0, 0.0)))
            .take(block)
            .collect();
        forward.process(&mut spectrum);
        FirConvolver { taps, block, spectrum, forward, inverse }
    }

    /// `y[n] = Σₖ taps[k + h]·x[n − k]` for k in −h..=h, with x = 0 outside.
    pub fn convolve_centered(&self, x: &[f64], y: &mut Vec<f64>, work: &mut Vec<Complex64>) {
        if self.taps.len() <= DIRECT_FIR_MAX_TAPS {
            convolve_centered_direct(&self.taps, x, y);
            return;
        }
        let n = x.len();
        let h = self.taps.len() / 2;
        let valid = self.block - self.taps.len() + 1;
        let scale = 1.0 / self.block as f64;
        y.clear();
        y.resize(n, 0.0);
        let mut start = 0usize;
        while start < n {
            work.clear();
            work.extend((0..self.block).map(|j| {
                let index = start as isize - h as isize + j as isize;
                if index >= 0 && (index as usize) < n {
                    Complex64::new(x[index as usize], 0.0)
                } else {
                    Complex64::new(0.0, 0.0)
                }
            }));
            self.forward.process(work);
            for (w, s) in work.iter_mut().zip(&self.spectrum) {
                *w *= s;
            }
            self.inverse.process(work);
            let count = valid.min(n - start);
            for j in 0..count {
                y[start + j] = work[j + self.taps.len() - 1].re * scale;
            }
            start += valid;
        }
    }
}

/// The plain reference for [`FirConvolver::convolve_centered`].
pub fn convolve_centered_direct(taps: &[f64], x: &[f64], y: &mut Vec<f64>) {
    let n = x.len() as isize;
    let h = (taps.len() / 2) as isize;
    y.clear();
    y.extend((0..n).map(|i| {
        let mut sum = 0.0;
        for (k, t) in taps.iter().enumerate() {
            let index = i + h - k as isize;
            if index >= 0 && index < n {
                sum += t * x[index as usize];
            }
        }
        sum
    }));
}

/// The common median reference: from every channel, frame by frame, the
/// median of its group's usable channels is subtracted.
pub struct MedianReference {
    /// Group of each channel (0-based, dense).
    groups: Vec<usize>,
    /// Usable channels of each group.
    members: Vec<Vec<usize>>,
}

impl MedianReference {
    /// `groups[c]` is channel c's group; `usable[c]` says whether it
    /// contributes to its group's median (a group without usable channels
    /// gets 0).
    pub fn new(groups: &[usize], usable: &[bool]) -> Self {
        let n_groups = groups.iter().copied().max().map_or(0, |g| g + 1);
        let members =
            (0..n_groups).map(|g| (0..groups.len()).filter(|&c| groups[c] == g && usable[c]).collect()).collect();
        MedianReference { groups: groups.to_vec(), members }
    }

    /// Subtract the reference from one frame. `scratch` carries the
    /// previous frame's medians from one call to the next (the answer never
    /// depends on it).
    #[inline]
    pub fn subtract(&self, frame: &mut [f32], scratch: &mut ReferenceScratch) {
        scratch.medians.resize_with(self.members.len(), RunningMedian::default);
        if let ([members], [running]) = (self.members.as_slice(), scratch.medians.as_mut_slice()) {
            let median = if members.len() == frame.len() {
                running.median(frame)
            } else {
                scratch.values.clear();
                scratch.values.extend(members.iter().map(|&c| frame[c]));
                running.median(&scratch.values)
            };
            // A group without usable channels gets 0.
            let median = if median.is_nan() { 0.0 } else { median as f32 };
            frame.iter_mut().for_each(|v| *v -= median);
            return;
        }
        let medians: Vec<f32> = self
            .members
            .iter()
            .zip(scratch.medians.iter_mut())
            .map(|(members, running)| {
                scratch.values.clear();
                scratch.values.extend(members.iter().map(|&c| frame[c]));
                let median = running.median(&scratch.values);
                if median.is_nan() {
                    0.0
                } else {
                    median as f32
                }
            })
            .collect();
        for (v, g) in frame.iter_mut().zip(&self.groups) {
            *v -= medians[*g];
        }
    }
}

/// Per-thread state of [`MedianReference::subtract`].
#[derive(Default)]
pub struct ReferenceScratch {
    values: Vec<f32>,
    medians: Vec<RunningMedian>,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn junk_seeded(n: usize, seed: u64) -> Vec<f64> {
        let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        (0..n)
            .map(|_| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
            })
            .collect()
    }

    #[test]
    fn fft_convolution_matches_direct_convolution() {
        let taps = design::fir_bandpass(301, 300.0, 6000.0, 30000.0);
        let convolver = FirConvolver::new(taps.clone());
        let x = junk_seeded(5000, 7);
        let (mut fast, mut plain) = (vec![9.0; 3], vec![]);
        let mut work = vec![Complex64::new(123.0, -4.0); 17];
        convolver.convolve_centered(&x, &mut fast, &mut work);
        convolve_centered_direct(&taps, &x, &mut plain);
        let worst = fast.iter().zip(&plain).map(|(a, b)| (a - b).abs()).fold(0.0, f64::max);
        assert!(worst < 1e-12, "{worst}");
    }

    #[test]
    fn direct_convolution_by_hand() {
        let mut y = vec![];
        convolve_centered_direct(&[1.0, 2.0, 3.0], &[1.0, 0.0, 0.0, 1.0], &mut y);
        // y[n] = 3·x[n−1] + 2·x[n] + 1·x[n+1]
        assert_eq!(y, vec![2.0, 3.0, 1.0, 2.0]);
    }

    #[test]
    fn odd_extension_reflects_about_the_end_values() {
        let mut out = vec![];
        assert_eq!(extend_odd(&[1.0, 2.0, 4.0], 2, 1, &mut out), (2, 1));
        assert_eq!(out, vec![-2.0, 0.0, 1.0, 2.0, 4.0, 6.0]);
        assert_eq!(extend_odd(&[1.0, 2.0, 4.0], 9, 9, &mut out), (2, 2));
    }

    fn engine(params: crate::params::FilterParams, fs: f64) -> FilterEngine {
        FilterEngine::new(&params.check(fs).unwrap(), fs)
    }

    // The SIMD-friendly block path computes what the plain per-channel path
    // does, whichever instruction set it runs on.
    #[test]
    fn block_filtering_matches_channel_filtering() {
        for params in [
            crate::params::FilterParams::default(),
            crate::params::FilterParams { notch_hz: 50.0, ..Default::default() },
        ] {
            let engine = engine(params, 20000.0);
            // A full block and a partial one.
            let n_channels = BLOCK_LANES + 8;
            let n = 3000;
            let frames: Vec<f32> = junk_seeded(n * n_channels, 3).into_iter().map(|v| (v * 100.0) as f32).collect();
            let (pad_before, pad_after, core_offset, core_frames) = (engine.margin_frames(), 40, 100, 2500);
            let (before, after) = (pad_before.min(n - 1), pad_after.min(n - 1));
            let mut blocks = vec![vec![[7.0; BLOCK_LANES]; before + n + after]; 2];
            let mut portable = blocks.clone();
            for (b, (block, plain)) in blocks.iter_mut().zip(portable.iter_mut()).enumerate() {
                engine.filter_block(&Frames::Microvolts(&frames), n_channels, b * BLOCK_LANES, before, block);
                engine.filter_block_portable(&Frames::Microvolts(&frames), n_channels, b * BLOCK_LANES, before, plain);
            }
            // The path this CPU runs (AVX-512 or AVX2 on most x86-64) equals the portable build.
            assert!(blocks == portable);
            for channel in 0..n_channels {
                let column: Vec<f32> = frames.iter().skip(channel).step_by(n_channels).copied().collect();
                let mut plain = vec![0.0f32; core_frames];
                engine.filter_channel(&column, pad_before, pad_after, core_offset, &mut plain, &mut Scratch::default());
                let rows = &blocks[channel / BLOCK_LANES][before + core_offset..];
                for k in 0..core_frames {
                    assert_eq!(rows[k][channel % BLOCK_LANES], plain[k], "channel {channel} frame {k}");
                }
            }
            // Unused lanes are zero.
            assert!(blocks[1][before..before + n].iter().all(|row| row[8..].iter().all(|v| *v == 0.0)));
        }
    }

    // The band-pass step (four operations) gives the general step's
    // numbers bit for bit on Butterworth band-pass sections, whose
    // numerators are all b0·(1 − z⁻²).
    #[test]
    fn band_pass_step_equals_the_general_step() {
        let sections = design::butterworth_bandpass(3, 300.0, 6000.0, 30000.0);
        let mut cascade = Cascade::new(&sections);
        assert!(cascade.band_pass_form && cascade.double.is_empty());
        let signal: Vec<[f32; 4]> =
            junk_seeded(4 * 5000, 9).chunks(4).map(|c| std::array::from_fn(|l| (c[l] * 300.0) as f32)).collect();
        let (mut band, mut general) = (signal.clone(), signal);
        cascade.run(band.iter_mut());
        cascade.band_pass_form = false;
        cascade.run(general.iter_mut());
        assert!(band.iter().flatten().zip(general.iter().flatten()).all(|(a, b)| a.to_bits() == b.to_bits()));
        assert!(band.iter().flatten().any(|v| *v != 0.0));
    }

    // Single-precision recursions stay far below the i16 storage step of the
    // filtered copy (σ/64): against the same sections run in f64, on noise of
    // σ = 10 µV riding on a 10 mV offset and 200 µV of mains hum, for the
    // default band at 20 and 30 kHz and a low, steep band.
    #[test]
    fn single_precision_error_is_a_small_fraction_of_the_storage_step() {
        for (band_hz, order, fs, notch_hz) in [
            ([300.0, 6000.0], 3, 30000.0, 0.0),
            ([300.0, 6000.0], 3, 20000.0, 0.0),
            ([100.0, 3000.0], 5, 20000.0, 0.0),
            ([300.0, 6000.0], 3, 30000.0, 50.0),
            ([5.0, 300.0], 3, 30000.0, 0.0),
        ] {
            let params = crate::params::FilterParams { band_hz, order, notch_hz, ..Default::default() };
            let engine = engine(params.clone(), fs);
            let mut sections = design::butterworth_bandpass(order, band_hz[0], band_hz[1], fs);
            if notch_hz > 0.0 {
                sections.push(design::notch(notch_hz, params.notch_q, fs));
            }
            let n = 60000.max(engine.margin_frames() + 1);
            let sigma = 10.0;
            let x: Vec<f32> = junk_seeded(n, 9)
                .iter()
                .enumerate()
                .map(|(i, u)| {
                    let hum = 200.0 * (2.0 * std::f64::consts::PI * 50.0 * i as f64 / fs).sin();
                    (10_000.0 + sigma * 12f64.sqrt() * u + hum) as f32
                })
                .collect();
            let m = engine.margin_frames();
            let mut single = vec![0.0f32; n];
            engine.filter_channel(&x, m, m, 0, &mut single, &mut Scratch::default());
            let mut double = Vec::new();
            extend_odd(&x, m, m, &mut double);
            for _ in 0..2 {
                for s in &sections {
                    let (mut z1, mut z2) = (0.0, 0.0);
                    for v in double.iter_mut() {
                        let x = *v;
                        let y = s.b[0] * x + z1;
                        z1 = s.b[1] * x - s.a[0] * y + z2;
                        z2 = s.b[2] * x - s.a[1] * y;
                        *v = y;
                    }
                }
                double.reverse();
            }
            let worst = double[m..m + n].iter().zip(&single).map(|(a, b)| (a - *b as f64).abs()).fold(0.0, f64::max);
            assert!(worst < sigma / 64.0 / 10.0, "{params:?} at {fs} Hz: worst {worst} µV");
        }
    }

    // Regression: a recording shorter than the margin has its padding
    // clamped, and the core must still line up (zero phase keeps an
    // impulse's response centred on it).
    #[test]
    fn short_signal_keeps_zero_phase_alignment() {
        let engine = engine(crate::params::FilterParams::default(), 20000.0);
        let n = 301;
        assert!(engine.margin_frames() > n);
        let mut impulse = vec![0.0f32; n];
        impulse[150] = 1.0;
        let mut out = vec![0.0f32; n];
        engine.filter_channel(
            &impulse,
            engine.margin_frames(),
            engine.margin_frames(),
            0,
            &mut out,
            &mut Scratch::default(),
        );
        let peak = out.iter().enumerate().fold((0, f32::MIN), |b, (i, &v)| if v > b.1 { (i, v) } else { b }).0;
        assert_eq!(peak, 150);
        for k in 1..40 {
            assert!((out[150 - k] - out[150 + k]).abs() < 1e-6, "asymmetric at ±{k}");
        }
    }

    #[test]
    fn median_reference_by_group_ignores_unusable_channels() {
        // One frame, four channels in two groups; channel 1 unusable.
        let mut frame = vec![1.0f32, 100.0, 3.0, 5.0];
        let mut scratch = ReferenceScratch::default();
        MedianReference::new(&[0, 0, 1, 1], &[true, false, true, true]).subtract(&mut frame, &mut scratch);
        assert_eq!(frame, vec![0.0, 99.0, -1.0, 1.0]);
        // One group, channel 2 unusable: median of 1, 100 and 5.
        let mut frame = vec![1.0f32, 100.0, -50.0, 5.0];
        MedianReference::new(&[0; 4], &[true, true, false, true]).subtract(&mut frame, &mut scratch);
        assert_eq!(frame, vec![-4.0, 95.0, -55.0, 0.0]);
        // All four usable: the median of -4, 95, -55 and 0.
        MedianReference::new(&[0; 4], &[true; 4]).subtract(&mut frame, &mut scratch);
        assert_eq!(frame, vec![-2.0, 97.0, -53.0, 2.0]);
    }
}
