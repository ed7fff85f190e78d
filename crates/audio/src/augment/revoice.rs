//! Re-voicing: the voice source of an utterance exchanged through a linear-prediction vocoder.
//!
//! A recognizer trained on a few voices learns their voice source — the pitch, the buzz or
//! breathiness, the spectral tilt of the glottal pulses, the way a synthesizer makes them —
//! along with the words. Speed perturbation and vocal-tract warping move the formants; nothing
//! else in the chain changes the source. Re-voicing keeps what carries the words, the spectral
//! envelope frame by frame and its loudness, and gives it a new source:
//!
//! - **Analysis** (the source-filter model of linear prediction, common practice): the samples
//!   are pre-emphasised (`1 − 0.97 z⁻¹`); every [`REVOICE_HOP`] samples a Hann window of
//!   [`REVOICE_WINDOW`] samples centred on the hop gives the autocorrelation up to
//!   [`LPC_ORDER`] (with a white-noise correction of 10⁻⁴ on lag 0), and the Levinson–Durbin
//!   recursion gives the prediction polynomial `A(z) = 1 + Σ a_k z⁻ᵏ` ([`levinson_durbin`],
//!   checked against `scipy.linalg.solve_toeplitz`). The residual `A(z)·x` over the hop gives
//!   the hop's source power.
//! - **Voicing**: the normalised lag-one autocorrelation of the windowed (not pre-emphasised)
//!   samples, near 1 in vowels and nasals, low or negative in fricatives and silence, mapped
//!   linearly from [`VOICING_LOW`] (unvoiced) to [`VOICING_HIGH`] (voiced) onto a voiced share
//!   between 0 and 1.
//! - **New source**: a pulse train at a drawn fundamental, moved by a slow intonation (two
//!   sinusoids of random rate and phase, a drawn depth in semitones) and a period jitter of
//!   ±[`JITTER`], mixed with Gaussian noise by the voiced share (and a drawn breathiness that
//!   moves power from the pulses to the noise); every part is scaled to unit mean power, then
//!   to the hop's residual power (interpolated between hop centres), so the loudness contour
//!   is kept; a one-pole filter with a drawn coefficient tilts its spectrum.
//! - **Synthesis**: the new source through `1 / A(z/γ)` of each hop — with γ < 1 every
//!   resonance of the envelope is wider (bandwidth expansion, common practice in linear
//!   prediction) — de-emphasis, and the whole utterance scaled back to its mean power.
//!
//! The original fundamental and its intonation are dropped: the drawn one does not follow
//! them. That is fine for a language without lexical tone; a tone language would want the
//! original contour kept. Every random value comes from the caller's generator.

use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::SAMPLE_RATE;

/// Order of the prediction polynomial: the sample rate in kHz plus two (common practice for
/// speech, from memory), 18 at 16 kHz.
pub const LPC_ORDER: usize = 18;

/// Samples between analysis frames (10 ms at 16 kHz).
pub const REVOICE_HOP: usize = 160;

/// Samples of the Hann analysis window (25 ms at 16 kHz).
pub const REVOICE_WINDOW: usize = 400;

/// Pre-emphasis coefficient of the analysis (undone after synthesis).
pub const PREEMPHASIS: f64 = 0.97;

/// Lag-one autocorrelation at and below which a frame counts as unvoiced.
pub const VOICING_LOW: f64 = 0.4;

/// Lag-one autocorrelation at and above which a frame counts as fully voiced.
pub const VOICING_HIGH: f64 = 0.85;

/// Largest relative change of one pitch period from the contour (uniform, ±1.5 %).
pub const JITTER: f64 = 0.015;

/// One drawn re-voicing: what [`revoice`] does to an utterance.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RevoiceSettings {
    /// The new fundamental's centre (Hz).
    pub f0_hz: f64,
    /// Depth of the slow intonation around it (semitones, peak).
    pub intonation_semitones: f64,
    /// Share of the voiced frames' source power given to noise instead of pulses (0 to 1).
    pub breath: f64,
    /// Coefficient of the one-pole tilt of the source (−1 < tilt < 1; positive: darker).
    pub tilt: f64,
    /// Radius factor γ of every pole of the envelope (0 < γ ≤ 1; `a_k` becomes `a_k · γᵏ`):
    /// each resonance widens by −ln γ · fs / π Hz (about 100 Hz at γ = 0.98), the formants of a
    /// breathier or more muffled voice.
    pub bandwidth_factor: f64,
}

/// The autocorrelation `r[0..=order]` of `frame`: `r[k] = Σ frame[n]·frame[n + k]`.
pub fn autocorrelation(frame: &[f64], order: usize) -> Vec<f64> {
    (0..=order)
        .map(|lag| {
            if lag < frame.len() {
                dot(&frame[..frame.len() - lag], &frame[lag..])
            } else {
                0.0
            }
        })
        .collect()
}

/// `Σ a[i]·b[i]` over the shorter length, in four interleaved partial sums (independent chains
/// of additions, which the CPU overlaps).
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let len = a.len().min(b.len());
    let (a, b) = (&a[..len], &b[..len]);
    let mut sums = [0.0f64; 4];
    let mut chunks_a = a.chunks_exact(4);
    let mut chunks_b = b.chunks_exact(4);
    for (x, y) in (&mut chunks_a).zip(&mut chunks_b) {
        for lane in 0..4 {
            sums[lane] += x[lane] * y[lane];
        }
    }
    let tail: f64 = chunks_a
        .remainder()
        .iter()
        .zip(chunks_b.remainder())
        .map(|(x, y)| x * y)
        .sum();
    (sums[0] + sums[1]) + (sums[2] + sums[3]) + tail
}

/// The prediction polynomial `[1, a_1, …, a_p]` of the autocorrelation `r[0..=p]` by the
/// Levinson–Durbin recursion (it solves `Σ_k a_k r[|i − k|] = −r[i]`, i = 1..p), and the
/// prediction error power. `None` when `r[0]` is not positive or the recursion meets a
/// reflection coefficient of magnitude 1 or more (a matrix that is not positive definite).
pub fn levinson_durbin(r: &[f64]) -> Option<(Vec<f64>, f64)> {
    let order = r.len().checked_sub(1)?;
    if !(r[0] > 0.0 && r[0].is_finite()) {
        return None;
    }
    let mut a = vec![0.0; order + 1];
    a[0] = 1.0;
    let mut error = r[0];
    let mut previous = a.clone();
    for i in 1..=order {
        let acc: f64 = (0..i).map(|j| a[j] * r[i - j]).sum();
        let k = -acc / error;
        if k.is_nan() || k.abs() >= 1.0 {
            return None;
        }
        previous.copy_from_slice(&a);
        for j in 1..i {
            a[j] = previous[j] + k * previous[i - j];
        }
        a[i] = k;
        error *= 1.0 - k * k;
    }
    Some((a, error))
}

/// Periodic Hann window of `len` samples.
fn hann(len: usize) -> Vec<f64> {
    (0..len)
        .map(|n| 0.5 - 0.5 * (2.0 * std::f64::consts::PI * n as f64 / len as f64).cos())
        .collect()
}

/// What the analysis found in one hop.
struct Hop {
    /// `[1, a_1, …, a_p]`.
    polynomial: Vec<f64>,
    /// Mean power of the residual over the hop.
    power: f64,
    /// Voiced share, 0 to 1.
    voiced: f64,
}

/// The analysis of every hop of the pre-emphasised `emphasised` (and the raw `samples`, for
/// voicing).
fn analyse(samples: &[f64], emphasised: &[f64]) -> Vec<Hop> {
    let n = samples.len();
    let window = hann(REVOICE_WINDOW);
    let mut frame = vec![0.0; REVOICE_WINDOW];
    let mut raw = vec![0.0; REVOICE_WINDOW];
    (0..n.div_ceil(REVOICE_HOP))
        .map(|h| {
            let centre = h * REVOICE_HOP + REVOICE_HOP / 2;
            let start = centre as isize - (REVOICE_WINDOW / 2) as isize;
            for j in 0..REVOICE_WINDOW {
                let at = start + j as isize;
                let (e, s) = if at >= 0 && (at as usize) < n {
                    (emphasised[at as usize], samples[at as usize])
                } else {
                    (0.0, 0.0)
                };
                frame[j] = e * window[j];
                raw[j] = s * window[j];
            }
            let mut r = autocorrelation(&frame, LPC_ORDER);
            r[0] *= 1.0 + 1e-4;
            let polynomial = levinson_durbin(&r).map_or_else(
                || {
                    let mut flat = vec![0.0; LPC_ORDER + 1];
                    flat[0] = 1.0;
                    flat
                },
                |(a, _)| a,
            );
            let first = h * REVOICE_HOP;
            let last = (first + REVOICE_HOP).min(n);
            let reversed: Vec<f64> = polynomial.iter().rev().copied().collect();
            let power = (first..last)
                .map(|i| {
                    let e = if i >= LPC_ORDER {
                        dot(&reversed, &emphasised[i - LPC_ORDER..=i])
                    } else {
                        (0..=i).map(|k| polynomial[k] * emphasised[i - k]).sum()
                    };
                    e * e
                })
                .sum::<f64>()
                / (last - first) as f64;
            let lag = autocorrelation(&raw, 1);
            let correlation = if lag[0] > 0.0 { lag[1] / lag[0] } else { 0.0 };
            let voiced =
                ((correlation - VOICING_LOW) / (VOICING_HIGH - VOICING_LOW)).clamp(0.0, 1.0);
            Hop {
                polynomial,
                power,
                voiced,
            }
        })
        .collect()
}

/// Linear interpolation of a per-hop value at sample `i` between hop centres (held flat before
/// the first centre and after the last).
fn between_hops(values: &[f64], i: usize) -> f64 {
    let position = (i as f64 - (REVOICE_HOP / 2) as f64) / REVOICE_HOP as f64;
    if position <= 0.0 {
        return values[0];
    }
    let h = position.floor() as usize;
    if h + 1 >= values.len() {
        return values[values.len() - 1];
    }
    let t = position - h as f64;
    values[h] * (1.0 - t) + values[h + 1] * t
}

/// Replaces the voice source of `samples` (16 kHz) as `settings` say, in place; the length and
/// the mean power do not change. Returns false, leaving the samples as they were, for an
/// utterance shorter than one analysis window, a silent one, or (a guard that should not
/// trigger: each hop's polynomial is minimum-phase) a synthesis that did not stay finite.
pub fn revoice<R: Rng + ?Sized>(
    samples: &mut [f32],
    settings: &RevoiceSettings,
    rng: &mut R,
) -> bool {
    let n = samples.len();
    if n < REVOICE_WINDOW {
        return false;
    }
    let input: Vec<f64> = samples.iter().map(|&s| f64::from(s)).collect();
    let input_power = input.iter().map(|s| s * s).sum::<f64>() / n as f64;
    if !(input_power > 0.0 && input_power.is_finite()) {
        return false;
    }
    let emphasised: Vec<f64> = (0..n)
        .map(|i| {
            input[i]
                - if i > 0 {
                    PREEMPHASIS * input[i - 1]
                } else {
                    0.0
                }
        })
        .collect();
    let mut hops = analyse(&input, &emphasised);
    if settings.bandwidth_factor != 1.0 {
        for hop in &mut hops {
            let mut radius = 1.0;
            for a in &mut hop.polynomial[1..] {
                radius *= settings.bandwidth_factor;
                *a *= radius;
            }
        }
    }
    let amplitudes: Vec<f64> = hops.iter().map(|h| h.power.sqrt()).collect();
    let voicing: Vec<f64> = hops.iter().map(|h| h.voiced).collect();

    let rate = f64::from(SAMPLE_RATE);
    let tau = 2.0 * std::f64::consts::PI;
    let slow = (rng.random_range(0.2..0.6), rng.random::<f64>() * tau);
    let fast = (rng.random_range(0.8..2.0), rng.random::<f64>() * tau);
    // The fundamental at every hop boundary; a contour below 2 Hz is linear within 10 ms.
    let contour: Vec<f64> = (0..=n.div_ceil(REVOICE_HOP))
        .map(|h| {
            let t = (h * REVOICE_HOP) as f64 / rate;
            let semitones = settings.intonation_semitones
                * (0.6 * (tau * slow.0 * t + slow.1).sin()
                    + 0.4 * (tau * fast.0 * t + fast.1).sin());
            settings.f0_hz * 2f64.powf(semitones / 12.0)
        })
        .collect();
    // Each hop's feedback coefficients `[a_p, …, a_1]`, against `y[i − p .. i]`.
    let feedback: Vec<Vec<f64>> = hops
        .iter()
        .map(|hop| hop.polynomial[1..].iter().rev().copied().collect())
        .collect();
    let tilt_gain = (1.0 - settings.tilt * settings.tilt).sqrt();
    let mut phase = 0.0;
    let mut period_scale = 1.0 + rng.random_range(-JITTER..=JITTER);
    let mut tilted = 0.0;
    let mut previous_out = 0.0;
    let mut synthesis = vec![0.0f64; n];
    let mut output = vec![0.0f64; n];
    for i in 0..n {
        let h = i / REVOICE_HOP;
        let within = (i - h * REVOICE_HOP) as f64 / REVOICE_HOP as f64;
        let f0 = contour[h] + (contour[h + 1] - contour[h]) * within;
        phase += f0 / (rate * period_scale);
        let pulse = if phase >= 1.0 {
            phase -= 1.0;
            period_scale = 1.0 + rng.random_range(-JITTER..=JITTER);
            (rate / f0).sqrt()
        } else {
            0.0
        };
        let noise: f64 = StandardNormal.sample(rng);
        let pulse_share = between_hops(&voicing, i) * (1.0 - settings.breath);
        let source = between_hops(&amplitudes, i)
            * (pulse_share.sqrt() * pulse + (1.0 - pulse_share).sqrt() * noise);
        tilted = tilt_gain * source + settings.tilt * tilted;
        let coefficients = &feedback[h];
        let fed_back = if i >= LPC_ORDER {
            dot(coefficients, &synthesis[i - LPC_ORDER..i])
        } else {
            (1..=i)
                .map(|k| coefficients[LPC_ORDER - k] * synthesis[i - k])
                .sum()
        };
        let y = tilted - fed_back;
        synthesis[i] = y;
        previous_out = y + PREEMPHASIS * previous_out;
        output[i] = previous_out;
    }
    let output_power = output.iter().map(|s| s * s).sum::<f64>() / n as f64;
    if !(output_power > 0.0 && output_power.is_finite()) {
        return false;
    }
    let scale = (input_power / output_power).sqrt();
    for (sample, value) in samples.iter_mut().zip(&output) {
        *sample = (value * scale) as f32;
    }
    true
}

#[cfg(test)]
mod tests {
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    use super::*;

    const SETTINGS: RevoiceSettings = RevoiceSettings {
        f0_hz: 200.0,
        intonation_semitones: 0.0,
        breath: 0.0,
        tilt: 0.0,
        bandwidth_factor: 1.0,
    };

    /// A vowel-like sound: a 110 Hz pulse train through two resonances (700 Hz and 1 200 Hz),
    /// with a little noise.
    fn vowel(seconds: f64, rng: &mut ChaCha8Rng) -> Vec<f32> {
        let rate = f64::from(SAMPLE_RATE);
        let n = (seconds * rate) as usize;
        let period = (rate / 110.0).round() as usize;
        let mut source: Vec<f64> = (0..n)
            .map(|i| if i % period == 0 { 1.0 } else { 0.0 })
            .collect();
        for s in &mut source {
            *s += 0.01 * Distribution::<f64>::sample(&StandardNormal, rng);
        }
        for (f, bandwidth) in [(700.0, 80.0), (1_200.0, 90.0)] {
            let radius = (-std::f64::consts::PI * bandwidth / rate).exp();
            let angle = 2.0 * std::f64::consts::PI * f / rate;
            let (a1, a2) = (-2.0 * radius * angle.cos(), radius * radius);
            let (mut y1, mut y2) = (0.0, 0.0);
            for s in &mut source {
                let y = *s - a1 * y1 - a2 * y2;
                y2 = y1;
                y1 = y;
                *s = y;
            }
        }
        let peak = source.iter().fold(0.0f64, |m, s| m.max(s.abs()));
        source.iter().map(|s| (0.5 * s / peak) as f32).collect()
    }

    /// The shortest lag (in samples, 40 to 400) whose normalised autocorrelation over the
    /// middle half of `samples` comes within 10 % of the highest (a periodic sound correlates as
    /// well at multiples of its period), and that correlation.
    fn strongest_period(samples: &[f32]) -> (usize, f64) {
        let x: Vec<f64> = samples[samples.len() / 4..3 * samples.len() / 4]
            .iter()
            .map(|&s| f64::from(s))
            .collect();
        let correlations: Vec<(usize, f64)> = (40..400)
            .map(|lag| {
                let (a, b) = (&x[..x.len() - lag], &x[lag..]);
                let dot: f64 = a.iter().zip(b).map(|(p, q)| p * q).sum();
                let norm = (a.iter().map(|p| p * p).sum::<f64>()
                    * b.iter().map(|q| q * q).sum::<f64>())
                .sqrt();
                (lag, dot / norm)
            })
            .collect();
        let best = correlations.iter().fold(f64::MIN, |m, c| m.max(c.1));
        *correlations
            .iter()
            .find(|c| c.1 >= 0.9 * best)
            .expect("the maximum itself qualifies")
    }

    /// The log power spectrum (dB) of the prediction polynomial's envelope `1 / |A|²` of the
    /// middle 25 ms of `samples`, at 64 frequencies up to 4 kHz.
    fn envelope_db(samples: &[f32]) -> Vec<f64> {
        let mid = samples.len() / 2;
        let x: Vec<f64> = samples[mid - REVOICE_WINDOW / 2..mid + REVOICE_WINDOW / 2]
            .iter()
            .map(|&s| f64::from(s))
            .collect();
        let e: Vec<f64> = (0..x.len())
            .map(|i| x[i] - if i > 0 { PREEMPHASIS * x[i - 1] } else { 0.0 })
            .zip(hann(REVOICE_WINDOW))
            .map(|(v, w)| v * w)
            .collect();
        let r = autocorrelation(&e, 12);
        let (a, error) = levinson_durbin(&r).unwrap();
        (0..64)
            .map(|j| {
                let w = std::f64::consts::PI * (j as f64 + 0.5) / 128.0;
                let (mut re, mut im) = (0.0, 0.0);
                for (k, c) in a.iter().enumerate() {
                    re += c * (w * k as f64).cos();
                    im -= c * (w * k as f64).sin();
                }
                10.0 * (error / (re * re + im * im)).log10()
            })
            .collect()
    }

    /// A textbook case worked by hand: for r = [1, ρ] the first-order predictor is a₁ = −ρ with
    /// error 1 − ρ²; for the AR(1) autocorrelation r[k] = ρᵏ the higher coefficients are zero.
    #[test]
    fn levinson_durbin_solves_the_first_order_case_by_hand() {
        let (a, error) = levinson_durbin(&[1.0, 0.6]).unwrap();
        assert!((a[1] + 0.6).abs() < 1e-12 && (error - 0.64).abs() < 1e-12);
        let r: Vec<f64> = (0..6).map(|k| 0.6f64.powi(k)).collect();
        let (a, error) = levinson_durbin(&r).unwrap();
        assert!((a[1] + 0.6).abs() < 1e-12, "{a:?}");
        assert!(a[2..].iter().all(|c| c.abs() < 1e-12), "{a:?}");
        assert!((error - 0.64).abs() < 1e-12);
        assert!(levinson_durbin(&[0.0, 0.0]).is_none());
        assert!(levinson_durbin(&[1.0, 1.0]).is_none());
    }

    #[test]
    fn the_new_source_has_the_drawn_pitch_and_the_old_one_is_gone() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let original = vowel(1.0, &mut rng);
        let (lag, _) = strongest_period(&original);
        assert!(
            (144..=146).contains(&lag),
            "the test vowel's own period is 16 000 / 110 = 145: {lag}"
        );
        let mut samples = original.clone();
        assert!(revoice(&mut samples, &SETTINGS, &mut rng));
        let (lag, correlation) = strongest_period(&samples);
        // 16 000 / 200 = 80 samples, within the ±1.5 % jitter.
        assert!((79..=81).contains(&lag), "lag {lag}");
        assert!(correlation > 0.5, "{correlation}");
    }

    #[test]
    fn the_envelope_and_the_power_are_kept() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let original = vowel(1.0, &mut rng);
        for settings in [
            SETTINGS,
            RevoiceSettings {
                f0_hz: 120.0,
                intonation_semitones: 3.0,
                breath: 0.3,
                tilt: 0.0,
                bandwidth_factor: 1.0,
            },
        ] {
            let mut samples = original.clone();
            assert!(revoice(&mut samples, &settings, &mut rng));
            let power = |x: &[f32]| x.iter().map(|&s| f64::from(s).powi(2)).sum::<f64>();
            assert!((power(&samples) / power(&original) - 1.0).abs() < 1e-4);
            let (before, after) = (envelope_db(&original), envelope_db(&samples));
            // The two resonances stay where they were: 700 and 1 200 Hz, bins 11 and 19 of
            // 62.5 Hz (a bin's centre is (j + ½) · 62.5 Hz).
            let peaks = |e: &[f64]| {
                let mut maxima: Vec<usize> = (1..e.len() - 1)
                    .filter(|&j| e[j] > e[j - 1] && e[j] >= e[j + 1])
                    .collect();
                maxima.sort_by(|&a, &b| e[b].total_cmp(&e[a]));
                maxima.truncate(2);
                maxima.sort_unstable();
                maxima
            };
            for envelope in [&before, &after] {
                let found = peaks(envelope);
                assert!(
                    found.len() == 2 && found[0].abs_diff(11) <= 1 && found[1].abs_diff(19) <= 1,
                    "{settings:?}: peaks at bins {found:?} of {envelope:?}"
                );
            }
            let shift = before.iter().sum::<f64>() / 64.0 - after.iter().sum::<f64>() / 64.0;
            let distance = (before
                .iter()
                .zip(&after)
                .map(|(b, a)| (b - a - shift).powi(2))
                .sum::<f64>()
                / 64.0)
                .sqrt();
            assert!(distance < 4.0, "{settings:?}: {distance} dB");
        }
    }

    /// Bandwidth expansion flattens the envelope's peaks: the strongest resonance stands less
    /// far above the envelope's mean, and the more so the smaller γ.
    #[test]
    fn a_smaller_bandwidth_factor_gives_flatter_peaks() {
        let mut rng = ChaCha8Rng::seed_from_u64(13);
        let original = vowel(1.0, &mut rng);
        let prominence = |factor: f64| {
            let mut samples = original.clone();
            let settings = RevoiceSettings {
                bandwidth_factor: factor,
                ..SETTINGS
            };
            assert!(revoice(
                &mut samples,
                &settings,
                &mut ChaCha8Rng::seed_from_u64(1)
            ));
            let envelope = envelope_db(&samples);
            let peak = envelope.iter().fold(f64::MIN, |m, &v| m.max(v));
            peak - envelope.iter().sum::<f64>() / envelope.len() as f64
        };
        let (sharp, wider, widest) = (prominence(1.0), prominence(0.97), prominence(0.93));
        assert!(
            sharp > wider + 1.0 && wider > widest + 1.0,
            "{sharp} {wider} {widest}"
        );
    }

    #[test]
    fn noise_stays_noise_and_silence_and_short_input_are_left_alone() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut noise: Vec<f32> = (0..16_000)
            .map(|_| 0.1 * Distribution::<f32>::sample(&StandardNormal, &mut rng))
            .collect();
        assert!(revoice(&mut noise, &SETTINGS, &mut rng));
        assert!(noise.iter().all(|s| s.is_finite()));
        let (_, correlation) = strongest_period(&noise);
        assert!(
            correlation < 0.2,
            "white noise gained a pitch: {correlation}"
        );

        let mut silence = vec![0.0f32; 16_000];
        assert!(!revoice(&mut silence, &SETTINGS, &mut rng));
        assert!(silence.iter().all(|&s| s == 0.0));
        let mut short = vec![0.1f32; REVOICE_WINDOW - 1];
        assert!(!revoice(&mut short, &SETTINGS, &mut rng));
        assert!(short.iter().all(|&s| s == 0.1));
    }

    /// Odd input from real files — a constant offset, one click, a clipped square wave, a
    /// near-silent hiss, a pure tone — comes out finite at the input's power, or untouched.
    #[test]
    fn odd_input_stays_finite() {
        let mut rng = ChaCha8Rng::seed_from_u64(19);
        let n = 8_000;
        let inputs: Vec<(&str, Vec<f32>)> = vec![
            ("offset", vec![0.25; n]),
            (
                "click",
                (0..n).map(|i| if i == n / 2 { 1.0 } else { 0.0 }).collect(),
            ),
            (
                "square",
                (0..n)
                    .map(|i| if (i / 40) % 2 == 0 { 1.0 } else { -1.0 })
                    .collect(),
            ),
            (
                "hiss",
                (0..n)
                    .map(|_| 1e-30 * Distribution::<f32>::sample(&StandardNormal, &mut rng))
                    .collect(),
            ),
            ("tone", (0..n).map(|i| (i as f32 * 0.3).sin()).collect()),
        ];
        for (name, input) in inputs {
            let mut samples = input.clone();
            let changed = revoice(&mut samples, &SETTINGS, &mut rng);
            assert!(samples.iter().all(|s| s.is_finite()), "{name}");
            if changed {
                let power = |x: &[f32]| x.iter().map(|&s| f64::from(s).powi(2)).sum::<f64>();
                let ratio = power(&samples) / power(&input);
                assert!((ratio - 1.0).abs() < 1e-3, "{name}: power ratio {ratio}");
            } else {
                assert_eq!(samples, input, "{name}");
            }
        }
    }

    #[test]
    fn the_same_generator_state_gives_the_same_samples() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let original = vowel(0.5, &mut rng);
        let settings = RevoiceSettings {
            f0_hz: 150.0,
            intonation_semitones: 2.0,
            breath: 0.2,
            tilt: 0.4,
            bandwidth_factor: 0.97,
        };
        let (mut a, mut b) = (original.clone(), original);
        revoice(&mut a, &settings, &mut ChaCha8Rng::seed_from_u64(1));
        revoice(&mut b, &settings, &mut ChaCha8Rng::seed_from_u64(1));
        assert_eq!(a, b);
    }
}
