//! Channel QC: noise by MAD and RMS of the band-passed signal, and a Welch
//! power spectrum of the raw signal, on windows spread over the recording.

use rustfft::num_complex::Complex64;
use rustfft::FftPlanner;

/// Welch power spectral density, one-sided, density scaling (µV²/Hz):
/// periodic Hann window, 50 % overlap, mean removed per segment, segments
/// averaged. `segment` is a power of two no longer than the signal.
pub struct Welch {
    segment: usize,
    window: Vec<f64>,
    /// Per bin of the one-sided spectrum: `scale`, doubled for the bins
    /// that also stand for their negative frequency.
    bin_weights: Vec<f64>,
    fft: std::sync::Arc<dyn rustfft::Fft<f64>>,
    pub sample_rate_hz: f64,
}

impl Welch {
    pub fn new(segment: usize, sample_rate_hz: f64) -> Self {
        let window: Vec<f64> =
            (0..segment).map(|n| 0.5 - 0.5 * (2.0 * std::f64::consts::PI * n as f64 / segment as f64).cos()).collect();
        let power: f64 = window.iter().map(|w| w * w).sum();
        let fft = FftPlanner::new().plan_fft_forward(segment);
        let scale = 1.0 / (sample_rate_hz * power);
        let last = segment / 2;
        let bin_weights = (0..=last).map(|bin| if bin == 0 || bin == last { scale } else { scale * 2.0 }).collect();
        Welch { segment, window, bin_weights, fft, sample_rate_hz }
    }

    /// Segment length for a frequency resolution of about `resolution_hz`,
    /// capped by the signal length.
    pub fn segment_for(sample_rate_hz: f64, resolution_hz: f64, max_len: usize) -> usize {
        let wanted = (sample_rate_hz / resolution_hz).max(16.0) as usize;
        let mut segment = wanted.next_power_of_two();
        while segment > max_len && segment > 16 {
            segment /= 2;
        }
        segment
    }

    pub fn n_bins(&self) -> usize {
        self.segment / 2 + 1
    }

    pub fn frequency_hz(&self, bin: usize) -> f64 {
        bin as f64 * self.sample_rate_hz / self.segment as f64
    }

    /// Add this signal's segment periodograms into `sum` (length `n_bins`);
    /// returns how many segments were added. Two real segments share one
    /// complex FFT (a + i·b), separated by the transform's symmetry:
    /// `A[k] = (Z[k] + conj(Z[N − k])) / 2` and `B[k] = (Z[k] − conj(Z[N − k])) / 2i`.
    /// `work` is reused from call to call (the segment and the FFT's scratch).
    pub fn accumulate(&self, signal: &[f32], sum: &mut [f64], work: &mut Vec<Complex64>) -> usize {
        let n = self.segment;
        let starts: Vec<usize> = (0..).map(|k| k * (n / 2)).take_while(|s| s + n <= signal.len()).collect();
        let windowed = |start: usize| {
            let piece = &signal[start..start + n];
            let mean = sum_in_lanes(piece, f64::from) / n as f64;
            piece.iter().zip(&self.window).map(move |(&v, w)| (v as f64 - mean) * w)
        };
        let last = n / 2;
        work.resize(n + self.fft.get_inplace_scratch_len(), Complex64::default());
        let (segment, scratch) = work.split_at_mut(n);
        for pair in starts.chunks(2) {
            match *pair {
                [a, b] => {
                    for (z, (x, y)) in segment.iter_mut().zip(windowed(a).zip(windowed(b))) {
                        *z = Complex64::new(x, y);
                    }
                }
                _ => {
                    for (z, x) in segment.iter_mut().zip(windowed(pair[0])) {
                        *z = Complex64::new(x, 0.0);
                    }
                }
            }
            self.fft.process_with_scratch(segment, scratch);
            // Bin k and its mirror N − k (bin 0 is its own mirror).
            let mirrors = std::iter::once(&segment[0]).chain(segment[last..].iter().rev());
            for ((s, weight), (z, mirror)) in sum.iter_mut().zip(&self.bin_weights).zip(segment.iter().zip(mirrors)) {
                let (z, mirror) = (*z, mirror.conj());
                if pair.len() == 2 {
                    *s += (z + mirror).norm_sqr() / 4.0 * weight;
                    *s += (z - mirror).norm_sqr() / 4.0 * weight;
                } else {
                    *s += z.norm_sqr() * weight;
                }
            }
        }
        starts.len()
    }

    /// Power in µV² between two frequencies (bins whose centre lies in [low, high)).
    pub fn band_power(&self, psd: &[f64], low_hz: f64, high_hz: f64) -> f64 {
        let df = self.sample_rate_hz / self.segment as f64;
        psd.iter()
            .enumerate()
            .filter(|(bin, _)| {
                let f = self.frequency_hz(*bin);
                f >= low_hz && f < high_hz
            })
            .map(|(_, p)| p * df)
            .sum()
    }
}

/// The sum of `term(v)` over `values` in f64, over eight lanes that the
/// compiler can keep in vector registers (a single running sum waits on
/// each addition). For the f32 values themselves, of similar size, the f64
/// sums are exact, so the order does not change the result.
pub fn sum_in_lanes(values: &[f32], term: impl Fn(f32) -> f64) -> f64 {
    let mut lanes = [0.0f64; 8];
    let (whole, rest) = values.as_chunks::<8>();
    for chunk in whole {
        for (lane, &v) in lanes.iter_mut().zip(chunk) {
            *lane += term(v);
        }
    }
    lanes.iter().sum::<f64>() + rest.iter().map(|&v| term(v)).sum::<f64>()
}

/// A channel's state after QC.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ChannelStatus {
    Ok,
    Dead,
    Noisy,
}

impl ChannelStatus {
    pub fn name(self) -> &'static str {
        match self {
            ChannelStatus::Ok => "ok",
            ChannelStatus::Dead => "dead",
            ChannelStatus::Noisy => "noisy",
        }
    }
}

/// Classify channels by their noise relative to the array's median noise.
pub fn classify(noise_uv: &[f64], rms_uv: &[f64], dead_below_ratio: f64, noisy_above_ratio: f64) -> Vec<ChannelStatus> {
    let mut sorted: Vec<f32> = noise_uv.iter().map(|&v| v as f32).collect();
    let median = spikeyard_contract::noise::median_in_place(&mut sorted);
    noise_uv
        .iter()
        .zip(rms_uv)
        .map(|(&noise, &rms)| {
            if rms == 0.0 || !noise.is_finite() || noise < dead_below_ratio * median {
                ChannelStatus::Dead
            } else if noise > noisy_above_ratio * median {
                ChannelStatus::Noisy
            } else {
                ChannelStatus::Ok
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // Parseval: a sine of amplitude A has power A²/2, and the PSD integrates to it.
    #[test]
    fn welch_integrates_to_the_signal_power() {
        let fs = 30000.0;
        let amplitude = 20.0;
        let signal: Vec<f32> = (0..60000)
            .map(|n| (amplitude * (2.0 * std::f64::consts::PI * 1000.0 * n as f64 / fs).sin()) as f32)
            .collect();
        let welch = Welch::new(Welch::segment_for(fs, 10.0, signal.len()), fs);
        let mut sum = vec![0.0; welch.n_bins()];
        let count = welch.accumulate(&signal, &mut sum, &mut vec![]);
        let psd: Vec<f64> = sum.iter().map(|s| s / count as f64).collect();
        let total = welch.band_power(&psd, 0.0, fs);
        assert!((total - amplitude * amplitude / 2.0).abs() < 0.01 * 200.0, "{total}");
        let near = welch.band_power(&psd, 980.0, 1020.0);
        assert!(near > 0.99 * total);
    }

    // Two segments per complex FFT give each segment's own periodogram:
    // against one FFT per segment, for an odd number of segments.
    #[test]
    fn paired_segments_match_one_fft_per_segment() {
        let fs = 20000.0;
        let mut rng = spikeyard_contract::testing::TestRng::new(4);
        let signal: Vec<f32> = (0..5 * 1024).map(|_| (3.0 + 10.0 * rng.normal()) as f32).collect();
        let welch = Welch::new(2048, fs);
        let mut sum = vec![0.0; welch.n_bins()];
        assert_eq!(welch.accumulate(&signal, &mut sum, &mut vec![]), 4);
        let mut odd = vec![0.0; welch.n_bins()];
        assert_eq!(welch.accumulate(&signal[..4 * 1024], &mut odd, &mut vec![]), 3);
        let scale = 1.0 / (fs * welch.window.iter().map(|w| w * w).sum::<f64>());
        for (signal, paired) in [(&signal[..], &sum), (&signal[..4 * 1024], &odd)] {
            let mut plain = vec![0.0; welch.n_bins()];
            for start in (0..).map(|k| k * 1024).take_while(|s| s + 2048 <= signal.len()) {
                let piece = &signal[start..start + 2048];
                let mean = piece.iter().map(|&v| v as f64).sum::<f64>() / 2048.0;
                let mut work: Vec<Complex64> =
                    piece.iter().zip(&welch.window).map(|(&v, w)| Complex64::new((v as f64 - mean) * w, 0.0)).collect();
                welch.fft.process(&mut work);
                for (bin, p) in plain.iter_mut().enumerate() {
                    let one_sided = if bin == 0 || bin == 1024 { 1.0 } else { 2.0 };
                    *p += work[bin].norm_sqr() * scale * one_sided;
                }
            }
            for (a, b) in paired.iter().zip(&plain) {
                assert!((a - b).abs() <= 1e-9 * b.abs().max(1e-3), "{a} vs {b}");
            }
        }
    }

    // Whole lanes and a remainder: 0 + 1 + ... + 20 = 210.
    #[test]
    fn lane_sums_add_every_value() {
        let values: Vec<f32> = (0..=20).map(|v| v as f32).collect();
        assert_eq!(sum_in_lanes(&values, f64::from), 210.0);
        assert_eq!(sum_in_lanes(&values[..3], f64::from), 3.0);
        assert_eq!(sum_in_lanes(&values, |v| f64::from(v) * f64::from(v)), 2870.0);
    }

    #[test]
    fn dead_and_noisy_channels_are_flagged() {
        let noise = [10.0, 11.0, 9.0, 1.0, 50.0, 10.0];
        let rms = [12.0, 13.0, 11.0, 1.2, 60.0, 0.0];
        let status = classify(&noise, &rms, 0.2, 3.0);
        use ChannelStatus::*;
        assert_eq!(status, vec![Ok, Ok, Ok, Dead, Noisy, Dead]);
    }
}
