//! The time-delay neural network: layers that splice frames at fixed offsets.
//!
//! A layer with offsets `o_1 … o_K`, input width `D` and output width `H` computes
//! `y[t] = b + Σ_k x[s·t + o_k − o_1] · W_k` (`s` is the subsampling factor). Instead of copying
//! the `K` shifted inputs side by side (a `[frames, K·D]` splice), the layer multiplies the input
//! once by all `W_k` stacked side by side (`[D, K·H]`, one large matrix product) and then adds the
//! `K` column blocks of the product at their shifted frames. The product is the same size as the
//! splice would have been for `H ≈ D`, but the backward pass also stays two large products instead
//! of a scatter of spliced gradients.
//!
//! Every layer is "valid" in time (no padding inside the network); callers pad each utterance by
//! [`TdnnConfig::context`] frames (edge frames repeated) so that the output has
//! `⌈frames / subsampling⌉` frames — see [`Tdnn::output_frames`].

use std::collections::BTreeMap;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarBuilder;
use rand::Rng;

use crate::config::{Normalization, TdnnConfig};
use crate::AcousticError;

const NORM_EPSILON: f64 = 1e-5;

/// One spliced affine layer, optionally followed by ReLU, layer normalisation and dropout.
///
/// Input `[batch, frames, input_dims]`, output `[batch, frames_out, output_dims]` with
/// `frames_out = (frames − 1 − (o_K − o_1)) / subsample + 1`.
#[derive(Debug, Clone)]
pub struct TdnnLayer {
    /// `[input_dims, K · output_dims]`: the per-offset matrices side by side.
    weight: Tensor,
    /// `[output_dims]`.
    bias: Tensor,
    /// Layer-norm gain and shift, each `[output_dims]`.
    norm: Option<(Tensor, Tensor)>,
    offsets: Vec<i32>,
    subsample: usize,
    output_dims: usize,
    hidden: bool,
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
        let bias = vb.get(output_dims, "bias")?;
        let norm = match normalization {
            Some(Normalization::Layer) => Some((
                vb.pp("norm").get(output_dims, "weight")?,
                vb.pp("norm").get(output_dims, "bias")?,
            )),
            _ => None,
        };
        Ok(TdnnLayer {
            weight,
            bias,
            norm,
            offsets: offsets.to_vec(),
            subsample,
            output_dims,
            hidden: normalization.is_some(),
        })
    }

    fn span(&self) -> usize {
        (self.offsets[self.offsets.len() - 1] - self.offsets[0]) as usize
    }

    /// Output frames for `frames` input frames (0 when the input is shorter than the span).
    pub fn output_frames(&self, frames: usize) -> usize {
        if frames <= self.span() {
            0
        } else {
            (frames - 1 - self.span()) / self.subsample + 1
        }
    }

    /// Runs the layer; `dropout` is `Some((p, rng))` during training.
    pub fn forward<R: rand::RngCore + ?Sized>(
        &self,
        input: &Tensor,
        dropout: Option<(f32, &mut R)>,
    ) -> Result<Tensor, AcousticError> {
        let (batch, frames, dims) = input.dims3()?;
        let frames_out = self.output_frames(frames);
        if frames_out == 0 {
            return Err(AcousticError::Shape(format!(
                "a layer spanning {} frames got only {frames}",
                self.span() + 1
            )));
        }
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
        let mut output = match output {
            Some(sum) => sum.broadcast_add(&self.bias)?,
            None => return Err(AcousticError::Shape("a layer without offsets".into())),
        };
        if !self.hidden {
            return Ok(output);
        }
        output = output.relu()?;
        if let Some((gain, shift)) = &self.norm {
            let centred = output.broadcast_sub(&output.mean_keepdim(2)?)?;
            let variance = centred.sqr()?.mean_keepdim(2)?;
            output = centred
                .broadcast_div(&(variance + NORM_EPSILON)?.sqrt()?)?
                .broadcast_mul(gain)?
                .broadcast_add(shift)?;
        }
        if let Some((p, rng)) = dropout {
            if p > 0.0 {
                let keep = 1.0 / (1.0 - p);
                let mask: Vec<f32> = (0..output.elem_count())
                    .map(|_| if rng.random::<f32>() < p { 0.0 } else { keep })
                    .collect();
                let mask = Tensor::from_vec(mask, output.shape(), output.device())?;
                output = (output * mask)?;
            }
        }
        Ok(output)
    }
}

/// The network: hidden [`TdnnLayer`]s and a final affine layer over the units (blank at 0).
///
/// Input `[batch, frames, feature_dims]` (each utterance already padded by the context),
/// output `[batch, output_frames, units]` unnormalised scores (logits).
#[derive(Debug, Clone)]
pub struct Tdnn {
    layers: Vec<TdnnLayer>,
    config: TdnnConfig,
}

impl Tdnn {
    /// Builds the network, taking parameters `layers.{i}.weight`, `layers.{i}.bias`,
    /// `layers.{i}.norm.weight`, `layers.{i}.norm.bias` from `vb`; the output layer is
    /// `layers.{hidden_count}`.
    pub fn new(
        vb: VarBuilder,
        config: &TdnnConfig,
        input_dims: usize,
        units: usize,
    ) -> Result<Self, AcousticError> {
        config.validate()?;
        let mut layers = Vec::with_capacity(config.layers.len() + 1);
        let mut dims = input_dims;
        for (i, layer) in config.layers.iter().enumerate() {
            layers.push(TdnnLayer::new(
                vb.pp("layers").pp(i),
                dims,
                layer.dims,
                &layer.offsets,
                layer.subsample,
                Some(config.normalization),
            )?);
            dims = layer.dims;
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
        })
    }

    /// Output frames for an utterance of `frames` feature frames padded by the context.
    pub fn output_frames(&self, frames: usize) -> usize {
        let (left, right) = self.config.context();
        self.layers
            .iter()
            .fold(frames + left + right, |n, layer| layer.output_frames(n))
    }

    /// The architecture.
    pub fn config(&self) -> &TdnnConfig {
        &self.config
    }

    /// Logits `[batch, output_frames, units]`; pass an RNG to train (dropout on).
    pub fn forward(
        &self,
        input: &Tensor,
        mut dropout_rng: Option<&mut dyn rand::RngCore>,
    ) -> Result<Tensor, AcousticError> {
        let mut x = input.clone();
        for layer in &self.layers {
            let dropout = dropout_rng
                .as_deref_mut()
                .map(|rng| (self.config.dropout, rng));
            x = layer.forward(&x, dropout)?;
        }
        Ok(x)
    }
}

/// Freshly initialised parameters by name: affine weights uniform in `±1/√fan_in` (the common
/// default for linear layers), biases zero, norm gains one. Deterministic for the RNG.
pub fn initial_parameters(
    config: &TdnnConfig,
    input_dims: usize,
    units: usize,
    rng: &mut impl Rng,
) -> Result<BTreeMap<String, Var>, AcousticError> {
    let device = Device::Cpu;
    let mut vars = BTreeMap::new();
    let mut dims = input_dims;
    let mut shapes: Vec<(usize, usize, usize, bool)> = Vec::new();
    for layer in &config.layers {
        shapes.push((dims, layer.offsets.len(), layer.dims, true));
        dims = layer.dims;
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
        vars.insert(
            format!("{prefix}.bias"),
            Var::zeros(output, DType::F32, &device)?,
        );
        if hidden && config.normalization == Normalization::Layer {
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
                    offsets: vec![-1, 0, 2],
                    dims: 4,
                    subsample: 1,
                },
                LayerConfig {
                    offsets: vec![-1, 0, 1],
                    dims: 5,
                    subsample: 3,
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
        let first = net.layers[0].forward::<ChaCha8Rng>(&input, None).unwrap();
        let got: Vec<Vec<Vec<f32>>> = net.layers[1]
            .forward::<ChaCha8Rng>(&first, None)
            .unwrap()
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
        let config = ModelConfig::small().model;
        assert_eq!(config.context(), (10, 10));
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let vars = initial_parameters(&config, 39, 30, &mut rng).unwrap();
        let net = Tdnn::new(var_builder(&vars), &config, 39, 30).unwrap();
        for frames in [1usize, 2, 3, 4, 100, 101] {
            assert_eq!(
                net.output_frames(frames),
                frames.div_ceil(3),
                "{frames} frames"
            );
        }
        let input = Tensor::zeros((2, 50 + 20, 39), DType::F32, &Device::Cpu).unwrap();
        let out = net.forward(&input, None).unwrap();
        assert_eq!(out.dims3().unwrap(), (2, 17, 30));
        let count: usize = vars.values().map(|v| v.elem_count()).sum();
        assert_eq!(count, config.parameter_count(39, 30));
        assert!(
            (1_000_000..2_000_000).contains(&count),
            "{count} parameters"
        );
    }
}
