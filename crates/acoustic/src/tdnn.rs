//! The time-delay neural network: layers that splice frames at fixed offsets.
//!
//! A layer with offsets `o_1 … o_K`, input width `D` and output width `H` computes
//! `y[t] = b + Σ_k x[s·t + o_k − o_1] · W_k` (`s` is the subsampling factor), then (hidden layers)
//! ReLU, layer normalisation and dropout. The weight is stored as the `K` per-offset matrices side
//! by side (`[D, K·H]`). The spliced input is never copied: for offset `k` the input rows
//! `s·t + o_k − o_1` are a strided view of the input, so the layer is `K` matrix products
//! accumulating into one buffer — with subsampling, only for the frames that are kept. Bias,
//! ReLU, layer normalisation and dropout then run in one pass per frame, and the backward pass is
//! written by hand; the whole layer is one candle operation (see `fused.rs`), tested against the
//! same layer written with candle primitives and differentiated by candle.
//!
//! Every layer is "valid" in time (no padding inside the network); callers pad each utterance by
//! [`TdnnConfig::context`] frames (edge frames repeated) so that the output has
//! `⌈frames / subsampling⌉` frames — see [`Tdnn::output_frames`].

use std::collections::BTreeMap;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarBuilder;
use rand::Rng;

use crate::config::{Normalization, TdnnConfig};
use crate::fused::FusedLayer;
#[cfg(test)]
use crate::fused::NORM_EPSILON;
use crate::AcousticError;

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
    ///
    /// One fused operation (see the `fused` module): the shifted matrix products, bias, ReLU,
    /// layer normalisation and dropout, with a hand-written backward pass.
    pub fn forward<R: rand::RngCore + ?Sized>(
        &self,
        input: &Tensor,
        dropout: Option<(f32, &mut R)>,
    ) -> Result<Tensor, AcousticError> {
        let (batch, frames, _) = input.dims3()?;
        let frames_out = self.output_frames(frames);
        if frames_out == 0 {
            return Err(AcousticError::Shape(format!(
                "a layer spanning {} frames got only {frames}",
                self.span() + 1
            )));
        }
        let params = match &self.norm {
            Some((gain, shift)) => Tensor::stack(&[&self.bias, gain, shift], 0)?,
            None => self.bias.unsqueeze(0)?,
        };
        let mask = match dropout {
            Some((p, rng)) if self.hidden && p > 0.0 => {
                let keep = 1.0 / (1.0 - p);
                Some(
                    (0..batch * frames_out * self.output_dims)
                        .map(|_| if rng.random::<f32>() < p { 0.0 } else { keep })
                        .collect(),
                )
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
            self.norm.is_some(),
            mask,
            input.track_op(),
        );
        Ok(input.contiguous()?.apply_op3(&self.weight, &params, op)?)
    }

    /// The layer written with candle primitives (the definition the fused operation is tested
    /// against).
    #[cfg(test)]
    fn forward_reference<R: rand::RngCore + ?Sized>(
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
                .broadcast_div(&(variance + NORM_EPSILON as f64)?.sqrt()?)?
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

impl Tdnn {
    /// [`Tdnn::forward`] through [`TdnnLayer::forward_reference`] (tests only).
    #[cfg(test)]
    pub(crate) fn forward_reference(
        &self,
        input: &Tensor,
        mut dropout_rng: Option<&mut dyn rand::RngCore>,
    ) -> Result<Tensor, AcousticError> {
        let mut x = input.clone();
        for layer in &self.layers {
            let dropout = dropout_rng
                .as_deref_mut()
                .map(|rng| (self.config.dropout, rng));
            x = layer.forward_reference(&x, dropout)?;
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
    fn with_norm(mut config: TdnnConfig, dropout: f32) -> TdnnConfig {
        config.normalization = Normalization::Layer;
        config.dropout = dropout;
        config
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
    /// with and without layer norm and dropout, for frame counts that do and do not line up with
    /// the subsampling period.
    #[test]
    fn fused_layers_match_the_candle_graph_and_its_gradients() {
        let configs = [
            with_norm(tiny(), 0.3),
            with_norm(tiny(), 0.0),
            tiny(),
            with_norm(ModelConfig::small().model, 0.1),
        ];
        for (c, config) in configs.iter().enumerate() {
            for frames in [14usize, 15, 16, 31] {
                let (left, right) = config.context();
                if frames <= left + right + 2 {
                    continue;
                }
                for input_is_var in [false, true] {
                    let mut rng = ChaCha8Rng::seed_from_u64(7 + frames as u64);
                    let dims = 3;
                    let units = 4;
                    let vars = initial_parameters(config, dims, units, &mut rng).unwrap();
                    // Non-trivial biases, gains and shifts.
                    for (name, var) in &vars {
                        if var.rank() == 1 {
                            let values: Vec<f32> = (0..var.elem_count())
                                .map(|_| rng.random_range(0.5..1.5))
                                .collect();
                            let values = if name.ends_with("norm.weight") {
                                values
                            } else {
                                values.iter().map(|v| v - 1.0).collect()
                            };
                            var.set(&Tensor::from_vec(values, var.shape(), &Device::Cpu).unwrap())
                                .unwrap();
                        }
                    }
                    let net = Tdnn::new(var_builder(&vars), config, dims, units).unwrap();
                    let x: Vec<f32> = (0..2 * frames * dims)
                        .map(|_| rng.random_range(-1.0..1.0))
                        .collect();
                    let input_var = Var::from_vec(x, (2, frames, dims), &Device::Cpu).unwrap();
                    let input = if input_is_var {
                        input_var.as_tensor().clone()
                    } else {
                        input_var.as_tensor().detach()
                    };
                    let mut rng_a = ChaCha8Rng::seed_from_u64(99);
                    let mut rng_b = ChaCha8Rng::seed_from_u64(99);
                    let fused = net.forward(&input, Some(&mut rng_a)).unwrap();
                    let reference = net.forward_reference(&input, Some(&mut rng_b)).unwrap();
                    assert_eq!(fused.dims(), reference.dims());
                    let what = format!("config {c}, {frames} frames, input var {input_is_var}");
                    let diff = max_difference(&fused, &reference);
                    assert!(diff < 1e-5, "{what}: outputs differ by {diff}");
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

    /// Central finite differences of the fused network (no candle graph involved) agree with its
    /// hand-written backward pass.
    #[test]
    fn fused_gradients_match_finite_differences() {
        let config = with_norm(tiny(), 0.0);
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let vars = initial_parameters(&config, 3, 4, &mut rng).unwrap();
        let net = Tdnn::new(var_builder(&vars), &config, 3, 4).unwrap();
        let x: Vec<f32> = (0..2 * 16 * 3)
            .map(|_| rng.random_range(-1.0..1.0))
            .collect();
        let input = Tensor::from_vec(x, (2, 16, 3), &Device::Cpu).unwrap();
        let probe = Tensor::randn(
            0f32,
            1.0,
            net.forward(&input, None).unwrap().shape(),
            &Device::Cpu,
        )
        .unwrap();
        let loss = |net: &Tdnn| -> f64 {
            let out = net.forward(&input, None).unwrap();
            let out: Vec<f32> = out.flatten_all().unwrap().to_vec1().unwrap();
            let probe: Vec<f32> = probe.flatten_all().unwrap().to_vec1().unwrap();
            out.iter()
                .zip(&probe)
                .map(|(a, b)| *a as f64 * *b as f64)
                .sum()
        };
        let grads = (net.forward(&input, None).unwrap() * &probe)
            .unwrap()
            .sum_all()
            .unwrap()
            .backward()
            .unwrap();
        for name in [
            "layers.0.weight",
            "layers.1.weight",
            "layers.0.norm.weight",
            "layers.1.bias",
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
                var.set(&Tensor::from_vec(original.clone(), var.shape(), &Device::Cpu).unwrap())
                    .unwrap();
                let numeric = (plus - minus) / (2.0 * step as f64);
                let tolerance = 2e-2 * numeric.abs().max(analytic[index].abs() as f64).max(0.1);
                assert!(
                    (numeric - analytic[index] as f64).abs() < tolerance,
                    "{name}[{index}]: finite difference {numeric}, backward {}",
                    analytic[index]
                );
            }
        }
    }
}
