//! Waveform augmentation for training: speed and volume perturbation.

use crate::resample::resample_all;
use crate::AudioError;

/// Speed factors are expressed as a ratio over this denominator, so the resampler works with
/// an exact rational ratio (0.9 → 9:10, 1.1 → 11:10).
const FACTOR_DENOMINATOR: u32 = 1000;

/// Checks a speed factor before use (for config and flag validation at the edge): finite and
/// within 0.5–2.0, the range where speed perturbation still sounds like speech.
pub fn check_speed_factor(factor: f64) -> Result<(), AudioError> {
    if factor.is_finite() && (0.5..=2.0).contains(&factor) {
        Ok(())
    } else {
        Err(AudioError::InvalidParameter {
            what: "speed factor",
            expected: "a number from 0.5 to 2.0",
            found: factor.to_string(),
        })
    }
}

/// Speed perturbation: plays 16 kHz audio `factor` times as fast, changing tempo and pitch
/// together, by resampling from 16 kHz·factor to 16 kHz. The result lasts 1/`factor` times as
/// long (0.9 → 11 % longer). The factor is rounded to 1/1000.
///
/// # Panics
/// When the factor fails [`check_speed_factor`]; validate configuration first.
pub fn speed_perturb(samples: &[f32], factor: f64) -> Vec<f32> {
    assert!(
        check_speed_factor(factor).is_ok(),
        "speed factor {factor} outside 0.5–2.0: validate with check_speed_factor first"
    );
    let rate_in = (factor * f64::from(FACTOR_DENOMINATOR)).round() as u32;
    if rate_in == FACTOR_DENOMINATOR {
        return samples.to_vec();
    }
    resample_all(samples, rate_in, FACTOR_DENOMINATOR)
}

/// Volume perturbation: multiplies every sample by `gain` (linear; e.g. a random gain drawn
/// in 0.125–2 by the trainer).
pub fn volume_perturb(samples: &mut [f32], gain: f32) {
    for sample in samples {
        *sample *= gain;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::*;

    fn tone(frequency: f64, seconds: f64) -> Vec<f32> {
        sine(16_000, frequency, 0.5, seconds)
            .into_iter()
            .map(|x| x as f32)
            .collect()
    }

    #[test]
    fn speed_changes_duration_by_one_over_the_factor() {
        let original = tone(500.0, 3.0);
        let slow = speed_perturb(&original, 0.9);
        let fast = speed_perturb(&original, 1.1);
        // Duration scales by 1/factor (common practice for speed perturbation).
        assert_eq!(slow.len(), (48_000f64 / 0.9).ceil() as usize);
        assert_eq!(fast.len(), (48_000f64 / 1.1).ceil() as usize);
        // Original + 0.9 + 1.1 copies hold 1 + 1/0.9 + 1/1.1 ≈ 3.02 times the audio: the
        // "speed perturbation triples the data" figure of the trade.
        let total = original.len() + slow.len() + fast.len();
        let ratio = total as f64 / original.len() as f64;
        assert!((ratio - 3.0202).abs() < 1e-3, "{ratio}");
    }

    #[test]
    fn speed_shifts_pitch_by_the_factor() {
        let original = tone(1_000.0, 2.0);
        for factor in [0.9, 1.1] {
            let changed = speed_perturb(&original, factor);
            let middle = &changed[1_600..changed.len() - 1_600];
            let moved = tone_amplitude(middle, 16_000, 1_000.0 * factor);
            assert!((moved - 0.5).abs() < 0.01, "{factor}: {moved}");
            let stayed = tone_amplitude(middle, 16_000, 1_000.0);
            assert!(stayed < 0.01, "{factor}: {stayed}");
        }
        assert_eq!(speed_perturb(&original, 1.0), original);
    }

    #[test]
    fn bad_speed_factors_are_rejected_at_the_edge() {
        for factor in [0.0, -1.0, f64::NAN, 3.0] {
            let message = check_speed_factor(factor).unwrap_err().to_string();
            assert!(message.contains("speed factor"), "{message}");
        }
        assert!(check_speed_factor(0.9).is_ok());
    }

    #[test]
    fn volume_scales_every_sample() {
        let mut samples = vec![0.5, -0.25, 0.0];
        volume_perturb(&mut samples, 0.5);
        assert_eq!(samples, [0.25, -0.125, 0.0]);
    }
}
