//! The time-delay neural network: layers that splice frames at fixed offsets.
//!
//! A layer with offsets `o_1 … o_K`, input width `D` and output width `H` computes
//! `z[t] = Σ_k x[s·t + o_k − o_1] · W_k` (`s` is the subsampling factor), then in hidden layers
//! one of (the `normalization` setting):
//!
//! * `"layer"`: bias, ReLU, layer normalisation (per frame over the `H` units, gain and shift);
//! * `"batch"`: batch normalisation (per unit over the batch, gain γ and shift β), ReLU. The
//!   layer has no bias: a bias would be cancelled by the batch mean, its gradient is zero;
//! * `"none"`: bias, ReLU;
//!
//! then dropout. The output layer is `z + b`. The weight is stored as the `K` per-offset matrices
//! side by side (`[D, K·H]`). The spliced input is never copied: for offset `k` the input rows
//! `s·t + o_k − o_1` are a strided view of the input, so the layer is `K` matrix products
//! accumulating into one buffer — with subsampling, only for the frames that are kept. The rest
//! runs in one pass per frame, and the backward pass is written by hand; the whole layer is one
//! candle operation (see `fused.rs`), tested against the same layer written with candle
//! primitives and differentiated by candle.
//!
//! Batch normalisation in training ([`Tdnn::forward_train`]) normalises with the mean and biased
//! variance of each unit over the batch's *valid* output frames: each utterance's frames whose
//! inputs all lie inside the utterance (its features plus the context), so that the padding of
//! shorter utterances to the longest one does not count. The pass returns those statistics, and
//! [`Tdnn::update_running_statistics`] folds them into running estimates once the update they
//! belong to has been made (a skipped batch leaves them alone): an exponential moving average
//! with weight [`RUNNING_MOMENTUM`] for the newest batch, of the mean and of the *unbiased*
//! variance (`N/(N−1)` times the batch's), common practice and the convention of
//! `torch.nn.BatchNorm1d`, against which the layer is tested. Inference ([`Tdnn::forward`])
//! normalises with the running estimates, so every frame's output depends on that frame alone.
//! The running estimates (`layers.{i}.norm.running_mean`, `layers.{i}.norm.running_var`) are
//! stored with the parameters but are not parameters: no gradient, no optimizer state.
//!
//! Every layer is "valid" in time (no padding inside the network); callers pad each utterance by
//! [`TdnnConfig::context`] frames (edge frames repeated) so that the output has
//! `⌈frames / subsampling⌉` frames — see [`Tdnn::output_frames`].
//!
//! Speaker vectors at every layer ([`NetworkInput::layer_vector_dims`] > 0, the
//! `[speaker_vectors] input = "layers"` setting): the last `R` columns of each input frame are
//! the speaker vector, and every hidden layer after the first reads, beside each row of its
//! input, the vector of the input frame that row is centred on. Row `t` of a layer's output is
//! centred on its input row `s·t − o_1` (where its tap 0 reads; row 0 when every tap is
//! positive), so the centre of every row is followed back to a row of the padded input
//! ([`TdnnLayer::centre_rows`]). The vector is not trained and gets no gradient.

use std::collections::BTreeMap;
use std::sync::Arc;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarBuilder;
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::collective::Collective;
use crate::config::{MatmulPrecision, NetworkInput, Normalization, TdnnConfig};
#[cfg(test)]
use crate::fused::NORM_EPSILON;
use crate::fused::{
    global_statistics, inverse_deviations, FusedLayer, PackedWeights, Transform, UnitStatistics,
};
use crate::AcousticError;

/// Weight of the newest batch in the running mean and variance of batch normalisation (common
/// practice).
pub const RUNNING_MOMENTUM: f32 = 0.1;

/// What a layer applies after its matrix products, with the tensors it needs.
#[derive(Debug, Clone)]
enum Stage {
    /// Bias, then ReLU in a hidden layer (the output layer; hidden layers without
    /// normalisation).
    Bias { bias: Tensor },
    /// Bias, ReLU, layer normalisation.
    LayerNorm {
        bias: Tensor,
        gain: Tensor,
        shift: Tensor,
    },
    /// Batch normalisation, ReLU.
    BatchNorm {
        gain: Tensor,
        shift: Tensor,
        running_mean: Var,
        running_var: Var,
    },
}

/// What a training pass gives one layer: the valid output frames of each utterance, the dropout
/// probability and the generator of the dropout masks.
pub(crate) type LayerTraining<'a> = (&'a [usize], f32, &'a mut dyn RngCore);

/// This rank's part of the batch of a data-parallel training pass: the position of each of its
/// utterances in the whole batch (the stream of its dropout mask, as a single process drawing
/// the whole batch would use) and the ranks over which batch normalisation sums.
#[derive(Clone)]
pub struct BatchPart<'a> {
    /// Position in the whole batch of each utterance of the part, in the part's order.
    pub positions: &'a [u64],
    /// The ranks.
    pub collective: Arc<dyn Collective>,
}

/// One spliced affine layer, optionally followed by ReLU, normalisation and dropout.
///
/// Input `[batch, frames, input_dims]`, output `[batch, frames_out, output_dims]` with
/// `frames_out = (frames − 1 − (o_K − o_1)) / subsample + 1`.
#[derive(Debug, Clone)]
pub struct TdnnLayer {
    /// `[input_dims, K · output_dims]`: the per-offset matrices side by side.
    weight: Tensor,
    /// Everything after the matrix products.
    stage: Stage,
    offsets: Vec<i32>,
    subsample: usize,
    output_dims: usize,
    hidden: bool,
    /// Number format of the matrix products of training passes.
    training_precision: MatmulPrecision,
    /// Number format of the matrix products of inference passes (`[inference]
    /// matmul_precision` of `model.toml`; f32 unless set).
    inference_precision: MatmulPrecision,
    /// With bf16 inference, the weights converted once for the bf16 kernels.
    packed_weights: Option<Arc<PackedWeights>>,
}

impl TdnnLayer {
    fn new(
        vb: VarBuilder,
        input_dims: usize,
        output_dims: usize,
        offsets: &[i32],
        subsample: usize,
        normalization: Option<Normalization>,
    ) -> Result<Self, AcousticError> {
        let weight = vb.get((input_dims, offsets.len() * output_dims), "weight")?;
        let norm = vb.pp("norm");
        let stage = match normalization {
            Some(Normalization::Batch) => Stage::BatchNorm {
                gain: norm.get(output_dims, "weight")?,
                shift: norm.get(output_dims, "bias")?,
                // Shares the storage when the builder holds variables (training), so that the
                // updates reach the trainer's copy.
                running_mean: Var::from_tensor(&norm.get(output_dims, "running_mean")?)?,
                running_var: Var::from_tensor(&norm.get(output_dims, "running_var")?)?,
            },
            Some(Normalization::Layer) => Stage::LayerNorm {
                bias: vb.get(output_dims, "bias")?,
                gain: norm.get(output_dims, "weight")?,
                shift: norm.get(output_dims, "bias")?,
            },
            Some(Normalization::None) | None => Stage::Bias {
                bias: vb.get(output_dims, "bias")?,
            },
        };
        Ok(TdnnLayer {
            weight,
            stage,
            offsets: offsets.to_vec(),
            subsample,
            output_dims,
            hidden: normalization.is_some(),
            training_precision: MatmulPrecision::F32,
            inference_precision: MatmulPrecision::F32,
            packed_weights: None,
        })
    }

    /// The weights converted for the bf16 kernels (`None` where the CPU has none).
    fn packed(&self) -> Option<Arc<PackedWeights>> {
        let (dims, width) = self.weight.dims2().ok()?;
        let values: Vec<f32> = self.weight.flatten_all().ok()?.to_vec1().ok()?;
        let offsets = self.offsets.len();
        PackedWeights::new(&values, dims, offsets, width / offsets).map(Arc::new)
    }

    fn span(&self) -> usize {
        (self.offsets[self.offsets.len() - 1] - self.offsets[0]) as usize
    }

    /// For input rows that are centred on the padded-input rows `rows`, the padded-input row
    /// each output row is centred on: output row `t` on input row `s·t − o_1` (clamped to the
    /// input; `o_1 > 0` counts as 0).
    fn centre_rows(&self, rows: &[u32]) -> Vec<u32> {
        let centre = (-i64::from(self.offsets[0])).max(0) as usize;
        let last = rows.len().saturating_sub(1);
        (0..self.output_frames(rows.len()))
            .map(|t| rows[(self.subsample * t + centre).min(last)])
            .collect()
    }

    /// Output frames for `frames` input frames (0 when the input is shorter than the span).
    pub fn output_frames(&self, frames: usize) -> usize {
        layer_output_frames(frames, self.span(), self.subsample)
    }

    fn check_frames(&self, frames: usize) -> Result<usize, AcousticError> {
        match self.output_frames(frames) {
            0 => Err(AcousticError::Shape(format!(
                "a layer spanning {} frames got only {frames}",
                self.span() + 1
            ))),
            frames_out => Ok(frames_out),
        }
    }

    /// Runs the layer; `training` is given in training passes (dropout on, batch statistics).
    ///
    /// One fused operation (see the `fused` module): the shifted matrix products, bias,
    /// normalisation, ReLU and dropout, with a hand-written backward pass. Returns the batch
    /// statistics of a batch-normalised layer in training.
    pub(crate) fn forward(
        &self,
        input: &Tensor,
        training: Option<LayerTraining<'_>>,
        part: Option<&BatchPart<'_>>,
    ) -> Result<(Tensor, Option<UnitStatistics>), AcousticError> {
        let (batch, frames, _) = input.dims3()?;
        let frames_out = self.check_frames(frames)?;
        let (valid, dropout) = match training {
            Some((valid, p, rng)) => (Some(valid), Some((p, rng))),
            None => (None, None),
        };
        let precision = if valid.is_some() {
            self.training_precision
        } else {
            self.inference_precision
        };
        let (transform, params) = match (&self.stage, valid) {
            (Stage::Bias { bias }, _) => (Transform::Bias, bias.unsqueeze(0)?),
            (Stage::LayerNorm { bias, gain, shift }, _) => (
                Transform::LayerNorm,
                Tensor::stack(&[bias, gain, shift], 0)?,
            ),
            (Stage::BatchNorm { gain, shift, .. }, Some(valid)) => (
                Transform::BatchNorm {
                    valid: valid.to_vec(),
                },
                Tensor::stack(&[gain, shift], 0)?,
            ),
            (
                Stage::BatchNorm {
                    gain,
                    shift,
                    running_mean,
                    running_var,
                },
                None,
            ) => {
                let inverse = inverse_deviations(&running_var.as_tensor().to_vec1()?);
                let inverse = Tensor::from_vec(inverse, self.output_dims, input.device())?;
                let params = Tensor::stack(&[running_mean.as_tensor(), &inverse, gain, shift], 0)?;
                (Transform::FixedNorm, params.detach())
            }
        };
        let mask = match dropout {
            Some((p, rng)) if self.hidden && p > 0.0 => {
                let streams = part.map(|part| part.positions);
                Some(dropout_mask(
                    rng,
                    p,
                    batch,
                    frames_out * self.output_dims,
                    streams,
                )?)
            }
            _ => None,
        };
        let shifts = self
            .offsets
            .iter()
            .map(|&o| (o - self.offsets[0]) as usize)
            .collect();
        let op = FusedLayer::new(
            shifts,
            self.subsample,
            self.output_dims,
            self.hidden,
            transform,
            mask,
            input.track_op(),
        )
        .with_collective(part.map(|part| Arc::clone(&part.collective)))
        .with_precision(precision)
        .with_packed_weights(if valid.is_some() {
            None
        } else {
            self.packed_weights.clone()
        });
        let slot = op.statistics_slot();
        let output = input.contiguous()?.apply_op3(&self.weight, &params, op)?;
        let statistics = slot
            .lock()
            .map_err(|_| candle_core::Error::Msg("fused TDNN layer statistics poisoned".into()))?
            .take();
        Ok((output, statistics))
    }

    /// Folds one batch's statistics into the running estimates (see the module documentation).
    fn update_running_statistics(&self, batch: &UnitStatistics) -> Result<(), AcousticError> {
        let Stage::BatchNorm {
            running_mean,
            running_var,
            ..
        } = &self.stage
        else {
            return Err(AcousticError::Shape(
                "batch statistics for a layer without batch normalisation".into(),
            ));
        };
        let n = batch.frames as f64;
        let unbiased = if batch.frames > 1 { n / (n - 1.0) } else { 1.0 };
        let m = RUNNING_MOMENTUM;
        let mean: Vec<f32> = running_mean.as_tensor().to_vec1()?;
        let variance: Vec<f32> = running_var.as_tensor().to_vec1()?;
        let mean: Vec<f32> = mean
            .iter()
            .zip(&batch.mean)
            .map(|(&old, &new)| (1.0 - m) * old + m * new)
            .collect();
        let variance: Vec<f32> = variance
            .iter()
            .zip(&batch.variance)
            .map(|(&old, &new)| (1.0 - m) * old + m * (f64::from(new) * unbiased) as f32)
            .collect();
        let device = running_mean.device();
        running_mean.set(&Tensor::from_vec(mean, self.output_dims, device)?)?;
        running_var.set(&Tensor::from_vec(variance, self.output_dims, device)?)?;
        Ok(())
    }

    /// The layer written with candle primitives (the definition the fused operation is tested
    /// against); `training` as for [`TdnnLayer::forward`].
    #[cfg(test)]
    fn forward_reference(
        &self,
        input: &Tensor,
        training: Option<LayerTraining<'_>>,
    ) -> Result<Tensor, AcousticError> {
        let (batch, frames, dims) = input.dims3()?;
        let frames_out = self.check_frames(frames)?;
        let width = self.offsets.len() * self.output_dims;
        let product = input
            .reshape((batch * frames, dims))?
            .matmul(&self.weight)?
            .reshape((batch, frames, width))?;
        let s = self.subsample;
        // With subsampling, fold `s` consecutive frames into one row so that every s-th frame is
        // a plain (strided) slice.
        let folded = if s > 1 {
            let padded_frames = frames.div_ceil(s) * s;
            product
                .pad_with_zeros(1, 0, padded_frames - frames)?
                .reshape((batch, padded_frames / s, s * width))?
        } else {
            product
        };
        let mut output: Option<Tensor> = None;
        for (k, &offset) in self.offsets.iter().enumerate() {
            let shift = (offset - self.offsets[0]) as usize;
            let (row, phase) = (shift / s, shift % s);
            let block = folded.narrow(1, row, frames_out)?.narrow(
                2,
                phase * width + k * self.output_dims,
                self.output_dims,
            )?;
            output = Some(match output {
                None => block,
                Some(sum) => (sum + block)?,
            });
        }
        let Some(mut output) = output else {
            return Err(AcousticError::Shape("a layer without offsets".into()));
        };
        let (valid, dropout) = match training {
            Some((valid, p, rng)) => (Some(valid), Some((p, rng))),
            None => (None, None),
        };
        let layer_norm =
            |output: Tensor, gain: &Tensor, shift: &Tensor| -> candle_core::Result<_> {
                let centred = output.broadcast_sub(&output.mean_keepdim(2)?)?;
                let variance = centred.sqr()?.mean_keepdim(2)?;
                centred
                    .broadcast_div(&(variance + NORM_EPSILON as f64)?.sqrt()?)?
                    .broadcast_mul(gain)?
                    .broadcast_add(shift)
            };
        let normalise = |output: Tensor, mean: &Tensor, variance: &Tensor, gain, shift| {
            output
                .broadcast_sub(mean)?
                .broadcast_div(&(variance + NORM_EPSILON as f64)?.sqrt()?)?
                .broadcast_mul(gain)?
                .broadcast_add(shift)
        };
        output = match (&self.stage, valid) {
            (Stage::Bias { bias }, _) => {
                let output = output.broadcast_add(bias)?;
                if !self.hidden {
                    return Ok(output);
                }
                output.relu()?
            }
            (Stage::LayerNorm { bias, gain, shift }, _) => {
                layer_norm(output.broadcast_add(bias)?.relu()?, gain, shift)?
            }
            (Stage::BatchNorm { gain, shift, .. }, Some(valid)) => {
                // The statistics over the valid frames only: each utterance's first frames.
                let mut counted = Vec::new();
                for (b, &v) in valid.iter().enumerate() {
                    if v > 0 {
                        counted.push(output.get(b)?.narrow(0, 0, v)?);
                    }
                }
                let counted = Tensor::cat(&counted, 0)?;
                let mean = counted.mean_keepdim(0)?;
                let variance = counted.broadcast_sub(&mean)?.sqr()?.mean_keepdim(0)?;
                normalise(output, &mean, &variance, gain, shift)?.relu()?
            }
            (
                Stage::BatchNorm {
                    gain,
                    shift,
                    running_mean,
                    running_var,
                },
                None,
            ) => normalise(output, running_mean, running_var, gain, shift)?.relu()?,
        };
        if let Some((p, rng)) = dropout {
            if p > 0.0 {
                let (batch, frames_out, units) = output.dims3()?;
                let mask = dropout_mask(rng, p, batch, frames_out * units, None)?;
                let mask = Tensor::from_vec(mask, output.shape(), output.device())?;
                output = (output * mask)?;
            }
        }
        Ok(output)
    }
}

/// A dropout mask of `batch` utterances of `per_utterance` values: `0` with probability `p`,
/// else `1/(1−p)`. One generator per utterance (stream `b` of a seed drawn from `rng`, or
/// `streams[b]` for a rank's part of a data-parallel batch: its utterances' positions in the
/// whole batch), so the utterances are drawn in parallel and the mask does not depend on the
/// thread count or on how the batch is split over ranks (the first frames of a stream are the
/// utterance's valid ones, whatever the padding); a unit is dropped when a uniform 32-bit draw
/// falls below `p·2³²`.
fn dropout_mask(
    rng: &mut dyn RngCore,
    p: f32,
    batch: usize,
    per_utterance: usize,
    streams: Option<&[u64]>,
) -> Result<Vec<f32>, AcousticError> {
    if streams.is_some_and(|s| s.len() != batch) {
        return Err(AcousticError::Shape(format!(
            "{} batch positions for a part of {batch} utterances",
            streams.map_or(0, <[u64]>::len)
        )));
    }
    let keep = 1.0 / (1.0 - p);
    let mut mask = vec![keep; batch * per_utterance];
    let seed = rng.next_u64();
    let drop_below = (f64::from(p) * 4_294_967_296.0) as u64;
    if per_utterance > 0 {
        mask.par_chunks_mut(per_utterance)
            .enumerate()
            .for_each(|(b, chunk)| {
                let mut draw = ChaCha8Rng::seed_from_u64(seed);
                draw.set_stream(streams.map_or(b as u64, |s| s[b]));
                for m in chunk {
                    if u64::from(draw.next_u32()) < drop_below {
                        *m = 0.0;
                    }
                }
            });
    }
    Ok(mask)
}

/// The network: hidden [`TdnnLayer`]s and a final affine layer over the units (blank at 0).
///
/// The frame counts of a network without its weights (see [`Tdnn::frame_geometry`]).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct FrameGeometry {
    /// Context frames added around each utterance.
    padding: usize,
    /// `(span, subsample)` of each layer.
    layers: Vec<(usize, usize)>,
}

impl FrameGeometry {
    /// [`Tdnn::output_frames`] of the network it was taken from.
    pub(crate) fn output_frames(&self, frames: usize) -> usize {
        self.layers
            .iter()
            .fold(frames + self.padding, |n, &(span, subsample)| {
                layer_output_frames(n, span, subsample)
            })
    }
}

/// Output frames of a layer spanning `span + 1` input frames that keeps every `subsample`th.
fn layer_output_frames(frames: usize, span: usize, subsample: usize) -> usize {
    if frames <= span {
        0
    } else {
        (frames - 1 - span) / subsample + 1
    }
}

/// Input `[batch, frames, feature_dims]` (each utterance already padded by the context),
/// output `[batch, output_frames, units]` unnormalised scores (logits).
#[derive(Debug, Clone)]
pub struct Tdnn {
    layers: Vec<TdnnLayer>,
    config: TdnnConfig,
    input: NetworkInput,
}

impl Tdnn {
    /// Builds the network, taking from `vb` the tensors `layers.{i}.weight`, `layers.{i}.bias`
    /// (not with batch normalisation), `layers.{i}.norm.weight` and `layers.{i}.norm.bias` (gain
    /// and shift of either normalisation), `layers.{i}.norm.running_mean` and
    /// `layers.{i}.norm.running_var` (batch normalisation); the output layer is
    /// `layers.{hidden_count}` (weight and bias). The running statistics share the builder's
    /// storage when it holds variables, so [`Tdnn::update_running_statistics`] updates those.
    /// `input`: the dimensions of each input frame, and of the speaker vector every later
    /// hidden layer reads again (a plain `usize`: frames only).
    pub fn new(
        vb: VarBuilder,
        config: &TdnnConfig,
        input: impl Into<NetworkInput>,
        units: usize,
    ) -> Result<Self, AcousticError> {
        config.validate()?;
        let input = input.into();
        if input.layer_vector_dims > input.frame_dims {
            return Err(AcousticError::Shape(format!(
                "a speaker vector of {} dimensions in input frames of {}",
                input.layer_vector_dims, input.frame_dims
            )));
        }
        let mut layers = Vec::with_capacity(config.layers.len() + 1);
        let mut dims = input.frame_dims;
        for (i, layer) in config.layers.iter().enumerate() {
            if i > 0 {
                dims += input.layer_vector_dims;
            }
            layers.push(TdnnLayer::new(
                vb.pp("layers").pp(i),
                dims,
                layer.width,
                &layer.taps,
                layer.keep_every,
                Some(config.normalization),
            )?);
            dims = layer.width;
        }
        layers.push(TdnnLayer::new(
            vb.pp("layers").pp(config.layers.len()),
            dims,
            units,
            &[0],
            1,
            None,
        )?);
        Ok(Tdnn {
            layers,
            config: config.clone(),
            input,
        })
    }

    /// The speaker vectors of a padded input `[batch, frames, dims]` (its last columns) when the
    /// later layers read them, with the padded-input row each input row is centred on.
    fn layer_vectors(&self, input: &Tensor) -> Result<Option<(Tensor, Vec<u32>)>, AcousticError> {
        let r = self.input.layer_vector_dims;
        if r == 0 {
            return Ok(None);
        }
        let (_, frames, dims) = input.dims3()?;
        if dims != self.input.frame_dims {
            return Err(AcousticError::Shape(format!(
                "input frames of {dims} dimensions, the network takes {}",
                self.input.frame_dims
            )));
        }
        let vectors = input.narrow(2, dims - r, r)?.contiguous()?.detach();
        Ok(Some((vectors, (0..frames as u32).collect())))
    }

    /// The input of hidden layer `index`: `x`, with the speaker vector of the row each of its
    /// rows is centred on appended when the later layers read the vectors. Then moves `rows`
    /// on to the rows the layer's output is centred on.
    fn layer_input(
        &self,
        index: usize,
        x: Tensor,
        vectors: &mut Option<(Tensor, Vec<u32>)>,
    ) -> Result<Tensor, AcousticError> {
        let Some((all, rows)) = vectors else {
            return Ok(x);
        };
        let layer = &self.layers[index];
        let x = if index > 0 && layer.hidden {
            let picked = Tensor::from_slice(rows, rows.len(), all.device())?;
            Tensor::cat(&[&x, &all.index_select(&picked, 1)?], 2)?
        } else {
            x
        };
        *rows = layer.centre_rows(rows);
        Ok(x)
    }

    /// Output frames for an utterance of `frames` feature frames padded by the context.
    pub fn output_frames(&self, frames: usize) -> usize {
        let (left, right) = self.config.context();
        self.layers
            .iter()
            .fold(frames + left + right, |n, layer| layer.output_frames(n))
    }

    /// What [`Tdnn::output_frames`] needs, apart from the weights: a value another thread can
    /// hold while the weights are updated.
    pub(crate) fn frame_geometry(&self) -> FrameGeometry {
        let (left, right) = self.config.context();
        FrameGeometry {
            padding: left + right,
            layers: self
                .layers
                .iter()
                .map(|layer| (layer.span(), layer.subsample))
                .collect(),
        }
    }

    /// The number format of the matrix products of training passes ([`Tdnn::forward_train`]);
    /// f32 until set. Inference ([`Tdnn::forward`]) has its own
    /// ([`Tdnn::set_inference_precision`]). Bf16 on a CPU without the instructions runs f32
    /// (see [`MatmulPrecision::supported`]).
    pub fn set_training_precision(&mut self, precision: MatmulPrecision) {
        for layer in &mut self.layers {
            layer.training_precision = precision;
        }
    }

    /// The number format of the matrix products of inference passes ([`Tdnn::forward`]); f32
    /// until set. Everything else (bias, normalisation, the softmax) stays f32. Bf16 on a CPU
    /// without the instructions runs f32. With bf16 the weights are converted for the kernels
    /// here, once, instead of at every product: call it when the weights are final (a loaded
    /// model), and again after changing them.
    pub fn set_inference_precision(&mut self, precision: MatmulPrecision) {
        for layer in &mut self.layers {
            layer.inference_precision = precision;
            layer.packed_weights = match precision {
                MatmulPrecision::Bf16 => layer.packed(),
                MatmulPrecision::F32 => None,
            };
        }
    }

    /// Drops the converted weights, so that bf16 inference converts them at every product (for
    /// tests that compare the two).
    #[cfg(test)]
    fn forget_packed_weights(&mut self) {
        for layer in &mut self.layers {
            layer.packed_weights = None;
        }
    }

    /// The architecture.
    pub fn config(&self) -> &TdnnConfig {
        &self.config
    }

    /// Logits `[batch, output_frames, units]` for inference: no dropout, batch normalisation
    /// with the running statistics (so each frame's logits depend on its own context only).
    pub fn forward(&self, input: &Tensor) -> Result<Tensor, AcousticError> {
        let mut vectors = self.layer_vectors(input)?;
        let mut x = input.clone();
        for (index, layer) in self.layers.iter().enumerate() {
            x = self.layer_input(index, x, &mut vectors)?;
            x = layer.forward(&x, None, None)?.0;
        }
        Ok(x)
    }

    /// Logits `[batch, output_frames, units]` of a training pass: dropout masks drawn from `rng`,
    /// batch normalisation with the statistics of the batch, whose utterance `b` has
    /// `frames[b]` feature frames (before the context padding; the rest of its row in `input`
    /// is padding and does not count in the statistics). Returns the batch statistics for
    /// [`Tdnn::update_running_statistics`] (empty without batch normalisation).
    pub fn forward_train(
        &self,
        input: &Tensor,
        frames: &[usize],
        rng: &mut dyn RngCore,
    ) -> Result<(Tensor, BatchStatistics), AcousticError> {
        self.forward_train_part(input, frames, None, rng)
    }

    /// [`Tdnn::forward_train`] over this rank's `part` of a data-parallel batch (`None`: the
    /// whole batch): dropout masks drawn as for the whole batch, batch normalisation with the
    /// statistics of the whole batch (summed over the ranks in the forward pass, and the batch
    /// terms of its gradient in the backward pass). The returned statistics are the whole
    /// batch's, the same on every rank.
    pub fn forward_train_part(
        &self,
        input: &Tensor,
        frames: &[usize],
        part: Option<&BatchPart<'_>>,
        rng: &mut dyn RngCore,
    ) -> Result<(Tensor, BatchStatistics), AcousticError> {
        let mut valid = self.input_valid_frames(input, frames)?;
        let mut statistics = BatchStatistics::default();
        let mut vectors = self.layer_vectors(input)?;
        let mut x = input.clone();
        for (index, layer) in self.layers.iter().enumerate() {
            x = self.layer_input(index, x, &mut vectors)?;
            valid.iter_mut().for_each(|v| *v = layer.output_frames(*v));
            let (output, unit_statistics) =
                layer.forward(&x, Some((&valid, self.config.dropout, &mut *rng)), part)?;
            if let Some(unit_statistics) = unit_statistics {
                statistics.layers.push((index, unit_statistics));
            }
            x = output;
        }
        Ok((x, statistics))
    }

    /// The forward pass of a rank that has no utterance in a data-parallel batch: it draws
    /// from `rng` what the other ranks draw (one dropout seed per hidden layer) and takes part
    /// in the batch-norm sums with zeros. Returns the whole batch's statistics.
    pub fn idle_forward(
        &self,
        collective: &dyn Collective,
        rng: &mut dyn RngCore,
    ) -> Result<BatchStatistics, AcousticError> {
        let mut statistics = BatchStatistics::default();
        for (index, layer) in self.layers.iter().enumerate() {
            if layer.hidden && self.config.dropout > 0.0 {
                rng.next_u64();
            }
            if let Stage::BatchNorm { .. } = layer.stage {
                let h = layer.output_dims;
                let unit_statistics =
                    global_statistics(Some(collective), vec![0.0; h + 1], |_| vec![0.0; h])?;
                statistics.layers.push((index, unit_statistics));
            }
        }
        Ok(statistics)
    }

    /// The backward pass of a rank without utterances in the batch: the batch-norm gradient
    /// sums with zeros, last layer first (the order of the other ranks' backward passes).
    pub fn idle_backward(&self, collective: &dyn Collective) -> Result<(), AcousticError> {
        for layer in self.layers.iter().rev() {
            if let Stage::BatchNorm { .. } = layer.stage {
                let mut sums = vec![0.0; 2 * layer.output_dims];
                collective.sum_f64("the batch-norm gradient sums", &mut sums)?;
            }
        }
        Ok(())
    }

    /// Folds the statistics of a training pass into the running mean and variance of every
    /// batch-normalised layer (an exponential moving average, see the module documentation).
    /// Call it once per update made, not for a batch that was skipped.
    pub fn update_running_statistics(
        &self,
        statistics: &BatchStatistics,
    ) -> Result<(), AcousticError> {
        for (index, unit_statistics) in &statistics.layers {
            let layer = self.layers.get(*index).ok_or_else(|| {
                AcousticError::Shape(format!(
                    "batch statistics for a layer {index} that does not exist"
                ))
            })?;
            layer.update_running_statistics(unit_statistics)?;
        }
        Ok(())
    }

    /// Valid input frames of each utterance of a padded batch: its feature frames plus the
    /// context (none for an empty utterance).
    fn input_valid_frames(
        &self,
        input: &Tensor,
        frames: &[usize],
    ) -> Result<Vec<usize>, AcousticError> {
        let (batch, padded, _) = input.dims3()?;
        if frames.len() != batch {
            return Err(AcousticError::Shape(format!(
                "{} frame counts for a batch of {batch} utterances",
                frames.len()
            )));
        }
        let (left, right) = self.config.context();
        let valid: Vec<usize> = frames
            .iter()
            .map(|&f| if f == 0 { 0 } else { f + left + right })
            .collect();
        if let Some(b) = valid.iter().position(|&v| v > padded) {
            return Err(AcousticError::Shape(format!(
                "utterance {b} of the batch has {} feature frames, the batch holds {padded} with the context",
                frames[b]
            )));
        }
        Ok(valid)
    }
}

/// The batch statistics of one training pass ([`Tdnn::forward_train`]): for every
/// batch-normalised layer, the mean and biased variance of each unit over the batch's valid
/// frames, and their number.
#[derive(Debug, Clone, Default)]
pub struct BatchStatistics {
    layers: Vec<(usize, UnitStatistics)>,
}

impl Tdnn {
    /// [`Tdnn::forward`] (`training` = `None`) or [`Tdnn::forward_train`] (`Some((frames,
    /// rng))`, without the statistics) through [`TdnnLayer::forward_reference`] (tests only).
    #[cfg(test)]
    pub(crate) fn forward_reference(
        &self,
        input: &Tensor,
        training: Option<(&[usize], &mut dyn RngCore)>,
    ) -> Result<Tensor, AcousticError> {
        let mut vectors = self.layer_vectors(input)?;
        let mut x = input.clone();
        match training {
            None => {
                for (index, layer) in self.layers.iter().enumerate() {
                    x = self.layer_input(index, x, &mut vectors)?;
                    x = layer.forward_reference(&x, None)?;
                }
            }
            Some((frames, rng)) => {
                let mut valid = self.input_valid_frames(input, frames)?;
                for (index, layer) in self.layers.iter().enumerate() {
                    x = self.layer_input(index, x, &mut vectors)?;
                    valid.iter_mut().for_each(|v| *v = layer.output_frames(*v));
                    x = layer
                        .forward_reference(&x, Some((&valid, self.config.dropout, &mut *rng)))?;
                }
            }
        }
        Ok(x)
    }
}

/// Freshly initialised parameters by name: affine weights uniform in `±1/√fan_in` (the common
/// default for linear layers), biases zero, norm gains one, norm shifts zero. Deterministic for
/// the RNG. The running statistics of batch normalisation are not parameters; see
/// [`initial_statistics`].
pub fn initial_parameters(
    config: &TdnnConfig,
    input: impl Into<NetworkInput>,
    units: usize,
    rng: &mut impl Rng,
) -> Result<BTreeMap<String, Var>, AcousticError> {
    let device = Device::Cpu;
    let input = input.into();
    let mut vars = BTreeMap::new();
    let mut dims = input.frame_dims;
    let mut shapes: Vec<(usize, usize, usize, bool)> = Vec::new();
    for (i, layer) in config.layers.iter().enumerate() {
        if i > 0 {
            dims += input.layer_vector_dims;
        }
        shapes.push((dims, layer.taps.len(), layer.width, true));
        dims = layer.width;
    }
    shapes.push((dims, 1, units, false));
    for (i, (input, offsets, output, hidden)) in shapes.into_iter().enumerate() {
        let bound = 1.0 / ((input * offsets) as f32).sqrt();
        let weight: Vec<f32> = (0..input * offsets * output)
            .map(|_| rng.random_range(-bound..bound))
            .collect();
        let prefix = format!("layers.{i}");
        vars.insert(
            format!("{prefix}.weight"),
            Var::from_vec(weight, (input, offsets * output), &device)?,
        );
        let normalization = if hidden {
            config.normalization
        } else {
            Normalization::None
        };
        if normalization != Normalization::Batch {
            vars.insert(
                format!("{prefix}.bias"),
                Var::zeros(output, DType::F32, &device)?,
            );
        }
        if normalization != Normalization::None {
            vars.insert(
                format!("{prefix}.norm.weight"),
                Var::ones(output, DType::F32, &device)?,
            );
            vars.insert(
                format!("{prefix}.norm.bias"),
                Var::zeros(output, DType::F32, &device)?,
            );
        }
    }
    Ok(vars)
}

/// The running statistics of a fresh network by name: `layers.{i}.norm.running_mean` (zeros)
/// and `layers.{i}.norm.running_var` (ones) of every hidden layer with batch normalisation;
/// empty for other networks. They are saved and loaded with the parameters, but have no
/// gradient and no optimizer state.
pub fn initial_statistics(config: &TdnnConfig) -> Result<BTreeMap<String, Var>, AcousticError> {
    let mut vars = BTreeMap::new();
    if config.normalization != Normalization::Batch {
        return Ok(vars);
    }
    for (i, layer) in config.layers.iter().enumerate() {
        vars.insert(
            format!("layers.{i}.norm.running_mean"),
            Var::zeros(layer.width, DType::F32, &Device::Cpu)?,
        );
        vars.insert(
            format!("layers.{i}.norm.running_var"),
            Var::ones(layer.width, DType::F32, &Device::Cpu)?,
        );
    }
    Ok(vars)
}

/// A [`VarBuilder`] over named parameters (sharing their storage, so gradients reach the vars).
pub fn var_builder(vars: &BTreeMap<String, Var>) -> VarBuilder<'static> {
    let tensors = vars
        .iter()
        .map(|(name, var)| (name.clone(), var.as_tensor().clone()))
        .collect();
    VarBuilder::from_tensors(tensors, DType::F32, &Device::Cpu)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{LayerConfig, ModelConfig};
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn tiny() -> TdnnConfig {
        TdnnConfig {
            layers: vec![
                LayerConfig {
                    taps: vec![-1, 0, 2],
                    width: 4,
                    keep_every: 1,
                },
                LayerConfig {
                    taps: vec![-1, 0, 1],
                    width: 5,
                    keep_every: 3,
                },
            ],
            normalization: Normalization::None,
            dropout: 0.0,
        }
    }

    /// The definition: splice copies of the shifted frames, then one affine map per output frame.
    #[test]
    fn layer_equals_explicit_splice_then_affine() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let config = tiny();
        let vars = initial_parameters(&config, 3, 2, &mut rng).unwrap();
        let net = Tdnn::new(var_builder(&vars), &config, 3, 2).unwrap();
        let frames = 14;
        let x: Vec<f32> = (0..2 * frames * 3)
            .map(|_| rng.random_range(-1.0..1.0))
            .collect();
        let input = Tensor::from_vec(x.clone(), (2, frames, 3), &Device::Cpu).unwrap();
        // Give the biases non-zero values so that they are checked too.
        let bias = Tensor::new(&[0.1f32, -0.2, 0.3, 0.4, -0.5], &Device::Cpu).unwrap();
        vars["layers.1.bias"].set(&bias).unwrap();
        let first = net.layers[0].forward(&input, None, None).unwrap().0;
        let got: Vec<Vec<Vec<f32>>> = net.layers[1]
            .forward(&first, None, None)
            .unwrap()
            .0
            .to_vec3()
            .unwrap();
        let first: Vec<Vec<Vec<f32>>> = first.to_vec3().unwrap();
        let w1: Vec<Vec<f32>> = vars["layers.1.weight"].as_tensor().to_vec2().unwrap();
        let b1: Vec<f32> = bias.to_vec1().unwrap();
        let offsets = [-1i32, 0, 1];
        let frames1 = first[0].len();
        assert_eq!(frames1, frames - 3);
        let expected_frames = (frames1 - 1 - 2) / 3 + 1;
        assert_eq!(got[0].len(), expected_frames);
        for b in 0..2 {
            for (t, row) in got[b].iter().enumerate() {
                for (h, &value) in row.iter().enumerate() {
                    let mut sum = b1[h];
                    for (k, &o) in offsets.iter().enumerate() {
                        let source = (3 * t) as i32 + o + 1;
                        for (d, &xv) in first[b][source as usize].iter().enumerate() {
                            sum += xv * w1[d][k * 5 + h];
                        }
                    }
                    let expected = sum.max(0.0);
                    assert!(
                        (value - expected).abs() < 1e-5,
                        "b{b} t{t} h{h}: {value} vs {expected}"
                    );
                }
            }
        }
    }

    #[test]
    fn output_has_one_frame_per_subsampling_period() {
        for normalization in [
            Normalization::Layer,
            Normalization::Batch,
            Normalization::None,
        ] {
            let config = with_norm(ModelConfig::small().model, normalization, 0.1);
            // ±2 frames at the input rate, then at a third of it two layers of ±1 and two of ±3:
            // 2 + 3·(1 + 1 + 3 + 3).
            assert_eq!(config.context(), (26, 26));
            let mut rng = ChaCha8Rng::seed_from_u64(1);
            let vars = initial_parameters(&config, 39, 30, &mut rng).unwrap();
            let statistics = initial_statistics(&config).unwrap();
            let net = Tdnn::new(var_builder(&merged(&vars, &statistics)), &config, 39, 30).unwrap();
            let geometry = net.frame_geometry();
            for frames in [1usize, 2, 3, 4, 100, 101] {
                assert_eq!(
                    net.output_frames(frames),
                    frames.div_ceil(3),
                    "{frames} frames"
                );
                assert_eq!(geometry.output_frames(frames), frames.div_ceil(3));
            }
            let input = Tensor::zeros((2, 50 + 52, 39), DType::F32, &Device::Cpu).unwrap();
            let out = net.forward(&input).unwrap();
            assert_eq!(out.dims3().unwrap(), (2, 17, 30));
            let (out, _) = net.forward_train(&input, &[50, 43], &mut rng).unwrap();
            assert_eq!(out.dims3().unwrap(), (2, 17, 30));
            let count: usize = vars.values().map(|v| v.elem_count()).sum();
            assert_eq!(count, config.parameter_count(39, 30), "{normalization:?}");
            assert!(
                (1_000_000..2_000_000).contains(&count),
                "{count} parameters"
            );
            let running = if normalization == Normalization::Batch {
                2 * 320 * config.layers.len()
            } else {
                0
            };
            assert_eq!(
                statistics.values().map(|v| v.elem_count()).sum::<usize>(),
                running
            );
            // Frame counts that do not describe the batch are refused.
            for frames in [&[50usize][..], &[50, 51], &[50, 43, 1]] {
                let error = net.forward_train(&input, frames, &mut rng).unwrap_err();
                assert!(matches!(error, AcousticError::Shape(_)), "{error}");
            }
        }
    }
    fn with_norm(mut config: TdnnConfig, normalization: Normalization, dropout: f32) -> TdnnConfig {
        config.normalization = normalization;
        config.dropout = dropout;
        config
    }

    fn merged(a: &BTreeMap<String, Var>, b: &BTreeMap<String, Var>) -> BTreeMap<String, Var> {
        a.iter()
            .chain(b)
            .map(|(name, var)| (name.clone(), var.clone()))
            .collect()
    }

    /// A fresh network with non-trivial biases, gains, shifts and running statistics; returns
    /// the parameters, the running statistics and the network over both.
    fn network(
        config: &TdnnConfig,
        dims: impl Into<NetworkInput>,
        units: usize,
        rng: &mut ChaCha8Rng,
    ) -> (BTreeMap<String, Var>, BTreeMap<String, Var>, Tdnn) {
        let dims = dims.into();
        let vars = initial_parameters(config, dims, units, rng).unwrap();
        let statistics = initial_statistics(config).unwrap();
        for (name, var) in vars.iter().chain(&statistics) {
            if var.rank() == 1 {
                let values: Vec<f32> = (0..var.elem_count())
                    .map(|_| rng.random_range(0.5..1.5))
                    .collect();
                let values = if name.ends_with("norm.weight") || name.ends_with("running_var") {
                    values
                } else {
                    values.iter().map(|v| v - 1.0).collect()
                };
                var.set(&Tensor::from_vec(values, var.shape(), &Device::Cpu).unwrap())
                    .unwrap();
            }
        }
        let net = Tdnn::new(
            var_builder(&merged(&vars, &statistics)),
            config,
            dims,
            units,
        )
        .unwrap();
        (vars, statistics, net)
    }

    fn max_difference(a: &Tensor, b: &Tensor) -> f32 {
        (a - b)
            .unwrap()
            .abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap()
    }

    /// The fused layers give the outputs and gradients (input, weights, biases, norm gains and
    /// shifts) of the same layers written with candle primitives and differentiated by candle,
    /// with layer norm, batch norm and neither, with and without dropout, for frame counts that
    /// do and do not line up with the subsampling period, and (batch norm) utterances shorter
    /// than the batch whose padding must not count. Inference (running statistics) too.
    #[test]
    fn fused_layers_match_the_candle_graph_and_its_gradients() {
        let small = ModelConfig::small().model;
        let configs = [
            with_norm(tiny(), Normalization::Layer, 0.3),
            with_norm(tiny(), Normalization::Layer, 0.0),
            tiny(),
            with_norm(small.clone(), Normalization::Layer, 0.1),
            with_norm(tiny(), Normalization::Batch, 0.3),
            with_norm(tiny(), Normalization::Batch, 0.0),
            with_norm(small, Normalization::Batch, 0.1),
        ];
        for (c, config) in configs.iter().enumerate() {
            for frames in [14usize, 15, 16, 31] {
                let (left, right) = config.context();
                if frames <= left + right + 2 {
                    continue;
                }
                let features = frames - left - right;
                let lengths = [features, features.saturating_sub(4).max(1), 1];
                for input_is_var in [false, true] {
                    let mut rng = ChaCha8Rng::seed_from_u64(7 + frames as u64);
                    let dims = 3;
                    let units = 4;
                    let (vars, _, net) = network(config, dims, units, &mut rng);
                    let x: Vec<f32> = (0..3 * frames * dims)
                        .map(|_| rng.random_range(-1.0..1.0))
                        .collect();
                    let input_var = Var::from_vec(x, (3, frames, dims), &Device::Cpu).unwrap();
                    let input = if input_is_var {
                        input_var.as_tensor().clone()
                    } else {
                        input_var.as_tensor().detach()
                    };
                    let what = format!("config {c}, {frames} frames, input var {input_is_var}");
                    let diff = max_difference(
                        &net.forward(&input).unwrap(),
                        &net.forward_reference(&input, None).unwrap(),
                    );
                    assert!(diff < 1e-5, "{what}: inference outputs differ by {diff}");
                    let mut rng_a = ChaCha8Rng::seed_from_u64(99);
                    let mut rng_b = ChaCha8Rng::seed_from_u64(99);
                    let (fused, _) = net.forward_train(&input, &lengths, &mut rng_a).unwrap();
                    let reference = net
                        .forward_reference(&input, Some((&lengths, &mut rng_b)))
                        .unwrap();
                    assert_eq!(fused.dims(), reference.dims());
                    let diff = max_difference(&fused, &reference);
                    assert!(diff < 1e-5, "{what}: outputs differ by {diff}");
                    // Every output frame gets a gradient, padded ones included.
                    let weights = Tensor::randn(0f32, 1.0, fused.shape(), &Device::Cpu).unwrap();
                    let grads_fused = (&fused * &weights)
                        .unwrap()
                        .sum_all()
                        .unwrap()
                        .backward()
                        .unwrap();
                    let grads_reference = (&reference * &weights)
                        .unwrap()
                        .sum_all()
                        .unwrap()
                        .backward()
                        .unwrap();
                    let mut checked = vec![("input".to_string(), input_var.as_tensor().clone())];
                    checked.extend(vars.iter().map(|(n, v)| (n.clone(), v.as_tensor().clone())));
                    for (name, tensor) in &checked {
                        let (a, b) = (grads_fused.get(tensor), grads_reference.get(tensor));
                        if name == "input" && !input_is_var {
                            assert!(a.is_none() && b.is_none(), "{what}: input gradient");
                            continue;
                        }
                        let (a, b) = (a.unwrap(), b.unwrap());
                        let scale = b
                            .abs()
                            .unwrap()
                            .flatten_all()
                            .unwrap()
                            .max(0)
                            .unwrap()
                            .to_scalar::<f32>()
                            .unwrap();
                        let diff = max_difference(a, b);
                        assert!(
                            diff <= 1e-4 * scale.max(1.0),
                            "{what}: gradient of {name} differs by {diff} (largest {scale})"
                        );
                    }
                }
            }
        }
    }

    /// `matmul_precision = "bf16"`: a training pass (logits and every weight gradient) stays
    /// within bf16 rounding of the f32 pass, with dropout and both normalisations, and inference
    /// keeps the f32 bits.
    #[test]
    fn bf16_passes_stay_close_to_f32_and_inference_follows_its_own_setting() {
        if !crate::fused::bf16_available() {
            eprintln!("skipped: this CPU lacks AVX-512 BF16");
            return;
        }
        let layer = |taps: Vec<i32>, width, keep_every| LayerConfig {
            taps,
            width,
            keep_every,
        };
        let wide = TdnnConfig {
            layers: vec![
                layer(vec![-2, -1, 0, 1, 2], 48, 3),
                layer(vec![-1, 0, 1], 40, 1),
                layer(vec![-3, 0, 3], 40, 1),
            ],
            normalization: Normalization::None,
            dropout: 0.0,
        };
        for normalization in [
            Normalization::None,
            Normalization::Batch,
            Normalization::Layer,
        ] {
            let config = with_norm(wide.clone(), normalization, 0.1);
            let mut rng = ChaCha8Rng::seed_from_u64(12);
            let (vars, _, mut net) = network(&config, 23, 9, &mut rng);
            let x: Vec<f32> = (0..3 * 90 * 23)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let input = Tensor::from_vec(x, (3, 90, 23), &Device::Cpu).unwrap();
            let lengths = [62, 40, 25];
            let pass = |net: &Tdnn| {
                let (out, _) = net
                    .forward_train(&input, &lengths, &mut ChaCha8Rng::seed_from_u64(1))
                    .unwrap();
                let probe = out.ones_like().unwrap().cumsum(2).unwrap().sin().unwrap();
                let grads = (&out * &probe)
                    .unwrap()
                    .sum_all()
                    .unwrap()
                    .backward()
                    .unwrap();
                let mut values = vec![("logits".to_string(), out.flatten_all().unwrap())];
                for (name, var) in &vars {
                    if name.ends_with(".weight") && !name.contains("norm") {
                        let grad = grads.get(var.as_tensor()).unwrap().flatten_all().unwrap();
                        values.push((name.clone(), grad));
                    }
                }
                values
                    .into_iter()
                    .map(|(name, t)| (name, t.to_vec1::<f32>().unwrap()))
                    .collect::<Vec<_>>()
            };
            let inference = |net: &Tdnn| -> Vec<u32> {
                let out = net.forward(&input).unwrap().flatten_all().unwrap();
                out.to_vec1::<f32>()
                    .unwrap()
                    .iter()
                    .map(|v| v.to_bits())
                    .collect()
            };
            let (f32_pass, f32_inference) = (pass(&net), inference(&net));
            net.set_training_precision(MatmulPrecision::Bf16);
            let bf16_pass = pass(&net);
            assert_eq!(
                inference(&net),
                f32_inference,
                "{normalization:?}: inference changed"
            );
            for ((name, exact), (_, rounded)) in f32_pass.iter().zip(&bf16_pass) {
                let norm = |v: &mut dyn Iterator<Item = f32>| {
                    v.map(|x| f64::from(x).powi(2)).sum::<f64>().sqrt()
                };
                let error = norm(&mut exact.iter().zip(rounded).map(|(a, b)| a - b))
                    / norm(&mut exact.iter().copied());
                // bf16 keeps 8 significant bits: the logits are off by a few parts in a
                // thousand (measured 0.1–0.5 %). The weight gradients of the first layers
                // less so: they sum many terms of either sign after three backward products
                // and flipped ReLU gates (measured up to 7 % for the first layer, 0.2 % for the
                // last).
                let tolerance = if name == "logits" { 1e-2 } else { 0.15 };
                assert!(
                    error <= tolerance,
                    "{normalization:?} {name}: relative error {error}"
                );
                assert!(
                    error > 0.0,
                    "{normalization:?} {name}: bf16 changed nothing"
                );
            }
            // bf16 inference: the weights converted once give the bits of converting them at
            // every product, and differ from f32 by rounding alone.
            net.set_inference_precision(MatmulPrecision::Bf16);
            let packed = inference(&net);
            net.forget_packed_weights();
            let unpacked = inference(&net);
            assert_eq!(packed, unpacked, "{normalization:?}: converted weights");
            let as_f32 = |bits: &[u32]| bits.iter().map(|&b| f32::from_bits(b)).collect();
            let (exact, rounded): (Vec<f32>, Vec<f32>) = (as_f32(&f32_inference), as_f32(&packed));
            let largest = exact.iter().map(|v| v.abs()).fold(0f32, f32::max);
            let error = exact
                .iter()
                .zip(&rounded)
                .map(|(a, b)| (a - b).abs())
                .fold(0f32, f32::max);
            assert!(
                error > 0.0 && error <= 2e-2 * largest,
                "{normalization:?}: bf16 inference off by {error} (largest logit {largest})"
            );
            net.set_inference_precision(MatmulPrecision::F32);
            assert_eq!(
                inference(&net),
                f32_inference,
                "{normalization:?}: back to f32"
            );
        }
    }

    /// Central finite differences of the fused network (no candle graph involved) agree with its
    /// hand-written backward pass, with layer and batch normalisation.
    #[test]
    fn fused_gradients_match_finite_differences() {
        for normalization in [Normalization::Layer, Normalization::Batch] {
            let config = with_norm(tiny(), normalization, 0.0);
            let mut rng = ChaCha8Rng::seed_from_u64(3);
            let (vars, _, net) = network(&config, 3, 4, &mut rng);
            let x: Vec<f32> = (0..2 * 16 * 3)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let input = Tensor::from_vec(x, (2, 16, 3), &Device::Cpu).unwrap();
            let lengths = [11, 6];
            let forward = |net: &Tdnn| {
                net.forward_train(&input, &lengths, &mut ChaCha8Rng::seed_from_u64(0))
                    .unwrap()
                    .0
            };
            let probe = Tensor::randn(0f32, 1.0, forward(&net).shape(), &Device::Cpu).unwrap();
            let loss = |net: &Tdnn| -> f64 {
                let out: Vec<f32> = forward(net).flatten_all().unwrap().to_vec1().unwrap();
                let probe: Vec<f32> = probe.flatten_all().unwrap().to_vec1().unwrap();
                out.iter()
                    .zip(&probe)
                    .map(|(a, b)| *a as f64 * *b as f64)
                    .sum()
            };
            let grads = (forward(&net) * &probe)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            for name in [
                "layers.0.weight",
                "layers.1.weight",
                "layers.0.norm.weight",
                "layers.1.norm.bias",
                "layers.2.bias",
            ] {
                let var = &vars[name];
                let original: Vec<f32> = var.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
                let analytic: Vec<f32> = grads
                    .get(var.as_tensor())
                    .unwrap()
                    .flatten_all()
                    .unwrap()
                    .to_vec1()
                    .unwrap();
                for index in [0, original.len() / 2, original.len() - 1] {
                    let step = 1e-3f32;
                    let mut values = original.clone();
                    values[index] = original[index] + step;
                    var.set(&Tensor::from_vec(values.clone(), var.shape(), &Device::Cpu).unwrap())
                        .unwrap();
                    let plus = loss(&net);
                    values[index] = original[index] - step;
                    var.set(&Tensor::from_vec(values, var.shape(), &Device::Cpu).unwrap())
                        .unwrap();
                    let minus = loss(&net);
                    var.set(
                        &Tensor::from_vec(original.clone(), var.shape(), &Device::Cpu).unwrap(),
                    )
                    .unwrap();
                    let numeric = (plus - minus) / (2.0 * step as f64);
                    let tolerance = 2e-2 * numeric.abs().max(analytic[index].abs() as f64).max(0.1);
                    assert!(
                        (numeric - analytic[index] as f64).abs() < tolerance,
                        "{normalization:?} {name}[{index}]: finite difference {numeric}, backward {}",
                        analytic[index]
                    );
                }
            }
        }
    }

    /// Issue 15: a speaker vector enters as extra input columns, the same values on every frame
    /// of an utterance (between recomputations). The gradient with respect to one vector entry —
    /// the input gradient of its column summed over the frames — equals the finite difference
    /// of moving that entry on every frame of the utterance, through the whole network in a
    /// training pass, with layer and batch normalisation.
    #[test]
    fn the_gradient_reaches_a_speaker_vector_appended_to_every_frame() {
        let (feature_dims, vector_dims, frames) = (3, 2, 16);
        let dims = feature_dims + vector_dims;
        for normalization in [Normalization::Layer, Normalization::Batch] {
            let config = with_norm(tiny(), normalization, 0.0);
            let mut rng = ChaCha8Rng::seed_from_u64(8);
            let (_, _, net) = network(&config, dims, 4, &mut rng);
            let features: Vec<f32> = (0..2 * frames * feature_dims)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let vectors: Vec<f32> = (0..2 * vector_dims)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let input_of = |vectors: &[f32]| {
                let mut x = Vec::with_capacity(2 * frames * dims);
                for b in 0..2 {
                    for t in 0..frames {
                        let row = (b * frames + t) * feature_dims;
                        x.extend_from_slice(&features[row..row + feature_dims]);
                        x.extend_from_slice(&vectors[b * vector_dims..(b + 1) * vector_dims]);
                    }
                }
                Tensor::from_vec(x, (2, frames, dims), &Device::Cpu).unwrap()
            };
            let lengths = [11, 6];
            let forward = |input: &Tensor| {
                net.forward_train(input, &lengths, &mut ChaCha8Rng::seed_from_u64(0))
                    .unwrap()
                    .0
            };
            let probe = Tensor::randn(
                0f32,
                1.0,
                forward(&input_of(&vectors)).shape(),
                &Device::Cpu,
            )
            .unwrap();
            let loss = |vectors: &[f32]| -> f64 {
                let out: Vec<f32> = (forward(&input_of(vectors)) * &probe)
                    .unwrap()
                    .flatten_all()
                    .unwrap()
                    .to_vec1()
                    .unwrap();
                out.iter().map(|&v| f64::from(v)).sum()
            };
            let input = Var::from_tensor(&input_of(&vectors)).unwrap();
            let grads = (forward(input.as_tensor()) * &probe)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            let gradient: Vec<Vec<Vec<f32>>> =
                grads.get(input.as_tensor()).unwrap().to_vec3().unwrap();
            for b in 0..2 {
                for j in 0..vector_dims {
                    let analytic: f64 = (0..frames)
                        .map(|t| f64::from(gradient[b][t][feature_dims + j]))
                        .sum();
                    let step = 1e-3f32;
                    let mut moved = vectors.clone();
                    moved[b * vector_dims + j] += step;
                    let plus = loss(&moved);
                    moved[b * vector_dims + j] -= 2.0 * step;
                    let minus = loss(&moved);
                    let numeric = (plus - minus) / (2.0 * f64::from(step));
                    let tolerance = 2e-2 * numeric.abs().max(analytic.abs()).max(0.1);
                    assert!(
                        (numeric - analytic).abs() < tolerance,
                        "{normalization:?} utterance {b}, entry {j}: finite difference {numeric}, backward {analytic}"
                    );
                }
            }
        }
    }

    /// Where a later layer's vector comes from, worked by hand for `configs/tdnn-small.toml`:
    /// output row t of layer 0 (taps −2…2, every third frame kept) is centred on padded row
    /// 3t + 2; layers 1 and 2 (taps ±1) move the centre by one row of their input, i.e. 3
    /// padded rows; layers 3 and 4 (taps ±3) by 9; layer 5 (tap 0) not at all. So the output
    /// row t is centred on padded row 3t + 26, and 26 is the network's left context: output
    /// frame t sits on feature frame 3t, as the padding by the context intends.
    #[test]
    fn each_layer_output_row_is_centred_where_the_context_says() {
        let config = ModelConfig::small().model;
        let net = Tdnn::new(
            var_builder(&merged(
                &initial_parameters(&config, 39, 30, &mut ChaCha8Rng::seed_from_u64(1)).unwrap(),
                &initial_statistics(&config).unwrap(),
            )),
            &config,
            39,
            30,
        )
        .unwrap();
        let padded = 200u32;
        let mut rows: Vec<u32> = (0..padded).collect();
        let expected_shift = [2u32, 5, 8, 17, 26, 26];
        for (layer, shift) in net.layers.iter().zip(expected_shift) {
            rows = layer.centre_rows(&rows);
            let want: Vec<u32> = (0..rows.len() as u32).map(|t| 3 * t + shift).collect();
            assert_eq!(rows, want);
        }
        assert_eq!(config.context().0, 26);
        assert_eq!(
            rows.len(),
            net.output_frames(padded as usize - 26 - config.context().1)
        );
    }

    /// `[speaker_vectors] input = "layers"`: every hidden layer after the first reads the
    /// vector columns of the padded input row its rows are centred on. The network's output
    /// (inference and a training pass with batch normalisation) equals the layers run one by
    /// one on inputs extended by explicit loops over those rows, with a vector that differs on
    /// every frame so that a wrong row shows; the parameter count includes the vector's rows,
    /// and a finite difference on a weight of the vector confirms its gradient.
    #[test]
    fn later_layers_read_the_vector_of_the_row_they_are_centred_on() {
        let (feature_dims, vector_dims, frames) = (3, 2, 20);
        let dims = feature_dims + vector_dims;
        let input_spec = NetworkInput {
            frame_dims: dims,
            layer_vector_dims: vector_dims,
        };
        for normalization in [Normalization::None, Normalization::Batch] {
            let config = with_norm(tiny(), normalization, 0.0);
            let mut rng = ChaCha8Rng::seed_from_u64(21);
            let (vars, _, net) = network(&config, input_spec, 4, &mut rng);
            assert_eq!(
                vars.values().map(|v| v.elem_count()).sum::<usize>(),
                config.parameter_count(input_spec, 4)
            );
            assert_eq!(vars["layers.1.weight"].dims(), &[4 + vector_dims, 3 * 5]);
            let values: Vec<f32> = (0..2 * frames * dims)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let input = Tensor::from_vec(values.clone(), (2, frames, dims), &Device::Cpu).unwrap();
            let lengths = [frames - net.config.context().0 - net.config.context().1, 9];
            // Layer 0: taps −1, 0, 2 at every frame, so output row t is centred on input row
            // t + 1; layer 1 reads the vector of padded row t + 1 beside its row t.
            let by_hand = |training: bool| -> Tensor {
                let mut rng = ChaCha8Rng::seed_from_u64(5);
                let mut valid: Vec<usize> = lengths
                    .iter()
                    .map(|&f| f + net.config.context().0 + net.config.context().1)
                    .collect();
                let mut x = input.clone();
                for (index, layer) in net.layers.iter().enumerate() {
                    if index == 1 {
                        let (batch, rows, width) = x.dims3().unwrap();
                        let before: Vec<f32> = x.flatten_all().unwrap().to_vec1().unwrap();
                        let mut extended = Vec::new();
                        for b in 0..batch {
                            for j in 0..rows {
                                extended.extend_from_slice(
                                    &before[(b * rows + j) * width..(b * rows + j + 1) * width],
                                );
                                let source = (b * frames + j + 1) * dims + feature_dims;
                                extended.extend_from_slice(&values[source..source + vector_dims]);
                            }
                        }
                        x = Tensor::from_vec(
                            extended,
                            (batch, rows, width + vector_dims),
                            &Device::Cpu,
                        )
                        .unwrap();
                    }
                    if training {
                        valid.iter_mut().for_each(|v| *v = layer.output_frames(*v));
                        x = layer
                            .forward(&x, Some((&valid, 0.0, &mut rng)), None)
                            .unwrap()
                            .0;
                    } else {
                        x = layer.forward(&x, None, None).unwrap().0;
                    }
                }
                x
            };
            let inference = net.forward(&input).unwrap();
            assert!(
                max_difference(&inference, &by_hand(false)) < 1e-6,
                "{normalization:?}"
            );
            let trained = net
                .forward_train(&input, &lengths, &mut ChaCha8Rng::seed_from_u64(5))
                .unwrap()
                .0;
            assert!(
                max_difference(&trained, &by_hand(true)) < 1e-6,
                "{normalization:?}"
            );
            // The gradient of a weight that multiplies the vector in layer 1.
            let weight = &vars["layers.1.weight"];
            let probe = Tensor::randn(0f32, 1.0, trained.shape(), &Device::Cpu).unwrap();
            let loss = || -> f64 {
                let out = net
                    .forward_train(&input, &lengths, &mut ChaCha8Rng::seed_from_u64(5))
                    .unwrap()
                    .0;
                f64::from(
                    (out * &probe)
                        .unwrap()
                        .sum_all()
                        .unwrap()
                        .to_scalar::<f32>()
                        .unwrap(),
                )
            };
            let out = net
                .forward_train(&input, &lengths, &mut ChaCha8Rng::seed_from_u64(5))
                .unwrap()
                .0;
            let grads = (out * &probe)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            let gradient: Vec<Vec<f32>> = grads.get(weight.as_tensor()).unwrap().to_vec2().unwrap();
            let original: Vec<Vec<f32>> = weight.as_tensor().to_vec2().unwrap();
            for (row, column) in [(4, 0), (5, 7), (4, 14)] {
                let step = 1e-2f32;
                let mut moved = original.clone();
                let mut at = |delta: f32| {
                    moved[row][column] = original[row][column] + delta;
                    let flat: Vec<f32> = moved.iter().flatten().copied().collect();
                    weight
                        .set(&Tensor::from_vec(flat, weight.shape(), &Device::Cpu).unwrap())
                        .unwrap();
                    loss()
                };
                let numeric = (at(step) - at(-step)) / (2.0 * f64::from(step));
                at(0.0);
                let analytic = f64::from(gradient[row][column]);
                assert!(
                    (numeric - analytic).abs() < 2e-2 * numeric.abs().max(analytic.abs()).max(0.1),
                    "{normalization:?} weight ({row}, {column}): finite difference {numeric}, backward {analytic}"
                );
            }
        }
    }

    /// The running statistics after three training passes are the moving average (weight 0.1
    /// for the newest batch, unbiased variance) of each pass's statistics computed directly:
    /// the hidden layers written out as loops in f64 over each utterance's valid frames only.
    /// The padding is random, so counting it would show.
    #[test]
    fn running_statistics_follow_the_batches_they_saw() {
        let config = with_norm(tiny(), Normalization::Batch, 0.0);
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let dims = 3;
        let (vars, statistics, net) = network(&config, dims, 4, &mut rng);
        let values = |name: &str, map: &BTreeMap<String, Var>| -> Vec<f64> {
            let tensor = map[name].as_tensor().flatten_all().unwrap();
            tensor
                .to_vec1::<f32>()
                .unwrap()
                .into_iter()
                .map(f64::from)
                .collect()
        };
        let hidden = config.layers.len();
        let mut expected: Vec<(Vec<f64>, Vec<f64>)> = (0..hidden)
            .map(|l| {
                (
                    values(&format!("layers.{l}.norm.running_mean"), &statistics),
                    values(&format!("layers.{l}.norm.running_var"), &statistics),
                )
            })
            .collect();
        let (left, right) = config.context();
        for pass in 0..3usize {
            let lengths = [12 - pass, 7 + 2 * pass, 1 + pass];
            let frames = lengths.iter().max().unwrap() + left + right;
            let x: Vec<f32> = (0..3 * frames * dims)
                .map(|_| rng.random_range(-1.0..1.0) + 0.3)
                .collect();
            let input = Tensor::from_vec(x.clone(), (3, frames, dims), &Device::Cpu).unwrap();
            let (_, batch) = net.forward_train(&input, &lengths, &mut rng).unwrap();
            net.update_running_statistics(&batch).unwrap();
            // The definition, utterance by utterance, valid frames only.
            let mut activations: Vec<Vec<Vec<f64>>> = (0..3)
                .map(|b| {
                    (0..lengths[b] + left + right)
                        .map(|t| {
                            let at = (b * frames + t) * dims;
                            x[at..at + dims].iter().map(|&v| f64::from(v)).collect()
                        })
                        .collect()
                })
                .collect();
            for (l, layer) in config.layers.iter().enumerate() {
                let h = layer.width;
                let weight = values(&format!("layers.{l}.weight"), &vars);
                let gain = values(&format!("layers.{l}.norm.weight"), &vars);
                let shift = values(&format!("layers.{l}.norm.bias"), &vars);
                let span = (layer.taps[layer.taps.len() - 1] - layer.taps[0]) as usize;
                let width = layer.taps.len() * h;
                let z: Vec<Vec<Vec<f64>>> = activations
                    .iter()
                    .map(|utterance| {
                        let valid = if utterance.len() > span {
                            (utterance.len() - 1 - span) / layer.keep_every + 1
                        } else {
                            0
                        };
                        (0..valid)
                            .map(|t| {
                                (0..h)
                                    .map(|j| {
                                        let mut sum = 0.0;
                                        for (k, &tap) in layer.taps.iter().enumerate() {
                                            let source = layer.keep_every * t
                                                + (tap - layer.taps[0]) as usize;
                                            for (d, &v) in utterance[source].iter().enumerate() {
                                                sum += v * weight[d * width + k * h + j];
                                            }
                                        }
                                        sum
                                    })
                                    .collect()
                            })
                            .collect()
                    })
                    .collect();
                let rows: Vec<&Vec<f64>> = z.iter().flatten().collect();
                let n = rows.len() as f64;
                let mean: Vec<f64> = (0..h)
                    .map(|j| rows.iter().map(|r| r[j]).sum::<f64>() / n)
                    .collect();
                let variance: Vec<f64> = (0..h)
                    .map(|j| rows.iter().map(|r| (r[j] - mean[j]).powi(2)).sum::<f64>() / n)
                    .collect();
                let (running_mean, running_var) = &mut expected[l];
                for j in 0..h {
                    running_mean[j] = 0.9 * running_mean[j] + 0.1 * mean[j];
                    running_var[j] = 0.9 * running_var[j] + 0.1 * variance[j] * n / (n - 1.0);
                }
                activations = z
                    .iter()
                    .map(|utterance| {
                        utterance
                            .iter()
                            .map(|row| {
                                (0..h)
                                    .map(|j| {
                                        let xhat = (row[j] - mean[j])
                                            / (variance[j] + f64::from(NORM_EPSILON)).sqrt();
                                        (xhat * gain[j] + shift[j]).max(0.0)
                                    })
                                    .collect()
                            })
                            .collect()
                    })
                    .collect();
            }
        }
        assert_eq!(RUNNING_MOMENTUM, 0.1);
        for (l, (mean, variance)) in expected.iter().enumerate() {
            let got_mean = values(&format!("layers.{l}.norm.running_mean"), &statistics);
            let got_var = values(&format!("layers.{l}.norm.running_var"), &statistics);
            for j in 0..mean.len() {
                assert!(
                    (got_mean[j] - mean[j]).abs() < 1e-5 * mean[j].abs().max(1.0),
                    "layer {l} unit {j}: running mean {} vs {}",
                    got_mean[j],
                    mean[j]
                );
                assert!(
                    (got_var[j] - variance[j]).abs() < 1e-5 * variance[j].abs().max(1.0),
                    "layer {l} unit {j}: running variance {} vs {}",
                    got_var[j],
                    variance[j]
                );
            }
        }
    }

    fn flat(value: &serde_json::Value) -> Vec<f32> {
        match value {
            serde_json::Value::Array(items) => items.iter().flat_map(flat).collect(),
            number => vec![number.as_f64().unwrap() as f32],
        }
    }

    /// Asserts `ours` equals `torch` within `relative` of the largest torch magnitude (at least
    /// 1).
    fn assert_close(ours: &[f32], torch: &[f32], relative: f32, what: &str) {
        assert_eq!(ours.len(), torch.len(), "{what}: sizes");
        let scale = torch.iter().fold(1f32, |m, v| m.max(v.abs()));
        for (i, (a, b)) in ours.iter().zip(torch).enumerate() {
            assert!(
                (a - b).abs() <= relative * scale,
                "{what}[{i}]: ours {a}, torch.nn.BatchNorm1d {b}"
            );
        }
    }

    /// One batch-normalised layer against torch.nn.BatchNorm1d fed the valid frames of the
    /// batch (fixture by `scripts/reference/batchnorm_reference.py`, torch in float64 on
    /// float32 inputs): training outputs, the gradients of the input, weight, gain and shift,
    /// the running statistics over three passes, and inference with them.
    #[test]
    fn batch_norm_layer_matches_torch() {
        let fixture: serde_json::Value =
            serde_json::from_str(include_str!("../tests/fixtures/batchnorm_torch.json")).unwrap();
        let device = Device::Cpu;
        let taps: Vec<i32> = fixture["taps"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_i64().unwrap() as i32)
            .collect();
        let keep_every = fixture["keep_every"].as_u64().unwrap() as usize;
        let dims = fixture["dims"].as_u64().unwrap() as usize;
        let units = fixture["units"].as_u64().unwrap() as usize;
        let counts = |value: &serde_json::Value| -> Vec<usize> {
            let list = value.as_array().unwrap();
            list.iter().map(|v| v.as_u64().unwrap() as usize).collect()
        };
        let input = |value: &serde_json::Value| {
            let utterances = value.as_array().unwrap();
            let frames = utterances[0].as_array().unwrap().len();
            Var::from_vec(flat(value), (utterances.len(), frames, dims), &device).unwrap()
        };
        let layer = || {
            let mut vars = BTreeMap::new();
            let weight = Var::from_vec(
                flat(&fixture["weight"]),
                (dims, taps.len() * units),
                &device,
            );
            vars.insert("weight".to_string(), weight.unwrap());
            for (name, values) in [
                ("norm.weight", flat(&fixture["gain"])),
                ("norm.bias", flat(&fixture["shift"])),
                ("norm.running_mean", vec![0.0; units]),
                ("norm.running_var", vec![1.0; units]),
            ] {
                vars.insert(
                    name.to_string(),
                    Var::from_vec(values, units, &device).unwrap(),
                );
            }
            let vb = var_builder(&vars);
            let layer = TdnnLayer::new(
                vb,
                dims,
                units,
                &taps,
                keep_every,
                Some(Normalization::Batch),
            );
            (vars, layer.unwrap())
        };
        let mut rng = ChaCha8Rng::seed_from_u64(0);

        // One training pass: outputs of the valid frames and the gradients.
        let (vars, net) = layer();
        let train = &fixture["train"];
        let x = input(&train["x"]);
        let valid = counts(&train["valid"]);
        let (y, _) = net
            .forward(x.as_tensor(), Some((&valid, 0.0, &mut rng)), None)
            .unwrap();
        let (batch, frames_out, _) = y.dims3().unwrap();
        let outputs: Vec<Vec<Vec<f32>>> = y.to_vec3().unwrap();
        let ours: Vec<f32> = valid
            .iter()
            .enumerate()
            .flat_map(|(b, &v)| outputs[b][..v].iter().flatten().copied())
            .collect();
        assert_close(&ours, &flat(&train["y"]), 1e-5, "training output");
        let torch_probe = flat(&train["probe"]);
        let mut probe = vec![0f32; batch * frames_out * units];
        let mut next = torch_probe.chunks(units);
        for (b, &v) in valid.iter().enumerate() {
            for t in 0..v {
                let at = (b * frames_out + t) * units;
                probe[at..at + units].copy_from_slice(next.next().unwrap());
            }
        }
        let probe = Tensor::from_vec(probe, y.shape(), &device).unwrap();
        let grads = (y * probe).unwrap().sum_all().unwrap().backward().unwrap();
        let gradient = |var: &Var| -> Vec<f32> {
            let grad = grads.get(var.as_tensor()).unwrap();
            grad.flatten_all().unwrap().to_vec1().unwrap()
        };
        assert_close(
            &gradient(&x),
            &flat(&train["grad_x"]),
            1e-5,
            "input gradient",
        );
        for (name, key) in [
            ("weight", "grad_weight"),
            ("norm.weight", "grad_gain"),
            ("norm.bias", "grad_shift"),
        ] {
            assert_close(&gradient(&vars[name]), &flat(&train[key]), 1e-5, name);
        }

        // The running statistics over three passes, then inference with them.
        let (vars, net) = layer();
        for (p, pass) in fixture["running"].as_array().unwrap().iter().enumerate() {
            let valid = counts(&pass["valid"]);
            let x = input(&pass["x"]);
            let (_, statistics) = net
                .forward(x.as_tensor(), Some((&valid, 0.0, &mut rng)), None)
                .unwrap();
            net.update_running_statistics(&statistics.unwrap()).unwrap();
            for name in ["running_mean", "running_var"] {
                let got: Vec<f32> = vars[&format!("norm.{name}")].as_tensor().to_vec1().unwrap();
                assert_close(&got, &flat(&pass[name]), 1e-6, &format!("pass {p}: {name}"));
            }
        }
        let inference = &fixture["inference"];
        let (y, statistics) = net
            .forward(input(&inference["x"]).as_tensor(), None, None)
            .unwrap();
        assert!(statistics.is_none());
        let ours: Vec<f32> = y.flatten_all().unwrap().to_vec1().unwrap();
        assert_close(&ours, &flat(&inference["y"]), 1e-5, "inference output");
    }
}
