//! Times the sums over ranks that data-parallel training makes, through
//! [`MpiCollective`](isogloss_acoustic::collective::MpiCollective) itself: run under `mpirun`
//! with two or more ranks, e.g.
//!
//! ```sh
//! cargo build --release -p isogloss-acoustic --features mpi --example exchange
//! mpirun -np 2 --mca btl_vader_single_copy_mechanism none target/release/examples/exchange
//! mpirun -np 2 --mca btl_vader_single_copy_mechanism none target/release/examples/exchange 5000
//! ```
//!
//! For each buffer size (a gradient of 1.4 M and of 0.88 M parameters, a batch-normalisation
//! sum, a loss) it prints rank 0's median, 10th and 90th percentile over 50 sums. The optional
//! argument makes the last rank arrive that many microseconds after the others at every sum
//! (the slower half of an unbalanced batch); that lateness is subtracted from rank 0's time,
//! so what is printed is the exchange itself after everyone has arrived.

use std::time::{Duration, Instant};

use isogloss_acoustic::collective::{Collective, MpiCollective};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let late = Duration::from_micros(
        std::env::args()
            .nth(1)
            .map(|v| v.parse())
            .transpose()?
            .unwrap_or(0),
    );
    let Some(world) = MpiCollective::from_launcher(Duration::from_secs(60))? else {
        return Err("run this under mpirun with two or more ranks".into());
    };
    let last = world.size() - 1;
    for size in [1_400_000usize, 880_000, 1_024, 3] {
        let mut times = Vec::new();
        for round in 0..60 {
            let mut values = vec![1f32; size];
            // Line the ranks up: a one-value sum returns on every rank once all have called it.
            world.sum_f32("the start line", &mut [0f32])?;
            if world.rank() == last && !late.is_zero() {
                let wait = Instant::now();
                while wait.elapsed() < late {
                    std::hint::spin_loop();
                }
            }
            let started = Instant::now();
            world.sum_f32("the timed sum", &mut values)?;
            let mut spent = started.elapsed().as_secs_f64();
            if world.rank() != last {
                spent -= late.as_secs_f64();
            }
            if values[0] != world.size() as f32 {
                return Err(format!("the sum gave {} on rank {}", values[0], world.rank()).into());
            }
            if round >= 10 {
                times.push(spent * 1e3);
            }
        }
        times.sort_by(f64::total_cmp);
        if world.rank() == 0 {
            println!(
                "{:>9} values ({:>5.2} MB), last rank {:>5} µs late: median {:.3} ms (p10 {:.3}, p90 {:.3})",
                size,
                size as f64 * 4e-6,
                late.as_micros(),
                times[times.len() / 2],
                times[times.len() / 10],
                times[times.len() * 9 / 10]
            );
        }
    }
    Ok(())
}
