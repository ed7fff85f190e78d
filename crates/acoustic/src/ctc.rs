//! Connectionist temporal classification (Graves, Fernández, Gomez & Schmidhuber 2006).
//!
//! The loss of one utterance is `-log p(labels | frames)`, summed over every frame-level path that
//! collapses to the labels (merge repeats, then drop blanks). It is computed with the
//! forward–backward recursions in log space, in `f64` so that long utterances keep their
//! precision, and the gradient with respect to the *unnormalised* scores (logits) is returned in
//! the same pass: `softmax(logits) − occupancy`, where the occupancy of unit `k` at frame `t` is
//! the posterior probability that a path emits `k` at `t`. Feeding log-softmax output instead of
//! logits gives the same loss and gradient (log-softmax is idempotent and the gradient sums to zero
//! over units).
//!
//! [`CtcLoss`] wires this into candle's automatic differentiation as a custom operation whose
//! forward pass computes losses *and* gradients (the recursions needed for both are the same) and
//! whose backward pass only scales the stored gradient by the incoming one. That avoids building a
//! graph of thousands of tiny log-sum-exp nodes, which is what makes CTC slow when written with
//! tensor primitives.

use std::sync::Mutex;

use candle_core::{CpuStorage, CustomOp1, Layout, Shape, Tensor};
use rayon::prelude::*;

use crate::AcousticError;

/// The loss and gradient of one utterance.
#[derive(Debug, Clone, PartialEq)]
pub struct UtteranceCtc {
    /// `-ln p(labels | frames)`; `+inf` when no path fits (too few frames for the labels).
    pub loss: f64,
    /// `[frames, units]` row-major gradient of `loss` with respect to the logits; zero when the
    /// loss is infinite.
    pub grad: Vec<f64>,
}

fn log_add(a: f64, b: f64) -> f64 {
    if a == f64::NEG_INFINITY {
        return b;
    }
    if b == f64::NEG_INFINITY {
        return a;
    }
    let (hi, lo) = if a > b { (a, b) } else { (b, a) };
    hi + (lo - hi).exp().ln_1p()
}

/// The fewest frames a label sequence needs: one per label plus one blank between equal
/// neighbours (a path cannot emit `a a` without a blank in between).
pub fn min_frames_for(labels: &[u32]) -> usize {
    labels.len() + labels.windows(2).filter(|w| w[0] == w[1]).count()
}

/// CTC loss and gradient of one utterance from `[frames, units]` row-major logits.
///
/// `labels` must not contain `blank` and every label must be `< units` (checked by the caller,
/// [`ctc_batch`]).
pub fn ctc_utterance(
    logits: &[f64],
    frames: usize,
    units: usize,
    labels: &[u32],
    blank: u32,
) -> UtteranceCtc {
    debug_assert_eq!(logits.len(), frames * units);
    let mut grad = vec![0.0; frames * units];
    if frames == 0 {
        let loss = if labels.is_empty() {
            0.0
        } else {
            f64::INFINITY
        };
        return UtteranceCtc { loss, grad };
    }
    if min_frames_for(labels) > frames {
        return UtteranceCtc {
            loss: f64::INFINITY,
            grad,
        };
    }
    // Log-softmax per frame; `grad` temporarily holds the log-probabilities.
    for (row, out) in logits.chunks_exact(units).zip(grad.chunks_exact_mut(units)) {
        let max = row.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let log_sum = max + row.iter().map(|v| (v - max).exp()).sum::<f64>().ln();
        for (o, v) in out.iter_mut().zip(row) {
            *o = v - log_sum;
        }
    }
    let log_probs = grad;
    // Extended label sequence: blank, l1, blank, l2, …, blank.
    let states = 2 * labels.len() + 1;
    let unit_of = |s: usize| -> usize {
        if s.is_multiple_of(2) {
            blank as usize
        } else {
            labels[s / 2] as usize
        }
    };
    // A path may skip the blank between two different labels.
    let can_skip = |s: usize| s % 2 == 1 && s >= 2 && labels[s / 2] != labels[s / 2 - 1];
    let lp = |t: usize, s: usize| log_probs[t * units + unit_of(s)];

    // alpha[t][s]: log probability of all prefixes ending in state s at frame t (emission at t
    // included). beta[t][s]: log probability of completing from state s at frame t (emission at t
    // excluded), so alpha + beta is the log occupancy of (t, s) times p.
    let neg = f64::NEG_INFINITY;
    let mut alpha = vec![neg; frames * states];
    let mut beta = vec![neg; frames * states];
    alpha[0] = lp(0, 0);
    if states > 1 {
        alpha[1] = lp(0, 1);
    }
    for t in 1..frames {
        let (prev, cur) = alpha.split_at_mut(t * states);
        let prev = &prev[(t - 1) * states..];
        for s in 0..states {
            let mut a = prev[s];
            if s >= 1 {
                a = log_add(a, prev[s - 1]);
            }
            if can_skip(s) {
                a = log_add(a, prev[s - 2]);
            }
            cur[s] = if a == neg { neg } else { a + lp(t, s) };
        }
    }
    let last = (frames - 1) * states;
    beta[last + states - 1] = 0.0;
    if states > 1 {
        beta[last + states - 2] = 0.0;
    }
    for t in (0..frames - 1).rev() {
        let (cur, next) = beta.split_at_mut((t + 1) * states);
        let cur = &mut cur[t * states..];
        for s in 0..states {
            let mut b = next[s] + lp(t + 1, s);
            if s + 1 < states {
                b = log_add(b, next[s + 1] + lp(t + 1, s + 1));
            }
            if s + 2 < states && can_skip(s + 2) {
                b = log_add(b, next[s + 2] + lp(t + 1, s + 2));
            }
            cur[s] = b;
        }
    }
    let mut log_p = alpha[last + states - 1];
    if states > 1 {
        log_p = log_add(log_p, alpha[last + states - 2]);
    }
    let mut grad = log_probs;
    if !log_p.is_finite() {
        grad.iter_mut().for_each(|g| *g = 0.0);
        return UtteranceCtc {
            loss: f64::INFINITY,
            grad,
        };
    }
    let mut occupancy = vec![neg; units];
    for t in 0..frames {
        occupancy.iter_mut().for_each(|o| *o = neg);
        for s in 0..states {
            let k = unit_of(s);
            occupancy[k] = log_add(occupancy[k], alpha[t * states + s] + beta[t * states + s]);
        }
        for (g, o) in grad[t * units..(t + 1) * units].iter_mut().zip(&occupancy) {
            *g = g.exp() - (o - log_p).exp();
        }
    }
    UtteranceCtc { loss: -log_p, grad }
}

/// Losses and gradients of a padded batch.
#[derive(Debug, Clone)]
pub struct BatchCtc {
    /// One loss per utterance (`+inf` for an utterance whose labels do not fit its frames).
    pub losses: Vec<f32>,
    /// `[batch, frames, units]` gradient of the summed loss; zero on padding frames and for
    /// utterances with an infinite loss.
    pub grad: Vec<f32>,
}

/// Which frames and labels belong to each utterance of a padded `[batch, frames, units]` block.
#[derive(Debug, Clone)]
pub struct CtcTargets {
    /// Valid output frames per utterance (the rest of each row is padding).
    pub frame_lengths: Vec<usize>,
    /// Label sequence per utterance, unit indices without the blank.
    pub labels: Vec<Vec<u32>>,
    /// Index of the blank unit (0 in every isogloss model).
    pub blank: u32,
}

/// CTC over a padded batch of `[batch, frames, units]` row-major logits, in parallel over
/// utterances.
pub fn ctc_batch(
    logits: &[f32],
    shape: (usize, usize, usize),
    targets: &CtcTargets,
) -> Result<BatchCtc, AcousticError> {
    let (batch, frames, units) = shape;
    if logits.len() != batch * frames * units {
        return Err(AcousticError::Shape(format!(
            "CTC logits hold {} values, expected {batch}×{frames}×{units}",
            logits.len()
        )));
    }
    if targets.frame_lengths.len() != batch || targets.labels.len() != batch {
        return Err(AcousticError::Shape(format!(
            "CTC batch of {batch} utterances got {} frame lengths and {} label sequences",
            targets.frame_lengths.len(),
            targets.labels.len()
        )));
    }
    for (i, (&len, labels)) in targets
        .frame_lengths
        .iter()
        .zip(&targets.labels)
        .enumerate()
    {
        if len > frames {
            return Err(AcousticError::Shape(format!(
                "utterance {i} of the CTC batch claims {len} frames, the batch holds {frames}"
            )));
        }
        if let Some(bad) = labels
            .iter()
            .find(|&&l| l == targets.blank || l as usize >= units)
        {
            return Err(AcousticError::Shape(format!(
                "utterance {i} of the CTC batch has label {bad}; labels must be below {units} and not the blank {}",
                targets.blank
            )));
        }
    }
    let stride = frames * units;
    let mut grad = vec![0f32; batch * stride];
    let mut losses = vec![0f32; batch];
    if stride > 0 {
        grad.par_chunks_mut(stride)
            .zip(losses.par_iter_mut())
            .enumerate()
            .for_each(|(i, (grad_row, loss))| {
                let len = targets.frame_lengths[i];
                let input: Vec<f64> = logits[i * stride..i * stride + len * units]
                    .iter()
                    .map(|&v| v as f64)
                    .collect();
                let result = ctc_utterance(&input, len, units, &targets.labels[i], targets.blank);
                *loss = result.loss as f32;
                for (g, r) in grad_row.iter_mut().zip(&result.grad) {
                    *g = *r as f32;
                }
            });
    } else {
        for (i, loss) in losses.iter_mut().enumerate() {
            *loss = if targets.labels[i].is_empty() {
                0.0
            } else {
                f32::INFINITY
            };
        }
    }
    Ok(BatchCtc { losses, grad })
}

/// The gradient kept between the forward and the backward pass, with its `[batch, frames, units]`.
type StoredGradient = Option<(Vec<f32>, (usize, usize, usize))>;

/// CTC as a candle operation: `logits [batch, frames, units] → losses [batch]`.
///
/// The forward pass runs [`ctc_batch`] and keeps the gradient; the backward pass multiplies it by
/// the incoming gradient of each utterance's loss. Apply it with [`CtcLoss::apply`].
pub struct CtcLoss {
    targets: CtcTargets,
    grad: Mutex<StoredGradient>,
}

impl CtcLoss {
    /// Per-utterance CTC losses of `logits` (`[batch, frames, units]`, f32), differentiable.
    pub fn apply(logits: &Tensor, targets: CtcTargets) -> Result<Tensor, AcousticError> {
        let op = CtcLoss {
            targets,
            grad: Mutex::new(None),
        };
        Ok(logits.contiguous()?.apply_op1(op)?)
    }
}

impl CustomOp1 for CtcLoss {
    fn name(&self) -> &'static str {
        "ctc-loss"
    }

    fn cpu_fwd(
        &self,
        storage: &CpuStorage,
        layout: &Layout,
    ) -> candle_core::Result<(CpuStorage, Shape)> {
        let (batch, frames, units) = layout.shape().dims3()?;
        let values = match storage {
            CpuStorage::F32(values) => values,
            _ => candle_core::bail!("the CTC loss takes f32 logits"),
        };
        let values = match layout.contiguous_offsets() {
            Some((start, end)) => &values[start..end],
            None => candle_core::bail!("the CTC loss takes contiguous logits"),
        };
        let result = ctc_batch(values, (batch, frames, units), &self.targets)
            .map_err(|e| candle_core::Error::Msg(e.to_string()))?;
        let mut slot = self
            .grad
            .lock()
            .map_err(|_| candle_core::Error::Msg("CTC gradient lock poisoned".into()))?;
        *slot = Some((result.grad, (batch, frames, units)));
        Ok((CpuStorage::F32(result.losses), Shape::from(batch)))
    }

    fn bwd(
        &self,
        arg: &Tensor,
        _res: &Tensor,
        grad_res: &Tensor,
    ) -> candle_core::Result<Option<Tensor>> {
        let slot = self
            .grad
            .lock()
            .map_err(|_| candle_core::Error::Msg("CTC gradient lock poisoned".into()))?;
        let Some((grad, shape)) = slot.as_ref() else {
            candle_core::bail!("CTC backward pass before its forward pass")
        };
        let grad = Tensor::from_slice(grad, *shape, arg.device())?;
        let scale = grad_res.reshape((shape.0, 1, 1))?;
        Ok(Some(grad.broadcast_mul(&scale)?))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Var};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_logits(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
        (0..n).map(|_| rng.random_range(-3.0..3.0)).collect()
    }

    /// The definition: log-sum over every frame-level path that collapses to the labels.
    fn brute_force(logits: &[f64], frames: usize, units: usize, labels: &[u32]) -> f64 {
        let mut log_probs = logits.to_vec();
        for row in log_probs.chunks_exact_mut(units) {
            let log_sum = row.iter().map(|v| v.exp()).sum::<f64>().ln();
            row.iter_mut().for_each(|v| *v -= log_sum);
        }
        let mut total = f64::NEG_INFINITY;
        for code in 0..units.pow(frames as u32) {
            let mut path = Vec::with_capacity(frames);
            let mut c = code;
            for _ in 0..frames {
                path.push((c % units) as u32);
                c /= units;
            }
            let mut collapsed = Vec::new();
            let mut previous = None;
            for &u in &path {
                if Some(u) != previous && u != 0 {
                    collapsed.push(u);
                }
                previous = Some(u);
            }
            if collapsed == labels {
                let score: f64 = path
                    .iter()
                    .enumerate()
                    .map(|(t, &u)| log_probs[t * units + u as usize])
                    .sum();
                total = log_add(total, score);
            }
        }
        -total
    }

    #[test]
    fn equals_brute_force_enumeration_of_alignments() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let cases: &[(usize, usize, &[u32])] = &[
            (1, 3, &[]),
            (1, 3, &[2]),
            (3, 3, &[1, 1]),
            (4, 3, &[1, 2]),
            (5, 4, &[3, 3, 1]),
            (6, 3, &[]),
            (6, 3, &[2, 1, 2]),
            (7, 3, &[1, 1, 1, 1]),
        ];
        for &(frames, units, labels) in cases {
            let logits = random_logits(&mut rng, frames * units);
            let fast = ctc_utterance(&logits, frames, units, labels, 0).loss;
            let slow = brute_force(&logits, frames, units, labels);
            assert!(
                (fast - slow).abs() <= 1e-10 * slow.abs().max(1.0),
                "{frames} frames, labels {labels:?}: recursion {fast}, enumeration {slow}"
            );
        }
    }

    #[test]
    fn too_few_frames_give_infinite_loss_and_zero_gradient() {
        let logits = vec![0.5; 2 * 3];
        // Two equal labels need a blank between them: three frames.
        let result = ctc_utterance(&logits, 2, 3, &[1, 1], 0);
        assert_eq!(result.loss, f64::INFINITY);
        assert!(result.grad.iter().all(|&g| g == 0.0));
        assert_eq!(min_frames_for(&[1, 1, 2, 2, 2]), 8);
    }

    #[test]
    fn gradient_matches_central_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for &(frames, units, labels) in &[
            (6usize, 4usize, &[1u32, 2, 2][..]),
            (9, 5, &[4, 1, 3]),
            (4, 3, &[]),
        ] {
            let logits = random_logits(&mut rng, frames * units);
            let analytic = ctc_utterance(&logits, frames, units, labels, 0).grad;
            let h = 1e-5;
            for i in 0..logits.len() {
                let mut plus = logits.clone();
                plus[i] += h;
                let mut minus = logits.clone();
                minus[i] -= h;
                let numeric = (ctc_utterance(&plus, frames, units, labels, 0).loss
                    - ctc_utterance(&minus, frames, units, labels, 0).loss)
                    / (2.0 * h);
                assert!(
                    (numeric - analytic[i]).abs() < 1e-6,
                    "element {i}: finite difference {numeric}, analytic {}",
                    analytic[i]
                );
            }
        }
    }

    #[derive(serde::Deserialize)]
    struct TorchCase {
        name: String,
        batch: usize,
        frames: usize,
        units: usize,
        frame_lengths: Vec<usize>,
        labels: Vec<Vec<u32>>,
        logits: Vec<f32>,
        losses: Vec<f64>,
        grad: Vec<f64>,
    }

    #[derive(serde::Deserialize)]
    struct TorchFixture {
        cases: Vec<TorchCase>,
    }

    #[test]
    fn equals_torch_ctc_loss_and_its_gradient() {
        let text = include_str!("../tests/fixtures/ctc_torch.json");
        let fixture: TorchFixture = serde_json::from_str(text).expect("fixture parses");
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-4 * b.abs().max(1e-2);
        for case in fixture.cases {
            let targets = CtcTargets {
                frame_lengths: case.frame_lengths.clone(),
                labels: case.labels.clone(),
                blank: 0,
            };
            let result = ctc_batch(
                &case.logits,
                (case.batch, case.frames, case.units),
                &targets,
            )
            .expect("valid batch");
            for (i, (&ours, &theirs)) in result.losses.iter().zip(&case.losses).enumerate() {
                // Reference: torch.nn.functional.ctc_loss, reduction='none' (scripts/reference/ctc_reference.py).
                assert!(
                    close(ours as f64, theirs),
                    "{}: utterance {i} loss {ours} vs torch {theirs}",
                    case.name
                );
            }
            for (i, (&ours, &theirs)) in result.grad.iter().zip(&case.grad).enumerate() {
                // Reference: torch autograd of sum(ctc_loss) w.r.t. the logits (same script).
                assert!(
                    (ours as f64 - theirs).abs() <= 1e-4 * theirs.abs().max(1e-1),
                    "{}: gradient element {i} {ours} vs torch {theirs}",
                    case.name
                );
            }
        }
    }

    #[test]
    fn candle_backward_pass_returns_the_ctc_gradient_scaled() {
        let device = Device::Cpu;
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (batch, frames, units) = (2, 5, 4);
        let values: Vec<f32> = (0..batch * frames * units)
            .map(|_| rng.random_range(-2.0..2.0))
            .collect();
        let logits = Var::from_vec(values.clone(), (batch, frames, units), &device).unwrap();
        let targets = CtcTargets {
            frame_lengths: vec![5, 3],
            labels: vec![vec![1, 2], vec![3]],
            blank: 0,
        };
        let losses = CtcLoss::apply(logits.as_tensor(), targets.clone()).unwrap();
        // Weight the utterances differently so that the chain rule is exercised.
        let weights = Tensor::new(&[0.5f32, 2.0], &device).unwrap();
        let total = (losses * weights).unwrap().sum_all().unwrap();
        let grads = total.backward().unwrap();
        let grad = grads.get(&logits).unwrap().flatten_all().unwrap();
        let grad: Vec<f32> = grad.to_vec1().unwrap();
        let direct = ctc_batch(&values, (batch, frames, units), &targets).unwrap();
        for (i, (g, d)) in grad.iter().zip(&direct.grad).enumerate() {
            let w = if i < frames * units { 0.5 } else { 2.0 };
            assert!((g - w * d).abs() < 1e-6, "element {i}: {g} vs {}", w * d);
        }
    }
}
