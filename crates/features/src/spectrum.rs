//! Power spectrum of a real frame through a half-length complex FFT.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

/// Power spectrum |X[k]|², k = 0…n/2, of a real frame of even length n.
///
/// The n real samples are packed into n/2 complex ones, z[m] = x[2m] + i·x[2m+1], transformed by
/// one complex FFT of length n/2 and untangled with X[k] = E[k] + e^(−2πik/n)·O[k], where
/// E[k] = (Z[k] + Z*[n/2−k])/2 and O[k] = (Z[k] − Z*[n/2−k])/(2i) are the spectra of the even and
/// odd samples. This is half the work of a length-n complex FFT of a signal whose imaginary part
/// is zero. The FFT is planned once; callers pass the buffers, so nothing is allocated per frame.
pub(crate) struct PowerSpectrum {
    fft: Arc<dyn Fft<f32>>,
    half: usize,
    /// e^(−2πik/n) for k = 0…n/2.
    twiddles: Vec<Complex<f32>>,
}

/// Per-call working memory of [`PowerSpectrum::compute`].
pub(crate) struct SpectrumBuffers {
    packed: Vec<Complex<f32>>,
    scratch: Vec<Complex<f32>>,
}

impl PowerSpectrum {
    /// Plans the FFT for frames of `fft_size` (even) samples.
    pub(crate) fn new(fft_size: usize) -> Self {
        let half = fft_size / 2;
        let fft = FftPlanner::new().plan_fft_forward(half);
        let twiddles = (0..=half)
            .map(|k| {
                let angle = -2.0 * std::f64::consts::PI * k as f64 / fft_size as f64;
                Complex::new(angle.cos() as f32, angle.sin() as f32)
            })
            .collect();
        PowerSpectrum {
            fft,
            half,
            twiddles,
        }
    }

    /// Working memory for [`PowerSpectrum::compute`]; allocate once per utterance or thread.
    pub(crate) fn buffers(&self) -> SpectrumBuffers {
        SpectrumBuffers {
            packed: vec![Complex::default(); self.half],
            scratch: vec![Complex::default(); self.fft.get_inplace_scratch_len()],
        }
    }

    /// Writes the `fft_size/2 + 1` power values of `frame` (exactly `fft_size` samples) to `power`.
    pub(crate) fn compute(&self, frame: &[f32], buffers: &mut SpectrumBuffers, power: &mut [f32]) {
        let half = self.half;
        for (z, pair) in buffers.packed.iter_mut().zip(frame.chunks_exact(2)) {
            *z = Complex::new(pair[0], pair[1]);
        }
        self.fft
            .process_with_scratch(&mut buffers.packed, &mut buffers.scratch);
        let z = &buffers.packed;
        // k = 0 and k = n/2 involve only Z[0]: X[0] = Re + Im, X[n/2] = Re − Im.
        power[0] = (z[0].re + z[0].im).powi(2);
        power[half] = (z[0].re - z[0].im).powi(2);
        for k in 1..half {
            let zk = z[k];
            let zm = z[half - k].conj();
            let even = (zk + zm) * 0.5;
            let diff = (zk - zm) * 0.5;
            // diff / i = (re + i·im)/i = im − i·re
            let odd = Complex::new(diff.im, -diff.re);
            power[k] = (even + self.twiddles[k] * odd).norm_sqr();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The definition: X[k] = Σ x[m]·e^(−2πikm/n), evaluated directly in f64.
    fn naive_power(frame: &[f32]) -> Vec<f64> {
        let n = frame.len();
        (0..=n / 2)
            .map(|k| {
                let (mut re, mut im) = (0.0f64, 0.0f64);
                for (m, &x) in frame.iter().enumerate() {
                    let angle = -2.0 * std::f64::consts::PI * (k * m % n) as f64 / n as f64;
                    re += f64::from(x) * angle.cos();
                    im += f64::from(x) * angle.sin();
                }
                re * re + im * im
            })
            .collect()
    }

    #[test]
    fn matches_the_naive_dft() {
        for n in [2usize, 8, 30, 512] {
            // A deterministic, non-periodic test signal.
            let frame: Vec<f32> = (0..n)
                .map(|m| ((m * m) as f32 * 0.37).sin() + 0.25 * (m as f32 * 1.3).cos() - 0.1)
                .collect();
            let spectrum = PowerSpectrum::new(n);
            let mut buffers = spectrum.buffers();
            let mut power = vec![0.0; n / 2 + 1];
            spectrum.compute(&frame, &mut buffers, &mut power);
            let expected = naive_power(&frame);
            let scale = expected.iter().cloned().fold(0.0, f64::max);
            for (k, (&got, &want)) in power.iter().zip(&expected).enumerate() {
                assert!(
                    (f64::from(got) - want).abs() <= 1e-5 * scale,
                    "n={n} k={k}: {got} vs {want}"
                );
            }
        }
    }
}
