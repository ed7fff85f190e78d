//! FFT plans shared by the augmentations, and linear convolution through one complex FFT.

use std::sync::{Arc, Mutex};

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

/// A planner shared by the threads of a training loop. `rustfft` caches plans inside a planner,
/// so every length is planned once; the lock is held only while a plan is looked up, never
/// while it runs.
pub struct FftPlans {
    planner: Mutex<FftPlanner<f32>>,
}

impl Default for FftPlans {
    fn default() -> Self {
        FftPlans {
            planner: Mutex::new(FftPlanner::new()),
        }
    }
}

impl FftPlans {
    /// An empty cache of plans.
    pub fn new() -> Self {
        FftPlans::default()
    }

    pub(crate) fn forward(&self, length: usize) -> Arc<dyn Fft<f32>> {
        self.lock().plan_fft_forward(length)
    }

    pub(crate) fn inverse(&self, length: usize) -> Arc<dyn Fft<f32>> {
        self.lock().plan_fft_inverse(length)
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, FftPlanner<f32>> {
        // A planner left behind by a panicking thread is still a valid cache.
        self.planner
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
    }
}

impl std::fmt::Debug for FftPlans {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("FftPlans")
    }
}

/// The smallest length ≥ `n` whose only prime factors are 2, 3 and 5, for which `rustfft` has
/// fast algorithms; at most 1.25 × n for the lengths of utterances, where a power of two can
/// be nearly 2 × n.
pub(crate) fn fast_length(n: usize) -> usize {
    let mut best = n.next_power_of_two();
    let mut five = 1;
    while five < best {
        let mut three = five;
        while three < best {
            let mut candidate = three;
            while candidate < n {
                candidate *= 2;
            }
            best = best.min(candidate);
            three *= 3;
        }
        five *= 5;
    }
    best
}

/// Full linear convolution `x * h` (length `x.len() + h.len() − 1`) by FFT.
///
/// Both real signals travel in one complex FFT of length M (the first [`fast_length`] that holds
/// the result), packed as z = x + i·h; their spectra are untangled with X[k] = (Z[k] + Z*[M−k])/2 and
/// H[k] = (Z[k] − Z*[M−k])/(2i), multiplied, and one inverse FFT gives the result. Two FFTs of
/// length M in all, where the textbook method needs three.
pub fn convolve(x: &[f32], h: &[f32], plans: &FftPlans) -> Vec<f32> {
    if x.is_empty() || h.is_empty() {
        return Vec::new();
    }
    let length = x.len() + h.len() - 1;
    let size = fast_length(length.max(2));
    let mut z = vec![Complex::<f32>::default(); size];
    for (slot, &value) in z.iter_mut().zip(x) {
        slot.re = value;
    }
    for (slot, &value) in z.iter_mut().zip(h) {
        slot.im = value;
    }
    plans.forward(size).process(&mut z);
    let mut product = vec![Complex::<f32>::default(); size];
    for k in 0..size {
        let a = z[k];
        let b = z[(size - k) % size].conj();
        let spectrum_x = (a + b) * 0.5;
        // (a − b)/(2i) = −i·(a − b)/2
        let spectrum_h = (a - b) * Complex::new(0.0, -0.5);
        product[k] = spectrum_x * spectrum_h;
    }
    plans.inverse(size).process(&mut product);
    let scale = 1.0 / size as f32;
    product[..length].iter().map(|c| c.re * scale).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The definition: y[n] = Σ_k x[k]·h[n−k], in f64.
    fn direct_convolution(x: &[f32], h: &[f32]) -> Vec<f64> {
        let mut y = vec![0.0f64; x.len() + h.len() - 1];
        for (i, &a) in x.iter().enumerate() {
            for (j, &b) in h.iter().enumerate() {
                y[i + j] += f64::from(a) * f64::from(b);
            }
        }
        y
    }

    #[test]
    fn fast_lengths_are_5_smooth_and_minimal() {
        let smooth = |mut n: usize| {
            for p in [2, 3, 5] {
                while n.is_multiple_of(p) {
                    n /= p;
                }
            }
            n == 1
        };
        for n in 1..2_000 {
            let m = fast_length(n);
            assert!(m >= n && smooth(m), "{n} → {m}");
            assert!((n..m).all(|k| !smooth(k)), "{n} → {m}");
        }
        assert_eq!(fast_length(80_000), 80_000);
    }

    #[test]
    fn equals_the_direct_sum() {
        let plans = FftPlans::new();
        for (nx, nh) in [(1, 1), (5, 3), (100, 37), (1000, 513), (64, 64), (997, 1)] {
            let x: Vec<f32> = (0..nx).map(|i| ((i * i) as f32 * 0.37).sin()).collect();
            let h: Vec<f32> = (0..nh)
                .map(|i| (i as f32 * 1.3).cos() / (1.0 + i as f32))
                .collect();
            let fast = convolve(&x, &h, &plans);
            let slow = direct_convolution(&x, &h);
            assert_eq!(fast.len(), slow.len());
            let scale = slow.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            for (n, (&got, &want)) in fast.iter().zip(&slow).enumerate() {
                assert!(
                    (f64::from(got) - want).abs() <= 1e-5 * scale,
                    "{nx}×{nh} at {n}: {got} vs {want}"
                );
            }
        }
        assert!(convolve(&[], &[1.0], &plans).is_empty());
    }
}
