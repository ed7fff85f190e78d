//! Band-limiting: Butterworth high-pass and low-pass filters run forward and backward.

/// Order of each Butterworth filter (per pass).
pub const BUTTERWORTH_ORDER: usize = 4;

/// One second-order section, direct form II transposed, coefficients normalised by a0.
#[derive(Debug, Clone, Copy)]
struct Biquad {
    b: [f64; 3],
    a: [f64; 2],
}

/// Runs a cascade of sections over `samples` in place, from rest. All sections advance together
/// sample by sample: each section's recursion is a chain of dependent multiply-adds, and running
/// them side by side lets the processor overlap the chains (about twice as fast as one whole
/// pass per section).
fn run_cascade(sections: &[Biquad], samples: &mut [f64]) {
    let mut state = vec![[0.0f64; 2]; sections.len()];
    for sample in samples.iter_mut() {
        let mut x = *sample;
        for (section, [s1, s2]) in sections.iter().zip(state.iter_mut()) {
            let y = section.b[0] * x + *s1;
            *s1 = section.b[1] * x - section.a[0] * y + *s2;
            *s2 = section.b[2] * x - section.a[1] * y;
            x = y;
        }
        *sample = x;
    }
}

/// Which side of the cut-off a filter keeps.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Pass {
    Low,
    High,
}

/// The second-order sections of a Butterworth filter of [`BUTTERWORTH_ORDER`], cut-off
/// `cutoff_hz`: the analogue prototype's pole pairs (quality factors Q_k = 1/(2·cos((2k+1)π/(2N))))
/// mapped by the bilinear transform with the cut-off pre-warped, one section per pair.
fn butterworth(pass: Pass, cutoff_hz: f64, sample_rate: f64) -> Vec<Biquad> {
    let omega = 2.0 * std::f64::consts::PI * cutoff_hz / sample_rate;
    let (sin, cos) = omega.sin_cos();
    (0..BUTTERWORTH_ORDER / 2)
        .map(|k| {
            let angle = (2 * k + 1) as f64 * std::f64::consts::PI / (2 * BUTTERWORTH_ORDER) as f64;
            let quality = 1.0 / (2.0 * angle.cos());
            let alpha = sin / (2.0 * quality);
            let a0 = 1.0 + alpha;
            let b = match pass {
                Pass::Low => [(1.0 - cos) / 2.0, 1.0 - cos, (1.0 - cos) / 2.0],
                Pass::High => [(1.0 + cos) / 2.0, -(1.0 + cos), (1.0 + cos) / 2.0],
            };
            Biquad {
                b: b.map(|v| v / a0),
                a: [-2.0 * cos / a0, (1.0 - alpha) / a0],
            }
        })
        .collect()
}

/// The amplitude gain that [`band_limit`] applies to a steady sine of `frequency_hz` (away from
/// the utterance's edges). Each Butterworth pass of order N has
/// |H(f)|² = 1 / (1 + r^(2N)) with r = tan(πf/fs)/tan(πf_c/fs) for the low-pass and its inverse
/// for the high-pass (the bilinear transform's frequency warping); running the filter forward
/// and backward squares the magnitude, so the gain is Π 1/(1 + r^(2N)) over the filters used:
/// 0.5 (−6.02 dB) at a cut-off, and for N = 4 about −48 dB one octave beyond it.
pub fn band_limit_gain(
    frequency_hz: f64,
    low_cut_hz: Option<f64>,
    high_cut_hz: Option<f64>,
    sample_rate: u32,
) -> f64 {
    let fs = f64::from(sample_rate);
    let warped = |hz: f64| (std::f64::consts::PI * hz / fs).tan();
    let order = 2 * BUTTERWORTH_ORDER as i32;
    let mut gain = 1.0;
    if let Some(cut) = low_cut_hz {
        gain /= 1.0 + (warped(cut) / warped(frequency_hz)).powi(order);
    }
    if let Some(cut) = high_cut_hz {
        gain /= 1.0 + (warped(frequency_hz) / warped(cut)).powi(order);
    }
    gain
}

/// Band-limits `samples` in place: a Butterworth high-pass at `low_cut_hz` and low-pass at
/// `high_cut_hz` (either may be absent), each of order [`BUTTERWORTH_ORDER`], run forward and
/// then backward over the utterance so that the result has zero phase (no shift of the
/// alignment); [`band_limit_gain`] gives the exact gain at any frequency. Cut-offs must lie
/// strictly between 0 and half the sample rate (the configuration is validated at the edge).
/// The filters start from rest at both ends, so the first and last few milliseconds carry a
/// start-up transient, as a recording switched on mid-sound does.
pub fn band_limit(
    samples: &mut [f32],
    low_cut_hz: Option<f64>,
    high_cut_hz: Option<f64>,
    sample_rate: u32,
) {
    let fs = f64::from(sample_rate);
    let mut sections = Vec::new();
    if let Some(cut) = low_cut_hz {
        sections.extend(butterworth(Pass::High, cut, fs));
    }
    if let Some(cut) = high_cut_hz {
        sections.extend(butterworth(Pass::Low, cut, fs));
    }
    if sections.is_empty() {
        return;
    }
    let mut work: Vec<f64> = samples.iter().map(|&x| f64::from(x)).collect();
    run_cascade(&sections, &mut work);
    work.reverse();
    run_cascade(&sections, &mut work);
    work.reverse();
    for (sample, value) in samples.iter_mut().zip(work) {
        *sample = value as f32;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::{sine, tone_amplitude};

    fn tone(frequency: f64) -> Vec<f32> {
        sine(16_000, frequency, 0.5, 2.0)
            .into_iter()
            .map(|x| x as f32)
            .collect()
    }

    #[test]
    fn telephone_band_passes_speech_band_sines_and_stops_the_rest() {
        let (low, high) = (Some(300.0), Some(3400.0));
        for frequency in [
            60.0, 150.0, 300.0, 700.0, 1000.0, 2000.0, 3400.0, 5000.0, 7000.0,
        ] {
            let mut samples = tone(frequency);
            band_limit(&mut samples, low, high, 16_000);
            // Away from the edges (0.5 s trimmed) the filters are in their steady state.
            let measured = tone_amplitude(&samples[8_000..24_000], 16_000, frequency) / 0.5;
            let expected = band_limit_gain(frequency, low, high, 16_000);
            // Analytic Butterworth magnitude (bilinear transform, squared by the two passes).
            assert!(
                (measured - expected).abs() <= 1e-3 + 1e-3 * expected,
                "{frequency} Hz: measured {measured}, expected {expected}"
            );
            if (700.0..=2000.0).contains(&frequency) {
                assert!(expected > 0.99, "{frequency} Hz passes: {expected}");
            }
            if frequency <= 150.0 || frequency >= 7000.0 {
                assert!(
                    expected < 0.01,
                    "{frequency} Hz is stopped (−40 dB): {expected}"
                );
            }
        }
        // At each cut-off the two passes give exactly half the amplitude (−6.02 dB).
        assert!((band_limit_gain(300.0, Some(300.0), None, 16_000) - 0.5).abs() < 1e-12);
        assert!((band_limit_gain(3400.0, None, Some(3400.0), 16_000) - 0.5).abs() < 1e-12);
    }

    #[test]
    fn one_octave_beyond_a_cut_is_about_48_db_down() {
        // Order-4 Butterworth, forward and backward: 8 × 6.02 dB per octave asymptotically
        // (textbook roll-off); the bilinear warping makes the stop band steeper still.
        let gain = band_limit_gain(100.0, Some(200.0), None, 16_000);
        let db = 20.0 * gain.log10();
        assert!((-48.3..=-48.0).contains(&db), "{db}");
    }

    #[test]
    fn no_cut_leaves_the_samples_alone() {
        let original = tone(440.0);
        let mut samples = original.clone();
        band_limit(&mut samples, None, None, 16_000);
        assert_eq!(samples, original);
    }
}
