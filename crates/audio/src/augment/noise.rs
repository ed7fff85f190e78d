//! Additive noise: generated coloured noise, mains hum, babble, looping with a cross-fade,
//! mixing at an exact signal-to-noise ratio.

use std::borrow::Cow;

use rand::Rng;
use rand_distr::StandardNormal;
use rustfft::num_complex::Complex;
use serde::{Deserialize, Serialize};

use super::fourier::{fast_length, FftPlans};

/// Length of the cross-fade where a looped noise source joins its own start (10 ms at 16 kHz),
/// or half the source when it is shorter than two of these.
pub const LOOP_CROSSFADE_SAMPLES: usize = 160;

/// Generated noise is shaped only from this frequency up; below it the spectrum is zero, so that
/// brown noise's power is not spent on sub-audible drift that the front end never sees.
pub const COLOURED_NOISE_LOW_HZ: f64 = 20.0;

/// A kind of additive noise.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum NoiseKind {
    /// Flat spectrum (power ∝ f⁰).
    White,
    /// Power ∝ 1/f (−3 dB per octave).
    Pink,
    /// Power ∝ 1/f² (−6 dB per octave).
    Brown,
    /// A sum of other utterances, supplied by the caller through a [`BabbleSource`].
    Babble,
    /// Mains hum: a 50 or 60 Hz tone and its harmonics over a broadband hiss ([`hum`]), as a
    /// ground loop or an unshielded tape recorder leaves on a transfer.
    Hum,
}

impl NoiseKind {
    /// The exponent β of the power spectrum 1/f^β of a coloured noise; `None` for babble and
    /// hum.
    pub fn spectral_exponent(self) -> Option<f64> {
        match self {
            NoiseKind::White => Some(0.0),
            NoiseKind::Pink => Some(1.0),
            NoiseKind::Brown => Some(2.0),
            NoiseKind::Babble | NoiseKind::Hum => None,
        }
    }
}

/// The nominal frequencies of public mains supplies (Hz); a hum draws one of them.
pub const MAINS_HZ: [f64; 2] = [50.0, 60.0];

/// How many harmonics of the mains frequency a hum has (the fundamental counts as the first),
/// [low, high], drawn uniformly.
pub const HUM_HARMONICS: [usize; 2] = [3, 12];

/// The level of the white hiss under a hum, relative to the hum's tones (dB), [low, high],
/// drawn uniformly.
pub const HUM_HISS_DB: [f64; 2] = [-20.0, -3.0];

/// What a hum is made of.
#[derive(Debug, Clone, PartialEq)]
pub struct HumSettings {
    /// The mains frequency (Hz).
    pub mains_hz: f64,
    /// Amplitude of each harmonic, the fundamental first (harmonic h is at h·`mains_hz`).
    pub amplitudes: Vec<f64>,
    /// Phase of each harmonic (radians), as many as `amplitudes`.
    pub phases: Vec<f64>,
    /// Power of the white hiss relative to the power of the tones (dB); `None`: no hiss.
    pub hiss_db: Option<f64>,
}

impl HumSettings {
    /// Draws a hum: a mains frequency from [`MAINS_HZ`], a number of harmonics in
    /// [`HUM_HARMONICS`] (those below the Nyquist frequency), amplitude u/h for harmonic h with
    /// u uniform in [0.25, 1], uniform phases, and hiss at a level in [`HUM_HISS_DB`].
    pub fn draw<R: Rng + ?Sized>(sample_rate: u32, rng: &mut R) -> Self {
        let mains_hz = MAINS_HZ[rng.random_range(0..MAINS_HZ.len())];
        let count = rng.random_range(HUM_HARMONICS[0]..=HUM_HARMONICS[1]);
        let nyquist = f64::from(sample_rate) / 2.0;
        let count = count.min((nyquist / mains_hz).ceil() as usize - 1).max(1);
        let amplitudes = (1..=count)
            .map(|h| rng.random_range(0.25..=1.0) / h as f64)
            .collect();
        let phases = (0..count)
            .map(|_| rng.random_range(0.0..std::f64::consts::TAU))
            .collect();
        let hiss_db = Some(rng.random_range(HUM_HISS_DB[0]..=HUM_HISS_DB[1]));
        HumSettings {
            mains_hz,
            amplitudes,
            phases,
            hiss_db,
        }
    }
}

/// `length` samples of the hum `settings` describe, with unit mean power:
///
/// t[n] = Σ_h a_h·sin(2π·h·f·n/fs + φ_h), then white Gaussian hiss w[n] scaled so that its
/// power is 10^(hiss/10) times the tones' (mean powers over the `length` samples), and the sum
/// scaled to unit mean power.
pub fn hum<R: Rng + ?Sized>(
    length: usize,
    sample_rate: u32,
    settings: &HumSettings,
    rng: &mut R,
) -> Vec<f32> {
    let step = std::f64::consts::TAU * settings.mains_hz / f64::from(sample_rate);
    // Each harmonic is the imaginary part of a phasor turned by e^{i·h·step} per sample (a
    // complex product instead of a sine per sample and harmonic), set exactly from its angle
    // every RESYNC_SAMPLES so that rounding cannot accumulate.
    const RESYNC_SAMPLES: usize = 4_096;
    let turns: Vec<(f64, f64)> = (1..=settings.amplitudes.len())
        .map(|h| (h as f64 * step).sin_cos())
        .map(|(sin, cos)| (cos, sin))
        .collect();
    let mut phasors = vec![(0.0f64, 0.0f64); turns.len()];
    let mut tones = vec![0.0f64; length];
    for (n, tone) in tones.iter_mut().enumerate() {
        if n % RESYNC_SAMPLES == 0 {
            for (k, (phasor, &phase)) in phasors.iter_mut().zip(&settings.phases).enumerate() {
                let (sin, cos) = ((k + 1) as f64 * step * n as f64 + phase).sin_cos();
                *phasor = (cos, sin);
            }
        }
        let mut sum = 0.0;
        for ((phasor, &(cos, sin)), &a) in phasors.iter_mut().zip(&turns).zip(&settings.amplitudes)
        {
            sum += a * phasor.1;
            *phasor = (
                phasor.0 * cos - phasor.1 * sin,
                phasor.0 * sin + phasor.1 * cos,
            );
        }
        *tone = sum;
    }
    let tone_power = tones.iter().map(|x| x * x).sum::<f64>() / length.max(1) as f64;
    if let Some(hiss_db) = settings.hiss_db {
        let hiss: Vec<f64> = (0..length)
            .map(|_| f64::from(rng.sample::<f32, _>(StandardNormal)))
            .collect();
        let hiss_power = hiss.iter().map(|x| x * x).sum::<f64>() / length.max(1) as f64;
        if hiss_power > 0.0 {
            let scale = (tone_power * 10f64.powf(hiss_db / 10.0) / hiss_power).sqrt();
            for (tone, noise) in tones.iter_mut().zip(hiss) {
                *tone += scale * noise;
            }
        }
    }
    let power = tones.iter().map(|x| x * x).sum::<f64>() / length.max(1) as f64;
    let scale = if power > 0.0 {
        power.sqrt().recip()
    } else {
        0.0
    };
    tones.into_iter().map(|x| (x * scale) as f32).collect()
}

/// Where babble comes from: other utterances of the training set, by index. The training loop
/// implements it over whatever holds its audio (and may leave out the utterance being augmented,
/// or its speaker, by what it counts and returns).
pub trait BabbleSource: Sync {
    /// How many utterances there are to draw from.
    fn utterance_count(&self) -> usize;
    /// The 16 kHz mono samples of utterance `index` (< [`Self::utterance_count`]), or `None`
    /// when it cannot be had; that talker is then left out of the babble.
    fn utterance(&self, index: usize) -> Option<Cow<'_, [f32]>>;
}

impl BabbleSource for Vec<Vec<f32>> {
    fn utterance_count(&self) -> usize {
        self.len()
    }

    fn utterance(&self, index: usize) -> Option<Cow<'_, [f32]>> {
        self.get(index)
            .map(|samples| Cow::Borrowed(samples.as_slice()))
    }
}

/// `length` samples of Gaussian noise whose power spectrum falls as 1/f^`exponent` (0 white,
/// 1 pink, 2 brown), with unit mean power.
///
/// White noise is drawn sample by sample. Coloured noise is drawn in the frequency domain: the
/// spectrum of white Gaussian noise of M samples (M the first FFT-friendly length ≥ `length`)
/// has independent complex Gaussian bins X[k], X[M−k] = X*[k]; each bin is drawn so and scaled
/// by f_k^(−β/2) for f_k ≥ [`COLOURED_NOISE_LOW_HZ`] (zero below), one inverse FFT gives the
/// noise, and the first `length` samples are kept and scaled to unit power.
pub fn coloured_noise<R: Rng + ?Sized>(
    length: usize,
    exponent: f64,
    sample_rate: u32,
    rng: &mut R,
    plans: &FftPlans,
) -> Vec<f32> {
    if length == 0 {
        return Vec::new();
    }
    let mut noise: Vec<f32> = if exponent == 0.0 {
        (0..length).map(|_| rng.sample(StandardNormal)).collect()
    } else {
        let size = fast_length(length.max(2));
        let mut spectrum = vec![Complex::<f32>::default(); size];
        let bin_hz = f64::from(sample_rate) / size as f64;
        for k in 1..=size / 2 {
            let hz = k as f64 * bin_hz;
            let weight = if hz < COLOURED_NOISE_LOW_HZ {
                0.0
            } else if exponent == 1.0 {
                // Pink and brown without a power function: a third of the generation time.
                (1.0 / hz.sqrt()) as f32
            } else if exponent == 2.0 {
                (1.0 / hz) as f32
            } else {
                hz.powf(-exponent / 2.0) as f32
            };
            let (re, im): (f32, f32) = (rng.sample(StandardNormal), rng.sample(StandardNormal));
            if 2 * k == size {
                // The Nyquist bin of an even length is real; √2 gives it a complex bin's power.
                spectrum[k] = Complex::new(weight * re * std::f32::consts::SQRT_2, 0.0);
            } else {
                spectrum[k] = Complex::new(weight * re, weight * im);
                spectrum[size - k] = spectrum[k].conj();
            }
        }
        plans.inverse(size).process(&mut spectrum);
        spectrum[..length].iter().map(|c| c.re).collect()
    };
    let power = mean_power(&noise);
    if power > 0.0 {
        let scale = (1.0 / power).sqrt() as f32;
        for sample in &mut noise {
            *sample *= scale;
        }
    }
    noise
}

/// Mean power (1/N)·Σ x[n]², summed in f64.
pub fn mean_power(samples: &[f32]) -> f64 {
    if samples.is_empty() {
        return 0.0;
    }
    samples.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>() / samples.len() as f64
}

/// `length` samples of `source` starting at `start`, looped when the source ends before.
///
/// Each time the source runs out, its last F samples are cross-faded into its first F samples
/// with equal-power gains (cos and sin of a quarter period, which keep the power of two
/// uncorrelated signals constant), F = min([`LOOP_CROSSFADE_SAMPLES`], source length / 2), and
/// it continues from sample F. No sample past the source's end is ever read. `start` is clamped
/// so that a full cross-fade fits before the first join. An empty source gives silence.
pub fn loop_to_length(source: &[f32], length: usize, start: usize) -> Vec<f32> {
    let available = source.len();
    if available == 0 {
        return vec![0.0; length];
    }
    let fade = LOOP_CROSSFADE_SAMPLES.min(available / 2);
    let start = start.min(available - fade.max(1));
    let mut out = Vec::with_capacity(length);
    out.extend_from_slice(&source[start..available.min(start + length)]);
    let gains: Vec<(f32, f32)> = (0..fade)
        .map(|i| {
            let angle = std::f64::consts::FRAC_PI_2 * (i as f64 + 0.5) / fade as f64;
            (angle.cos() as f32, angle.sin() as f32)
        })
        .collect();
    while out.len() < length {
        let join = out.len() - fade;
        for (i, &(fade_out, fade_in)) in gains.iter().enumerate() {
            out[join + i] = out[join + i] * fade_out + source[i] * fade_in;
        }
        let wanted = length - out.len();
        out.extend_from_slice(&source[fade..available.min(fade + wanted)]);
    }
    out
}

/// Adds `noise` (same length as `signal`) scaled so that the signal-to-noise ratio over the whole
/// utterance is exactly `snr_db`:
///
/// P_s = (1/N)·Σ signal[n]², P_v = (1/N)·Σ noise[n]², g = √(P_s / (P_v·10^(snr/10))),
/// signal[n] += g·noise[n], so that 10·log10(P_s / (g²·P_v)) = snr.
///
/// Returns the gain g, or `None` (and leaves the signal alone) when either power is zero, where
/// no ratio exists.
pub fn mix_at_snr(signal: &mut [f32], noise: &[f32], snr_db: f64) -> Option<f64> {
    assert_eq!(
        signal.len(),
        noise.len(),
        "noise must match the signal's length"
    );
    let (signal_power, noise_power) = (mean_power(signal), mean_power(noise));
    if signal_power <= 0.0 || noise_power <= 0.0 {
        return None;
    }
    let gain = (signal_power / (noise_power * 10f64.powf(snr_db / 10.0))).sqrt();
    for (sample, &value) in signal.iter_mut().zip(noise) {
        *sample = (f64::from(*sample) + gain * f64::from(value)) as f32;
    }
    Some(gain)
}

/// Babble of `length` samples from the given utterances: each is looped from a random start
/// ([`loop_to_length`]), scaled to unit mean power so that every talker is equally loud, and
/// the talkers are summed. Silent or empty utterances are left out; `None` when none is left.
pub fn babble<R: Rng + ?Sized>(
    talkers: &[Cow<'_, [f32]>],
    length: usize,
    rng: &mut R,
) -> Option<Vec<f32>> {
    let mut sum = vec![0.0f32; length];
    let mut used = 0;
    for talker in talkers {
        let power = mean_power(talker);
        if power <= 0.0 {
            continue;
        }
        let start = rng.random_range(0..talker.len());
        let looped = loop_to_length(talker, length, start);
        let scale = (1.0 / mean_power(&looped).max(f64::MIN_POSITIVE)).sqrt() as f32;
        for (total, value) in sum.iter_mut().zip(looped) {
            *total += scale * value;
        }
        used += 1;
    }
    (used > 0).then_some(sum)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// 10·log10(P_signal / P_added) of what `mix_at_snr` did, in f64 from the samples.
    fn measured_snr(clean: &[f32], mixed: &[f32]) -> f64 {
        let signal: f64 = clean.iter().map(|&x| f64::from(x).powi(2)).sum();
        let noise: f64 = clean
            .iter()
            .zip(mixed)
            .map(|(&a, &b)| (f64::from(b) - f64::from(a)).powi(2))
            .sum();
        10.0 * (signal / noise).log10()
    }

    fn speech_like(length: usize) -> Vec<f32> {
        // A tone gated on and off, with silences, so that the power is not uniform.
        (0..length)
            .map(|n| {
                let on = (n / 1_600) % 3 != 2;
                if on {
                    0.3 * (n as f32 * 0.07).sin() * (n as f32 * 0.0013).cos()
                } else {
                    0.0
                }
            })
            .collect()
    }

    #[test]
    fn snr_is_exact_for_every_kind_of_noise_and_with_looping() {
        let plans = FftPlans::new();
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let clean = speech_like(37_000);
        // A short babble source (0.4 s) that must be looped many times over 2.3 s.
        let short_talker: Vec<f32> = speech_like(6_400).iter().map(|x| x * 3.0).collect();
        let long_talker = speech_like(50_000);
        let talkers = [
            Cow::Borrowed(&short_talker[..]),
            Cow::Borrowed(&long_talker[..]),
        ];
        for kind in [
            NoiseKind::White,
            NoiseKind::Pink,
            NoiseKind::Brown,
            NoiseKind::Babble,
            NoiseKind::Hum,
        ] {
            let noise = match kind.spectral_exponent() {
                Some(exponent) => coloured_noise(clean.len(), exponent, 16_000, &mut rng, &plans),
                None if kind == NoiseKind::Hum => {
                    let settings = HumSettings::draw(16_000, &mut rng);
                    hum(clean.len(), 16_000, &settings, &mut rng)
                }
                None => babble(&talkers, clean.len(), &mut rng).unwrap(),
            };
            for snr in [0.0, 5.0, 12.5, 20.0, 40.0] {
                let mut mixed = clean.clone();
                mix_at_snr(&mut mixed, &noise, snr).unwrap();
                let got = measured_snr(&clean, &mixed);
                // The definition of SNR over the whole utterance; only f32 rounding of the sum
                // separates the two.
                assert!((got - snr).abs() < 1e-4, "{kind:?} at {snr} dB: {got}");
            }
        }
        // A looped noise file shorter than the utterance, mixed the same way.
        let noise_file = coloured_noise(5_000, 1.0, 16_000, &mut rng, &plans);
        let looped = loop_to_length(&noise_file, clean.len(), 4_000);
        let mut mixed = clean.clone();
        mix_at_snr(&mut mixed, &looped, 10.0).unwrap();
        assert!((measured_snr(&clean, &mixed) - 10.0).abs() < 1e-4);
    }

    #[test]
    fn silence_gets_no_noise() {
        let mut silent = vec![0.0f32; 100];
        assert_eq!(mix_at_snr(&mut silent, &[1.0; 100], 10.0), None);
        assert!(silent.iter().all(|&x| x == 0.0));
    }

    #[test]
    fn looping_copies_the_source_and_cross_fades_at_each_join() {
        let source: Vec<f32> = (0..1_000).map(|i| i as f32).collect();
        let out = loop_to_length(&source, 2_500, 300);
        assert_eq!(out.len(), 2_500);
        // First 700 − 160 samples: the source from 300 on, untouched.
        assert_eq!(out[..540], source[300..840]);
        // Then 160 samples cross-fading source[840..1000] into source[0..160].
        for i in 0..LOOP_CROSSFADE_SAMPLES {
            let angle = std::f64::consts::FRAC_PI_2 * (i as f64 + 0.5) / 160.0;
            let expected = source[840 + i] as f64 * angle.cos() + source[i] as f64 * angle.sin();
            assert!((f64::from(out[540 + i]) - expected).abs() < 1e-3);
        }
        // And on from source[160] up to the next join (never past source[999]).
        assert_eq!(out[700..1380], source[160..840]);
        // Longer sources are just cut.
        assert_eq!(loop_to_length(&source, 200, 10), source[10..210]);
        // A one-sample source repeats (no room for a fade).
        assert_eq!(loop_to_length(&[0.5], 3, 0), [0.5, 0.5, 0.5]);
        assert_eq!(loop_to_length(&[], 2, 0), [0.0, 0.0]);
    }

    /// Power of each whole-hertz bin of a one-second signal at 16 kHz (an exact number of
    /// periods of every harmonic of 50 and 60 Hz, so a tone falls in one bin, no leakage).
    fn one_hertz_power(signal: &[f32], plans: &FftPlans) -> Vec<f64> {
        assert_eq!(signal.len(), 16_000);
        let mut buffer: Vec<Complex<f32>> = signal.iter().map(|&x| Complex::new(x, 0.0)).collect();
        plans.forward(16_000).process(&mut buffer);
        buffer[..8_000]
            .iter()
            .map(|c| f64::from(c.norm_sqr()))
            .collect()
    }

    #[test]
    fn hum_is_its_harmonics_over_hiss_at_the_drawn_level() {
        let plans = FftPlans::new();
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        // Tones only: every bit of power sits on the harmonics of the mains frequency, in the
        // proportions a_h² (Parseval: a sine of amplitude a has power a²/2).
        let settings = HumSettings {
            mains_hz: 60.0,
            amplitudes: vec![1.0, 0.5, 0.25],
            phases: vec![0.3, 2.0, 4.0],
            hiss_db: None,
        };
        let tones = hum(16_000, 16_000, &settings, &mut rng);
        assert!((mean_power(&tones) - 1.0).abs() < 1e-5);
        let power = one_hertz_power(&tones, &plans);
        let total: f64 = power.iter().sum();
        let share = |hz: usize| power[hz] / total;
        let expected = [1.0, 0.25, 0.0625].map(|a2| a2 / 1.3125);
        for (h, want) in expected.iter().enumerate() {
            let got = share(60 * (h + 1));
            assert!((got - want).abs() < 1e-4, "harmonic {}: {got}", h + 1);
        }
        // With hiss 10 dB under the tones, the tones keep 1/(1 + 0.1) of the power; the hiss
        // spreads the rest over all 8 000 bins, 3 of which are the tones'.
        let with_hiss = HumSettings {
            hiss_db: Some(-10.0),
            ..settings
        };
        let noisy = hum(16_000, 16_000, &with_hiss, &mut rng);
        assert!((mean_power(&noisy) - 1.0).abs() < 1e-5);
        let power = one_hertz_power(&noisy, &plans);
        let tonal: f64 = [60, 120, 180].iter().map(|&hz| power[hz]).sum();
        let share = tonal / power.iter().sum::<f64>();
        assert!((share - 1.0 / 1.1).abs() < 0.01, "{share}");
        // Drawn hums stay within their documented ranges, at a mains frequency of the list.
        for _ in 0..50 {
            let drawn = HumSettings::draw(16_000, &mut rng);
            assert!(MAINS_HZ.contains(&drawn.mains_hz));
            assert!((HUM_HARMONICS[0]..=HUM_HARMONICS[1]).contains(&drawn.amplitudes.len()));
            assert_eq!(drawn.amplitudes.len(), drawn.phases.len());
            for (h, a) in drawn.amplitudes.iter().enumerate() {
                let h = (h + 1) as f64;
                assert!((0.25 / h..=1.0 / h).contains(a), "{a} at harmonic {h}");
            }
            let hiss = drawn.hiss_db.unwrap();
            assert!((HUM_HISS_DB[0]..=HUM_HISS_DB[1]).contains(&hiss));
        }
        assert!(hum(0, 16_000, &with_hiss, &mut rng).is_empty());
    }

    #[test]
    fn hum_tones_are_the_sines_of_their_definition_over_a_long_stretch() {
        let settings = HumSettings {
            mains_hz: 50.0,
            amplitudes: vec![1.0, 0.4, 0.3, 0.1, 0.05],
            phases: vec![0.0, 1.0, 2.0, 3.0, 4.0],
            hiss_db: None,
        };
        let length = 200_000;
        let got = hum(length, 16_000, &settings, &mut ChaCha8Rng::seed_from_u64(0));
        let step = std::f64::consts::TAU * 50.0 / 16_000.0;
        let direct: Vec<f64> = (0..length)
            .map(|n| {
                (0..5)
                    .map(|k| {
                        let angle = (k + 1) as f64 * step * n as f64 + settings.phases[k];
                        settings.amplitudes[k] * angle.sin()
                    })
                    .sum()
            })
            .collect();
        let power = direct.iter().map(|x| x * x).sum::<f64>() / length as f64;
        let scale = power.sqrt().recip();
        let worst = got
            .iter()
            .zip(&direct)
            .map(|(&g, &d)| (f64::from(g) - d * scale).abs())
            .fold(0.0, f64::max);
        // f32 output: a few units of its rounding.
        assert!(worst < 1e-6, "{worst}");
    }

    #[test]
    fn coloured_noise_has_the_slope_of_its_colour() {
        let plans = FftPlans::new();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for (kind, exponent) in [
            (NoiseKind::White, 0.0),
            (NoiseKind::Pink, 1.0),
            (NoiseKind::Brown, 2.0),
        ] {
            let noise = coloured_noise(1 << 18, exponent, 16_000, &mut rng, &plans);
            assert!((mean_power(&noise) - 1.0).abs() < 1e-4);
            let slope = fitted_slope(&noise, &plans);
            // A power spectrum ∝ 1/f^β has slope −β in log power against log frequency (the
            // definition); a least-squares fit over 100 Hz–7 kHz of a 64-segment Welch average
            // scatters by about ±0.02 here, so ±0.05 is the tolerance.
            assert!((slope + exponent).abs() < 0.05, "{kind:?}: slope {slope}");
        }
    }

    /// Least-squares slope of log10(power) against log10(frequency) over 100 Hz–7 kHz, from a
    /// Welch average of Hann-windowed 4096-sample segments (no overlap).
    fn fitted_slope(noise: &[f32], plans: &FftPlans) -> f64 {
        let size = 4_096;
        let fft = plans.forward(size);
        let window: Vec<f32> = (0..size)
            .map(|n| {
                (0.5 - 0.5 * (2.0 * std::f64::consts::PI * n as f64 / size as f64).cos()) as f32
            })
            .collect();
        let mut power = vec![0.0f64; size / 2];
        for segment in noise.chunks_exact(size) {
            let mut buffer: Vec<Complex<f32>> = segment
                .iter()
                .zip(&window)
                .map(|(&x, &w)| Complex::new(x * w, 0.0))
                .collect();
            fft.process(&mut buffer);
            for (total, value) in power.iter_mut().zip(&buffer) {
                *total += f64::from(value.norm_sqr());
            }
        }
        let points: Vec<(f64, f64)> = (1..size / 2)
            .map(|k| (k as f64 * 16_000.0 / size as f64, power[k]))
            .filter(|&(hz, _)| (100.0..=7_000.0).contains(&hz))
            .map(|(hz, p)| (hz.log10(), p.log10()))
            .collect();
        let n = points.len() as f64;
        let (mean_x, mean_y) = (
            points.iter().map(|p| p.0).sum::<f64>() / n,
            points.iter().map(|p| p.1).sum::<f64>() / n,
        );
        let covariance: f64 = points.iter().map(|p| (p.0 - mean_x) * (p.1 - mean_y)).sum();
        let variance: f64 = points.iter().map(|p| (p.0 - mean_x).powi(2)).sum();
        covariance / variance
    }
}
