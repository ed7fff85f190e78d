//! MFCC + Δ + ΔΔ and log-mel against numpy/scipy/librosa on synthesised speech.
//!
//! Fixtures: `tests/fixtures/features/` at the repository root, made by
//! `scripts/reference/features_reference.py` (espeak-ng speech resampled by sox to 16 kHz 16-bit;
//! reference values from numpy's FFT, librosa.filters.mel(htk=True, norm=None), scipy's
//! orthonormal DCT-II and librosa.feature.delta; written by the Python safetensors package).
//!
//! Tolerance, "≤ 1e-3 relative per dimension": |ours − reference| ≤ 1e-3 · max(|reference|, σ_d),
//! where σ_d is the standard deviation of dimension d of the reference over all frames. A plain
//! relative error |a−b|/|b| is meaningless where a value crosses zero (cepstra and deltas do, all
//! the time), so each value is measured against the larger of itself and the typical magnitude of
//! its dimension.

use std::path::{Path, PathBuf};

use isogloss_features::{read_features, FeatureConfig, FeatureExtractor};
use ndarray::Array2;

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures/features")
}

fn speech() -> Vec<f32> {
    let mut reader = hound::WavReader::open(fixtures().join("speech.wav")).unwrap();
    let spec = reader.spec();
    assert_eq!(
        (spec.sample_rate, spec.channels, spec.bits_per_sample),
        (16_000, 1, 16)
    );
    // docs/features.md: int16 scaled by 1/32768.
    reader
        .samples::<i16>()
        .map(|s| f32::from(s.unwrap()) / 32768.0)
        .collect()
}

/// Largest |ours − reference| / max(|reference|, σ_d) over all values, with its place.
fn worst_relative_error(ours: &Array2<f32>, reference: &Array2<f32>) -> (f64, usize, usize) {
    assert_eq!(ours.dim(), reference.dim());
    let mut worst = (0.0, 0, 0);
    for (d, column) in reference.columns().into_iter().enumerate() {
        let mean = column.iter().map(|&v| f64::from(v)).sum::<f64>() / column.len() as f64;
        let sigma = (column
            .iter()
            .map(|&v| (f64::from(v) - mean).powi(2))
            .sum::<f64>()
            / column.len() as f64)
            .sqrt();
        for (t, &want) in column.iter().enumerate() {
            let scale = f64::from(want).abs().max(sigma);
            let error = (f64::from(ours[(t, d)]) - f64::from(want)).abs() / scale;
            if error > worst.0 {
                worst = (error, t, d);
            }
        }
    }
    worst
}

#[test]
fn mfcc_with_deltas_matches_numpy_scipy_librosa() {
    let reference = read_features(&fixtures().join("reference-mfcc.safetensors")).unwrap();
    let samples = speech();
    let ours = FeatureExtractor::new(&FeatureConfig::default())
        .unwrap()
        .extract(&samples);
    // Frame count: 1 + ⌊(N − 400)/160⌋ (docs/features.md), as numpy framed it in the reference script.
    assert_eq!(ours.dim(), (1 + (samples.len() - 400) / 160, 39));
    let (error, frame, dim) = worst_relative_error(&ours, &reference);
    println!("mfcc: worst relative error {error:.2e} at frame {frame}, dim {dim}");
    // Reference: scripts/reference/features_reference.py (numpy/scipy/librosa), ≤ 1e-3 relative.
    assert!(
        error <= 1e-3,
        "mfcc frame {frame} dim {dim}: relative error {error:.2e}"
    );
}

#[test]
fn log_mel_matches_librosa_mel_filterbank() {
    let reference = read_features(&fixtures().join("reference-logmel.safetensors")).unwrap();
    let ours = FeatureExtractor::new(&FeatureConfig::logmel())
        .unwrap()
        .extract(&speech());
    assert_eq!(ours.ncols(), 40);
    let (error, frame, dim) = worst_relative_error(&ours, &reference);
    println!("log-mel: worst relative error {error:.2e} at frame {frame}, dim {dim}");
    // Reference: librosa.filters.mel(htk=True, norm=None) on numpy's rfft power, ≤ 1e-3 relative.
    assert!(
        error <= 1e-3,
        "log-mel frame {frame} dim {dim}: relative error {error:.2e}"
    );
}
