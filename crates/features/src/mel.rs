//! The mel scale and a sparse triangular mel filterbank.

use crate::vtlp::VtlpWarp;
use crate::FeatureError;

/// Hertz to mel by the published formula of O'Shaughnessy (1987, *Speech Communication: Human
/// and Machine*), mel = 2595·log10(1 + f/700).
pub fn hz_to_mel(hz: f64) -> f64 {
    2595.0 * (1.0 + hz / 700.0).log10()
}

/// Mel to hertz, the inverse of [`hz_to_mel`].
pub fn mel_to_hz(mel: f64) -> f64 {
    700.0 * (10f64.powf(mel / 2595.0) - 1.0)
}

/// Triangular filters equally spaced on the mel scale, applied to a power spectrum.
///
/// Filter i rises linearly from corner i to a peak of 1 at corner i+1 and falls to 0 at corner i+2,
/// where the `bins + 2` corners are equally spaced in mel between the low and high edge; weights
/// are evaluated at the FFT bin frequencies k·rate/n and not area-normalised. Only the non-zero
/// weights are stored (a 512-point spectrum has 257 bins, but each filter covers a handful), which
/// makes applying the bank a few hundred multiply-adds per frame instead of 40 × 257.
#[derive(Debug, Clone)]
pub struct MelFilterbank {
    /// Per filter: first FFT bin with a non-zero weight and the range of its weights in `weights`.
    filters: Vec<(usize, std::ops::Range<usize>)>,
    weights: Vec<f32>,
    centers_hz: Vec<f64>,
    spectrum_bins: usize,
}

impl MelFilterbank {
    /// Builds `bins` filters between `low_hz` and `high_hz` for an `fft_size`-point spectrum at
    /// `sample_rate`. Fails when a filter would cover no FFT bin (too many filters for the FFT).
    pub fn new(
        sample_rate: u32,
        fft_size: usize,
        bins: usize,
        low_hz: f64,
        high_hz: f64,
    ) -> Result<Self, FeatureError> {
        Self::build(sample_rate, fft_size, bins, low_hz, high_hz, |hz| hz)
    }

    /// The same filters read through the VTLP frequency warp: bin k gets the weight the unwarped
    /// filter has at W(f_k) (see [`crate::vtlp`]). Equal to [`Self::new`] for α = 1. Fails, naming
    /// the warp factor, when the warp squeezes a filter between two FFT bins.
    pub fn warped(
        sample_rate: u32,
        fft_size: usize,
        bins: usize,
        low_hz: f64,
        high_hz: f64,
        warp: &VtlpWarp,
    ) -> Result<Self, FeatureError> {
        Self::build(sample_rate, fft_size, bins, low_hz, high_hz, |hz| {
            warp.apply(hz)
        })
        .map_err(|_| FeatureError::InvalidSetting {
            key: "augmentation.vtlp.warp_factor",
            expected: format!(
                "a warp that leaves each of the {bins} mel filters at least one FFT bin"
            ),
            found: warp.factor().to_string(),
        })
    }

    fn build(
        sample_rate: u32,
        fft_size: usize,
        bins: usize,
        low_hz: f64,
        high_hz: f64,
        warp: impl Fn(f64) -> f64,
    ) -> Result<Self, FeatureError> {
        let low_mel = hz_to_mel(low_hz);
        let step = (hz_to_mel(high_hz) - low_mel) / (bins + 1) as f64;
        let corners: Vec<f64> = (0..bins + 2)
            .map(|i| mel_to_hz(low_mel + step * i as f64))
            .collect();
        let spectrum_bins = fft_size / 2 + 1;
        let bin_hz = f64::from(sample_rate) / fft_size as f64;
        let mut filters = Vec::with_capacity(bins);
        let mut weights = Vec::new();
        for i in 0..bins {
            let (left, center, right) = (corners[i], corners[i + 1], corners[i + 2]);
            let start = weights.len();
            let mut first_bin = None;
            for k in 0..spectrum_bins {
                let hz = warp(k as f64 * bin_hz);
                let weight = ((hz - left) / (center - left))
                    .min((right - hz) / (right - center))
                    .max(0.0);
                if weight > 0.0 {
                    first_bin.get_or_insert(k);
                    weights.push(weight as f32);
                } else if first_bin.is_some() {
                    break;
                }
            }
            let Some(first_bin) = first_bin else {
                return Err(FeatureError::InvalidConfig {
                    setting: "mel_filters",
                    expected: format!(
                        "few enough that every filter covers an FFT bin ({bin_hz} Hz apart)"
                    ),
                    found: format!("{bins} (filter {i}, {left:.1}–{right:.1} Hz, is empty)"),
                });
            };
            filters.push((first_bin, start..weights.len()));
        }
        Ok(MelFilterbank {
            filters,
            weights,
            centers_hz: corners[1..=bins].to_vec(),
            spectrum_bins,
        })
    }

    /// Number of filters.
    pub fn bins(&self) -> usize {
        self.filters.len()
    }

    /// Peak frequency of each unwarped filter in Hz.
    pub fn centers_hz(&self) -> &[f64] {
        &self.centers_hz
    }

    /// The weights as a dense `[bins][fft_size/2 + 1]` table (for inspection and tests).
    pub fn dense_weights(&self) -> Vec<Vec<f32>> {
        self.filters
            .iter()
            .map(|(first_bin, range)| {
                let mut row = vec![0.0; self.spectrum_bins];
                row[*first_bin..first_bin + range.len()]
                    .copy_from_slice(&self.weights[range.clone()]);
                row
            })
            .collect()
    }

    /// Filter energies of a batch of power spectra into `energies` (`bins` rows). Row k of
    /// `power` holds bin k of `LANES` spectra side by side, so every step of the sum is one
    /// vector operation across the batch and no horizontal sums are needed; a single spectrum is
    /// `LANES = 1`. Inlined so that it is compiled for the caller's instruction set.
    #[inline(always)]
    pub fn apply<const LANES: usize>(&self, power: &[[f32; LANES]], energies: &mut [[f32; LANES]]) {
        for ((first_bin, range), energy) in self.filters.iter().zip(energies.iter_mut()) {
            let mut sum = [0.0f32; LANES];
            for (bin, &weight) in power[*first_bin..].iter().zip(&self.weights[range.clone()]) {
                for (lane, &value) in sum.iter_mut().zip(bin) {
                    *lane += weight * value;
                }
            }
            *energy = sum;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn oshaughnessy_mel_scale_maps_1000_hz_to_1000_mel() {
        // O'Shaughnessy (1987), Speech Communication: 2595·log10(1 + 1000/700) = 999.99 mel;
        // librosa.hz_to_mel(1000, htk=True) = 999.9855371396244 (tests/fixtures/features/reference.json).
        assert!((hz_to_mel(1000.0) - 999.9855371396244).abs() < 1e-9);
        assert!((hz_to_mel(1000.0) - 1000.0).abs() < 0.02);
        // librosa.hz_to_mel(8000, htk=True), same fixture.
        assert!((hz_to_mel(8000.0) - 2840.023046708319).abs() < 1e-9);
        for hz in [0.0, 20.0, 440.0, 1000.0, 7999.0] {
            assert!((mel_to_hz(hz_to_mel(hz)) - hz).abs() < 1e-9);
        }
    }

    #[test]
    fn filters_are_triangles_with_peak_at_most_one_in_ascending_order() {
        let bank = MelFilterbank::new(16_000, 512, 40, 20.0, 8000.0).unwrap();
        assert_eq!(bank.bins(), 40);
        let dense = bank.dense_weights();
        for (i, row) in dense.iter().enumerate() {
            let peak = row.iter().cloned().fold(0.0, f32::max);
            assert!(peak > 0.5 && peak <= 1.0, "filter {i} peak {peak}");
            // Each filter is one contiguous run of non-zero weights, rising then falling.
            let nonzero: Vec<usize> = (0..row.len()).filter(|&k| row[k] > 0.0).collect();
            assert_eq!(nonzero.len(), nonzero[nonzero.len() - 1] - nonzero[0] + 1);
        }
        assert!(bank.centers_hz().windows(2).all(|pair| pair[0] < pair[1]));
    }

    #[test]
    fn too_many_filters_for_the_fft_is_a_config_error() {
        let error = MelFilterbank::new(16_000, 512, 200, 20.0, 8000.0).unwrap_err();
        assert!(error.to_string().contains("mel_filters"), "{error}");
    }
}
