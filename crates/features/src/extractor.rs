//! The feature extractor: waveform in, `[frames, dims]` matrix out.

use ndarray::Array2;

use crate::mel::MelFilterbank;
use crate::spectrum::PowerSpectrum;
use crate::{FeatureConfig, FeatureError, FeatureKind};

/// Turns 16 kHz mono samples into MFCC or log-mel fbank features, as its [`FeatureConfig`] says.
///
/// Everything that does not depend on the signal (window, FFT plan, mel weights, DCT matrix) is
/// computed once in [`FeatureExtractor::new`]. [`FeatureExtractor::extract`] takes `&self` and
/// allocates its working buffers once per call, never per frame, so one extractor can be shared
/// by several threads.
pub struct FeatureExtractor {
    config: FeatureConfig,
    preemphasis: f32,
    log_floor: f32,
    window: Vec<f32>,
    spectrum: PowerSpectrum,
    mel: MelFilterbank,
    /// Orthonormal DCT-II basis stored by mel bin: entry [m][k] is the weight of log-mel energy m
    /// in cepstrum c_k, so a frame's cepstra are a sum of independent, vectorisable axpy steps
    /// rather than serial dot products. Empty for fbank.
    dct_by_mel_bin: Vec<f32>,
}

impl FeatureExtractor {
    /// Validates the config and prepares window, FFT plan, mel filters and DCT.
    pub fn new(config: &FeatureConfig) -> Result<Self, FeatureError> {
        config.validate()?;
        let mel = MelFilterbank::new(
            config.sample_rate,
            config.fft_size,
            config.mel_bins,
            config.low_hz,
            config.high_hz,
        )?;
        Ok(FeatureExtractor {
            config: config.clone(),
            preemphasis: config.preemphasis as f32,
            log_floor: config.log_floor as f32,
            window: symmetric_hamming(config.frame_length),
            spectrum: PowerSpectrum::new(config.fft_size),
            mel,
            dct_by_mel_bin: match config.kind {
                FeatureKind::Mfcc => transpose(
                    &orthonormal_dct_ii(config.cepstra, config.mel_bins),
                    config.cepstra,
                ),
                FeatureKind::Fbank => Vec::new(),
            },
        })
    }

    /// The (validated) settings.
    pub fn config(&self) -> &FeatureConfig {
        &self.config
    }

    /// Dimensions of each feature vector.
    pub fn dims(&self) -> usize {
        self.config.dims()
    }

    /// The mel filterbank in use.
    pub fn mel_filterbank(&self) -> &MelFilterbank {
        &self.mel
    }

    /// Features of one utterance, `[frames, dims]` with frames = 1 + ⌊(N − frame_length)/frame_shift⌋
    /// (0 frames when the signal is shorter than one frame). Samples are expected in [−1, 1] at the
    /// configured sample rate; no normalisation is applied (see [`crate::Cmvn`]).
    pub fn extract(&self, samples: &[f32]) -> Array2<f32> {
        let config = &self.config;
        let frames = config.frame_count(samples.len());
        let dims = config.dims();
        let static_dims = config.static_dims();
        let mut features = Array2::zeros((frames, dims));
        if frames == 0 {
            return features;
        }
        let mut frame = vec![0.0f32; config.fft_size];
        let mut buffers = self.spectrum.buffers();
        let mut power = vec![0.0f32; config.fft_size / 2 + 1];
        let mut log_mel = vec![0.0f32; config.mel_bins];
        let data = features
            .as_slice_mut()
            .expect("a freshly allocated array is contiguous");
        let length = config.frame_length;
        let a = self.preemphasis;
        for (t, row) in data.chunks_exact_mut(dims).enumerate() {
            let start = t * config.frame_shift;
            let x = &samples[start..start + length];
            // Pre-emphasis over the whole signal (y[0] = x[0]), so a frame's first sample uses
            // the sample before the frame.
            let before = if start == 0 { 0.0 } else { samples[start - 1] };
            frame[0] = (x[0] - a * before) * self.window[0];
            for (((out, &now), &previous), &weight) in frame[1..length]
                .iter_mut()
                .zip(&x[1..])
                .zip(x)
                .zip(&self.window[1..])
            {
                *out = (now - a * previous) * weight;
            }
            // frame[length..] stays zero: the padding up to the FFT size.
            self.spectrum.compute(&frame, &mut buffers, &mut power);
            self.mel.apply(&power, &mut log_mel);
            for energy in log_mel.iter_mut() {
                *energy = energy.max(self.log_floor).ln();
            }
            match config.kind {
                FeatureKind::Fbank => row[..static_dims].copy_from_slice(&log_mel),
                FeatureKind::Mfcc => {
                    let cepstra = &mut row[..static_dims];
                    cepstra.fill(0.0);
                    for (&energy, weights) in log_mel
                        .iter()
                        .zip(self.dct_by_mel_bin.chunks_exact(static_dims))
                    {
                        for (c, w) in cepstra.iter_mut().zip(weights) {
                            *c += w * energy;
                        }
                    }
                }
            }
        }
        let mut delta = vec![0.0f32; static_dims];
        for order in 1..=config.delta_order() {
            regression_deltas(
                data,
                dims,
                (order - 1) * static_dims..order * static_dims,
                order * static_dims,
                config.delta_window,
                &mut delta,
            );
        }
        features
    }
}

/// Symmetric Hamming window w[n] = 0.54 − 0.46·cos(2πn/(L−1)).
fn symmetric_hamming(length: usize) -> Vec<f32> {
    if length == 1 {
        return vec![1.0];
    }
    (0..length)
        .map(|n| {
            let phase = 2.0 * std::f64::consts::PI * n as f64 / (length - 1) as f64;
            (0.54 - 0.46 * phase.cos()) as f32
        })
        .collect()
}

/// Orthonormal DCT-II basis: c_k = s_k·Σ_m e_m·cos(πk(2m+1)/(2M)), s_0 = √(1/M), s_k = √(2/M).
fn orthonormal_dct_ii(coefficients: usize, inputs: usize) -> Vec<f32> {
    let m = inputs as f64;
    (0..coefficients)
        .flat_map(|k| {
            let scale = if k == 0 {
                (1.0 / m).sqrt()
            } else {
                (2.0 / m).sqrt()
            };
            (0..inputs).map(move |i| {
                let angle = std::f64::consts::PI * k as f64 * (2 * i + 1) as f64 / (2.0 * m);
                (scale * angle.cos()) as f32
            })
        })
        .collect()
}

/// Matrix `rows × (values.len()/rows)`, row-major, transposed.
fn transpose(values: &[f32], rows: usize) -> Vec<f32> {
    let columns = values.len() / rows;
    (0..columns)
        .flat_map(|c| (0..rows).map(move |r| values[r * columns + c]))
        .collect()
}

/// Writes the Δ of columns `source` into the columns starting at `target`, for every row of the
/// row-major `data` (rows of `dims` values): d_t = Σ_n n·(c_{t+n} − c_{t−n}) / (2·Σ_n n²) over
/// n = 1…window, with frames beyond either end replaced by the first or last frame. `delta` is
/// scratch of `source.len()` values.
fn regression_deltas(
    data: &mut [f32],
    dims: usize,
    source: std::ops::Range<usize>,
    target: usize,
    window: usize,
    delta: &mut [f32],
) {
    let frames = data.len() / dims;
    let width = source.len();
    let denominator = 2.0 * (1..=window).map(|n| (n * n) as f32).sum::<f32>();
    for t in 0..frames {
        delta.fill(0.0);
        for n in 1..=window {
            let later = (t + n).min(frames - 1) * dims + source.start;
            let earlier = t.saturating_sub(n) * dims + source.start;
            let weight = n as f32 / denominator;
            for ((d, &after), &before) in delta
                .iter_mut()
                .zip(&data[later..later + width])
                .zip(&data[earlier..earlier + width])
            {
                *d += weight * (after - before);
            }
        }
        data[t * dims + target..t * dims + target + width].copy_from_slice(delta);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn short_signals_give_zero_frames_without_panicking() {
        let extractor = FeatureExtractor::new(&FeatureConfig::default()).unwrap();
        for length in [0, 1, 399] {
            let features = extractor.extract(&vec![0.1; length]);
            assert_eq!(features.dim(), (0, 39));
        }
        assert_eq!(extractor.extract(&[0.1; 400]).dim(), (1, 39));
    }

    #[test]
    fn frame_count_is_one_plus_floor_of_n_minus_400_over_160() {
        let extractor = FeatureExtractor::new(&FeatureConfig::fbank()).unwrap();
        for length in [400usize, 559, 560, 1234, 16_000] {
            // DESIGN.md "Default front end": frames = 1 + ⌊(N − 400)/160⌋.
            let expected = 1 + (length - 400) / 160;
            assert_eq!(extractor.extract(&vec![0.0; length]).nrows(), expected);
        }
    }

    #[test]
    fn silence_hits_the_log_floor() {
        let extractor = FeatureExtractor::new(&FeatureConfig::fbank()).unwrap();
        let features = extractor.extract(&[0.0; 800]);
        // ln(1e-10), the contract's floor.
        assert!(features.iter().all(|&v| (v - (1e-10f32).ln()).abs() < 1e-4));
    }

    #[test]
    fn a_pure_tone_peaks_in_the_mel_band_centred_on_it() {
        let extractor = FeatureExtractor::new(&FeatureConfig::fbank()).unwrap();
        let centers = extractor.mel_filterbank().centers_hz().to_vec();
        for band in [5usize, 17, 30] {
            let hz = centers[band];
            let tone: Vec<f32> = (0..16_000)
                .map(|n| 0.5 * (2.0 * std::f64::consts::PI * hz * n as f64 / 16_000.0).sin() as f32)
                .collect();
            let features = extractor.extract(&tone);
            for row in features.rows() {
                let loudest = (0..row.len())
                    .max_by(|&a, &b| row[a].total_cmp(&row[b]))
                    .unwrap();
                assert_eq!(loudest, band, "{hz:.1} Hz tone");
            }
        }
    }

    #[test]
    fn dct_basis_is_orthonormal() {
        let (rows, inputs) = (40, 40);
        let basis = orthonormal_dct_ii(rows, inputs);
        for a in 0..rows {
            for b in 0..rows {
                let dot: f32 = (0..inputs)
                    .map(|i| basis[a * inputs + i] * basis[b * inputs + i])
                    .sum();
                let expected = if a == b { 1.0 } else { 0.0 };
                assert!((dot - expected).abs() < 1e-5, "rows {a},{b}: {dot}");
            }
        }
    }

    #[test]
    fn hamming_window_is_symmetric_with_ends_at_0_08() {
        let window = symmetric_hamming(400);
        // Symmetric Hamming: w[0] = w[L−1] = 0.54 − 0.46 = 0.08 (textbook definition).
        assert!((window[0] - 0.08).abs() < 1e-7 && (window[399] - 0.08).abs() < 1e-7);
        assert!((0..200).all(|n| window[n] == window[399 - n]));
    }

    #[test]
    fn deltas_of_a_ramp_are_its_slope_and_edges_replicate() {
        // One column c_t = 3t over 6 frames; Δ goes to column 1.
        let mut data: Vec<f32> = (0..6).flat_map(|t| [3.0 * t as f32, 0.0]).collect();
        regression_deltas(&mut data, 2, 0..1, 1, 2, &mut [0.0]);
        let deltas: Vec<f32> = data.chunks(2).map(|row| row[1]).collect();
        // Interior frames: slope 3. Frame 0 with c_{-1}=c_{-2}=c_0: (1·3 + 2·6)/10 = 1.5;
        // frame 1: (1·(6−0) + 2·(9−0))/10 = 2.4 (edge replication by hand).
        let expected = [1.5, 2.4, 3.0, 3.0, 2.4, 1.5];
        for (got, want) in deltas.iter().zip(expected) {
            assert!((got - want).abs() < 1e-6, "{deltas:?}");
        }
    }
}
