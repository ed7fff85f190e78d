//! The training loop: duration-bucketed batches, CTC, AdamW with a planned learning-rate
//! schedule, gradient clipping, an optional wall-clock budget, early stopping, atomic checkpoints
//! and exact resumption.
//!
//! The schedule is planned in updates: a linear warm-up over `warmup_share` of all planned
//! updates, then (by default) half a cosine down to `final_rate` of the peak at the last one. With
//! a fixed number of epochs the plan is `epochs × batches per epoch`. With a wall-clock budget
//! ([`Trainer::set_deadline`]) the plan is first estimated from the time of the first few updates
//! and re-estimated at the end of every epoch from the measured epoch time (dev pass included), so
//! the rate reaches its floor when the budget runs out, whatever the machine's speed.
//!
//! Determinism: the batch order and dropout masks of epoch `e` come from a ChaCha stream keyed by
//! `(seed, e)`, and every utterance's perturbation from a stream keyed by `(seed, e, utterance)`
//! (see [`crate::data`]). A checkpoint therefore only has to hold the parameters, the optimizer
//! moments and counters; resuming after epoch `e` replays epoch `e + 1` exactly as an
//! uninterrupted run would (for the same thread count: the matrix products split their work by
//! thread count). A run under a wall-clock budget plans from measured times, so it is not
//! repeatable to the bit.
//!
//! Data parallelism ([`Trainer::set_collective`] with several ranks): every rank holds the same
//! weights and cuts the same batches from the lengths of the whole training set (a
//! [`crate::data::ShardedSet`]); of each batch it computes its own utterances' features and
//! gradient, the loss and frame counts and then one flat buffer of all gradients are summed over
//! the ranks, and every rank makes the same update. With batch normalisation the layers sum
//! their statistics over the ranks, so the whole batch is normalised as one; dropout masks are
//! drawn by position in the whole batch. The result is the single process's up to the order of
//! floating-point sums (docs/training.md, "Data-parallel training").

use std::collections::BTreeMap;
use std::panic::AssertUnwindSafe;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::time::Instant;

use candle_core::{Device, Tensor, Var};
use ndarray::Array2;
use rand::seq::SliceRandom;
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::collective::{Collective, SingleProcess};
use crate::config::{Keep, MatmulPrecision, ModelConfig, NetworkInput, Schedule};
use crate::ctc::{min_frames_for, CtcLoss, CtcTargets};
use crate::data::{utterance_rng, TrainingData};
pub use crate::data::{Augment, PreparedUtterance};
use crate::optim::{AdamW, Moments};
use crate::tdnn::{
    initial_parameters, initial_statistics, var_builder, BatchPart, FrameGeometry, Tdnn,
};
use crate::units::UnitInventory;
use crate::{greedy_path, AcousticError};

/// Something the training loop reports as it runs (the CLI draws the progress bar from these).
#[derive(Debug, Clone)]
pub enum TrainingEvent {
    /// An epoch begins.
    EpochStart {
        /// 1-based epoch number.
        epoch: usize,
        /// Batches in the epoch.
        batches: usize,
        /// Input frames in the epoch.
        frames: usize,
    },
    /// A batch was trained on.
    Batch {
        /// Batches done in this epoch.
        done: usize,
        /// Per-frame CTC loss of the batch.
        loss: f64,
        /// Input frames in the batch (padding excluded).
        frames: usize,
        /// Input frames per second of wall time over the epoch so far.
        frames_per_second: f64,
    },
    /// A batch whose loss was not finite; no update was made.
    BatchSkipped {
        /// Batches done in this epoch.
        done: usize,
        /// Ids of the utterances in the batch.
        utterances: Vec<String>,
    },
    /// An epoch ended.
    EpochEnd(EpochRecord),
}

/// What one epoch achieved (one line of the JSON-lines training log).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpochRecord {
    /// 1-based epoch number.
    pub epoch: usize,
    /// Mean per-frame CTC loss over the training batches.
    pub train_loss: f64,
    /// Per-frame CTC loss on the dev set.
    pub dev_loss: f64,
    /// Greedy unit error rate on the dev set (edit distance / reference units).
    pub dev_unit_error_rate: f64,
    /// Batches skipped for a non-finite loss.
    pub skipped_batches: usize,
    /// Training input frames per second of wall time.
    pub frames_per_second: f64,
    /// Learning rate at the end of the epoch.
    pub learning_rate: f64,
    /// True when the dev loss was the best so far.
    pub improved: bool,
    /// True when the model directory was written with this epoch's weights (every epoch with
    /// `keep = "last"`, the improved ones with `keep = "best-dev-loss"`). Logs written before
    /// the key existed lack it: there it was `improved`.
    #[serde(default)]
    pub saved: bool,
    /// Updates done in this epoch.
    #[serde(default)]
    pub updates: u64,
    /// Wall time of the training pass, seconds (feature work included).
    #[serde(default)]
    pub train_seconds: f64,
    /// Wall time the training pass waited for the batches' features (perturbation,
    /// extraction, masks): all of their computation without prefetch, with prefetch the part
    /// the steps did not hide.
    #[serde(default)]
    pub feature_seconds: f64,
    /// Wall time of each utterance's feature computation, summed over the threads that
    /// computed them (absent from logs written before it existed).
    #[serde(default)]
    pub feature_compute_seconds: f64,
    /// Wall time of the dev pass, seconds.
    #[serde(default)]
    pub dev_seconds: f64,
    /// Wall time this rank spent in sums over the ranks during the training pass, waiting for
    /// the slowest rank included (0 in a single process).
    #[serde(default)]
    pub exchange_seconds: f64,
    /// After an epoch of the averaging window (`[training] average_share`): the mean weights
    /// so far, which the model directory then holds.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub average: Option<AverageRecord>,
}

/// The mean weights after an epoch of the averaging window (`[training] average_share`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AverageRecord {
    /// Epochs in the mean so far (this one included).
    pub epochs: usize,
    /// Per-frame dev CTC loss of the mean weights.
    pub dev_loss: f64,
    /// Greedy dev unit error rate of the mean weights.
    pub dev_unit_error_rate: f64,
}

/// Counters that survive a resume.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TrainingProgress {
    /// The seed every random stream derives from.
    pub seed: u64,
    /// Epochs completed.
    pub epochs_done: usize,
    /// Best dev loss so far.
    pub best_dev_loss: Option<f64>,
    /// Epochs since the best dev loss.
    pub epochs_without_improvement: usize,
    /// One record per completed epoch.
    pub history: Vec<EpochRecord>,
    /// Updates the learning-rate schedule is planned for (0: not planned yet).
    #[serde(default)]
    pub planned_updates: u64,
    /// The epoch count the plan was made for (a changed `--epochs` re-plans).
    #[serde(default)]
    pub planned_epochs: usize,
    /// Epochs folded into the mean weights (`[training] average_share`; 0: none yet).
    #[serde(default)]
    pub averaged_epochs: usize,
}

/// Utterances left out because their labels cannot fit the output frames.
#[derive(Debug, Clone, Default)]
pub struct Admission {
    /// Kept utterances (perturbed variants that do not fit are dropped from them).
    pub kept: Vec<PreparedUtterance>,
    /// Ids of utterances skipped, with their output frames and required frames.
    pub skipped: Vec<(String, usize, usize)>,
}

/// The model being trained, its optimizer and progress.
pub struct Trainer {
    config: ModelConfig,
    units: UnitInventory,
    input_dims: usize,
    parameters: BTreeMap<String, Var>,
    /// Running statistics of batch normalisation: saved with the parameters, not trained.
    statistics: BTreeMap<String, Var>,
    network: Tdnn,
    optimizer: AdamW,
    progress: TrainingProgress,
    /// The mean of the weights (parameters and running statistics, by name) at the ends of
    /// the `progress.averaged_epochs` epochs of the averaging window; empty before it.
    average: BTreeMap<String, Vec<f32>>,
    deadline: Option<Instant>,
    /// The ranks of a data-parallel run ([`SingleProcess`] by default).
    collective: Arc<dyn Collective>,
    /// Compute the next batch's features on a background thread while a batch trains.
    prefetch: bool,
}

/// What one update of a data-parallel run gives: the per-frame loss of the whole batch and its
/// output frames (`None` when it was not finite and no update was made), and its input frames.
type PartOutcome = (Option<(f64, usize)>, usize);

/// Updates of the first epoch timed before a budgeted run plans its schedule.
const PROBE_UPDATES: usize = 8;

/// What computing an utterance's features for an epoch needs, shared by the training loop and
/// the prefetch thread (the network's frame counts, not the network, whose weights change).
struct FeatureWork<'a> {
    train: &'a dyn TrainingData,
    seed: u64,
    epoch: usize,
    geometry: &'a FrameGeometry,
    /// Time spent in [`FeatureWork::compute`], summed over threads.
    compute_nanos: AtomicU64,
}

impl FeatureWork<'_> {
    /// This process's utterances of `batch`, in batch order.
    fn mine(&self, batch: &[usize]) -> Vec<usize> {
        batch
            .iter()
            .copied()
            .filter(|&i| self.train.is_local(i))
            .collect()
    }

    /// Utterance `i`'s features of the epoch, from its own random stream: the same whichever
    /// thread computes them, and whenever.
    fn compute(&self, i: usize) -> Array2<f32> {
        let start = Instant::now();
        let labels = self.train.labels(i);
        let fits = |frames: usize| {
            frames > 0 && min_frames_for(labels) <= self.geometry.output_frames(frames)
        };
        let features = self
            .train
            .features(i, &mut utterance_rng(self.seed, self.epoch, i), &fits);
        let nanos = u64::try_from(start.elapsed().as_nanos()).unwrap_or(u64::MAX);
        self.compute_nanos.fetch_add(nanos, Ordering::Relaxed);
        features
    }
}

/// The features of one batch, each utterance's computed by whichever thread claims it first:
/// the prefetch thread, or the training loop's pool when the batch is needed before the
/// prefetch thread is through with it.
struct BatchFeatures {
    utterances: Vec<usize>,
    slots: Vec<Mutex<Option<Array2<f32>>>>,
    /// The next unclaimed place in `utterances`.
    next: AtomicUsize,
    /// Places whose computation is over (whether or not it gave features), and its signal.
    finished: Mutex<usize>,
    changed: Condvar,
}

impl BatchFeatures {
    fn new(utterances: Vec<usize>) -> Self {
        BatchFeatures {
            slots: utterances.iter().map(|_| Mutex::new(None)).collect(),
            utterances,
            next: AtomicUsize::new(0),
            finished: Mutex::new(0),
            changed: Condvar::new(),
        }
    }

    /// Claims the next place and computes it (a panic caught when `catch`, leaving the place
    /// empty); `None` when every place is claimed, else whether the computation gave features.
    fn claim_one(&self, work: &FeatureWork, catch: bool) -> Option<bool> {
        let k = self.next.fetch_add(1, Ordering::Relaxed);
        let &i = self.utterances.get(k)?;
        let features = if catch {
            std::panic::catch_unwind(AssertUnwindSafe(|| work.compute(i))).ok()
        } else {
            Some(work.compute(i))
        };
        let done = features.is_some();
        *lock(&self.slots[k]) = features;
        *lock(&self.finished) += 1;
        self.changed.notify_all();
        Some(done)
    }

    /// The prefetch thread's share: claims places until none is left or `stop` is set. False
    /// when it should stop (told to, or a computation panicked: the training loop then computes
    /// that utterance itself, and the panic, if it happens again, happens there as it would
    /// without prefetch).
    fn work_alone(&self, work: &FeatureWork, stop: &AtomicBool) -> bool {
        while !stop.load(Ordering::Relaxed) {
            match self.claim_one(work, true) {
                None => return true,
                Some(true) => {}
                Some(false) => return false,
            }
        }
        false
    }

    /// The training loop's side: computes the unclaimed places on the pool, waits for those
    /// claimed by the prefetch thread and returns the features in batch order.
    fn finish(&self, work: &FeatureWork) -> Vec<Array2<f32>> {
        let left = self
            .utterances
            .len()
            .saturating_sub(self.next.load(Ordering::Relaxed));
        (0..left).into_par_iter().for_each(|_| {
            self.claim_one(work, false);
        });
        let mut finished = lock(&self.finished);
        while *finished < self.utterances.len() {
            finished = self
                .changed
                .wait(finished)
                .unwrap_or_else(|poisoned| poisoned.into_inner());
        }
        drop(finished);
        self.slots
            .iter()
            .zip(&self.utterances)
            .map(|(slot, &i)| lock(slot).take().unwrap_or_else(|| work.compute(i)))
            .collect()
    }
}

/// A lock whose holder cannot have left its value half-changed (every holder here only
/// assigns), so a panic elsewhere does not poison it for the others.
fn lock<T>(mutex: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    mutex
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

fn epoch_rng(seed: u64, epoch: usize) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(epoch as u64 + 1);
    rng
}

/// Groups utterances of similar length: sort by frames (ties broken at random), cut into batches
/// of at most `batch_frames` padded frames, then shuffle the batch order.
pub fn bucketed_batches(
    frames: &[usize],
    batch_frames: usize,
    rng: &mut impl Rng,
) -> Vec<Vec<usize>> {
    let mut order: Vec<(usize, u32, usize)> = frames
        .iter()
        .enumerate()
        .map(|(i, &f)| (f, rng.random::<u32>(), i))
        .collect();
    order.sort_unstable();
    let mut batches: Vec<Vec<usize>> = Vec::new();
    let mut current: Vec<usize> = Vec::new();
    for (length, _, index) in order {
        // Sorted ascending, so `length` is the longest in the batch so far.
        if !current.is_empty() && (current.len() + 1) * length > batch_frames {
            batches.push(std::mem::take(&mut current));
        }
        current.push(index);
    }
    if !current.is_empty() {
        batches.push(current);
    }
    batches.shuffle(rng);
    batches
}

/// Levenshtein distance between unit sequences.
pub fn edit_distance(reference: &[u32], hypothesis: &[u32]) -> usize {
    let mut row: Vec<usize> = (0..=hypothesis.len()).collect();
    for (i, r) in reference.iter().enumerate() {
        let mut diagonal = row[0];
        row[0] = i + 1;
        for (j, h) in hypothesis.iter().enumerate() {
            let substitution = diagonal + usize::from(r != h);
            diagonal = row[j + 1];
            row[j + 1] = substitution.min(row[j] + 1).min(diagonal + 1);
        }
    }
    row[hypothesis.len()]
}

impl Trainer {
    /// A freshly initialised model (weights drawn from `seed`).
    pub fn new(
        config: ModelConfig,
        units: UnitInventory,
        input_dims: usize,
        seed: u64,
    ) -> Result<Self, AcousticError> {
        units.validate()?;
        config.model.validate()?;
        let input = NetworkInput {
            frame_dims: input_dims,
            layer_vector_dims: config.network_input().layer_vector_dims,
        };
        config.model.check_size(input, units.len())?;
        let mut rng = epoch_rng(seed, usize::MAX - 1);
        let parameters = initial_parameters(&config.model, input, units.len(), &mut rng)?;
        let statistics = initial_statistics(&config.model)?;
        let mut network = Tdnn::new(
            var_builder(&model_tensors(&parameters, &statistics)),
            &config.model,
            input,
            units.len(),
        )?;
        network.set_training_precision(config.training.matmul_precision.supported());
        let optimizer = AdamW::new(config.training.weight_decay);
        Ok(Trainer {
            config,
            units,
            input_dims,
            parameters,
            statistics,
            network,
            optimizer,
            progress: TrainingProgress {
                seed,
                ..TrainingProgress::default()
            },
            average: BTreeMap::new(),
            deadline: None,
            collective: Arc::new(SingleProcess),
            prefetch: true,
        })
    }

    /// Trains as one rank of a data-parallel run over `collective` (see the module
    /// documentation); with one rank, as a single process.
    pub fn set_collective(&mut self, collective: Arc<dyn Collective>) {
        self.collective = collective;
    }

    /// Whether the features of the next batch are computed on a background thread while a
    /// batch trains (on by default). The weights are the same either way: every utterance's
    /// features come from its own random stream.
    pub fn set_prefetch(&mut self, prefetch: bool) {
        self.prefetch = prefetch;
    }

    /// The ranks this trainer works with.
    pub fn collective(&self) -> &Arc<dyn Collective> {
        &self.collective
    }

    fn distributed(&self) -> bool {
        self.collective.size() > 1
    }

    /// True while training should go on: not [`Trainer::finished`], as rank 0 sees it (a
    /// wall-clock budget ends at slightly different moments on different machines).
    pub fn keep_going(&self) -> Result<bool, AcousticError> {
        let mut going = [f64::from(u8::from(!self.finished()))];
        if self.distributed() {
            self.collective
                .broadcast_f64("the decision to train another epoch", &mut going)?;
        }
        Ok(going[0] > 0.5)
    }

    /// The network.
    pub fn network(&self) -> &Tdnn {
        &self.network
    }

    /// Trained parameters by name.
    pub fn parameters(&self) -> &BTreeMap<String, Var> {
        &self.parameters
    }

    /// Running statistics of batch normalisation by name (empty for other networks).
    pub fn running_statistics(&self) -> &BTreeMap<String, Var> {
        &self.statistics
    }

    /// Everything a model directory holds: the parameters and the running statistics (sharing
    /// their storage), for [`crate::AcousticModel::save`].
    pub fn model_tensors(&self) -> BTreeMap<String, Var> {
        model_tensors(&self.parameters, &self.statistics)
    }

    /// True when the epoch just finished lies in the averaging window: `[training]
    /// average_share` is set and the updates done exceed `1 − average_share` of the planned
    /// ones (with `--minutes`, of those planned at the time).
    fn in_average_window(&self) -> bool {
        let share = self.config.training.average_share;
        let planned = self.progress.planned_updates;
        share > 0.0 && planned > 0 && self.optimizer.step as f64 > planned as f64 * (1.0 - share)
    }

    /// Folds the current weights into the mean: `mean += (weights − mean) / k` for the k-th
    /// epoch of the window, in f32 (so the first epoch's mean is its weights exactly, and a
    /// resumed run continues the same sums). Then measures the mean on dev.
    fn fold_into_average(
        &mut self,
        dev: &[PreparedUtterance],
    ) -> Result<AverageRecord, AcousticError> {
        let k = self.progress.averaged_epochs + 1;
        let divisor = k as f32;
        for (name, var) in self.model_tensors() {
            let weights: Vec<f32> = var.as_tensor().flatten_all()?.to_vec1()?;
            let mean = self
                .average
                .entry(name)
                .or_insert_with(|| vec![0.0; weights.len()]);
            for (m, w) in mean.iter_mut().zip(weights) {
                *m += (w - *m) / divisor;
            }
        }
        self.progress.averaged_epochs = k;
        let (dev_loss, dev_unit_error_rate) =
            self.with_kept_weights(|trainer| trainer.evaluate(dev))?;
        Ok(AverageRecord {
            epochs: k,
            dev_loss,
            dev_unit_error_rate,
        })
    }

    /// Runs `f` with the weights the model directory is to hold in place: the mean weights
    /// once the averaging window has begun, else the current ones; the current weights are
    /// back afterwards, whatever `f` returned.
    pub fn with_kept_weights<T>(
        &self,
        f: impl FnOnce(&Self) -> Result<T, AcousticError>,
    ) -> Result<T, AcousticError> {
        let mut current = Vec::new();
        for (name, var) in self.model_tensors() {
            if let Some(mean) = self.average.get(&name) {
                current.push((var.clone(), var.as_tensor().copy()?));
                var.set(&Tensor::from_slice(mean, var.shape(), &Device::Cpu)?)?;
            }
        }
        let result = f(self);
        for (var, weights) in current {
            var.set(&weights)?;
        }
        result
    }

    /// Counters and history.
    pub fn progress(&self) -> &TrainingProgress {
        &self.progress
    }

    /// The configuration.
    pub fn config(&self) -> &ModelConfig {
        &self.config
    }

    /// The number format the training pass's matrix products run in: `[training]
    /// matmul_precision` where this CPU supports it, else f32.
    pub fn matmul_precision(&self) -> MatmulPrecision {
        self.config.training.matmul_precision.supported()
    }

    /// The unit inventory.
    pub fn units(&self) -> &UnitInventory {
        &self.units
    }

    /// Sets the number of epochs to train in total.
    pub fn set_epochs(&mut self, epochs: usize) {
        self.config.training.epochs = epochs;
    }

    /// Trains until `deadline` (wall clock) instead of a fixed number of epochs; the schedule is
    /// planned to end there. `None` returns to epoch counting.
    pub fn set_deadline(&mut self, deadline: Option<Instant>) {
        self.deadline = deadline;
        if deadline.is_some() {
            self.config.training.epochs = usize::MAX;
            self.progress.planned_updates = 0;
        }
    }

    /// True when training should stop: all epochs done, the budget spent, or no dev improvement
    /// for `patience` epochs.
    pub fn finished(&self) -> bool {
        let budget_spent = self.deadline.is_some_and(|deadline| {
            Instant::now() >= deadline
                || (self.progress.planned_updates > 0
                    && self.optimizer.step >= self.progress.planned_updates)
        });
        budget_spent
            || self.progress.epochs_done >= self.config.training.epochs
            || (self.config.training.patience > 0
                && self.progress.epochs_without_improvement >= self.config.training.patience)
    }

    /// True when an utterance of `frames` input frames has enough output frames for `labels`.
    pub fn fits(&self, frames: usize, labels: &[u32]) -> bool {
        frames > 0 && min_frames_for(labels) <= self.network.output_frames(frames)
    }

    /// Updates done so far.
    pub fn updates(&self) -> u64 {
        self.optimizer.step
    }

    /// Plans the schedule of a budgeted run: the updates that fit in the time left at
    /// `seconds_per_update` (dev passes included), on top of those done.
    /// In a data-parallel run rank 0's plan is every rank's.
    fn plan_for_deadline(&mut self, seconds_per_update: f64) -> Result<(), AcousticError> {
        if let Some(deadline) = self.deadline {
            let left = deadline
                .saturating_duration_since(Instant::now())
                .as_secs_f64();
            let more = (left / seconds_per_update.max(1e-6)).floor() as u64;
            let mut planned = [(self.optimizer.step + more.max(1)) as f64];
            if self.distributed() {
                self.collective
                    .broadcast_f64("the planned number of updates", &mut planned)?;
            }
            self.progress.planned_updates = planned[0] as u64;
        }
        Ok(())
    }

    /// Keeps utterances whose labels fit their output frames; perturbed variants that do not
    /// fit are dropped.
    pub fn admit(&self, utterances: Vec<PreparedUtterance>) -> Admission {
        let mut admission = Admission::default();
        for mut utterance in utterances {
            let needed = min_frames_for(&utterance.labels);
            let frames = utterance.variants.first().map_or(0, |v| v.nrows());
            let available = self.network.output_frames(frames);
            if frames == 0 || needed > available {
                admission.skipped.push((utterance.id, available, needed));
                continue;
            }
            let first = utterance.variants.remove(0);
            let network = &self.network;
            utterance
                .variants
                .retain(|v| needed <= network.output_frames(v.nrows()));
            utterance.variants.insert(0, first);
            admission.kept.push(utterance);
        }
        admission
    }

    /// The rate of update `step` (1-based) under the planned schedule.
    pub fn learning_rate(&self, step: u64) -> f64 {
        let training = &self.config.training;
        let peak = training.learning_rate;
        let total = self.progress.planned_updates.max(1) as f64;
        let warmup = (training.warmup_share * total).ceil().max(1.0);
        let step = step.max(1) as f64;
        if step <= warmup {
            return peak * step / warmup;
        }
        match training.schedule {
            Schedule::Constant => peak,
            Schedule::InverseSqrt => peak * (warmup / step).sqrt(),
            Schedule::Cosine => {
                let progress = ((step - warmup) / (total - warmup).max(1.0)).min(1.0);
                let floor = training.final_rate;
                peak * (floor
                    + (1.0 - floor) * 0.5 * (1.0 + (std::f64::consts::PI * progress).cos()))
            }
        }
    }

    /// Pads each utterance by the network context (edge frames repeated) and to the longest.
    fn batch_input(
        &self,
        features: &[&Array2<f32>],
    ) -> Result<(Tensor, Vec<usize>), AcousticError> {
        let (left, right) = self.config.model.context();
        let longest = features.iter().map(|f| f.nrows()).max().unwrap_or(0);
        let frames = longest + left + right;
        let dims = self.input_dims;
        let mut data = vec![0f32; features.len() * frames * dims];
        let mut lengths = Vec::with_capacity(features.len());
        for (b, matrix) in features.iter().enumerate() {
            if matrix.ncols() != dims {
                return Err(AcousticError::Shape(format!(
                    "features have {} dims, the model takes {dims}",
                    matrix.ncols()
                )));
            }
            let n = matrix.nrows();
            let block = &mut data[b * frames * dims..(b + 1) * frames * dims];
            for t in 0..n + left + right {
                let source = t.saturating_sub(left).min(n - 1);
                for (d, value) in matrix.row(source).iter().enumerate() {
                    block[t * dims + d] = *value;
                }
            }
            lengths.push(self.network.output_frames(n));
        }
        let input = Tensor::from_vec(data, (features.len(), frames, dims), &Device::Cpu)?;
        Ok((input, lengths))
    }

    /// One update on a batch of (augmented) feature matrices. Returns the per-frame loss and the
    /// number of output frames, or `None` when the loss or gradient was not finite (no update).
    pub fn train_batch(
        &mut self,
        features: &[&Array2<f32>],
        labels: Vec<Vec<u32>>,
        rng: &mut dyn RngCore,
    ) -> Result<Option<(f64, usize)>, AcousticError> {
        let (input, output_frames) = self.batch_input(features)?;
        let frames: Vec<usize> = features.iter().map(|f| f.nrows()).collect();
        let (logits, batch_statistics) = self.network.forward_train(&input, &frames, rng)?;
        let total_frames: usize = output_frames.iter().sum();
        let targets = CtcTargets {
            frame_lengths: output_frames,
            labels,
            blank: 0,
        };
        let losses = CtcLoss::apply(&logits, targets)?;
        let loss = (losses.sum_all()? / total_frames.max(1) as f64)?;
        let value = loss.to_scalar::<f32>()? as f64;
        if !value.is_finite() {
            return Ok(None);
        }
        let grads = loss.backward()?;
        let norm = AdamW::gradient_norm(&self.parameters, &grads)?;
        if !norm.is_finite() {
            return Ok(None);
        }
        let scale = AdamW::clip_scale(norm, self.config.training.clip_norm);
        let rate = self.learning_rate(self.optimizer.step + 1);
        self.optimizer
            .update(&self.parameters, &grads, rate, scale)?;
        self.network.update_running_statistics(&batch_statistics)?;
        Ok(Some((value, total_frames)))
    }

    /// One update of a data-parallel run from this rank's part of a batch (`positions`: the
    /// part's places in the whole batch; empty when the rank has no utterance in it, in which
    /// case it takes part in the sums with zeros). Every rank gets the same outcome and makes
    /// the same update; `None` when the whole batch's loss or gradient was not finite.
    fn train_part(
        &mut self,
        features: &[&Array2<f32>],
        labels: Vec<Vec<u32>>,
        positions: &[u64],
        rng: &mut dyn RngCore,
    ) -> Result<PartOutcome, AcousticError> {
        let collective = Arc::clone(&self.collective);
        let update = self.optimizer.step + 1;
        let input_frames: usize = features.iter().map(|f| f.nrows()).sum();
        let local = if features.is_empty() {
            None
        } else {
            let (input, output_frames) = self.batch_input(features)?;
            let frames: Vec<usize> = features.iter().map(|f| f.nrows()).collect();
            let part = BatchPart {
                positions,
                collective: Arc::clone(&collective),
            };
            let (logits, statistics) =
                self.network
                    .forward_train_part(&input, &frames, Some(&part), rng)?;
            let total_frames: usize = output_frames.iter().sum();
            let targets = CtcTargets {
                frame_lengths: output_frames,
                labels,
                blank: 0,
            };
            let sum = CtcLoss::apply(&logits, targets)?.sum_all()?;
            Some((sum, statistics, total_frames))
        };
        let statistics = match &local {
            Some((_, statistics, _)) => statistics.clone(),
            None => self.network.idle_forward(collective.as_ref(), rng)?,
        };
        let mut totals = [
            match &local {
                Some((sum, _, _)) => f64::from(sum.to_scalar::<f32>()?),
                None => 0.0,
            },
            local.as_ref().map_or(0, |(_, _, frames)| *frames) as f64,
            input_frames as f64,
        ];
        collective.sum_f64(&format!("the loss of update {update}"), &mut totals)?;
        let [loss_sum, output_frames, input_frames] = totals;
        let input_frames = input_frames as usize;
        let loss = loss_sum / output_frames.max(1.0);
        if !loss.is_finite() {
            return Ok((None, input_frames));
        }
        let sizes: Vec<usize> = self.parameters.values().map(|v| v.elem_count()).collect();
        let mut flat = vec![0f32; sizes.iter().sum()];
        match local {
            Some((sum, _, _)) => {
                let grads = (sum / output_frames.max(1.0))?.backward()?;
                let mut offset = 0;
                for (var, &size) in self.parameters.values().zip(&sizes) {
                    if let Some(grad) = grads.get(var.as_tensor()) {
                        let values: Vec<f32> = grad.flatten_all()?.to_vec1()?;
                        flat[offset..offset + size].copy_from_slice(&values);
                    }
                    offset += size;
                }
            }
            None => self.network.idle_backward(collective.as_ref())?,
        }
        collective.sum_f32(&format!("the gradient of update {update}"), &mut flat)?;
        let mut grads: BTreeMap<&str, Tensor> = BTreeMap::new();
        let mut offset = 0;
        for ((name, var), &size) in self.parameters.iter().zip(&sizes) {
            let values = &flat[offset..offset + size];
            grads.insert(
                name.as_str(),
                Tensor::from_slice(values, var.shape(), &Device::Cpu)?,
            );
            offset += size;
        }
        let norm = AdamW::norm_of(grads.values())?;
        if !norm.is_finite() {
            return Ok((None, input_frames));
        }
        let scale = AdamW::clip_scale(norm, self.config.training.clip_norm);
        let rate = self.learning_rate(update);
        self.optimizer.update_with(
            &self.parameters,
            |name, _| grads.get(name).cloned(),
            rate,
            scale,
        )?;
        self.network.update_running_statistics(&statistics)?;
        Ok((Some((loss, output_frames as usize)), input_frames))
    }

    /// Per-frame CTC loss and greedy unit error rate on `dev` (no dropout, no augmentation);
    /// in a data-parallel run `dev` is this rank's share and the figures are the whole dev
    /// set's, summed over the ranks.
    pub fn evaluate(&self, dev: &[PreparedUtterance]) -> Result<(f64, f64), AcousticError> {
        let lengths: Vec<usize> = dev.iter().map(|u| u.variants[0].nrows()).collect();
        let mut rng = ChaCha8Rng::seed_from_u64(0);
        let batches = bucketed_batches(&lengths, self.config.training.batch_frames, &mut rng);
        let (mut loss_sum, mut frames, mut errors, mut reference) = (0f64, 0usize, 0usize, 0usize);
        for batch in batches {
            let features: Vec<&Array2<f32>> = batch.iter().map(|&i| &dev[i].variants[0]).collect();
            let (input, output_frames) = self.batch_input(&features)?;
            let logits = self.network.forward(&input)?;
            let targets = CtcTargets {
                frame_lengths: output_frames.clone(),
                labels: batch.iter().map(|&i| dev[i].labels.clone()).collect(),
                blank: 0,
            };
            let losses: Vec<f32> = CtcLoss::apply(&logits, targets)?.to_vec1()?;
            let logits: Vec<Vec<Vec<f32>>> = logits.to_vec3()?;
            for (k, &i) in batch.iter().enumerate() {
                if losses[k].is_finite() {
                    loss_sum += losses[k] as f64;
                    frames += output_frames[k];
                }
                let path = greedy_path(&logits[k][..output_frames[k]]);
                errors += edit_distance(&dev[i].labels, &path);
                reference += dev[i].labels.len();
            }
        }
        let mut totals = [loss_sum, frames as f64, errors as f64, reference as f64];
        if self.distributed() {
            self.collective
                .sum_f64("the dev loss and errors", &mut totals)?;
        }
        let [loss_sum, frames, errors, reference] = totals;
        Ok((loss_sum / frames.max(1.0), errors / reference.max(1.0)))
    }

    /// Trains one epoch over `train` (admitted utterances), then evaluates on `dev`. Under a
    /// deadline the epoch ends early when the budget is spent.
    pub fn run_epoch(
        &mut self,
        train: &dyn TrainingData,
        dev: &[PreparedUtterance],
        on_event: &mut dyn FnMut(&TrainingEvent),
    ) -> Result<EpochRecord, AcousticError> {
        if train.is_empty() {
            return Err(AcousticError::Config(
                "no training utterance is left to train on".into(),
            ));
        }
        let epoch = self.progress.epochs_done + 1;
        let seed = self.progress.seed;
        let mut rng = epoch_rng(seed, epoch);
        let lengths: Vec<usize> = (0..train.len()).map(|i| train.frames(i)).collect();
        let batches = bucketed_batches(&lengths, self.config.training.batch_frames, &mut rng);
        let epochs = self.config.training.epochs;
        if self.deadline.is_none()
            && (self.progress.planned_updates == 0 || self.progress.planned_epochs != epochs)
        {
            let left = epochs.saturating_sub(self.progress.epochs_done) as u64;
            self.progress.planned_updates =
                self.optimizer.step + left.saturating_mul(batches.len() as u64);
            self.progress.planned_epochs = epochs;
        }
        on_event(&TrainingEvent::EpochStart {
            epoch,
            batches: batches.len(),
            frames: lengths.iter().sum(),
        });
        let started = Instant::now();
        let exchange_before = self.collective.exchange_seconds();
        let updates_before = self.optimizer.step;
        let (mut loss_sum, mut loss_frames, mut epoch_frames, mut skipped) =
            (0f64, 0usize, 0usize, 0);
        let mut feature_seconds = 0f64;
        let dev_share = dev.iter().map(|u| u.variants[0].nrows()).sum::<usize>() as f64
            / lengths.iter().sum::<usize>().max(1) as f64;
        let geometry = self.network.frame_geometry();
        let work = FeatureWork {
            train,
            seed,
            epoch,
            geometry: &geometry,
            compute_nanos: AtomicU64::new(0),
        };
        let prefetch = self.prefetch;
        let stop = AtomicBool::new(false);
        std::thread::scope(|scope| -> Result<(), AcousticError> {
            // The prefetch thread computes the features of the batches in order, at most one
            // batch ahead of the training loop (which holds the next one while it trains on
            // the current one); it stops when the loop drops its end of the channel.
            let (sender, receiver) = std::sync::mpsc::sync_channel::<Arc<BatchFeatures>>(1);
            if prefetch {
                let (work, batches, stop) = (&work, &batches, &stop);
                scope.spawn(move || {
                    for batch in batches {
                        let job = Arc::new(BatchFeatures::new(work.mine(batch)));
                        if sender.send(Arc::clone(&job)).is_err() || !job.work_alone(work, stop) {
                            break;
                        }
                    }
                });
            } else {
                drop(sender);
            }
            let result = (|| {
                for (done, batch) in batches.iter().enumerate() {
                    if let Some(deadline) = self.deadline {
                        let planned = self.progress.planned_updates;
                        let mut spent = [f64::from(u8::from(Instant::now() >= deadline))];
                        if self.distributed() {
                            self.collective
                                .broadcast_f64("the end-of-budget check", &mut spent)?;
                        }
                        if spent[0] > 0.5 || (planned > 0 && self.optimizer.step >= planned) {
                            break;
                        }
                        if planned == 0 && done == PROBE_UPDATES {
                            // A forward-only dev pass costs about a third of a training pass
                            // per frame.
                            let per_update = started.elapsed().as_secs_f64() / done as f64;
                            self.plan_for_deadline(per_update * (1.0 + dev_share / 3.0))?;
                        }
                    }
                    let feature_start = Instant::now();
                    // This rank's utterances of the batch, with their places in it (all of them
                    // in a single process).
                    let (positions, mine): (Vec<u64>, Vec<usize>) = batch
                        .iter()
                        .enumerate()
                        .filter(|(_, &i)| train.is_local(i))
                        .map(|(position, &i)| (position as u64, i))
                        .unzip();
                    let features: Vec<Array2<f32>> = match receiver.recv() {
                        // What the prefetch thread has not done yet, the pool does now.
                        Ok(job) => job.finish(&work),
                        // Without prefetch (or after the prefetch thread stopped), all of it.
                        Err(_) => mine.par_iter().map(|&i| work.compute(i)).collect(),
                    };
                    feature_seconds += feature_start.elapsed().as_secs_f64();
                    let refs: Vec<&Array2<f32>> = features.iter().collect();
                    let labels: Vec<Vec<u32>> =
                        mine.iter().map(|&i| train.labels(i).to_vec()).collect();
                    let (outcome, batch_frames) = if self.distributed() {
                        self.train_part(&refs, labels, &positions, &mut rng)?
                    } else {
                        let input_frames = refs.iter().map(|f| f.nrows()).sum();
                        (self.train_batch(&refs, labels, &mut rng)?, input_frames)
                    };
                    epoch_frames += batch_frames;
                    let Some((value, total_frames)) = outcome else {
                        skipped += 1;
                        on_event(&TrainingEvent::BatchSkipped {
                            done: done + 1,
                            utterances: batch.iter().map(|&i| train.id(i).to_string()).collect(),
                        });
                        continue;
                    };
                    loss_sum += value * total_frames as f64;
                    loss_frames += total_frames;
                    on_event(&TrainingEvent::Batch {
                        done: done + 1,
                        loss: value,
                        frames: batch_frames,
                        frames_per_second: epoch_frames as f64
                            / started.elapsed().as_secs_f64().max(1e-9),
                    });
                }
                Ok(())
            })();
            // An early end (the budget, an error) stops the prefetch thread after the utterance
            // it is computing; the scope waits for it.
            stop.store(true, Ordering::Relaxed);
            drop(receiver);
            result
        })?;
        let feature_compute_seconds = work.compute_nanos.into_inner() as f64 * 1e-9;
        let train_seconds = started.elapsed().as_secs_f64();
        let frames_per_second = epoch_frames as f64 / train_seconds.max(1e-9);
        let exchange_seconds = self.collective.exchange_seconds() - exchange_before;
        let dev_started = Instant::now();
        let (dev_loss, dev_unit_error_rate) = self.evaluate(dev)?;
        let dev_seconds = dev_started.elapsed().as_secs_f64();
        let updates = self.optimizer.step - updates_before;
        if self.deadline.is_some() && updates > 0 {
            self.plan_for_deadline((train_seconds + dev_seconds) / updates as f64)?;
        }
        let improved = self
            .progress
            .best_dev_loss
            .is_none_or(|best| dev_loss < best);
        if improved {
            self.progress.best_dev_loss = Some(dev_loss);
            self.progress.epochs_without_improvement = 0;
        } else {
            self.progress.epochs_without_improvement += 1;
        }
        let record = EpochRecord {
            epoch,
            train_loss: loss_sum / loss_frames.max(1) as f64,
            dev_loss,
            dev_unit_error_rate,
            skipped_batches: skipped,
            frames_per_second,
            learning_rate: self.learning_rate(self.optimizer.step),
            improved,
            saved: improved || self.config.training.keep == Keep::Last,
            updates,
            train_seconds,
            feature_seconds,
            feature_compute_seconds,
            dev_seconds,
            exchange_seconds,
            average: None,
        };
        let record = EpochRecord {
            average: if self.in_average_window() {
                Some(self.fold_into_average(dev)?)
            } else {
                None
            },
            ..record
        };
        self.progress.epochs_done = epoch;
        self.progress.history.push(record.clone());
        on_event(&TrainingEvent::EpochEnd(record.clone()));
        Ok(record)
    }

    /// A warm start: replaces the weights (parameters and running statistics) by those of a
    /// model directory's `model.safetensors` written for the same network. The optimizer's
    /// moments, the schedule and the progress stay fresh: a new run that starts from trained
    /// weights.
    pub fn load_model_weights(&mut self, weights: &Path) -> Result<(), AcousticError> {
        let bad = |problem: String| AcousticError::Model {
            path: weights.to_path_buf(),
            problem,
        };
        let tensors = candle_core::safetensors::load(weights, &Device::Cpu)
            .map_err(|e| bad(format!("not readable as model weights ({e})")))?;
        for (name, var) in self.parameters.iter().chain(&self.statistics) {
            let tensor = tensors.get(name).ok_or_else(|| {
                bad(format!(
                    "tensor `{name}` missing: expected the weights of the network this run trains"
                ))
            })?;
            if tensor.dims() != var.dims() {
                return Err(bad(format!(
                    "tensor `{name}` has shape {:?}, this run's network expects {:?}",
                    tensor.dims(),
                    var.dims()
                )));
            }
            var.set(&tensor.to_dtype(candle_core::DType::F32)?)?;
        }
        Ok(())
    }

    /// Writes parameters, optimizer moments and progress to one safetensors file, atomically.
    pub fn save_checkpoint(&self, path: &Path) -> Result<(), AcousticError> {
        let mut tensors: Vec<(String, Vec<usize>, Vec<f32>)> = Vec::new();
        for (name, var) in &self.parameters {
            let values: Vec<f32> = var.as_tensor().flatten_all()?.to_vec1()?;
            tensors.push((format!("param/{name}"), var.dims().to_vec(), values));
        }
        for (name, var) in &self.statistics {
            let values: Vec<f32> = var.as_tensor().flatten_all()?.to_vec1()?;
            tensors.push((format!("statistic/{name}"), var.dims().to_vec(), values));
        }
        for (name, mean) in &self.average {
            tensors.push((format!("average/{name}"), vec![mean.len()], mean.clone()));
        }
        for (name, moments) in &self.optimizer.moments {
            let n = moments.first.len();
            tensors.push((format!("adam.first/{name}"), vec![n], moments.first.clone()));
            tensors.push((
                format!("adam.second/{name}"),
                vec![n],
                moments.second.clone(),
            ));
        }
        let mut metadata = BTreeMap::new();
        let progress = serde_json::to_string(&self.progress)
            .map_err(|e| AcousticError::Config(format!("progress does not serialise: {e}")))?;
        metadata.insert("progress".to_string(), progress);
        metadata.insert("adam_step".to_string(), self.optimizer.step.to_string());
        let config = toml::to_string(&self.config)
            .map_err(|e| AcousticError::Config(format!("configuration does not serialise: {e}")))?;
        metadata.insert("config".to_string(), config);
        let units = serde_json::to_string(&self.units)
            .map_err(|e| AcousticError::Config(format!("units do not serialise: {e}")))?;
        metadata.insert("units".to_string(), units);
        metadata.insert("input_dims".to_string(), self.input_dims.to_string());
        let bytes = crate::io::serialize_tensors(&tensors, Some(metadata))?;
        crate::io::write_atomically(path, &bytes)
    }

    /// Restores a trainer from [`Trainer::save_checkpoint`] output.
    pub fn load_checkpoint(path: &Path) -> Result<Self, AcousticError> {
        let bytes = std::fs::read(path).map_err(|source| AcousticError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let corrupt = |what: &str| AcousticError::Checkpoint {
            path: path.to_path_buf(),
            problem: what.to_string(),
        };
        let (_, header) = safetensors::SafeTensors::read_metadata(&bytes)
            .map_err(|e| corrupt(&format!("not a safetensors file ({e})")))?;
        let metadata = header
            .metadata()
            .clone()
            .ok_or_else(|| corrupt("no training metadata"))?;
        let field = |key: &str| {
            metadata
                .get(key)
                .ok_or_else(|| corrupt(&format!("no `{key}` entry")))
        };
        let progress: TrainingProgress = serde_json::from_str(field("progress")?)
            .map_err(|e| corrupt(&format!("bad progress record ({e})")))?;
        let config: ModelConfig =
            toml::from_str(field("config")?).map_err(|e| corrupt(&format!("bad config ({e})")))?;
        let units: UnitInventory = serde_json::from_str(field("units")?)
            .map_err(|e| corrupt(&format!("bad units ({e})")))?;
        let input_dims: usize = field("input_dims")?
            .parse()
            .map_err(|_| corrupt("bad input_dims"))?;
        let step: u64 = field("adam_step")?
            .parse()
            .map_err(|_| corrupt("bad adam_step"))?;
        let tensors = safetensors::SafeTensors::deserialize(&bytes)
            .map_err(|e| corrupt(&format!("unreadable tensors ({e})")))?;
        config
            .validate()
            .map_err(|e| corrupt(&format!("bad config ({e})")))?;
        // Every parameter is stored in the file: a network larger than the file is a lie, found
        // before its parameters are allocated.
        let parameters = config.model.parameter_count(input_dims, units.len()) as u64;
        if parameters.saturating_mul(4) > bytes.len() as u64 {
            return Err(corrupt(&format!(
                "its config describes {parameters} parameters, more than its {} bytes can hold",
                bytes.len()
            )));
        }
        let mut trainer = Trainer::new(config, units, input_dims, progress.seed)
            .map_err(|e| corrupt(&e.to_string()))?;
        let read = |name: &str| -> Result<Vec<f32>, AcousticError> {
            let view = tensors
                .tensor(name)
                .map_err(|_| corrupt(&format!("tensor `{name}` missing")))?;
            if view.dtype() != safetensors::Dtype::F32 {
                return Err(corrupt(&format!(
                    "tensor `{name}` is {:?}, expected F32",
                    view.dtype()
                )));
            }
            Ok(view
                .data()
                .chunks_exact(4)
                .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                .collect())
        };
        for (name, var) in &trainer.parameters {
            let values = read(&format!("param/{name}"))?;
            if values.len() != var.elem_count() {
                return Err(corrupt(&format!("parameter `{name}` has the wrong size")));
            }
            var.set(&Tensor::from_vec(values, var.shape(), &Device::Cpu)?)?;
            if tensors.tensor(&format!("adam.first/{name}")).is_ok() {
                let moments = Moments {
                    first: read(&format!("adam.first/{name}"))?,
                    second: read(&format!("adam.second/{name}"))?,
                };
                for (kind, values) in [("first", &moments.first), ("second", &moments.second)] {
                    if values.len() != var.elem_count() {
                        return Err(corrupt(&format!(
                            "the optimizer's {kind} moments of `{name}` hold {} values, the parameter has {}",
                            values.len(),
                            var.elem_count()
                        )));
                    }
                }
                trainer.optimizer.moments.insert(name.clone(), moments);
            }
        }
        for (name, var) in &trainer.statistics {
            let values = read(&format!("statistic/{name}"))?;
            if values.len() != var.elem_count() {
                return Err(corrupt(&format!("statistic `{name}` has the wrong size")));
            }
            var.set(&Tensor::from_vec(values, var.shape(), &Device::Cpu)?)?;
        }
        if progress.averaged_epochs > 0 {
            for (name, var) in trainer.model_tensors() {
                let mean = read(&format!("average/{name}"))?;
                if mean.len() != var.elem_count() {
                    return Err(corrupt(&format!("the mean of `{name}` has the wrong size")));
                }
                trainer.average.insert(name, mean);
            }
        }
        trainer.optimizer.step = step;
        trainer.progress = progress;
        Ok(trainer)
    }
}

/// The parameters and running statistics in one map (the vars share their storage).
fn model_tensors(
    parameters: &BTreeMap<String, Var>,
    statistics: &BTreeMap<String, Var>,
) -> BTreeMap<String, Var> {
    parameters
        .iter()
        .chain(statistics)
        .map(|(name, var)| (name.clone(), var.clone()))
        .collect()
}

/// Where the training files live inside a model directory.
pub fn checkpoint_path(model_dir: &Path) -> PathBuf {
    model_dir.join("checkpoint.safetensors")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{LayerConfig, Normalization, TdnnConfig, TrainingConfig};
    use crate::data::PreparedSet;
    use crate::units::UnitKind;

    fn tiny_config() -> ModelConfig {
        config_with(Normalization::Layer)
    }

    fn config_with(normalization: Normalization) -> ModelConfig {
        ModelConfig {
            model: TdnnConfig {
                layers: vec![
                    LayerConfig {
                        taps: vec![-1, 0, 1],
                        width: 24,
                        keep_every: 1,
                    },
                    LayerConfig {
                        taps: vec![-1, 0, 1],
                        width: 24,
                        keep_every: 3,
                    },
                ],
                normalization,
                dropout: 0.1,
            },
            training: TrainingConfig {
                epochs: 2,
                batch_frames: 200,
                learning_rate: 5e-3,
                ..TrainingConfig::default()
            },
            features: crate::config::default_features(),
            augmentation: crate::config::Augmentation::none(),
            speaker_vectors: None,
        }
    }

    fn units() -> UnitInventory {
        UnitInventory {
            kind: UnitKind::Phones,
            units: ["<ctc-blank>", "a", "b", "c"]
                .iter()
                .map(|s| s.to_string())
                .collect(),
        }
    }

    /// Synthetic utterances: each label is a burst of frames with its own feature pattern.
    fn synthetic(count: usize, seed: u64) -> Vec<PreparedUtterance> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..count)
            .map(|i| {
                let labels: Vec<u32> = (0..rng.random_range(1..4))
                    .map(|_| rng.random_range(1..4))
                    .collect();
                let mut rows = Vec::new();
                for &label in &labels {
                    for _ in 0..9 {
                        let mut row = vec![0f32; 5];
                        row[label as usize] = 1.0;
                        row[4] = rng.random_range(-0.1..0.1);
                        rows.push(row);
                    }
                    rows.push(vec![0.0; 5]);
                    rows.push(vec![0.0; 5]);
                    rows.push(vec![0.0; 5]);
                }
                let frames = rows.len();
                let matrix = Array2::from_shape_vec((frames, 5), rows.concat()).unwrap();
                PreparedUtterance {
                    id: format!("utt{i}"),
                    variants: vec![matrix],
                    labels,
                }
            })
            .collect()
    }

    fn set(utterances: &[PreparedUtterance]) -> PreparedSet<'_> {
        PreparedSet {
            utterances,
            augment: None,
        }
    }

    /// Every parameter and running statistic, by name.
    fn weights(trainer: &Trainer) -> Vec<(String, Vec<f32>)> {
        trainer
            .model_tensors()
            .iter()
            .map(|(name, v)| {
                let values = v.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
                (name.clone(), values)
            })
            .collect()
    }

    /// Ranks as threads of one process: every sum goes through one shared buffer between
    /// barriers (the order in which the ranks add is whatever the threads' timing makes it).
    struct ThreadRanks {
        rank: usize,
        size: usize,
        shared: Arc<(std::sync::Mutex<Vec<f64>>, std::sync::Barrier)>,
    }

    impl ThreadRanks {
        fn sum(&self, values: &mut [f64]) {
            let (buffer, barrier) = &*self.shared;
            barrier.wait();
            if self.rank == 0 {
                *buffer.lock().unwrap() = vec![0.0; values.len()];
            }
            barrier.wait();
            for (total, v) in buffer.lock().unwrap().iter_mut().zip(values.iter()) {
                *total += *v;
            }
            barrier.wait();
            values.copy_from_slice(&buffer.lock().unwrap());
            barrier.wait();
        }
    }

    impl Collective for ThreadRanks {
        fn rank(&self) -> usize {
            self.rank
        }

        fn size(&self) -> usize {
            self.size
        }

        fn sum_f64(&self, _what: &str, values: &mut [f64]) -> Result<(), AcousticError> {
            self.sum(values);
            Ok(())
        }

        fn sum_f32(&self, _what: &str, values: &mut [f32]) -> Result<(), AcousticError> {
            let mut wide: Vec<f64> = values.iter().map(|&v| f64::from(v)).collect();
            self.sum(&mut wide);
            for (v, w) in values.iter_mut().zip(wide) {
                *v = w as f32;
            }
            Ok(())
        }

        fn abort(&self, code: i32) -> ! {
            panic!("rank {} aborted with {code}", self.rank)
        }
    }

    /// A rank's weights by name and its epoch records.
    type RankOutcome = (Vec<(String, Vec<f32>)>, Vec<EpochRecord>);

    /// Data parallelism at the level of the trainer, with ranks as threads: three ranks, each
    /// holding its length-balanced share of the training set and every third dev utterance,
    /// train two epochs of a batch-normalised network with dropout and reach the weights and
    /// the epoch records of one process (up to the order of sums). Small batches leave some
    /// ranks without a part in some batches.
    #[test]
    fn ranks_train_the_weights_of_one_process() {
        let mut config = config_with(Normalization::Batch);
        config.training.batch_frames = 90;
        let train = synthetic(14, 1);
        let dev = synthetic(5, 2);
        let mut alone = Trainer::new(config.clone(), units(), 5, 42).unwrap();
        let single: Vec<EpochRecord> = (0..2)
            .map(|_| alone.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap())
            .collect();
        let size = 3;
        let shared = Arc::new((
            std::sync::Mutex::new(Vec::new()),
            std::sync::Barrier::new(size),
        ));
        let lengths: Vec<f64> = train.iter().map(|u| u.variants[0].nrows() as f64).collect();
        let idle = std::sync::atomic::AtomicUsize::new(0);
        let ranks: Vec<RankOutcome> = std::thread::scope(|scope| {
            let handles: Vec<_> = (0..size)
                .map(|rank| {
                    let shared = Arc::clone(&shared);
                    let (config, train, dev, lengths, idle) =
                        (&config, &train, &dev, &lengths, &idle);
                    scope.spawn(move || {
                        let share = crate::collective::balanced_share(lengths, rank, size);
                        let local: Vec<PreparedUtterance> =
                            share.iter().map(|&i| train[i].clone()).collect();
                        let mut local_index = vec![None; train.len()];
                        for (k, &i) in share.iter().enumerate() {
                            local_index[i] = Some(k);
                        }
                        let local_set = set(&local);
                        let whole = crate::data::ShardedSet::new(
                            &local_set,
                            train.iter().map(|u| u.id.clone()).collect(),
                            train.iter().map(|u| u.variants[0].nrows()).collect(),
                            local_index,
                        )
                        .unwrap();
                        let my_dev: Vec<PreparedUtterance> =
                            dev.iter().skip(rank).step_by(size).cloned().collect();
                        let mut trainer = Trainer::new(config.clone(), units(), 5, 42).unwrap();
                        trainer.set_collective(Arc::new(ThreadRanks { rank, size, shared }));
                        let records = (0..2)
                            .map(|_| trainer.run_epoch(&whole, &my_dev, &mut |_| {}).unwrap())
                            .collect();
                        let epoch_rng_batches = {
                            let mut rng = epoch_rng(42, 1);
                            let lengths: Vec<usize> =
                                train.iter().map(|u| u.variants[0].nrows()).collect();
                            bucketed_batches(&lengths, config.training.batch_frames, &mut rng)
                        };
                        let without_me = epoch_rng_batches
                            .iter()
                            .filter(|batch| batch.iter().all(|i| !share.contains(i)))
                            .count();
                        idle.fetch_add(without_me, std::sync::atomic::Ordering::Relaxed);
                        (weights(&trainer), records)
                    })
                })
                .collect();
            handles.into_iter().map(|h| h.join().unwrap()).collect()
        });
        assert!(
            idle.into_inner() > 0,
            "some rank has no part in some batch of epoch 1"
        );
        let expected = weights(&alone);
        for (rank, (weights, records)) in ranks.iter().enumerate() {
            for ((name, a), (other, b)) in expected.iter().zip(weights) {
                assert_eq!(name, other);
                for (x, y) in a.iter().zip(b) {
                    assert!(
                        (x - y).abs() <= 1e-5 * x.abs().max(1.0),
                        "rank {rank}, {name}: {x} vs {y}"
                    );
                }
            }
            for (one, many) in single.iter().zip(records) {
                assert_eq!(one.updates, many.updates);
                for (x, y) in [
                    (one.train_loss, many.train_loss),
                    (one.dev_loss, many.dev_loss),
                    (one.dev_unit_error_rate, many.dev_unit_error_rate),
                ] {
                    assert!(
                        (x - y).abs() <= 1e-5 * x.abs().max(1.0),
                        "{one:?} vs {many:?}"
                    );
                }
            }
        }
    }

    #[test]
    fn resuming_from_a_checkpoint_gives_identical_weights() {
        for normalization in [Normalization::Layer, Normalization::Batch] {
            resume_gives_identical_weights(config_with(normalization));
        }
    }

    fn resume_gives_identical_weights(config: ModelConfig) {
        let train = synthetic(12, 1);
        let dev = synthetic(3, 2);
        let mut straight = Trainer::new(config.clone(), units(), 5, 42).unwrap();
        for _ in 0..2 {
            straight.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        }
        let dir = tempfile::tempdir().unwrap();
        let path = checkpoint_path(dir.path());
        let mut first = Trainer::new(config.clone(), units(), 5, 42).unwrap();
        first.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        first.save_checkpoint(&path).unwrap();
        let after_one = weights(&first);
        drop(first);
        let mut resumed = Trainer::load_checkpoint(&path).unwrap();
        assert_eq!(resumed.progress().epochs_done, 1);
        assert_eq!(
            weights(&resumed),
            after_one,
            "the checkpoint restores everything"
        );
        resumed.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        assert_eq!(weights(&straight), weights(&resumed));
        if config.model.normalization == Normalization::Batch {
            // The running statistics moved, have no optimizer state and are not parameters.
            let fresh = Trainer::new(config, units(), 5, 42).unwrap();
            assert_eq!(resumed.running_statistics().len(), 4);
            for (name, var) in resumed.running_statistics() {
                let now: Vec<f32> = var.as_tensor().to_vec1().unwrap();
                let before: Vec<f32> = fresh.running_statistics()[name]
                    .as_tensor()
                    .to_vec1()
                    .unwrap();
                assert_ne!(now, before, "{name} was updated");
                assert!(!resumed.parameters().contains_key(name));
                assert!(!resumed.optimizer.moments.contains_key(name));
            }
        }
        // Everything but the wall-clock speed must agree.
        let without_speed = |trainer: &Trainer| {
            let mut progress = trainer.progress().clone();
            progress.history.iter_mut().for_each(zero_the_times);
            progress
        };
        assert_eq!(without_speed(&straight), without_speed(&resumed));
    }

    /// `[training] average_share = 0.5` over three epochs averages the last two (the first ends
    /// at a third of the planned updates, inside neither half): the kept weights are
    /// `w₂ + (w₃ − w₂)/2` in f32, checked against the weights of a run without averaging (which
    /// follows the same path: averaging only reads the weights), the current weights stay
    /// `w₃`, the model file and its provenance hold the mean and its dev figures, and a run
    /// resumed after epoch 2 gives the same mean to the bit.
    #[test]
    fn averaging_keeps_the_mean_of_the_window_epochs_and_resumes() {
        let train = synthetic(12, 1);
        let dev = synthetic(3, 2);
        let mut plain_config = config_with(Normalization::Batch);
        plain_config.training.epochs = 3;
        let mut averaged_config = plain_config.clone();
        averaged_config.training.average_share = 0.5;
        let mut plain = Trainer::new(plain_config, units(), 5, 42).unwrap();
        let mut per_epoch = Vec::new();
        for _ in 0..3 {
            let record = plain.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
            assert_eq!(record.average, None);
            per_epoch.push(weights(&plain));
        }
        let mut averaged = Trainer::new(averaged_config.clone(), units(), 5, 42).unwrap();
        let mut records = Vec::new();
        for _ in 0..3 {
            records.push(averaged.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap());
        }
        assert_eq!(
            weights(&averaged),
            per_epoch[2],
            "averaging does not touch training"
        );
        let counted: Vec<Option<usize>> = records
            .iter()
            .map(|r| r.average.as_ref().map(|a| a.epochs))
            .collect();
        assert_eq!(counted, [None, Some(1), Some(2)]);
        let expected: Vec<(String, Vec<f32>)> = per_epoch[1]
            .iter()
            .zip(&per_epoch[2])
            .map(|((name, second), (_, third))| {
                let mean = second
                    .iter()
                    .zip(third)
                    .map(|(&a, &b)| a + (b - a) / 2.0)
                    .collect();
                (name.clone(), mean)
            })
            .collect();
        assert_ne!(expected, per_epoch[2]);
        let kept = averaged.with_kept_weights(|t| Ok(weights(t))).unwrap();
        assert_eq!(kept, expected);
        assert_eq!(
            weights(&averaged),
            per_epoch[2],
            "the current weights are back"
        );
        // The mean's dev figures are those of the mean weights.
        let (dev_loss, dev_error) = averaged.with_kept_weights(|t| t.evaluate(&dev)).unwrap();
        let last = records[2].average.as_ref().unwrap();
        assert_eq!(
            (last.dev_loss, last.dev_unit_error_rate),
            (dev_loss, dev_error)
        );
        assert_ne!(last.dev_loss, records[2].dev_loss);
        // Resumed after epoch 2: the same mean, to the bit.
        let dir = tempfile::tempdir().unwrap();
        let path = checkpoint_path(dir.path());
        let mut first = Trainer::new(averaged_config, units(), 5, 42).unwrap();
        for _ in 0..2 {
            first.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        }
        first.save_checkpoint(&path).unwrap();
        drop(first);
        let mut resumed = Trainer::load_checkpoint(&path).unwrap();
        assert_eq!(resumed.progress().averaged_epochs, 1);
        let record = resumed.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        assert_eq!(record.average.as_ref().map(|a| a.epochs), Some(2));
        assert_eq!(
            resumed.with_kept_weights(|t| Ok(weights(t))).unwrap(),
            expected
        );
    }

    /// `matmul_precision = "bf16"` trains the same weights to the bit at one and two threads
    /// (each product element is summed by one thread in one order), and not the f32 weights.
    #[test]
    fn bf16_training_gives_the_same_weights_at_one_and_two_threads() {
        if !crate::fused::bf16_available() {
            eprintln!("skipped: this CPU lacks AVX-512 BF16");
            return;
        }
        let train = synthetic(12, 1);
        let dev = synthetic(3, 2);
        let trained = |precision: MatmulPrecision, threads: usize| {
            let mut config = config_with(Normalization::Batch);
            config.training.matmul_precision = precision;
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| {
                let mut trainer = Trainer::new(config, units(), 5, 42).unwrap();
                assert_eq!(trainer.matmul_precision(), precision);
                trainer.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
                weights(&trainer)
            })
        };
        let one = trained(MatmulPrecision::Bf16, 1);
        assert_eq!(one, trained(MatmulPrecision::Bf16, 2));
        assert_ne!(one, trained(MatmulPrecision::F32, 1));
    }

    /// Issue 16: optimizer moments shorter than their parameter were silently truncated on
    /// resume. They are now an error naming the checkpoint and the parameter.
    #[test]
    fn a_checkpoint_with_short_optimizer_state_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("checkpoint.safetensors");
        let mut trainer = Trainer::new(tiny_config(), units(), 5, 42).unwrap();
        let train = synthetic(4, 4);
        trainer
            .run_epoch(&set(&train), &synthetic(2, 5), &mut |_| {})
            .unwrap();
        trainer.save_checkpoint(&path).unwrap();
        let bytes = std::fs::read(&path).unwrap();
        let (_, header) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
        let metadata: BTreeMap<String, String> =
            header.metadata().clone().unwrap().into_iter().collect();
        let tensors = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        let mut names: Vec<String> = tensors.names().into_iter().map(str::to_string).collect();
        names.sort();
        let shortened = names
            .iter()
            .find(|n| n.starts_with("adam.first/"))
            .unwrap()
            .clone();
        let rewritten: Vec<(String, Vec<usize>, Vec<f32>)> = names
            .iter()
            .map(|name| {
                let view = tensors.tensor(name).unwrap();
                let mut values: Vec<f32> = view
                    .data()
                    .chunks_exact(4)
                    .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                    .collect();
                let mut shape = view.shape().to_vec();
                if *name == shortened {
                    values.pop();
                    shape = vec![values.len()];
                }
                (name.clone(), shape, values)
            })
            .collect();
        let bytes = crate::io::serialize_tensors(&rewritten, Some(metadata)).unwrap();
        std::fs::write(&path, bytes).unwrap();
        let message = Trainer::load_checkpoint(&path).err().unwrap().to_string();
        let parameter = shortened.trim_start_matches("adam.first/");
        assert!(
            message.contains("checkpoint.safetensors")
                && message.contains(&format!("first moments of `{parameter}`")),
            "{message}"
        );
    }

    #[test]
    fn utterances_too_short_for_their_labels_are_skipped_and_counted() {
        let trainer = Trainer::new(tiny_config(), units(), 5, 1).unwrap();
        let mut utterances = synthetic(3, 3);
        // 4 frames give ⌈4/3⌉ = 2 output frames: too few for three labels.
        utterances[1].variants[0] = Array2::zeros((4, 5));
        utterances[1].labels = vec![1, 2, 3];
        // The unperturbed copy fits, a (speed-perturbed) shorter copy does not and is dropped.
        utterances[2].labels = vec![1, 2];
        let long = utterances[2].variants[0].clone();
        utterances[2].variants = vec![long, Array2::zeros((3, 5))];
        let admission = trainer.admit(utterances);
        assert_eq!(admission.skipped, vec![("utt1".to_string(), 2, 3)]);
        assert_eq!(admission.kept.len(), 2);
        assert_eq!(admission.kept[1].variants.len(), 1);
    }

    #[test]
    fn a_batch_with_non_finite_loss_is_skipped_and_reported() {
        for normalization in [Normalization::Layer, Normalization::Batch] {
            let mut config = config_with(normalization);
            config.training.batch_frames = 10_000; // one batch
            let mut trainer = Trainer::new(config, units(), 5, 1).unwrap();
            let mut train = synthetic(4, 4);
            train[2].variants[0][[3, 1]] = f32::NAN;
            let before = weights(&trainer);
            let mut skipped = Vec::new();
            let record = trainer
                .run_epoch(&set(&train), &synthetic(2, 5), &mut |event| {
                    if let TrainingEvent::BatchSkipped { utterances, .. } = event {
                        skipped.extend(utterances.clone());
                    }
                })
                .unwrap();
            assert_eq!(record.skipped_batches, 1);
            assert!(skipped.contains(&"utt2".to_string()));
            assert_eq!(
                before,
                weights(&trainer),
                "no update from a skipped batch, running statistics included"
            );
        }
    }

    #[test]
    fn learns_synthetic_bursts_to_zero_error() {
        for normalization in [Normalization::Layer, Normalization::Batch] {
            let mut config = config_with(normalization);
            config.training.epochs = 60;
            config.training.patience = 0;
            config.model.dropout = 0.0;
            let train = synthetic(16, 6);
            let mut trainer = Trainer::new(config, units(), 5, 3).unwrap();
            let mut last = None;
            while !trainer.finished() {
                last = Some(
                    trainer
                        .run_epoch(&set(&train), &train, &mut |_| {})
                        .unwrap(),
                );
            }
            // The dev pass is inference: with batch norm, the running statistics.
            let last = last.unwrap();
            assert!(
                last.dev_unit_error_rate < 0.05,
                "{normalization:?}: {last:?}"
            );
        }
    }

    /// A batch-normalised model after training: saved, loaded and run on features, it gives the
    /// posteriors of the in-memory network (running statistics included, by their names).
    #[test]
    fn a_trained_model_with_batch_norm_saves_loads_and_infers_alike() {
        use crate::model::{ModelDescription, Provenance, MODEL_FORMAT};
        let config = config_with(Normalization::Batch);
        let train = synthetic(12, 1);
        let mut trainer = Trainer::new(config.clone(), units(), 5, 7).unwrap();
        trainer
            .run_epoch(&set(&train), &train, &mut |_| {})
            .unwrap();
        let mut features = config.features.clone();
        features.cepstra = 5;
        features.deltas = Some(0);
        assert_eq!(features.dims(), 5);
        let description = ModelDescription {
            format: MODEL_FORMAT,
            units: units(),
            features,
            architecture: config.model.clone(),
            provenance: Provenance::default(),
            training: None,
            augmentation: None,
            self_training: Vec::new(),
            speaker_vectors: None,
            inference: None,
        };
        let dir = tempfile::tempdir().unwrap();
        crate::AcousticModel::save(dir.path(), &description, &trainer.model_tensors()).unwrap();
        let stored =
            candle_core::safetensors::load(dir.path().join("model.safetensors"), &Device::Cpu)
                .unwrap();
        for (name, var) in trainer.running_statistics() {
            let expected: Vec<f32> = var.as_tensor().to_vec1().unwrap();
            assert_eq!(stored[name].to_vec1::<f32>().unwrap(), expected, "{name}");
        }
        assert!(stored.contains_key("layers.1.norm.running_var"));
        assert!(
            !stored.contains_key("layers.0.bias"),
            "no bias before batch norm"
        );
        let loaded = crate::AcousticModel::load(dir.path()).unwrap();
        let in_memory =
            crate::AcousticModel::from_parameters(description, &trainer.model_tensors()).unwrap();
        for utterance in synthetic(4, 9) {
            let matrix = &utterance.variants[0];
            let posteriors = loaded.log_posteriors(matrix).unwrap();
            assert_eq!(posteriors, in_memory.log_posteriors(matrix).unwrap());
            // And the trainer's own network, as the dev pass runs it.
            let (input, _) = trainer.batch_input(&[matrix]).unwrap();
            let logits = trainer
                .network()
                .forward(&input)
                .unwrap()
                .squeeze(0)
                .unwrap();
            let direct = candle_nn::ops::log_softmax(&logits, 1).unwrap();
            let direct: Vec<f32> = direct.flatten_all().unwrap().to_vec1().unwrap();
            assert_eq!(posteriors.iter().copied().collect::<Vec<f32>>(), direct);
        }
    }

    #[test]
    fn the_cosine_schedule_warms_up_peaks_and_ends_at_its_floor() {
        let mut config = tiny_config();
        config.training.learning_rate = 1e-3;
        config.training.warmup_share = 0.1;
        config.training.final_rate = 0.02;
        let mut trainer = Trainer::new(config, units(), 5, 1).unwrap();
        trainer.progress.planned_updates = 100;
        let rate = |step| trainer.learning_rate(step);
        assert!(
            (rate(1) - 1e-4).abs() < 1e-12,
            "linear warm-up over 10 updates"
        );
        assert!(
            (rate(10) - 1e-3).abs() < 1e-12,
            "the peak at the end of the warm-up"
        );
        // Half-way through the decay the cosine is at its middle: (peak + floor) / 2.
        assert!((rate(55) - 1e-3 * (1.0 + 0.02) / 2.0).abs() < 1e-12);
        assert!(
            (rate(100) - 2e-5).abs() < 1e-12,
            "the floor at the last planned update"
        );
        assert!((rate(150) - 2e-5).abs() < 1e-12, "and after it");
        let steps: Vec<f64> = (10..=100).map(rate).collect();
        assert!(
            steps.windows(2).all(|w| w[1] <= w[0]),
            "never rises after the peak"
        );
    }

    #[test]
    fn a_fixed_run_plans_its_schedule_over_all_epochs() {
        let train = synthetic(12, 1);
        let dev = synthetic(3, 2);
        let mut trainer = Trainer::new(tiny_config(), units(), 5, 42).unwrap();
        trainer.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        let per_epoch = trainer.updates();
        assert!(per_epoch > 1);
        assert_eq!(trainer.progress().planned_updates, 2 * per_epoch);
        // A longer run asked for on resume re-plans from where it is.
        trainer.set_epochs(4);
        trainer.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        assert_eq!(trainer.progress().planned_updates, 4 * per_epoch);
    }

    /// A training set whose features come late and out of the utterance's random stream: a
    /// variant drawn from the stream (a second one, every other frame of the first, too short
    /// for the labels of some utterances), noise drawn from it, after a pause that differs by
    /// utterance, so that the prefetch thread and the training loop each compute some of a
    /// batch. `panic_on_prefetch` makes every computation on the prefetch thread panic (counted
    /// in `panicked`); `always_panics` makes one utterance's computation panic anywhere.
    struct SlowSet<'a> {
        utterances: Vec<PreparedUtterance>,
        inner: std::marker::PhantomData<&'a ()>,
        trainer_thread: std::thread::ThreadId,
        panic_on_prefetch: bool,
        always_panics: Option<usize>,
        panicked: AtomicUsize,
    }

    impl SlowSet<'_> {
        fn new(utterances: &[PreparedUtterance]) -> Self {
            let utterances = utterances
                .iter()
                .map(|u| {
                    let first = u.variants[0].clone();
                    let halved = first.select(
                        ndarray::Axis(0),
                        &(0..first.nrows()).step_by(2).collect::<Vec<_>>(),
                    );
                    PreparedUtterance {
                        variants: vec![first, halved],
                        ..u.clone()
                    }
                })
                .collect();
            SlowSet {
                utterances,
                inner: std::marker::PhantomData,
                trainer_thread: std::thread::current().id(),
                panic_on_prefetch: false,
                always_panics: None,
                panicked: AtomicUsize::new(0),
            }
        }
    }

    fn noise(matrix: &mut Array2<f32>, rng: &mut dyn RngCore) {
        matrix.mapv_inplace(|v| v + rng.random_range(-0.05f32..0.05));
    }

    impl TrainingData for SlowSet<'_> {
        fn len(&self) -> usize {
            self.utterances.len()
        }
        fn id(&self, index: usize) -> &str {
            &self.utterances[index].id
        }
        fn labels(&self, index: usize) -> &[u32] {
            &self.utterances[index].labels
        }
        fn frames(&self, index: usize) -> usize {
            self.utterances[index].variants[0].nrows()
        }
        fn features(
            &self,
            index: usize,
            rng: &mut ChaCha8Rng,
            fits: &dyn Fn(usize) -> bool,
        ) -> Array2<f32> {
            std::thread::sleep(std::time::Duration::from_micros(300 * (index % 4) as u64));
            let on_prefetch_thread = rayon::current_thread_index().is_none()
                && std::thread::current().id() != self.trainer_thread;
            if self.always_panics == Some(index) || (self.panic_on_prefetch && on_prefetch_thread) {
                self.panicked.fetch_add(1, Ordering::Relaxed);
                panic!("the features of {} cannot be computed", self.id(index));
            }
            let augment: &Augment = &noise;
            let set = PreparedSet {
                utterances: &self.utterances,
                augment: Some(augment),
            };
            set.features(index, rng, fits)
        }
    }

    /// An epoch record without its wall-clock figures, which differ between equal runs.
    fn zero_the_times(record: &mut EpochRecord) {
        record.frames_per_second = 0.0;
        record.train_seconds = 0.0;
        record.feature_seconds = 0.0;
        record.feature_compute_seconds = 0.0;
        record.dev_seconds = 0.0;
    }

    /// Two epochs of `train` with or without prefetch: the weights and the epoch records with
    /// their times zeroed.
    fn two_epochs(
        train: &dyn TrainingData,
        dev: &[PreparedUtterance],
        prefetch: bool,
    ) -> (Vec<(String, Vec<f32>)>, Vec<EpochRecord>) {
        let mut config = config_with(Normalization::Batch);
        config.training.batch_frames = 90;
        let mut trainer = Trainer::new(config, units(), 5, 42).unwrap();
        trainer.set_prefetch(prefetch);
        let records = (0..2)
            .map(|_| {
                let mut record = trainer.run_epoch(train, dev, &mut |_| {}).unwrap();
                assert!(record.updates > 3, "several batches an epoch");
                assert!(record.feature_compute_seconds > 0.0);
                zero_the_times(&mut record);
                record
            })
            .collect();
        (weights(&trainer), records)
    }

    /// Features computed ahead on the prefetch thread (and, for what it has not reached, by
    /// the training loop) give exactly the weights of features computed batch by batch.
    #[test]
    fn prefetch_trains_the_weights_of_computing_features_in_turn() {
        let utterances = synthetic(16, 1);
        let dev = synthetic(4, 2);
        let train = SlowSet::new(&utterances);
        let (in_turn, records_in_turn) = two_epochs(&train, &dev, false);
        let (ahead, records_ahead) = two_epochs(&train, &dev, true);
        assert_eq!(records_ahead, records_in_turn);
        assert!(in_turn == ahead, "prefetch changed the weights");
        // Without the stream's draws the weights would differ: the check can fail.
        let (plain, _) = two_epochs(&set(&utterances), &dev, true);
        assert!(plain != ahead);
    }

    /// A panic on the prefetch thread stops it; the training loop computes that utterance and
    /// the rest itself, to the same weights.
    #[test]
    fn a_panic_on_the_prefetch_thread_leaves_the_work_to_the_training_loop() {
        let utterances = synthetic(16, 1);
        let dev = synthetic(4, 2);
        let mut train = SlowSet::new(&utterances);
        let (in_turn, _) = two_epochs(&train, &dev, false);
        train.panic_on_prefetch = true;
        let (ahead, _) = two_epochs(&train, &dev, true);
        assert!(in_turn == ahead, "the fallback changed the weights");
        assert!(
            train.panicked.load(Ordering::Relaxed) >= 1,
            "the prefetch thread computed something"
        );
    }

    /// A panic that happens wherever the utterance is computed reaches the caller of
    /// `run_epoch` with its message, as without prefetch, rather than hanging the epoch.
    #[test]
    fn a_feature_panic_reaches_the_caller() {
        let utterances = synthetic(16, 1);
        let dev = synthetic(4, 2);
        let mut train = SlowSet::new(&utterances);
        train.always_panics = Some(5);
        for prefetch in [false, true] {
            let mut trainer = Trainer::new(tiny_config(), units(), 5, 42).unwrap();
            trainer.set_prefetch(prefetch);
            let outcome = std::panic::catch_unwind(AssertUnwindSafe(|| {
                trainer.run_epoch(&train, &dev, &mut |_| {})
            }));
            let payload = outcome.expect_err("the panic reaches the caller");
            let message = payload
                .downcast_ref::<String>()
                .cloned()
                .unwrap_or_default();
            assert_eq!(message, "the features of utt5 cannot be computed");
        }
    }

    /// An error in a step ends the epoch with that error while the prefetch thread is at work.
    #[test]
    fn a_step_error_ends_the_epoch_with_prefetch() {
        let mut utterances = synthetic(16, 1);
        utterances[7].labels[0] = 9;
        let dev = synthetic(4, 2);
        let train = SlowSet::new(&utterances);
        let errors: Vec<String> = [false, true]
            .into_iter()
            .map(|prefetch| {
                let mut trainer = Trainer::new(tiny_config(), units(), 5, 42).unwrap();
                trainer.set_prefetch(prefetch);
                match trainer.run_epoch(&train, &dev, &mut |_| {}) {
                    Ok(_) => panic!("a label out of range fails the step"),
                    Err(e) => e.to_string(),
                }
            })
            .collect();
        assert!(errors[0].contains("label 9"), "{}", errors[0]);
        assert_eq!(errors[0], errors[1]);
    }

    #[test]
    fn a_spent_budget_ends_training() {
        let train = synthetic(12, 1);
        let dev = synthetic(3, 2);
        let mut trainer = Trainer::new(tiny_config(), units(), 5, 42).unwrap();
        trainer.set_deadline(Some(Instant::now() + std::time::Duration::from_secs(3600)));
        assert!(!trainer.finished());
        trainer.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        assert!(
            trainer.progress().planned_updates > trainer.updates(),
            "an hour holds more updates than one epoch of twelve tiny utterances"
        );
        trainer.set_deadline(Some(Instant::now()));
        assert!(trainer.finished());
        let record = trainer.run_epoch(&set(&train), &dev, &mut |_| {}).unwrap();
        assert_eq!(record.updates, 0, "no update once the budget is spent");
    }

    #[test]
    fn batches_group_similar_lengths_within_the_frame_budget() {
        let lengths = [10, 300, 12, 290, 11, 305, 50];
        let mut rng = ChaCha8Rng::seed_from_u64(0);
        let batches = bucketed_batches(&lengths, 700, &mut rng);
        let mut seen: Vec<usize> = batches.concat();
        seen.sort();
        assert_eq!(seen, (0..lengths.len()).collect::<Vec<_>>());
        for batch in &batches {
            let longest = batch.iter().map(|&i| lengths[i]).max().unwrap();
            assert!(
                batch.len() == 1 || batch.len() * longest <= 700,
                "{batch:?}"
            );
        }
        assert_eq!(edit_distance(&[1, 2, 3], &[1, 3, 4, 5]), 3);
    }
}
