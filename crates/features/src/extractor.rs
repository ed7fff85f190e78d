//! The feature extractor: waveform in, `[frames, dims]` matrix out.

use ndarray::Array2;

use crate::mel::MelFilterbank;
use crate::spectrum::PowerSpectrum;
use crate::vtlp::VtlpWarp;
use crate::{FeatureConfig, FeatureError, FeatureKind};

/// Turns 16 kHz mono samples into MFCC or log-mel features, as its [`FeatureConfig`] says.
///
/// Everything that does not depend on the signal (window, FFT plan, mel weights, DCT matrix) is
/// computed once in [`FeatureExtractor::new`]. [`FeatureExtractor::extract`] takes `&self` and
/// allocates its working buffers once per call, never per frame, so one extractor can be shared
/// by several threads.
pub struct FeatureExtractor {
    config: FeatureConfig,
    emphasis: f32,
    log_floor: f32,
    window: Vec<f32>,
    spectrum: PowerSpectrum,
    mel: MelFilterbank,
    /// Orthonormal DCT-II rows c0…c(n−1) over the mel bins, row-major; empty for log-mel.
    dct: Vec<f32>,
}

impl FeatureExtractor {
    /// Validates the config and prepares window, FFT plan, mel filters and DCT.
    pub fn new(config: &FeatureConfig) -> Result<Self, FeatureError> {
        config.validate()?;
        let mel = MelFilterbank::new(
            config.sample_rate,
            config.fft_size,
            config.mel_filters,
            config.band_low_hz,
            config.band_high_hz,
        )?;
        Ok(FeatureExtractor {
            config: config.clone(),
            emphasis: config.emphasis as f32,
            log_floor: config.log_floor as f32,
            window: symmetric_hamming(config.window_samples),
            spectrum: PowerSpectrum::new(config.fft_size),
            mel,
            dct: match config.kind {
                FeatureKind::Mfcc => orthonormal_dct_ii(config.cepstra, config.mel_filters),
                FeatureKind::LogMel => Vec::new(),
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

    /// Features of one utterance, `[frames, dims]` with frames = 1 + ⌊(N − window_samples)/hop_samples⌋
    /// (0 frames when the signal is shorter than one frame). Samples are expected in [−1, 1] at the
    /// configured sample rate; no normalisation is applied (see [`crate::Cmvn`]).
    pub fn extract(&self, samples: &[f32]) -> Array2<f32> {
        self.extract_with(samples, &self.mel)
    }

    /// Features of one utterance with vocal-tract length perturbation: the same front end with
    /// the mel filter bank read through `warp` ([`MelFilterbank::warped`]); everything else (FFT
    /// plan, window, DCT) is the extractor's own. The warped bank is built per call: measured at
    /// 13.5 µs, the cost of extracting about 20 frames (0.2 s of audio, 4 % of a 5 s utterance;
    /// `benches/augment.rs`), so a cache of banks per quantised factor would save too little to
    /// be worth its lock. Fails only when the warp empties a filter, which
    /// [`crate::VtlpConfig::validate`] rules out for the configured range.
    pub fn extract_warped(
        &self,
        samples: &[f32],
        warp: &VtlpWarp,
    ) -> Result<Array2<f32>, FeatureError> {
        let config = &self.config;
        let mel = MelFilterbank::warped(
            config.sample_rate,
            config.fft_size,
            config.mel_filters,
            config.band_low_hz,
            config.band_high_hz,
            warp,
        )?;
        Ok(self.extract_with(samples, &mel))
    }

    fn extract_with(&self, samples: &[f32], mel: &MelFilterbank) -> Array2<f32> {
        let config = &self.config;
        let frames = config.frame_count(samples.len());
        let dims = config.dims();
        let static_dims = config.static_dims();
        let mut features = Array2::zeros((frames, dims));
        if frames == 0 {
            return features;
        }
        let data = features
            .as_slice_mut()
            .expect("a freshly allocated array is contiguous");
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2, checked just above.
                unsafe { self.static_features_avx2(samples, mel, data) };
            } else {
                self.static_features(samples, mel, data);
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        self.static_features(samples, mel, data);
        let mut delta = vec![0.0f32; static_dims];
        for order in 1..=config.delta_order() {
            regression_deltas(
                data,
                dims,
                (order - 1) * static_dims..order * static_dims,
                order * static_dims,
                config.slope_reach,
                &mut delta,
            );
        }
        features
    }

    /// [`Self::static_features`] compiled for 8-lane AVX2 vectors. The portable build may only
    /// assume SSE2 (4 lanes); every inner loop here is written to vectorise, so a copy compiled
    /// for the wider vectors, picked at run time, is faster where the CPU has them (about 1.25×
    /// in `benches/mfcc_throughput.rs`; the FFT library already picks AVX by itself).
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn static_features_avx2(&self, samples: &[f32], mel: &MelFilterbank, data: &mut [f32]) {
        self.static_features(samples, mel, data);
    }

    /// Writes the static block (cepstra or log-mel energies) of every frame into the rows of
    /// `data` (row-major, `dims` per row). Inlined into each instruction-set variant.
    ///
    /// Frames go through the FFT one at a time, then through the mel filters, the log and the DCT
    /// in batches of [`BATCH`]: with the batch as the innermost dimension those stages are plain
    /// vector operations across frames instead of many short dot products per frame.
    #[inline(always)]
    fn static_features(&self, samples: &[f32], mel: &MelFilterbank, data: &mut [f32]) {
        let config = &self.config;
        let (dims, length) = (config.dims(), config.window_samples);
        // Pre-emphasised samples of one batch of frames: computed once per batch (frames overlap
        // 2.5-fold) into a buffer small enough to stay in the L1 cache.
        let mut emphasised = vec![0.0f32; (BATCH - 1) * config.hop_samples + length];
        let mut buffers = self.spectrum.buffers();
        let mut power_batch = vec![[0.0f32; BATCH]; config.fft_size / 2 + 1];
        let mut log_mel_batch = vec![[0.0f32; BATCH]; config.mel_filters];
        for (batch, rows) in data.chunks_mut(BATCH * dims).enumerate() {
            let frames_here = rows.len() / dims;
            let first_sample = batch * BATCH * config.hop_samples;
            let span = (frames_here - 1) * config.hop_samples + length;
            let x = &samples[first_sample..first_sample + span];
            // y[n] = x[n] − a·x[n−1] over the whole signal, with y[0] = x[0].
            let before = if first_sample == 0 {
                0.0
            } else {
                samples[first_sample - 1]
            };
            emphasised[0] = x[0] - self.emphasis * before;
            for ((y, &now), &previous) in emphasised[1..span].iter_mut().zip(&x[1..]).zip(x) {
                *y = now - self.emphasis * previous;
            }
            for lane in 0..frames_here {
                let start = lane * config.hop_samples;
                self.spectrum.compute(
                    &emphasised[start..start + length],
                    &self.window,
                    &mut buffers,
                    &mut power_batch,
                    lane,
                );
            }
            // Lanes past `frames_here` (last batch only) hold stale spectra; they are computed
            // along and never written out.
            mel.apply(&power_batch, &mut log_mel_batch);
            for energies in log_mel_batch.iter_mut() {
                for energy in energies.iter_mut() {
                    *energy = natural_log(energy.max(self.log_floor));
                }
            }
            match config.kind {
                FeatureKind::LogMel => {
                    for (lane, row) in rows.chunks_exact_mut(dims).enumerate() {
                        for (value, energies) in row.iter_mut().zip(&log_mel_batch) {
                            *value = energies[lane];
                        }
                    }
                }
                FeatureKind::Mfcc => {
                    for (k, basis) in self.dct.chunks_exact(config.mel_filters).enumerate() {
                        let mut cepstrum = [0.0f32; BATCH];
                        for (&weight, energies) in basis.iter().zip(&log_mel_batch) {
                            for (c, &energy) in cepstrum.iter_mut().zip(energies) {
                                *c += weight * energy;
                            }
                        }
                        for (row, &c) in rows.chunks_exact_mut(dims).zip(&cepstrum) {
                            row[k] = c;
                        }
                    }
                }
            }
        }
    }
}

/// Frames per batch in the mel, log and DCT stages: 8 f32 lanes fill one AVX register.
const BATCH: usize = 8;

/// Natural logarithm of a positive, finite, normal f32, in plain arithmetic so that a loop of
/// them vectorises (a libm call per value cannot). x = m·2^e with m in [√½, √2), and
/// ln m = 2·atanh(s) = 2(s + s³/3 + s⁵/5 + s⁷/7 + s⁹/9 + …) with s = (m−1)/(m+1), |s| < 0.172;
/// the first omitted term is below 1e-9, under f32 rounding (textbook series, e.g. Abramowitz &
/// Stegun 4.1.28).
#[inline(always)]
fn natural_log(x: f32) -> f32 {
    let bits = x.to_bits();
    let mut exponent = ((bits >> 23) & 0xff) as i32 - 127;
    let mut mantissa = f32::from_bits((bits & 0x007f_ffff) | 0x3f80_0000);
    if mantissa > std::f32::consts::SQRT_2 {
        mantissa *= 0.5;
        exponent += 1;
    }
    let s = (mantissa - 1.0) / (mantissa + 1.0);
    let z = s * s;
    let series = 1.0 + z * (1.0 / 3.0 + z * (1.0 / 5.0 + z * (1.0 / 7.0 + z * (1.0 / 9.0))));
    2.0 * s * series + exponent as f32 * std::f32::consts::LN_2
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
        let extractor = FeatureExtractor::new(&FeatureConfig::logmel()).unwrap();
        for length in [400usize, 559, 560, 1234, 16_000] {
            // docs/features.md "The default front end": frames = 1 + ⌊(N − 400)/160⌋.
            let expected = 1 + (length - 400) / 160;
            assert_eq!(extractor.extract(&vec![0.0; length]).nrows(), expected);
        }
    }

    #[test]
    fn silence_hits_the_log_floor() {
        let extractor = FeatureExtractor::new(&FeatureConfig::logmel()).unwrap();
        let features = extractor.extract(&[0.0; 800]);
        // ln(1e-10), the default floor.
        assert!(features.iter().all(|&v| (v - (1e-10f32).ln()).abs() < 1e-4));
    }

    #[test]
    fn a_pure_tone_peaks_in_the_mel_band_centred_on_it() {
        let extractor = FeatureExtractor::new(&FeatureConfig::logmel()).unwrap();
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
    fn fast_natural_log_matches_f64_ln() {
        // From the log floor 1e-10 up to 1e10, about 20 000 values per decade.
        let mut x = 1e-10f32;
        while x < 1e10 {
            let exact = f64::from(x).ln();
            let error = (f64::from(natural_log(x)) - exact).abs();
            assert!(error <= 4e-7 * exact.abs().max(1.0), "ln {x}: {error:e}");
            x *= 1.000_117;
        }
        assert_eq!(natural_log(1.0), 0.0);
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
