//! AdamW (Loshchilov & Hutter 2019) that updates the parameters in place.
//!
//! Written with tensor primitives, one AdamW step is about a dozen element-wise operations per
//! parameter tensor, each allocating a new tensor. Here the step runs as one fused loop over each
//! parameter's storage (through candle's in-place custom operation), with the moment estimates kept
//! as plain `Vec<f32>` that the checkpoint saves and restores exactly.

use std::collections::BTreeMap;
use std::sync::Mutex;

use candle_core::backprop::GradStore;
use candle_core::{CpuStorage, InplaceOp2, Layout, Tensor, Var};

use crate::AcousticError;

/// First and second moment estimates of one parameter tensor.
#[derive(Debug, Clone, PartialEq)]
pub struct Moments {
    /// Running mean of gradients.
    pub first: Vec<f32>,
    /// Running mean of squared gradients.
    pub second: Vec<f32>,
}

/// AdamW state and hyper-parameters.
#[derive(Debug, Clone)]
pub struct AdamW {
    /// Decay of the first moment.
    pub beta1: f64,
    /// Decay of the second moment.
    pub beta2: f64,
    /// Added to the root of the second moment.
    pub epsilon: f64,
    /// Decoupled weight decay (applied to matrices only; biases and norm gains are not decayed,
    /// common practice).
    pub weight_decay: f64,
    /// Updates done so far.
    pub step: u64,
    /// Moments by parameter name.
    pub moments: BTreeMap<String, Moments>,
}

struct FusedStep<'a> {
    moments: Mutex<&'a mut Moments>,
    learning_rate: f32,
    grad_scale: f32,
    beta1: f32,
    beta2: f32,
    /// `1 − β1` and `1 − β2`, computed in f64: in f32, 1 − 0.999 loses five digits
    /// (0.999 rounds to 0.99900001), which would weight new squared gradients 1.3e-5 too little.
    one_minus_beta1: f32,
    one_minus_beta2: f32,
    epsilon: f32,
    decay: f32,
    correction1: f32,
    correction2: f32,
}

impl InplaceOp2 for FusedStep<'_> {
    fn name(&self) -> &'static str {
        "adamw-step"
    }

    fn cpu_fwd(
        &self,
        parameter: &mut CpuStorage,
        parameter_layout: &Layout,
        grad: &CpuStorage,
        grad_layout: &Layout,
    ) -> candle_core::Result<()> {
        let (CpuStorage::F32(parameter), CpuStorage::F32(grad)) = (parameter, grad) else {
            candle_core::bail!("AdamW updates f32 parameters only")
        };
        let (Some((p0, p1)), Some((g0, g1))) = (
            parameter_layout.contiguous_offsets(),
            grad_layout.contiguous_offsets(),
        ) else {
            candle_core::bail!("AdamW needs contiguous parameters and gradients")
        };
        let mut guard = self
            .moments
            .lock()
            .map_err(|_| candle_core::Error::Msg("AdamW moments lock poisoned".into()))?;
        let moments = &mut **guard;
        let parameter = &mut parameter[p0..p1];
        let grad = &grad[g0..g1];
        if moments.first.len() != parameter.len() || grad.len() != parameter.len() {
            candle_core::bail!("AdamW moments, gradient and parameter differ in size")
        }
        for (((p, &g), m), v) in parameter
            .iter_mut()
            .zip(grad)
            .zip(moments.first.iter_mut())
            .zip(moments.second.iter_mut())
        {
            let g = g * self.grad_scale;
            *m = self.beta1 * *m + self.one_minus_beta1 * g;
            *v = self.beta2 * *v + self.one_minus_beta2 * g * g;
            let update = (*m / self.correction1) / ((*v / self.correction2).sqrt() + self.epsilon);
            *p -= self.learning_rate * (update + self.decay * *p);
        }
        Ok(())
    }
}

impl AdamW {
    /// Fresh state with the usual betas (0.9, 0.999) and epsilon 1e-8.
    pub fn new(weight_decay: f64) -> Self {
        AdamW {
            beta1: 0.9,
            beta2: 0.999,
            epsilon: 1e-8,
            weight_decay,
            step: 0,
            moments: BTreeMap::new(),
        }
    }

    /// The global L2 norm of the gradients of `parameters`.
    pub fn gradient_norm(
        parameters: &BTreeMap<String, Var>,
        grads: &GradStore,
    ) -> Result<f64, AcousticError> {
        Self::norm_of(
            parameters
                .values()
                .filter_map(|var| grads.get(var.as_tensor())),
        )
    }

    /// The global L2 norm of the given gradients.
    pub fn norm_of<'a>(grads: impl Iterator<Item = &'a Tensor>) -> Result<f64, AcousticError> {
        let mut sum = 0f64;
        for grad in grads {
            sum += grad.sqr()?.sum_all()?.to_scalar::<f32>()? as f64;
        }
        Ok(sum.sqrt())
    }

    /// The `grad_scale` of [`AdamW::update`] that clips the global gradient norm to `max_norm`:
    /// `max_norm / gradient_norm` when the norm exceeds it, else 1; `max_norm` ≤ 0 never clips.
    pub fn clip_scale(gradient_norm: f64, max_norm: f64) -> f64 {
        if max_norm > 0.0 && gradient_norm > max_norm {
            max_norm / gradient_norm
        } else {
            1.0
        }
    }

    /// One update: gradients are multiplied by `grad_scale` (for clipping) before use.
    pub fn update(
        &mut self,
        parameters: &BTreeMap<String, Var>,
        grads: &GradStore,
        learning_rate: f64,
        grad_scale: f64,
    ) -> Result<(), AcousticError> {
        self.update_with(
            parameters,
            |_, var| grads.get(var.as_tensor()).cloned(),
            learning_rate,
            grad_scale,
        )
    }

    /// [`AdamW::update`] with the gradient of each parameter given by `grad(name, var)` (a
    /// data-parallel run's gradients summed over the ranks); a parameter without one is left
    /// alone.
    pub fn update_with(
        &mut self,
        parameters: &BTreeMap<String, Var>,
        grad: impl Fn(&str, &Var) -> Option<Tensor>,
        learning_rate: f64,
        grad_scale: f64,
    ) -> Result<(), AcousticError> {
        self.step += 1;
        let t = self.step as i32;
        for (name, var) in parameters {
            let Some(grad) = grad(name, var) else {
                continue;
            };
            let grad: Tensor = grad.contiguous()?;
            let size = var.elem_count();
            let moments = self.moments.entry(name.clone()).or_insert_with(|| Moments {
                first: vec![0.0; size],
                second: vec![0.0; size],
            });
            let decay = if var.rank() >= 2 {
                self.weight_decay
            } else {
                0.0
            };
            let op = FusedStep {
                moments: Mutex::new(moments),
                learning_rate: learning_rate as f32,
                grad_scale: grad_scale as f32,
                beta1: self.beta1 as f32,
                beta2: self.beta2 as f32,
                one_minus_beta1: (1.0 - self.beta1) as f32,
                one_minus_beta2: (1.0 - self.beta2) as f32,
                epsilon: self.epsilon as f32,
                decay: decay as f32,
                correction1: (1.0 - self.beta1.powi(t)) as f32,
                correction2: (1.0 - self.beta2.powi(t)) as f32,
            };
            var.as_tensor().inplace_op2(&grad, &op)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{DType, Device};

    /// Reference: the AdamW update written out with tensor primitives for two steps.
    #[test]
    fn fused_step_equals_the_textbook_update() {
        let device = Device::Cpu;
        let start = [0.5f32, -1.0, 2.0, 0.25];
        let var = Var::from_slice(&start, (2, 2), &device).unwrap();
        let mut params = BTreeMap::new();
        params.insert("w".to_string(), var.clone());
        let mut adam = AdamW::new(0.1);
        let (lr, b1, b2, eps, wd) = (0.01f64, 0.9f64, 0.999f64, 1e-8f64, 0.1f64);
        let mut p: Vec<f64> = start.iter().map(|&v| v as f64).collect();
        let (mut m, mut v) = (vec![0.0; 4], vec![0.0; 4]);
        for step in 1..=2 {
            // loss = sum(w^3) → grad = 3 w^2
            let loss = var.as_tensor().powf(3.0).unwrap().sum_all().unwrap();
            let grads = loss.backward().unwrap();
            adam.update(&params, &grads, lr, 0.5).unwrap();
            for i in 0..4 {
                let g = 0.5 * 3.0 * p[i] * p[i];
                m[i] = b1 * m[i] + (1.0 - b1) * g;
                v[i] = b2 * v[i] + (1.0 - b2) * g * g;
                let mh = m[i] / (1.0 - b1.powi(step));
                let vh = v[i] / (1.0 - b2.powi(step));
                p[i] -= lr * (mh / (vh.sqrt() + eps) + wd * p[i]);
            }
        }
        let got: Vec<f32> = var.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
        for (g, e) in got.iter().zip(&p) {
            assert!((*g as f64 - e).abs() < 1e-5, "{g} vs {e}");
        }
    }

    /// A nested JSON list of numbers as (flat values, shape).
    fn flat(value: &serde_json::Value) -> (Vec<f64>, Vec<usize>) {
        match value.as_array() {
            Some(rows) if rows.first().is_some_and(|row| row.is_array()) => {
                let mut values = Vec::new();
                let mut shape = vec![rows.len()];
                for row in rows {
                    let (row_values, row_shape) = flat(row);
                    values.extend(row_values);
                    shape.truncate(1);
                    shape.extend(row_shape);
                }
                (values, shape)
            }
            Some(items) => {
                let values: Vec<f64> = items.iter().map(|x| x.as_f64().unwrap()).collect();
                let shape = vec![values.len()];
                (values, shape)
            }
            None => panic!("expected a list of numbers, found {value}"),
        }
    }

    fn tensor(value: &serde_json::Value) -> Tensor {
        let (values, shape) = flat(value);
        let values: Vec<f32> = values.iter().map(|&x| x as f32).collect();
        Tensor::from_vec(values, shape, &Device::Cpu).unwrap()
    }

    /// Largest `|ours − torch|` over a tensor, and the largest `|torch|`.
    fn deviation(ours: &[f32], torch: &serde_json::Value) -> (f64, f64) {
        let (torch, _) = flat(torch);
        assert_eq!(ours.len(), torch.len());
        ours.iter()
            .zip(&torch)
            .fold((0.0, 0.0), |(worst, size), (&o, &t)| {
                (
                    f64::max(worst, (f64::from(o) - t).abs()),
                    f64::max(size, t.abs()),
                )
            })
    }

    /// Twelve steps of AdamW on the gradients of a small network, with a learning-rate warm-up
    /// and decay, decayed matrices and an undecayed bias, once without and once with gradient
    /// clipping, against torch.optim.AdamW run in float64 on the same float32 inputs (fixture
    /// and its derivation: scripts/reference/adamw_reference.py).
    #[test]
    fn trajectories_match_torch_adamw() {
        let fixture: serde_json::Value =
            serde_json::from_str(include_str!("../tests/fixtures/adamw_torch.json")).unwrap();
        let mut clipped_steps = 0;
        let mut unclipped_steps = 0;
        for run in fixture["runs"].as_array().unwrap() {
            let max_norm = run["max_norm"].as_f64();
            let mut params = BTreeMap::new();
            for (name, value) in fixture["initial"].as_object().unwrap() {
                params.insert(name.clone(), Var::from_tensor(&tensor(value)).unwrap());
            }
            assert_eq!(params.len(), 3);
            let mut adam = AdamW::new(fixture["weight_decay"].as_f64().unwrap());
            // torch.optim.AdamW hyper-parameters of the fixture: isogloss's defaults must be them.
            assert_eq!(adam.beta1, fixture["beta1"].as_f64().unwrap());
            assert_eq!(adam.beta2, fixture["beta2"].as_f64().unwrap());
            assert_eq!(adam.epsilon, fixture["epsilon"].as_f64().unwrap());
            for (step, expected) in run["steps"].as_array().unwrap().iter().enumerate() {
                let label = format!("{} step {}", run["name"], step + 1);
                // Σ_p sum(p ⊙ G_p) has exactly the recorded gradients G_p.
                let mut loss = Tensor::zeros((), DType::F32, &Device::Cpu).unwrap();
                for (name, var) in &params {
                    let gradient = tensor(&expected["gradients"][name]);
                    let term = (var.as_tensor() * gradient).unwrap().sum_all().unwrap();
                    loss = (loss + term).unwrap();
                }
                let grads = loss.backward().unwrap();
                let norm = AdamW::gradient_norm(&params, &grads).unwrap();
                let torch_norm = expected["gradient_norm"].as_f64().unwrap();
                // torch.nn.utils.clip_grad_norm_'s total norm (float64 over the same gradients).
                assert!(
                    (norm - torch_norm).abs() < 1e-6 * torch_norm,
                    "{label}: norm {norm} vs torch {torch_norm}"
                );
                let scale = max_norm.map_or(1.0, |max_norm| AdamW::clip_scale(norm, max_norm));
                // torch.nn.utils.clip_grad_norm_ clipped this step or did not.
                assert_eq!(
                    scale < 1.0,
                    expected["clipped"].as_bool().unwrap(),
                    "{label}"
                );
                if scale < 1.0 {
                    clipped_steps += 1;
                } else {
                    unclipped_steps += 1;
                }
                let learning_rate = expected["learning_rate"].as_f64().unwrap();
                adam.update(&params, &grads, learning_rate, scale).unwrap();
                for (name, var) in &params {
                    let ours: Vec<f32> = var.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
                    let (worst, size) = deviation(&ours, &expected["parameters"][name]);
                    // torch.optim.AdamW parameters. Tolerance: one float32 rounding of p
                    // (2^-24 |p| ≈ 6e-8 |p|) in each of 12 steps, 7e-7 |p|, rounded up to 1e-6 |p|
                    // (measured: at most 2.4e-7 with |p| ≤ 2.01).
                    assert!(
                        worst < 1e-6 * size.max(1.0),
                        "{label} {name}: off by {worst}"
                    );
                    let moments = &adam.moments[name];
                    for (ours, key) in [
                        (&moments.first, "first_moments"),
                        (&moments.second, "second_moments"),
                    ] {
                        let (worst, size) = deviation(ours, &expected[key][name]);
                        // torch.optim.AdamW exp_avg / exp_avg_sq, relative to the tensor's largest
                        // moment. Tolerance: float32 rounding of a dozen running sums
                        // (12 · 2 · 6e-8 ≈ 1.5e-6) plus torch's 1e-6 in the clip factor, which
                        // enters g² twice (1e-6 / 1.31 · 2 ≈ 1.5e-6): 4e-6 (measured: at most
                        // 5.3e-7 for the first, 1.2e-6 for the second moments).
                        assert!(
                            worst <= 4e-6 * size,
                            "{label} {name} {key}: off by {worst} of {size}"
                        );
                    }
                }
            }
        }
        // The fixture exercises both sides of the clipping rule.
        assert!(clipped_steps >= 3 && unclipped_steps >= 12 + 3);
    }
}
