//! Communication between the processes (ranks) of a data-parallel training run.
//!
//! Key design decision: the training engine talks to other ranks only through the small
//! [`Collective`] trait — element-wise sums of a buffer over all ranks, every rank receiving the
//! result — so that the training loop, the batch-normalised layers and the dev pass are written
//! once. [`SingleProcess`] is the one-rank implementation: it does nothing, and the training
//! loop takes its unchanged single-process path whenever [`Collective::size`] is 1, so a build
//! with MPI costs a plain run nothing. [`MpiCollective`] (cargo feature `mpi`) sums over MPI's
//! world communicator; each sum is a non-blocking all-reduce polled against a timeout, so a rank
//! that died or hangs ends the job with a message instead of leaving the others waiting forever
//! (docs/training.md, "Data-parallel training").
//!
//! What is summed, in order, per update (docs/training.md has the contract): per
//! batch-normalised layer the unit sums and the centred squares of the forward pass, per such
//! layer in reverse order the two gradient sums of the backward pass, the loss and frame counts,
//! and one flat `f32` buffer holding every parameter's gradient.

use crate::AcousticError;

/// Exit status of a data-parallel job that ended because a rank failed or stopped answering
/// (docs/exit-codes.md).
pub const RANK_FAILED_EXIT_CODE: i32 = 3;

/// Sums over the ranks of a data-parallel run.
///
/// Every rank must make the same calls in the same order with buffers of the same length;
/// `what` names the exchange in the message a timeout prints.
pub trait Collective: Send + Sync {
    /// This process's rank, 0-based.
    fn rank(&self) -> usize;
    /// Number of ranks.
    fn size(&self) -> usize;
    /// Replaces `values` by their element-wise sum over all ranks.
    fn sum_f64(&self, what: &str, values: &mut [f64]) -> Result<(), AcousticError>;
    /// Replaces `values` by their element-wise sum over all ranks.
    fn sum_f32(&self, what: &str, values: &mut [f32]) -> Result<(), AcousticError>;
    /// Replaces `values` by rank 0's (a sum in which the other ranks give zeros, which is exact).
    fn broadcast_f64(&self, what: &str, values: &mut [f64]) -> Result<(), AcousticError> {
        if self.rank() != 0 {
            values.fill(0.0);
        }
        self.sum_f64(what, values)
    }
    /// Ends every rank of the job with `code` (after this rank printed why).
    fn abort(&self, code: i32) -> !;
    /// Wall seconds this rank has spent in sums so far (waiting for the slowest rank
    /// included): what data parallelism costs on top of the work. 0 for one process.
    fn exchange_seconds(&self) -> f64 {
        0.0
    }
}

/// The one-rank "collective": sums over one rank leave the values as they are.
#[derive(Debug, Clone, Copy, Default)]
pub struct SingleProcess;

impl Collective for SingleProcess {
    fn rank(&self) -> usize {
        0
    }

    fn size(&self) -> usize {
        1
    }

    fn sum_f64(&self, _what: &str, _values: &mut [f64]) -> Result<(), AcousticError> {
        Ok(())
    }

    fn sum_f32(&self, _what: &str, _values: &mut [f32]) -> Result<(), AcousticError> {
        Ok(())
    }

    fn abort(&self, code: i32) -> ! {
        std::process::exit(code)
    }
}

/// Rank `rank`'s share of `lengths.len()` items of the given lengths, out of `size` ranks,
/// balanced by length: the items are sorted by length (longest first, ties by position) and
/// dealt out in a serpentine (0, 1, …, N−1, N−1, …, 0, 0, 1, …). Each rank gets about the same
/// total length, and every run of similar lengths — what one duration-bucketed batch holds — is
/// split about evenly, so the ranks finish each update at about the same time. Returns the
/// positions in ascending order.
pub fn balanced_share(lengths: &[f64], rank: usize, size: usize) -> Vec<usize> {
    let size = size.max(1);
    let mut order: Vec<usize> = (0..lengths.len()).collect();
    order.sort_by(|&a, &b| lengths[b].total_cmp(&lengths[a]).then(a.cmp(&b)));
    let mut share: Vec<usize> = order
        .iter()
        .enumerate()
        .filter(|(position, _)| {
            let round = position / size;
            let seat = position % size;
            let owner = if round.is_multiple_of(2) {
                seat
            } else {
                size - 1 - seat
            };
            owner == rank
        })
        .map(|(_, &item)| item)
        .collect();
    share.sort_unstable();
    share
}

#[cfg(feature = "mpi")]
pub use self::mpi_world::MpiCollective;

#[cfg(feature = "mpi")]
mod mpi_world {
    use std::sync::atomic::{AtomicU64, Ordering};
    use std::thread::ThreadId;
    use std::time::{Duration, Instant};

    use mpi::collective::SystemOperation;
    use mpi::datatype::Equivalence;
    use mpi::environment::Universe;
    use mpi::topology::SimpleCommunicator;
    use mpi::traits::*;
    use mpi::Threading;

    use super::{Collective, RANK_FAILED_EXIT_CODE};
    use crate::AcousticError;

    /// Environment variables set by the MPI launchers (Open MPI's `mpirun`, PMI and PMIx, which
    /// batch schedulers' launchers use): a process without any of them runs alone.
    const LAUNCHER_VARIABLES: [&str; 3] = ["OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_RANK"];

    /// Polls of a pending all-reduce before the waiting rank starts to yield its core between
    /// polls. Open MPI moves a non-blocking collective on only inside a poll, so a rank must
    /// not pause between polls while the exchange is under way: with a 50 µs sleep between
    /// polls after 2 000 of them (this module's earlier rule) a 5.6 MB sum of two ranks took
    /// 10.4 ms instead of 1.75, and 19.1 instead of 1.8 once the other rank came 5 ms late
    /// (`examples/exchange.rs`, DEVELOPERS.md "Data-parallel training"). A yield costs nothing
    /// on an idle core and hands an oversubscribed one to whoever waits for it.
    const YIELD_AFTER_POLLS: u32 = 2_000;

    /// A wait longer than this is a rank that has stopped or hangs, not a slower one: from
    /// then on the waiting rank sleeps between polls, so a stuck job does not hold its cores
    /// until the timeout ends it.
    const SLEEP_AFTER: Duration = Duration::from_secs(1);

    /// The ranks of MPI's world communicator. MPI is initialised with
    /// `MPI_THREAD_FUNNELED`: only the thread that created this value may communicate, and every
    /// call checks it (the training loop, candle's forward and backward passes and thus the
    /// fused layers all run their collectives on the calling thread; rayon's workers never do).
    pub struct MpiCollective {
        world: SimpleCommunicator,
        rank: usize,
        size: usize,
        timeout: Duration,
        thread: ThreadId,
        host: String,
        // Nanoseconds spent in sums (only the communicating thread adds to it).
        spent: AtomicU64,
        // Finalises MPI when dropped, after `world`.
        _universe: Universe,
    }

    // SAFETY: the communicator handle is only used by the thread that initialised MPI: every
    // method that touches it first checks `thread` and refuses otherwise, which is what
    // MPI_THREAD_FUNNELED requires.
    unsafe impl Send for MpiCollective {}
    // SAFETY: as above; shared references never communicate from another thread.
    unsafe impl Sync for MpiCollective {}

    impl std::fmt::Debug for MpiCollective {
        fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            write!(
                f,
                "MpiCollective(rank {} of {} on {})",
                self.rank, self.size, self.host
            )
        }
    }

    impl MpiCollective {
        /// True when an MPI launcher started this process.
        pub fn launched() -> bool {
            LAUNCHER_VARIABLES
                .iter()
                .any(|name| std::env::var_os(name).is_some())
        }

        /// Initialises MPI when a launcher started this process (`None` otherwise: a plain
        /// run stays a single process and never touches MPI). A collective that has not
        /// completed after `timeout` ends the job.
        pub fn from_launcher(timeout: Duration) -> Result<Option<Self>, AcousticError> {
            if !Self::launched() {
                return Ok(None);
            }
            let (universe, threading) = mpi::initialize_with_threading(Threading::Funneled)
                .ok_or_else(|| {
                    AcousticError::Collective("MPI was already initialised in this process".into())
                })?;
            if threading < Threading::Funneled {
                return Err(AcousticError::Collective(format!(
                    "the MPI library offers thread support {threading:?}; training needs at least Funneled"
                )));
            }
            let world = universe.world();
            let rank = usize::try_from(world.rank()).unwrap_or(0);
            let size = usize::try_from(world.size()).unwrap_or(1);
            Ok(Some(MpiCollective {
                world,
                rank,
                size,
                timeout,
                thread: std::thread::current().id(),
                host: mpi::environment::processor_name().unwrap_or_else(|_| "?".into()),
                spent: AtomicU64::new(0),
                _universe: universe,
            }))
        }

        /// The host this rank runs on (for the start-up line).
        pub fn host(&self) -> &str {
            &self.host
        }

        fn sum<T: Equivalence + Copy>(
            &self,
            what: &str,
            values: &mut [T],
        ) -> Result<(), AcousticError> {
            if std::thread::current().id() != self.thread {
                return Err(AcousticError::Collective(format!(
                    "{what}: MPI called from a thread other than the one that initialised it"
                )));
            }
            let send = values.to_vec();
            let started = Instant::now();
            mpi::request::scope(|scope| {
                let mut request = self.world.immediate_all_reduce_into(
                    scope,
                    &send[..],
                    &mut *values,
                    SystemOperation::sum(),
                );
                let mut polls = 0u32;
                loop {
                    match request.test() {
                        Ok(_) => return,
                        Err(pending) => request = pending,
                    }
                    if started.elapsed() >= self.timeout {
                        eprintln!(
                            "error: rank {} of {} ({}): no answer from every rank for {what} within {} s (--rank-timeout): a rank has failed or hangs; ending the job (the checkpoint of the last finished epoch is kept)",
                            self.rank,
                            self.size,
                            self.host,
                            self.timeout.as_secs_f64()
                        );
                        self.world.abort(RANK_FAILED_EXIT_CODE);
                    }
                    polls = polls.saturating_add(1);
                    if started.elapsed() >= SLEEP_AFTER {
                        std::thread::sleep(Duration::from_millis(1));
                    } else if polls > YIELD_AFTER_POLLS {
                        std::thread::yield_now();
                    }
                }
            });
            let nanos = u64::try_from(started.elapsed().as_nanos()).unwrap_or(u64::MAX);
            self.spent.fetch_add(nanos, Ordering::Relaxed);
            Ok(())
        }
    }

    impl Collective for MpiCollective {
        fn rank(&self) -> usize {
            self.rank
        }

        fn size(&self) -> usize {
            self.size
        }

        fn sum_f64(&self, what: &str, values: &mut [f64]) -> Result<(), AcousticError> {
            self.sum(what, values)
        }

        fn sum_f32(&self, what: &str, values: &mut [f32]) -> Result<(), AcousticError> {
            self.sum(what, values)
        }

        fn abort(&self, code: i32) -> ! {
            self.world.abort(code)
        }

        fn exchange_seconds(&self) -> f64 {
            self.spent.load(Ordering::Relaxed) as f64 * 1e-9
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shares_cover_every_item_once_and_balance_the_lengths() {
        let lengths: Vec<f64> = (0..103).map(|i| ((i * 37) % 101) as f64 + 1.0).collect();
        for size in 1..=5 {
            let shares: Vec<Vec<usize>> = (0..size)
                .map(|r| balanced_share(&lengths, r, size))
                .collect();
            let mut all: Vec<usize> = shares.concat();
            all.sort_unstable();
            assert_eq!(all, (0..lengths.len()).collect::<Vec<_>>());
            let totals: Vec<f64> = shares
                .iter()
                .map(|s| s.iter().map(|&i| lengths[i]).sum())
                .collect();
            let longest = lengths.iter().copied().fold(0.0, f64::max);
            let spread = totals.iter().copied().fold(0.0, f64::max)
                - totals.iter().copied().fold(f64::INFINITY, f64::min);
            // A serpentine deal leaves the totals within one item's length of each other.
            assert!(spread <= longest, "{size} ranks: {totals:?}");
        }
    }

    #[test]
    fn the_deal_is_a_serpentine_over_the_sorted_lengths() {
        // Sorted longest first: items 3, 1, 0, 2 (lengths 9, 7, 5, 1).
        let lengths = [5.0, 7.0, 1.0, 9.0];
        assert_eq!(balanced_share(&lengths, 0, 2), vec![2, 3]); // 9 and 1
        assert_eq!(balanced_share(&lengths, 1, 2), vec![0, 1]); // 7 and 5
    }

    #[test]
    fn one_process_sums_and_broadcasts_to_itself() {
        let mut values = [1.5, -2.0];
        SingleProcess.sum_f64("test", &mut values).unwrap();
        SingleProcess.broadcast_f64("test", &mut values).unwrap();
        assert_eq!(values, [1.5, -2.0]);
        assert_eq!((SingleProcess.rank(), SingleProcess.size()), (0, 1));
    }
}
