//! Acoustic model of isogloss: a time-delay neural network (TDNN) over feature frames, trained
//! with connectionist temporal classification (CTC) on a CPU, and the model directory it lives in.
//!
//! * [`ctc`] — CTC loss and its exact gradient (forward–backward in log space, parallel over
//!   utterances), wired into candle's backward pass as a custom operation.
//! * [`tdnn`] — spliced affine layers with ReLU, batch or layer normalisation, dropout and frame
//!   subsampling; parameters named `layers.{i}.weight` etc. Batch normalisation counts only each
//!   utterance's valid frames, and keeps running statistics for inference beside the parameters.
//! * [`optim`] — AdamW updating parameters in place; [`train`] — the training loop (bucketed
//!   batches, warm-up and decay, clipping, early stopping, atomic checkpoints, exact resume);
//!   [`pipeline`] — manifests to cached features to a model directory, and back to posteriors;
//!   [`log`] — the training log read back and the training curve drawn from it.
//! * [`speaker_vectors`] — an online i-vector appended to every input frame, computed alike in
//!   training and inference, and the extractor trained (or read from the cache) before the
//!   network.
//! * [`collective`] — sums over the ranks of a data-parallel run (one process, or MPI with the
//!   `mpi` feature): the training loop, the batch-normalised layers and the dev pass reduce
//!   through it, and each rank trains on its share of every batch.
//! * [`model`] — `model.toml` + `model.safetensors`, [`AcousticModel::log_posteriors`] and
//!   [`greedy_decode`].
//!
//! Key design decision: candle builds the network and differentiates it, but the two places
//! where a generic tensor graph is slow are written by hand: CTC (thousands of tiny log-sum-exp
//! steps per utterance would each be a graph node; here one custom op computes loss *and*
//! gradient in the same pass, and its backward only scales the stored gradient — exact, because
//! the gradient of a sum of losses with respect to the logits is the per-utterance
//! `softmax − occupancy`), and the optimizer (one fused loop per parameter instead of a dozen
//! allocating tensor operations). The TDNN layers are a third such place: each layer is one
//! custom operation (strided matrix products per offset instead of a spliced copy, then bias,
//! ReLU, normalisation and dropout in one pass, with a hand-written backward pass), because
//! as a chain of about fifteen element-wise candle operations per layer, each allocating a tensor
//! forward and backward, the training step spent most of its time outside the matrix products.
//!
//! Training speed (benchmark `train_step`, batch 16 × 600 frames, the `tdnn-small` model, two
//! threads; see `DEVELOPERS.md` for the commands and all rounds): the fused layers are about 5×
//! the layers as candle primitives. Against the same network in PyTorch 2.15 they were 2.25× on a
//! loaded machine (medians 7 664 vs 3 402 frames/s) but only at parity on a quiet one (0.93–1.06×,
//! about 11 800 vs 12 800 frames/s), where both steps are bound by matrix products: ours runs them
//! at 68–85 % of the rate candle's matmul reaches alone on the largest layer's shape (12 % before).
//!
//! The matrix products themselves are the fourth hand-written piece, for training only and only
//! when asked for (`[training] matmul_precision = "bf16"`): on CPUs with AVX-512 BF16 a
//! register-blocked kernel (`bf16_matmul.rs`) rounds the operands to bfloat16 and sums in f32
//! with `VDPBF16PS`, which does twice the multiply-adds per cycle of f32 fused multiply-adds.
//! The `gemm` crate has no such kernel, so it is written here. On the products of the width-384
//! recipe's layers it ran at 177–197 GFLOP/s against 103–110 for `gemm`'s f32 (one core, medians),
//! a training step 1.26× as fast and whole epochs 1.22× (DEVELOPERS.md, "bf16 products: measured
//! figures"). Inference stays f32.
//!
//! ```
//! use isogloss_acoustic::ctc::{ctc_batch, CtcTargets};
//!
//! // Two frames, units {blank, a}: the label "a" is emitted by the paths a·a, a·blank, blank·a.
//! let logits = [0.0f32, 0.0, 0.0, 0.0];
//! let targets = CtcTargets { frame_lengths: vec![2], labels: vec![vec![1]], blank: 0 };
//! let result = ctc_batch(&logits, (1, 2, 2), &targets)?;
//! assert!((result.losses[0] - (4.0f32 / 3.0).ln()).abs() < 1e-6); // p = 3/4
//! # Ok::<(), isogloss_acoustic::AcousticError>(())
//! ```
#![deny(missing_docs)]

pub mod audio_set;
#[cfg(target_arch = "x86_64")]
mod bf16_amx;
#[cfg(target_arch = "x86_64")]
mod bf16_matmul;
pub mod collective;
pub mod config;
pub mod ctc;
pub mod data;
mod fused;
pub mod greedy;
pub mod io;
pub mod log;
pub mod model;
pub mod optim;
pub mod pipeline;
pub mod speaker_vectors;
pub mod tdnn;
pub mod train;
pub mod units;
pub mod warp_search;

use std::path::PathBuf;

#[doc(hidden)]
pub use fused::time_matmul;
pub use greedy::{greedy_decode, greedy_path};
pub use model::AcousticModel;

/// Everything that can go wrong in the acoustic stage.
#[derive(Debug, thiserror::Error)]
pub enum AcousticError {
    /// Tensors or batches whose shapes do not agree.
    #[error("shape mismatch: {0}")]
    Shape(String),
    /// An invalid architecture or training configuration.
    #[error("invalid configuration: {0}")]
    Config(String),
    /// A file that could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// A transcript unit the model's inventory (or the lexicon) cannot map.
    #[error("{item}: the unit {unit:?} is not in the model's unit inventory")]
    UnknownUnit {
        /// The utterance or word, with its file and line where known.
        item: String,
        /// The unit that could not be mapped.
        unit: String,
    },
    /// A model directory that cannot be used.
    #[error("{path}: {problem}")]
    Model {
        /// The file at fault.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
    /// A training checkpoint that cannot be resumed from.
    #[error("checkpoint {path}: {problem}")]
    Checkpoint {
        /// The checkpoint file.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
    /// A line of an input file (configuration, training log) that cannot be used.
    #[error("{path}, line {line}: {problem}")]
    Line {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// What was expected and what was found.
        problem: String,
    },
    /// Input that cannot be used (empty manifest, nothing to resume, …).
    #[error("{path}: {problem}")]
    Input {
        /// The file at fault.
        path: PathBuf,
        /// What is wrong.
        problem: String,
    },
    /// A manifest or table that cannot be read.
    #[error(transparent)]
    Corpus(#[from] isogloss_corpus::CorpusError),
    /// A front-end setting or feature file that cannot be used.
    #[error(transparent)]
    Features(#[from] isogloss_features::FeatureError),
    /// A lexicon that cannot be read.
    #[error(transparent)]
    Lexicon(#[from] isogloss_lexicon::LexiconError),
    /// A transcript word the lexicon has no pronunciation for.
    #[error("{item}: the word {word:?} is not in the lexicon")]
    NotInLexicon {
        /// The utterance, with its manifest file and line.
        item: String,
        /// The word.
        word: String,
    },
    /// An i-vector extractor that cannot be trained, read or applied (its message names the
    /// utterance or file).
    #[error(transparent)]
    Speaker(#[from] isogloss_speaker::SpeakerError),
    /// A data-parallel run whose ranks cannot work together (MPI unusable, ranks disagreeing).
    #[error("data-parallel training: {0}")]
    Collective(String),
    /// An error from the tensor library.
    #[error("tensor operation failed: {0}")]
    Tensor(#[from] candle_core::Error),
}
