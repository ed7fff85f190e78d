//! A low-bit-rate transform codec, simulated: what a lossy re-encode does to speech.
//!
//! Archive audio often went through a perceptual codec at a low bit rate (a streaming copy, a
//! compressed transfer of a cassette). Such a codec keeps a spectrum per frame of a few tens of
//! milliseconds, drops everything above a cut-off, and spends its few bits band by band so that
//! the quantisation noise in each band stays a fixed distance below that band's own level;
//! bands far below the frame's loudest get no bits at all, and coefficients smaller than half a
//! quantisation step become zero. The result is speech with holes in its spectrum that open and
//! close from frame to frame, noise that follows the speech's own envelope, smeared onsets
//! (quantisation noise spreads over the whole frame) and no high band. None of that is noise
//! added at a fixed SNR or a fixed filter, so the other augmentations do not teach it.
//!
//! The simulation does exactly those things and nothing codec-specific:
//!
//! - **Transform**: short-time Fourier transform, frames of [`CODEC_FRAME`] samples (32 ms at
//!   16 kHz) every [`CODEC_HOP`], with the square root of the periodic Hann window for analysis
//!   and again for synthesis. The squared window sums to one at half-frame hops
//!   (sin² + cos² = 1), so overlap-add gives the input back exactly when nothing is quantised.
//!   [`frame_spectra`] is checked against `scipy.signal.stft`.
//! - **Bands**: the critical bands of [`BAND_EDGES_HZ`].
//! - **Cut-off**: every bin above it is zero.
//! - **Bit pool**: a band whose mean power per bin is more than `floor_db` below the frame's
//!   loudest band is zero.
//! - **Quantisation**: the real and imaginary parts of every bin of a kept band are rounded to
//!   the nearest multiple of the band's step Δ. By Bennett's law each part's error is uniform
//!   over a step, of power Δ²/12, so a complex bin carries 2·Δ²/12 of noise. That error is
//!   spread evenly over the frame and weighted once by the synthesis window, where the signal
//!   was weighted twice (analysis and synthesis; the window's mean square is 1/2), so the band
//!   reaches the drawn `band_snr_db` in the output when 2·Δ²/12 = 2·P·10^(−SNR/10), P the
//!   band's mean power per bin: Δ = √(12·P·10^(−SNR/10)).
//!
//! Every random value is drawn per utterance by the caller's generator ([`super::Augmenter`]):
//! the cut-off and the band SNR; the bit-pool floor is a setting.

use rustfft::num_complex::Complex;

use super::fourier::FftPlans;

/// Samples per codec frame (32 ms at 16 kHz).
pub const CODEC_FRAME: usize = 512;

/// Samples between codec frames (half a frame).
pub const CODEC_HOP: usize = CODEC_FRAME / 2;

/// Edges of the critical bands (Hz), Zwicker's table as commonly quoted in perceptual-coding
/// texts (from memory), closed at 8 kHz, half the 16 kHz sample rate: 22 bands, 100 Hz wide up
/// to 500 Hz and growing to over a kilohertz at the top.
pub const BAND_EDGES_HZ: [f64; 23] = [
    0.0, 100.0, 200.0, 300.0, 400.0, 510.0, 630.0, 770.0, 920.0, 1080.0, 1270.0, 1480.0, 1720.0,
    2000.0, 2320.0, 2700.0, 3150.0, 3700.0, 4400.0, 5300.0, 6400.0, 7700.0, 8000.0,
];

/// One drawn re-encode: what [`simulate_codec`] does to an utterance.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CodecSettings {
    /// Bins above this frequency (Hz) are dropped.
    pub cutoff_hz: f64,
    /// Signal-to-quantisation-noise ratio within each kept band (dB).
    pub band_snr_db: f64,
    /// Bands this far (dB) below the frame's loudest band are dropped.
    pub floor_db: f64,
}

/// The analysis (and synthesis) window: the square root of the periodic Hann window of
/// [`CODEC_FRAME`] samples, sin(π·n/N).
pub fn codec_window() -> Vec<f32> {
    (0..CODEC_FRAME)
        .map(|n| (std::f64::consts::PI * n as f64 / CODEC_FRAME as f64).sin() as f32)
        .collect()
}

/// Short-time spectra of `samples`: frame t covers samples t·[`CODEC_HOP`] ..
/// t·[`CODEC_HOP`] + [`CODEC_FRAME`] (only whole frames, no padding), windowed by
/// [`codec_window`]; bins 0 ..= N/2 of the unnormalised DFT X[k] = Σ x[n]·w[n]·e^(−2πi·kn/N).
pub fn frame_spectra(samples: &[f32], plans: &FftPlans) -> Vec<Vec<Complex<f32>>> {
    if samples.len() < CODEC_FRAME {
        return Vec::new();
    }
    let window = codec_window();
    let forward = plans.forward(CODEC_FRAME);
    let count = (samples.len() - CODEC_FRAME) / CODEC_HOP + 1;
    let mut buffer = vec![Complex::<f32>::default(); CODEC_FRAME];
    (0..count)
        .map(|t| {
            let frame = &samples[t * CODEC_HOP..t * CODEC_HOP + CODEC_FRAME];
            for ((slot, &x), &w) in buffer.iter_mut().zip(frame).zip(&window) {
                *slot = Complex::new(x * w, 0.0);
            }
            forward.process(&mut buffer);
            buffer[..=CODEC_FRAME / 2].to_vec()
        })
        .collect()
}

/// Inverse of [`frame_spectra`]: each half spectrum back to a real frame (Hermitian symmetry),
/// windowed again and added at its place, in a signal of `length` samples.
pub fn overlap_add(spectra: &[Vec<Complex<f32>>], length: usize, plans: &FftPlans) -> Vec<f32> {
    let window = codec_window();
    let inverse = plans.inverse(CODEC_FRAME);
    let mut out = vec![0.0f32; length];
    let mut buffer = vec![Complex::<f32>::default(); CODEC_FRAME];
    let scale = 1.0 / CODEC_FRAME as f32;
    for (t, half) in spectra.iter().enumerate() {
        let start = t * CODEC_HOP;
        if start + CODEC_FRAME > length {
            break;
        }
        for k in 0..CODEC_FRAME {
            buffer[k] = if k <= CODEC_FRAME / 2 {
                half[k]
            } else {
                half[CODEC_FRAME - k].conj()
            };
        }
        // The DC and Nyquist bins of a real frame are real.
        buffer[0].im = 0.0;
        buffer[CODEC_FRAME / 2].im = 0.0;
        inverse.process(&mut buffer);
        for ((slot, value), &w) in out[start..start + CODEC_FRAME]
            .iter_mut()
            .zip(&buffer)
            .zip(&window)
        {
            *slot += value.re * scale * w;
        }
    }
    out
}

/// The band of each bin 0 ..= N/2 (bin k sits at k·16000/N Hz).
fn bin_bands(sample_rate: u32) -> Vec<usize> {
    let bin_hz = f64::from(sample_rate) / CODEC_FRAME as f64;
    (0..=CODEC_FRAME / 2)
        .map(|k| {
            let frequency = k as f64 * bin_hz;
            BAND_EDGES_HZ[1..]
                .iter()
                .position(|&edge| frequency < edge)
                .unwrap_or(BAND_EDGES_HZ.len() - 2)
        })
        .collect()
}

/// Quantises one frame's half spectrum in place (see the module documentation).
fn quantise_frame(
    spectrum: &mut [Complex<f32>],
    bands: &[usize],
    keep_bins: usize,
    settings: &CodecSettings,
) {
    let band_count = BAND_EDGES_HZ.len() - 1;
    let mut power = vec![0.0f64; band_count];
    let mut bins = vec![0usize; band_count];
    for (value, &band) in spectrum[..keep_bins].iter().zip(bands) {
        power[band] += f64::from(value.norm_sqr());
        bins[band] += 1;
    }
    for (p, &n) in power.iter_mut().zip(&bins) {
        if n > 0 {
            *p /= n as f64;
        }
    }
    let loudest = power.iter().fold(0.0f64, |m, &p| m.max(p));
    let floor = loudest * 10f64.powf(-settings.floor_db / 10.0);
    let noise_share = 10f64.powf(-settings.band_snr_db / 10.0);
    let steps: Vec<f64> = power
        .iter()
        .map(|&p| {
            if p > 0.0 && p >= floor {
                (12.0 * p * noise_share).sqrt()
            } else {
                0.0
            }
        })
        .collect();
    for (k, value) in spectrum.iter_mut().enumerate() {
        let step = if k < keep_bins { steps[bands[k]] } else { 0.0 };
        if step > 0.0 {
            let quantise = |v: f32| ((f64::from(v) / step).round() * step) as f32;
            *value = Complex::new(quantise(value.re), quantise(value.im));
        } else {
            *value = Complex::default();
        }
    }
}

/// Passes 16 kHz `samples` through the simulated codec in place (the length does not change).
/// The signal is padded with half a frame of silence in front and enough behind that every
/// sample lies in two frames, so the ends are treated like the middle.
pub fn simulate_codec(samples: &mut [f32], settings: &CodecSettings, plans: &FftPlans) {
    if samples.is_empty() {
        return;
    }
    let sample_rate = crate::SAMPLE_RATE;
    let front = CODEC_FRAME - CODEC_HOP;
    let back = CODEC_HOP + (CODEC_HOP - samples.len() % CODEC_HOP) % CODEC_HOP;
    let mut padded = vec![0.0f32; front + samples.len() + back];
    padded[front..front + samples.len()].copy_from_slice(samples);
    let mut spectra = frame_spectra(&padded, plans);
    let bands = bin_bands(sample_rate);
    let bin_hz = f64::from(sample_rate) / CODEC_FRAME as f64;
    // Bins at or below the cut-off are kept.
    let keep_bins = ((settings.cutoff_hz / bin_hz).floor() as usize + 1).min(CODEC_FRAME / 2 + 1);
    for spectrum in &mut spectra {
        quantise_frame(spectrum, &bands, keep_bins, settings);
    }
    let out = overlap_add(&spectra, padded.len(), plans);
    samples.copy_from_slice(&out[front..front + samples.len()]);
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn white(length: usize, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..length)
            .map(|_| rng.random_range(-1.0f32..1.0) * 0.3)
            .collect()
    }

    fn snr_db(clean: &[f32], coded: &[f32]) -> f64 {
        let signal: f64 = clean.iter().map(|&x| f64::from(x).powi(2)).sum();
        let noise: f64 = clean
            .iter()
            .zip(coded)
            .map(|(&x, &y)| (f64::from(x) - f64::from(y)).powi(2))
            .sum();
        10.0 * (signal / noise).log10()
    }

    #[test]
    fn the_squared_window_sums_to_one_at_half_frame_hops() {
        let w = codec_window();
        for n in 0..CODEC_HOP {
            let sum = w[n] * w[n] + w[n + CODEC_HOP] * w[n + CODEC_HOP];
            assert!((sum - 1.0).abs() < 1e-6, "{n}: {sum}");
        }
    }

    #[test]
    fn without_quantisation_the_signal_comes_back_exactly() {
        let plans = FftPlans::new();
        // Lengths around frame and hop multiples, and shorter than a frame.
        for length in [1, 100, 255, 256, 257, 511, 512, 513, 4_000, 16_001] {
            let clean = white(length, length as u64);
            let mut coded = clean.clone();
            let settings = CodecSettings {
                cutoff_hz: 8_000.0,
                band_snr_db: 200.0,
                floor_db: 1_000.0,
            };
            simulate_codec(&mut coded, &settings, &plans);
            for (n, (&a, &b)) in clean.iter().zip(&coded).enumerate() {
                assert!(
                    (a - b).abs() < 1e-5,
                    "length {length}, sample {n}: {a} vs {b}"
                );
            }
        }
    }

    /// Bennett's law for a uniform quantiser with a step small against the signal: the error is
    /// uniform over a step, of power Δ²/12. The step is set from it, so the SNR measured over
    /// the whole utterance should be the one asked for (white noise: every band is kept).
    #[test]
    fn the_quantisation_noise_is_at_the_band_snr() {
        let plans = FftPlans::new();
        let clean = white(48_000, 7);
        for target in [10.0, 20.0, 30.0] {
            let mut coded = clean.clone();
            let settings = CodecSettings {
                cutoff_hz: 8_000.0,
                band_snr_db: target,
                floor_db: 1_000.0,
            };
            simulate_codec(&mut coded, &settings, &plans);
            let measured = snr_db(&clean, &coded);
            assert!(
                (measured - target).abs() < 0.3,
                "target {target} dB, measured {measured:.2} dB"
            );
        }
    }

    #[test]
    fn nothing_is_left_above_the_cutoff_and_weak_bands_are_dropped() {
        let plans = FftPlans::new();
        let settings = CodecSettings {
            cutoff_hz: 4_000.0,
            band_snr_db: 40.0,
            floor_db: 30.0,
        };
        // A loud 1 kHz tone, a tone 50 dB weaker at 2.5 kHz, a loud one at 6 kHz.
        let tone = |f: f64, a: f64| -> Vec<f32> {
            (0..32_000)
                .map(|n| (a * (2.0 * std::f64::consts::PI * f * n as f64 / 16_000.0).sin()) as f32)
                .collect()
        };
        let parts = [
            tone(1_000.0, 0.5),
            tone(2_500.0, 0.5 * 10f64.powf(-2.5)),
            tone(6_000.0, 0.5),
        ];
        let mut mixed: Vec<f32> = (0..32_000)
            .map(|n| parts.iter().map(|p| p[n]).sum())
            .collect();
        simulate_codec(&mut mixed, &settings, &plans);
        // Project the middle of the output on each tone (amplitude by correlation).
        let amplitude = |f: f64| {
            let (mut c, mut s) = (0.0f64, 0.0f64);
            for (n, &x) in mixed.iter().enumerate().take(24_000).skip(8_000) {
                let phase = 2.0 * std::f64::consts::PI * f * n as f64 / 16_000.0;
                c += f64::from(x) * phase.cos();
                s += f64::from(x) * phase.sin();
            }
            2.0 * (c * c + s * s).sqrt() / 16_000.0
        };
        assert!(
            (amplitude(1_000.0) - 0.5).abs() < 0.01,
            "{}",
            amplitude(1_000.0)
        );
        assert!(amplitude(2_500.0) < 1e-4, "{}", amplitude(2_500.0));
        assert!(amplitude(6_000.0) < 1e-4, "{}", amplitude(6_000.0));
    }

    #[test]
    fn silence_stays_silent() {
        let plans = FftPlans::new();
        let mut silent = vec![0.0f32; 3_000];
        let settings = CodecSettings {
            cutoff_hz: 5_000.0,
            band_snr_db: 10.0,
            floor_db: 30.0,
        };
        simulate_codec(&mut silent, &settings, &plans);
        assert!(silent.iter().all(|&x| x == 0.0));
    }

    #[test]
    fn every_bin_has_a_band() {
        let bands = bin_bands(16_000);
        assert_eq!(bands[0], 0);
        assert_eq!(bands[3], 0); // 93.75 Hz
        assert_eq!(bands[4], 1); // 125 Hz
        assert_eq!(*bands.last().unwrap(), BAND_EDGES_HZ.len() - 2); // 8 kHz
        assert!(bands.windows(2).all(|w| w[0] <= w[1]));
    }
}
