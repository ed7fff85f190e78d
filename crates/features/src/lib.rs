//! Acoustic front end of isogloss: MFCC and log-mel features, deltas, CMVN, SpecAugment masks,
//! vocal-tract length perturbation ([`vtlp`]), and the safetensors feature files that cache them.
//!
//! The default [`FeatureConfig`] is the front end specified in `docs/features.md` (16 kHz,
//! pre-emphasis 0.97, 25 ms Hamming windows every 10 ms, 512-point power spectrum, 40 mel filters
//! on O'Shaughnessy's (1987) mel scale over 20–8000 Hz, natural log floored at 1e-10, orthonormal DCT-II c0…c12, Δ and ΔΔ over
//! ±2 frames: 39 dimensions). Its values are checked against numpy/scipy/librosa on synthesised
//! speech (`tests/reference.rs`).
//!
//! Key design decision: the extractor is planned once and is immutable. [`FeatureExtractor::new`]
//! computes window, FFT plan, sparse mel weights and DCT basis; [`FeatureExtractor::extract`] takes
//! `&self` and allocates a handful of buffers per utterance, none per frame. Per-frame allocation
//! would dominate the cost at thousands of times real time, and an immutable extractor can be
//! shared across training threads without locks. Normalisation ([`Cmvn`], [`SpeakerCmvnStats`])
//! and augmentation ([`SpecAugment`]) are separate steps on the resulting matrix, so `extract`
//! always returns exactly the configured front end.
//!
//! ```
//! use isogloss_features::{Cmvn, FeatureConfig, FeatureExtractor};
//!
//! let extractor = FeatureExtractor::new(&FeatureConfig::default())?;
//! // One second of a 440 Hz tone at 16 kHz.
//! let samples: Vec<f32> = (0..16_000)
//!     .map(|n| 0.3 * (2.0 * std::f32::consts::PI * 440.0 * n as f32 / 16_000.0).sin())
//!     .collect();
//! let mut features = extractor.extract(&samples);
//! assert_eq!(features.dim(), (98, 39)); // 1 + ⌊(16000 − 400)/160⌋ frames
//! Cmvn::from_features(&features, true, "tone")?.apply(&mut features, "tone")?;
//! # Ok::<(), isogloss_features::FeatureError>(())
//! ```
#![deny(missing_docs)]

mod cmvn;
mod config;
mod error;
mod extractor;
mod io;
pub mod mel;
mod specaugment;
mod spectrum;
pub mod vtlp;

pub use cmvn::{Cmvn, CmvnStats, SpeakerCmvnStats};
pub use config::{deprecated_spellings, CmvnMode, FeatureConfig, FeatureKind, DEPRECATED_KEYS};
pub use error::FeatureError;
pub use extractor::FeatureExtractor;
pub use io::{read_features, write_features, FEATURES_TENSOR};
pub use specaugment::{MaskFill, SpecAugment};
pub use vtlp::{VtlpConfig, VtlpWarp};
