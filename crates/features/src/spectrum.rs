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
    /// With w_k = e^(−2πik/n): X[k] = p_k·Z[k] + q_k·Z*[n/2−k], p_k = (1 − i·w_k)/2,
    /// q_k = (1 + i·w_k)/2, for k = 0…n/2 (Z[n/2] = Z[0]). Kept as separate real and imaginary
    /// arrays so that the untangling loop vectorises.
    p_re: Vec<f32>,
    p_im: Vec<f32>,
    q_re: Vec<f32>,
    q_im: Vec<f32>,
}

/// Per-call working memory of [`PowerSpectrum::compute`].
pub(crate) struct SpectrumBuffers {
    packed: Vec<Complex<f32>>,
    scratch: Vec<Complex<f32>>,
    /// Re and Im of Z[0…n/2], with Z[n/2] = Z[0] appended so that Z[n/2−k] is a reversed read.
    re: Vec<f32>,
    im: Vec<f32>,
}

impl PowerSpectrum {
    /// Plans the FFT for frames of `fft_size` (even) samples.
    pub(crate) fn new(fft_size: usize) -> Self {
        let half = fft_size / 2;
        let fft = FftPlanner::new().plan_fft_forward(half);
        let (mut p_re, mut p_im, mut q_re, mut q_im) = (vec![], vec![], vec![], vec![]);
        for k in 0..=half {
            let angle = -2.0 * std::f64::consts::PI * k as f64 / fft_size as f64;
            let (w_re, w_im) = (angle.cos(), angle.sin());
            // i·w = −w_im + i·w_re
            p_re.push(((1.0 + w_im) / 2.0) as f32);
            p_im.push((-w_re / 2.0) as f32);
            q_re.push(((1.0 - w_im) / 2.0) as f32);
            q_im.push((w_re / 2.0) as f32);
        }
        PowerSpectrum {
            fft,
            half,
            p_re,
            p_im,
            q_re,
            q_im,
        }
    }

    /// Working memory for [`PowerSpectrum::compute`]; allocate once per utterance or thread.
    pub(crate) fn buffers(&self) -> SpectrumBuffers {
        SpectrumBuffers {
            packed: vec![Complex::default(); self.half],
            scratch: vec![Complex::default(); self.fft.get_inplace_scratch_len()],
            re: vec![0.0; self.half + 1],
            im: vec![0.0; self.half + 1],
        }
    }

    /// Writes the `fft_size/2 + 1` power values of `frame` (exactly `fft_size` samples) to `power`.
    pub(crate) fn compute(&self, frame: &[f32], buffers: &mut SpectrumBuffers, power: &mut [f32]) {
        for (z, pair) in buffers.packed.iter_mut().zip(frame.chunks_exact(2)) {
            *z = Complex::new(pair[0], pair[1]);
        }
        self.fft
            .process_with_scratch(&mut buffers.packed, &mut buffers.scratch);
        let (re, im) = (&mut buffers.re, &mut buffers.im);
        for ((r, i), z) in re.iter_mut().zip(im.iter_mut()).zip(&buffers.packed) {
            *r = z.re;
            *i = z.im;
        }
        re[self.half] = re[0];
        im[self.half] = im[0];
        let forward = re.iter().zip(im.iter());
        let mirrored = re.iter().rev().zip(im.iter().rev());
        let p = self.p_re.iter().zip(&self.p_im);
        let q = self.q_re.iter().zip(&self.q_im);
        for ((((out, (a_re, a_im)), (b_re, b_im)), (p_re, p_im)), (q_re, q_im)) in
            power.iter_mut().zip(forward).zip(mirrored).zip(p).zip(q)
        {
            // b = conj(Z[n/2−k]), so its imaginary part is −b_im.
            let x_re = p_re * a_re - p_im * a_im + q_re * b_re + q_im * b_im;
            let x_im = p_re * a_im + p_im * a_re - q_re * b_im + q_im * b_re;
            *out = x_re * x_re + x_im * x_im;
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
