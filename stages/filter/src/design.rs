//! Filter design: Butterworth band-pass as second-order sections, the
//! second-order notch, and windowed-sinc FIR band-pass taps.
//!
//! The Butterworth design follows the textbook route (analog prototype,
//! low-pass to band-pass transform, bilinear transform with pre-warping),
//! the same route scipy.signal.butter takes, so its coefficients can be
//! checked against scipy fixtures (REFERENCES.md F3).

use rustfft::num_complex::Complex64;
use std::f64::consts::PI;

/// One biquad: y = (b0 + b1 z⁻¹ + b2 z⁻²)/(1 + a1 z⁻¹ + a2 z⁻²) x.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Section {
    pub b: [f64; 3],
    /// a1, a2 (a0 is 1).
    pub a: [f64; 2],
}

impl Section {
    /// Largest pole radius of this section.
    pub fn pole_radius(&self) -> f64 {
        let [a1, a2] = self.a;
        let discriminant = a1 * a1 - 4.0 * a2;
        if discriminant < 0.0 {
            a2.abs().sqrt()
        } else {
            let root = discriminant.sqrt();
            ((-a1 + root) / 2.0).abs().max(((-a1 - root) / 2.0).abs())
        }
    }

    /// Complex response at normalised angular frequency `omega` (rad/sample).
    pub fn response(&self, omega: f64) -> Complex64 {
        let z1 = Complex64::from_polar(1.0, -omega);
        let z2 = z1 * z1;
        let numerator = self.b[0] + z1 * self.b[1] + z2 * self.b[2];
        let denominator = 1.0 + z1 * self.a[0] + z2 * self.a[1];
        numerator / denominator
    }
}

/// Cascade response |H| at `frequency_hz` for one pass.
pub fn cascade_gain(sections: &[Section], frequency_hz: f64, sample_rate_hz: f64) -> f64 {
    let omega = 2.0 * PI * frequency_hz / sample_rate_hz;
    sections.iter().map(|s| s.response(omega)).fold(Complex64::new(1.0, 0.0), |acc, h| acc * h).norm()
}

/// Butterworth band-pass of `order` (per edge; 2·order poles) between
/// `low_hz` and `high_hz`, as `order` second-order sections with the
/// overall gain in the first one and sections ordered by pole radius.
/// The caller has checked 0 < low < high < Nyquist.
pub fn butterworth_bandpass(order: usize, low_hz: f64, high_hz: f64, sample_rate_hz: f64) -> Vec<Section> {
    // Pre-warped analog edges (rad/s with the bilinear constant 2·fs).
    let fs2 = 2.0 * sample_rate_hz;
    let warp = |f: f64| fs2 * (PI * f / sample_rate_hz).tan();
    let (w1, w2) = (warp(low_hz), warp(high_hz));
    let bandwidth = w2 - w1;
    let centre = (w1 * w2).sqrt();
    // Analog prototype poles on the left half of the unit circle.
    let n = order as f64;
    let prototype: Vec<Complex64> = (0..order)
        .map(|k| {
            let angle = PI * (2.0 * k as f64 + n + 1.0) / (2.0 * n);
            Complex64::from_polar(1.0, angle)
        })
        .collect();
    // Low-pass to band-pass: each prototype pole p gives the roots of
    // s² − p·B·s + ω0² = 0.
    let mut analog_poles = Vec::with_capacity(2 * order);
    for p in &prototype {
        let half = p * bandwidth / 2.0;
        let root = (half * half - centre * centre).sqrt();
        analog_poles.push(half + root);
        analog_poles.push(half - root);
    }
    // Bilinear transform. Band-pass zeros: `order` at s = 0 (→ z = 1) and
    // `order` at infinity (→ z = −1).
    let digital_poles: Vec<Complex64> = analog_poles.iter().map(|s| (fs2 + s) / (fs2 - s)).collect();
    let analog_gain = bandwidth.powi(order as i32);
    let zeros_term = Complex64::new(fs2, 0.0).powi(order as i32);
    let poles_term = analog_poles.iter().fold(Complex64::new(1.0, 0.0), |acc, s| acc * (fs2 - s));
    let gain = analog_gain * (zeros_term / poles_term).re;

    let mut sections: Vec<Section> =
        pair_poles(&digital_poles).into_iter().map(|a| Section { b: [1.0, 0.0, -1.0], a }).collect();
    sections.sort_by(|x, y| x.pole_radius().total_cmp(&y.pole_radius()));
    for b in sections[0].b.iter_mut() {
        *b *= gain;
    }
    sections
}

/// Group poles into conjugate pairs (or pairs of real poles) and return
/// each pair's denominator [a1, a2].
fn pair_poles(poles: &[Complex64]) -> Vec<[f64; 2]> {
    let tolerance = 1e-10;
    let mut denominators = Vec::new();
    let mut reals: Vec<f64> = Vec::new();
    for p in poles {
        if p.im.abs() <= tolerance * p.norm().max(1.0) {
            reals.push(p.re);
        } else if p.im > 0.0 {
            denominators.push([-2.0 * p.re, p.norm_sqr()]);
        }
    }
    reals.sort_by(f64::total_cmp);
    for pair in reals.chunks(2) {
        match pair {
            [r1, r2] => denominators.push([-(r1 + r2), r1 * r2]),
            [r] => denominators.push([-r, 0.0]),
            _ => {}
        }
    }
    denominators
}

/// Second-order IIR notch at `notch_hz` with quality factor `q`
/// (−3 dB width notch_hz/q), as scipy.signal.iirnotch designs it.
pub fn notch(notch_hz: f64, q: f64, sample_rate_hz: f64) -> Section {
    let w0 = 2.0 * PI * notch_hz / sample_rate_hz;
    let bandwidth = w0 / q;
    let beta = (bandwidth / 2.0).tan();
    let gain = 1.0 / (1.0 + beta);
    let c = -2.0 * w0.cos();
    Section { b: [gain, gain * c, gain], a: [gain * c, 2.0 * gain - 1.0] }
}

/// Windowed-sinc band-pass FIR taps (Hamming window), `n_taps` odd,
/// normalised to unit gain at the band centre.
pub fn fir_bandpass(n_taps: usize, low_hz: f64, high_hz: f64, sample_rate_hz: f64) -> Vec<f64> {
    let half = (n_taps / 2) as isize;
    let (f1, f2) = (low_hz / sample_rate_hz, high_hz / sample_rate_hz);
    let sinc_lowpass = |fc: f64, k: isize| {
        if k == 0 {
            2.0 * fc
        } else {
            (2.0 * PI * fc * k as f64).sin() / (PI * k as f64)
        }
    };
    let mut taps: Vec<f64> = (-half..=half)
        .map(|k| {
            let ideal = sinc_lowpass(f2, k) - sinc_lowpass(f1, k);
            let window = 0.54 - 0.46 * (2.0 * PI * (k + half) as f64 / (n_taps as f64 - 1.0)).cos();
            ideal * window
        })
        .collect();
    let centre = 2.0 * PI * (low_hz * high_hz).sqrt() / sample_rate_hz;
    let response: Complex64 =
        taps.iter().enumerate().map(|(i, t)| Complex64::from_polar(*t, -centre * (i as f64 - half as f64))).sum();
    let norm = response.norm();
    for t in taps.iter_mut() {
        *t /= norm;
    }
    taps
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Multiply the sections into one transfer function (b, a), highest power first.
    fn to_transfer_function(sections: &[Section]) -> (Vec<f64>, Vec<f64>) {
        let convolve = |x: &[f64], y: &[f64]| {
            let mut out = vec![0.0; x.len() + y.len() - 1];
            for (i, xi) in x.iter().enumerate() {
                for (j, yj) in y.iter().enumerate() {
                    out[i + j] += xi * yj;
                }
            }
            out
        };
        let mut b = vec![1.0];
        let mut a = vec![1.0];
        for s in sections {
            b = convolve(&b, &s.b);
            a = convolve(&a, &[1.0, s.a[0], s.a[1]]);
        }
        (b, a)
    }

    fn impulse_response(sections: &[Section], n: usize) -> Vec<f64> {
        let mut x = vec![0.0; n];
        x[0] = 1.0;
        for s in sections {
            let (mut z1, mut z2) = (0.0, 0.0);
            for v in x.iter_mut() {
                // Direct form II transposed, the plain way.
                let y = s.b[0] * *v + z1;
                z1 = s.b[1] * *v - s.a[0] * y + z2;
                z2 = s.b[2] * *v - s.a[1] * y;
                *v = y;
            }
        }
        x
    }

    fn assert_close(actual: &[f64], expected: &[f64], relative: f64) {
        assert_eq!(actual.len(), expected.len());
        let scale = expected.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (a, e) in actual.iter().zip(expected) {
            assert!((a - e).abs() <= relative * scale, "{actual:?} vs {expected:?}");
        }
    }

    // REFERENCES.md F3: scipy.signal.butter(3,[300,6000],btype='bandpass',fs=30000,output='sos'), tf form via sos2tf.
    #[test]
    fn butterworth_order3_matches_scipy_transfer_function() {
        let sections = butterworth_bandpass(3, 300.0, 6000.0, 30000.0);
        assert_eq!(sections.len(), 3);
        let (b, a) = to_transfer_function(&sections);
        let k = 0.08726583097233712;
        assert_close(&b, &[k, 0.0, -3.0 * k, 0.0, 3.0 * k, 0.0, -k], 1e-9);
        assert_close(
            &a,
            &[
                1.0,
                -3.5284652517837864,
                5.118029508490681,
                -4.145367827126995,
                2.1266129784088137,
                -0.6402946270896205,
                0.06968314987657705,
            ],
            1e-9,
        );
        // First 8 samples of scipy.signal.sosfilt's impulse response.
        assert_close(
            &impulse_response(&sections, 8),
            &[
                0.0872658309723371,
                0.307914452253929,
                0.378038854383633,
                0.119730676910677,
                -0.159712970959095,
                -0.208155729125615,
                -0.120860016581117,
                -0.0571932292634311,
            ],
            1e-9,
        );
    }

    // REFERENCES.md F3: butter(2,[300,3000],btype='bandpass',fs=20000,output='sos').
    #[test]
    fn butterworth_order2_matches_scipy() {
        let sections = butterworth_bandpass(2, 300.0, 3000.0, 20000.0);
        let (b, a) = to_transfer_function(&sections);
        let k = 0.11065284440041205;
        assert_close(&b, &[k, 0.0, -2.0 * k, 0.0, k], 1e-9);
        assert_close(&a, &[1.0, -2.7298121043894925, 2.836305607624567, -1.4085524920648311, 0.3068405187108478], 1e-9);
        assert_close(
            &impulse_response(&sections, 6),
            &[
                0.110652844400412,
                0.302061474029372,
                0.28942009620179,
                0.0891841689626313,
                -0.0752583076336643,
                -0.143415899289354,
            ],
            1e-9,
        );
    }

    // REFERENCES.md F1: one pass is −3.0103 dB at each cutoff, two passes −6.0206 dB.
    #[test]
    fn butterworth_is_half_power_at_each_cutoff() {
        for (order, low, high, fs) in
            [(3, 300.0, 6000.0, 30000.0), (2, 300.0, 3000.0, 20000.0), (5, 500.0, 5000.0, 25000.0)]
        {
            let sections = butterworth_bandpass(order, low, high, fs);
            for f in [low, high] {
                let one_pass_db = 20.0 * cascade_gain(&sections, f, fs).log10();
                assert!((one_pass_db - (-3.010299956639812)).abs() < 1e-9, "{one_pass_db}");
                let two_pass_db = 2.0 * one_pass_db;
                assert!((two_pass_db - (-6.020599913279624)).abs() < 1e-9);
            }
        }
    }

    // REFERENCES.md F2: closed form of the digital band-pass magnitude, any frequency.
    #[test]
    fn butterworth_matches_the_closed_form_everywhere() {
        let (n, f1, f2, fs) = (3, 300.0, 6000.0, 30000.0);
        let sections = butterworth_bandpass(n, f1, f2, fs);
        let t = |f: f64| (PI * f / fs).tan();
        for f in [50.0, 100.0, 300.0, 1000.0, 3000.0, 6000.0, 10000.0, 14000.0] {
            let omega = t(f);
            let ratio = (omega * omega - t(f1) * t(f2)) / ((t(f2) - t(f1)) * omega);
            let expected = 1.0 / (1.0 + ratio.powi(2 * n as i32));
            let actual = cascade_gain(&sections, f, fs).powi(2);
            assert!((actual - expected).abs() <= 1e-9 * expected.max(1e-12), "{f}: {actual} vs {expected}");
        }
    }

    // REFERENCES.md F5: iirnotch(50, 30, fs=30000) and fs=20000.
    #[test]
    fn notch_matches_scipy_iirnotch() {
        let s = notch(50.0, 30.0, 30000.0);
        assert_close(&s.b, &[0.9998254975294554, -1.9995413529260975, 0.9998254975294554], 1e-12);
        assert_close(&s.a, &[-1.9995413529260975, 0.9996509950589108], 1e-12);
        let s = notch(50.0, 30.0, 20000.0);
        assert_close(&s.b, &[0.9997382691272035, -1.9992298677959048, 0.9997382691272035], 1e-12);
        assert_close(&s.a, &[-1.9992298677959048, 0.9994765382544071], 1e-12);
        let s30 = notch(50.0, 30.0, 30000.0);
        assert!(20.0 * cascade_gain(&[s30], 50.0, 30000.0).log10() < -100.0);
        assert!((20.0 * cascade_gain(&[s30], 45.0, 30000.0).log10() - (-0.1069)).abs() < 1e-3);
        assert!((s30.pole_radius() - 0.99982548).abs() < 1e-8);
    }

    #[test]
    fn fir_passes_the_band_and_stops_outside() {
        let taps = fir_bandpass(401, 300.0, 6000.0, 30000.0);
        let gain = |f: f64| {
            let w = 2.0 * PI * f / 30000.0;
            taps.iter().enumerate().map(|(i, t)| Complex64::from_polar(*t, -w * i as f64)).sum::<Complex64>().norm()
        };
        assert!((gain(1500.0) - 1.0).abs() < 0.01);
        assert!(gain(20.0) < 0.01);
        assert!(gain(12000.0) < 0.01);
    }
}
