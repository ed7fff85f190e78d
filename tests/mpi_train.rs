//! Data-parallel `isogloss train` under MPI (issue 19), built with the `mpi` feature and run
//! with Open MPI's `mpirun` on this machine: two ranks train a tiny batch-normalised network on
//! a handful of demo utterances and end with the weights one process gets (to the tolerance
//! below), rank 0 alone writes the model directory, a killed rank ends the job within the rank
//! timeout, a rank that stops answering makes the others end the job with the timeout's message,
//! and the checkpoint left behind resumes (with another number of ranks).
//!
//! Runs as root are allowed through Open MPI's environment variables, set here for `mpirun`
//! only; `--oversubscribe` lets two ranks run on a machine that reports fewer slots.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Output, Stdio};
use std::time::{Duration, Instant};

use isogloss_acoustic::train::Trainer;

/// Largest difference allowed between a weight of the two-rank run and the one-process run,
/// relative to max(1, |weight|), after two epochs (16 updates, 14 of them with one rank idle).
/// Only the order of floating-point sums differs (per rank, then over the ranks:
/// docs/training.md, "Data-parallel training"); measured 8.9e-8 on this machine (a few units
/// in the last place of f32); the bound leaves a hundredfold room for other all-reduce
/// algorithms while a rank's gradient counted twice or missing moves weights by 1e-3 and more.
const WEIGHT_TOLERANCE: f32 = 1e-5;

/// The same for the per-epoch training and dev losses and dev error rate of the log.
const LOSS_TOLERANCE: f64 = 1e-5;

/// Seconds a rank waits at an exchange in the failure tests.
const RANK_TIMEOUT: u64 = 8;

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn text(path: &Path) -> &str {
    path.to_str().expect("test paths are UTF-8")
}

/// Rows of a demo manifest, audio made absolute.
fn manifest(dir: &Path, name: &str, split: &str, rows: std::ops::Range<usize>) -> PathBuf {
    let source = fs::read_to_string(repo("tests/data/demo").join(format!("{split}.tsv"))).unwrap();
    let mut lines = source.lines();
    let mut out = lines.next().unwrap().to_string() + "\n";
    for line in lines.skip(rows.start).take(rows.len()) {
        let mut fields: Vec<String> = line.split('\t').map(str::to_string).collect();
        fields[1] = repo("tests/data/demo")
            .join(&fields[1])
            .display()
            .to_string();
        out.push_str(&fields.join("\t"));
        out.push('\n');
    }
    let path = dir.join(name);
    fs::write(&path, out).unwrap();
    path
}

/// A tiny batch-normalised network with dropout, small batches (some hold one or two
/// utterances, so a rank sometimes has no part in a batch) and every perturbation but babble
/// noise (whose talkers come from the rank's own share).
fn config(dir: &Path) -> PathBuf {
    let path = dir.join("tiny.toml");
    fs::write(
        &path,
        r#"[model]
normalization = "batch"
dropout = 0.1
layers = [
  { taps = [-1, 0, 1], width = 48, keep_every = 3 },
  { taps = [-1, 0, 1], width = 48 },
  { taps = [0], width = 48 },
]

[training]
epochs = 2
batch_frames = 700
learning_rate = 0.003
warmup_share = 0.2

[augmentation.noise]
kinds = ["white", "pink", "brown"]

[features]
cmvn = "utterance"
"#,
    )
    .unwrap();
    path
}

struct Corpus {
    _dir: tempfile::TempDir,
    root: PathBuf,
    train: PathBuf,
    dev: PathBuf,
    config: PathBuf,
}

fn corpus() -> Corpus {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path().to_path_buf();
    Corpus {
        train: manifest(&root, "train.tsv", "train", 0..16),
        // Dev rows whose letters all occur in those training rows.
        dev: manifest(&root, "dev.tsv", "dev", 1..6),
        config: config(&root),
        root,
        _dir: dir,
    }
}

fn train_args(corpus: &Corpus, out: &Path, extra: &[&str]) -> Vec<String> {
    let mut args: Vec<String> = [
        "train",
        "--manifest",
        text(&corpus.train),
        "--dev",
        text(&corpus.dev),
        "--column",
        "dialectal",
        "--config",
        text(&corpus.config),
        "--out",
        text(out),
        "--threads",
        "1",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    args.extend(extra.iter().map(|s| s.to_string()));
    args
}

/// `mpirun -np N isogloss …`, with a marker in the environment that finds the ranks again.
fn mpirun(ranks: usize, args: &[String], marker: &str) -> Command {
    let mut command = Command::new("mpirun");
    command
        .args(["--oversubscribe", "--bind-to", "none", "-np"])
        .arg(ranks.to_string())
        .args(["--mca", "btl_vader_single_copy_mechanism", "none"])
        .arg(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .env("OMPI_ALLOW_RUN_AS_ROOT", "1")
        .env("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1")
        .env("ISOGLOSS_TEST_JOB", marker)
        .env_remove("RAYON_NUM_THREADS");
    command
}

fn single(args: &[String]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .unwrap()
}

fn succeeded(output: &Output, what: &str) {
    assert!(
        output.status.success(),
        "{what}: {:?}\n{}",
        output.status,
        String::from_utf8_lossy(&output.stderr)
    );
}

/// Every parameter and running statistic of a checkpoint, by name.
fn weights(out: &Path) -> Vec<(String, Vec<f32>)> {
    let trainer = Trainer::load_checkpoint(&out.join("checkpoint.safetensors")).unwrap();
    trainer
        .model_tensors()
        .iter()
        .map(|(name, var)| {
            let values = var.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
            (name.clone(), values)
        })
        .collect()
}

fn log_lines(out: &Path) -> Vec<serde_json::Value> {
    fs::read_to_string(out.join("training.jsonl"))
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

fn epochs_of(lines: &[serde_json::Value]) -> Vec<&serde_json::Value> {
    lines.iter().filter(|l| l["event"] == "epoch").collect()
}

fn relative(a: f64, b: f64) -> f64 {
    (a - b).abs() / a.abs().max(1.0)
}

#[test]
fn two_ranks_give_the_weights_of_one_process() {
    let corpus = corpus();
    let alone = corpus.root.join("alone");
    let ranked = corpus.root.join("ranked");
    succeeded(&single(&train_args(&corpus, &alone, &[])), "one process");
    let output = mpirun(2, &train_args(&corpus, &ranked, &[]), "equal")
        .output()
        .unwrap();
    succeeded(&output, "two ranks");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("data-parallel training: 2 ranks, threads per rank: 1"),
        "{stderr}"
    );

    let (a, b) = (weights(&alone), weights(&ranked));
    assert_eq!(a.len(), b.len());
    let mut largest = 0f32;
    for ((name, x), (other, y)) in a.iter().zip(&b) {
        assert_eq!(name, other);
        assert_eq!(x.len(), y.len(), "{name}");
        for (u, v) in x.iter().zip(y) {
            largest = largest.max((u - v).abs() / u.abs().max(1.0));
        }
    }
    println!("largest relative weight difference: {largest:e}");
    assert!(largest <= WEIGHT_TOLERANCE, "{largest:e}");

    // One log written once (rank 0 alone writes), with the same epochs.
    let (one, two) = (log_lines(&alone), log_lines(&ranked));
    assert_eq!(two.iter().filter(|l| l["event"] == "start").count(), 1);
    assert_eq!(two[0]["ranks"], 2);
    println!("updates per epoch: {}", epochs_of(&two)[0]["updates"]);
    assert_eq!(one[0]["train_utterances"], two[0]["train_utterances"]);
    assert_eq!(one[0]["dev_utterances"], two[0]["dev_utterances"]);
    let (one, two) = (epochs_of(&one), epochs_of(&two));
    assert_eq!(one.len(), 2);
    assert_eq!(two.len(), 2);
    for (x, y) in one.iter().zip(&two) {
        assert_eq!(x["updates"], y["updates"]);
        assert_eq!(x["skipped_batches"], y["skipped_batches"]);
        // The time in exchanges: none alone; some, and less than the pass, for the ranks.
        assert_eq!(x["exchange_seconds"], 0.0);
        let (exchange, pass) = (
            y["exchange_seconds"].as_f64().unwrap(),
            y["train_seconds"].as_f64().unwrap(),
        );
        assert!(exchange > 0.0 && exchange < pass, "{exchange} of {pass} s");
        for key in ["train_loss", "dev_loss", "dev_unit_error_rate"] {
            let (u, v) = (x[key].as_f64().unwrap(), y[key].as_f64().unwrap());
            println!("{key}: {u} vs {v}");
            assert!(relative(u, v) <= LOSS_TOLERANCE, "{key}: {u} vs {v}");
        }
    }
    assert!(ranked.join("model.safetensors").exists());
    // Each rank cached its own share.
    let caches: Vec<String> = fs::read_dir(ranked.join("cache"))
        .unwrap()
        .flat_map(|key| fs::read_dir(key.unwrap().path()).unwrap())
        .map(|entry| entry.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    for name in [
        "train-0-of-2.pcm",
        "train-1-of-2.pcm",
        "dev-0-of-2",
        "dev-1-of-2",
    ] {
        assert!(caches.iter().any(|c| c == name), "{name} in {caches:?}");
    }
}

/// The process ids of the ranks of the job marked `marker`, by rank.
fn rank_pid(marker: &str, rank: usize) -> Option<i32> {
    let wanted_job = format!("ISOGLOSS_TEST_JOB={marker}");
    let wanted_rank = format!("OMPI_COMM_WORLD_RANK={rank}");
    fs::read_dir("/proc").ok()?.find_map(|entry| {
        let entry = entry.ok()?;
        let pid: i32 = entry.file_name().to_str()?.parse().ok()?;
        let environ = fs::read(entry.path().join("environ")).ok()?;
        let variables: Vec<&[u8]> = environ.split(|&b| b == 0).collect();
        let has = |wanted: &str| variables.contains(&wanted.as_bytes());
        let exe = fs::read_link(entry.path().join("exe")).ok()?;
        let isogloss = exe.file_name()? == "isogloss";
        (isogloss && has(&wanted_job) && has(&wanted_rank)).then_some(pid)
    })
}

/// Waits for the first checkpoint of a job, then finds its rank 1.
fn rank_one_after_first_epoch(job: &mut Child, out: &Path, marker: &str) -> i32 {
    let started = Instant::now();
    while !out.join("checkpoint.safetensors").exists() {
        if let Some(status) = job.try_wait().unwrap() {
            panic!("the job ended before its first checkpoint: {status:?}");
        }
        assert!(
            started.elapsed() < Duration::from_secs(300),
            "no checkpoint after 300 s"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    rank_pid(marker, 1).expect("rank 1 is running")
}

/// Waits for a job to end, at most `limit`; returns its status and how long it took.
fn ended_within(job: &mut Child, limit: Duration) -> (ExitStatus, Duration) {
    let started = Instant::now();
    loop {
        if let Some(status) = job.try_wait().unwrap() {
            return (status, started.elapsed());
        }
        if started.elapsed() > limit {
            let _ = job.kill();
            panic!(
                "the job still runs {} s after a rank failed",
                limit.as_secs()
            );
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn signal(pid: i32, signal: &str) {
    let status = Command::new("kill")
        .args([signal, &pid.to_string()])
        .status()
        .unwrap();
    assert!(status.success(), "kill {signal} {pid}");
}

fn read_stderr(job: &mut Child) -> String {
    let mut text = String::new();
    if let Some(mut stderr) = job.stderr.take() {
        std::io::Read::read_to_string(&mut stderr, &mut text).unwrap();
    }
    text
}

/// Resumes `out` for one more epoch than its checkpoint holds (`ranks` 1: one process).
fn resume_one_more_epoch(corpus: &Corpus, out: &Path, ranks: usize) {
    let done = Trainer::load_checkpoint(&out.join("checkpoint.safetensors"))
        .expect("the checkpoint of the last finished epoch stays valid")
        .progress()
        .epochs_done;
    assert!(done >= 1);
    let epochs = (done + 1).to_string();
    let args = train_args(corpus, out, &["--resume", "--epochs", &epochs]);
    let output = if ranks == 1 {
        single(&args)
    } else {
        mpirun(ranks, &args, "resume").output().unwrap()
    };
    succeeded(&output, "resume");
    let after = Trainer::load_checkpoint(&out.join("checkpoint.safetensors")).unwrap();
    assert_eq!(after.progress().epochs_done, done + 1);
    let lines = log_lines(out);
    let resumed = lines.iter().rposition(|l| l["event"] == "resume").unwrap();
    assert_eq!(lines[resumed]["ranks"], ranks);
    assert_eq!(epochs_of(&lines[resumed..]).len(), 1);
}

#[test]
fn a_killed_rank_ends_the_job_and_the_checkpoint_resumes_on_one_process() {
    let corpus = corpus();
    let out = corpus.root.join("killed");
    let timeout = RANK_TIMEOUT.to_string();
    let args = train_args(
        &corpus,
        &out,
        &["--epochs", "500", "--rank-timeout", &timeout],
    );
    let mut job = mpirun(2, &args, "killed")
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let victim = rank_one_after_first_epoch(&mut job, &out, "killed");
    signal(victim, "-KILL");
    let (status, took) = ended_within(&mut job, Duration::from_secs(RANK_TIMEOUT + 30));
    let stderr = read_stderr(&mut job);
    println!("ended {took:?} after the kill: {status:?}\n{stderr}");
    assert!(!status.success(), "{stderr}");
    assert!(rank_pid("killed", 0).is_none(), "rank 0 is gone too");
    resume_one_more_epoch(&corpus, &out, 1);
}

#[test]
fn a_rank_that_stops_answering_times_out_the_others_and_the_job_resumes_on_two_ranks() {
    let corpus = corpus();
    let out = corpus.root.join("stopped");
    let timeout = RANK_TIMEOUT.to_string();
    let args = train_args(
        &corpus,
        &out,
        &["--epochs", "500", "--rank-timeout", &timeout],
    );
    let mut job = mpirun(2, &args, "stopped")
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let victim = rank_one_after_first_epoch(&mut job, &out, "stopped");
    signal(victim, "-STOP");
    let (status, took) = ended_within(&mut job, Duration::from_secs(RANK_TIMEOUT + 30));
    let stderr = read_stderr(&mut job);
    println!("ended {took:?} after the stop: {status:?}\n{stderr}");
    // The stopped rank may outlive the job; end it.
    if rank_pid("stopped", 1).is_some() {
        let _ = Command::new("kill")
            .args(["-KILL", &victim.to_string()])
            .status();
    }
    assert_eq!(status.code(), Some(3), "{stderr}");
    assert!(
        took >= Duration::from_secs(RANK_TIMEOUT / 2),
        "ended by the timeout, not before: {took:?}"
    );
    assert!(
        stderr.contains("rank 0 of 2")
            && stderr.contains(&format!("within {RANK_TIMEOUT} s (--rank-timeout)")),
        "{stderr}"
    );
    resume_one_more_epoch(&corpus, &out, 2);
}
