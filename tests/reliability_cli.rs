//! Crash safety and carrying on, end to end with the shipped demo model (issue 16):
//! a 1000-item batch with 5 % corrupt items of five kinds, and `transcribe` killed with SIGKILL
//! mid-batch then resumed. Good items are short cuts of real demo recordings, written as WAV.

use std::collections::HashSet;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn text(path: &Path) -> &str {
    path.to_str().expect("test paths are UTF-8")
}

/// Writes `count` short real recordings (the first demo test utterances, decoded) as 16-bit
/// WAV files `goodN.wav` into `dir`; returns their lengths in seconds.
fn good_recordings(dir: &Path, count: usize) -> Vec<f64> {
    let test = fs::read_to_string(repo("tests/data/demo/test.tsv")).unwrap();
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 16_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    test.lines()
        .skip(1)
        .take(count)
        .enumerate()
        .map(|(n, line)| {
            let audio = line.split('\t').nth(1).unwrap();
            let samples =
                isogloss_audio::read_mono_16k(&repo("tests/data/demo").join(audio)).unwrap();
            let mut writer = hound::WavWriter::create(dir.join(format!("good{n}.wav")), spec)
                .expect("a WAV file can be created");
            for x in &samples {
                writer
                    .write_sample((x.clamp(-1.0, 1.0) * 32767.0) as i16)
                    .unwrap();
            }
            writer.finalize().unwrap();
            samples.len() as f64 / 16_000.0
        })
        .collect()
}

/// Manifest rows of `good` cuts: 0.5 s pieces at varied starts of the good recordings.
fn good_rows(lengths: &[f64], good: usize) -> Vec<String> {
    (0..good)
        .map(|i| {
            let file = i % lengths.len();
            let start = ((i / lengths.len()) % 10) as f64 * 0.1;
            let end = (start + 0.5).min(lengths[file]);
            format!("ok{i:04}\tgood{file}.wav\t{start:.1}\t{end:.1}")
        })
        .collect()
}

fn write_manifest(dir: &Path, name: &str, rows: &[String]) -> PathBuf {
    let path = dir.join(name);
    fs::write(
        &path,
        format!("id\taudio\tstart\tend\n{}\n", rows.join("\n")),
    )
    .unwrap();
    path
}

fn transcribe_command(manifest: &Path, out: &Path, resume: bool) -> Command {
    let mut command = Command::new(env!("CARGO_BIN_EXE_isogloss"));
    command.args([
        "transcribe",
        "--model",
        text(&repo("models/demo")),
        "--lexicon",
        text(&repo("models/demo-lm/lexicon-grapheme.tsv")),
        "--lm",
        text(&repo("models/demo-lm/indomain-3gram.arpa")),
        "--beam",
        "4",
        "--manifest",
        text(manifest),
        "--out",
        text(out),
    ]);
    if resume {
        command.arg("--resume");
    }
    command
}

fn run(command: &mut Command) -> Output {
    command.output().expect("the isogloss binary runs")
}

/// The ids of the complete lines of a journal (a line cut by a kill has no line end).
fn journal_ids(out: &Path) -> Vec<String> {
    let path = isogloss_batch::Journal::path_for(out);
    let Ok(text) = fs::read_to_string(path) else {
        return Vec::new();
    };
    text.split_inclusive('\n')
        .filter(|line| line.ends_with('\n'))
        .map(|line| {
            let entry: serde_json::Value = serde_json::from_str(line).unwrap();
            entry["item"]["id"].as_str().unwrap().to_string()
        })
        .collect()
}

/// Issue 16: 1000 short items, 5 % corrupt in five ways (truncated inside the header, a text
/// file with a WAV name, zero bytes, NaN samples, missing): every good item is written, every
/// corrupt one is listed with its file and reason, the exit code is 2, and a rerun with
/// `--resume` decodes only the failed ones again.
#[test]
fn a_thousand_items_with_five_percent_corrupt_ones() {
    let dir = tempfile::tempdir().unwrap();
    let lengths = good_recordings(dir.path(), 10);
    let mut rows = good_rows(&lengths, 950);
    let good_wav = fs::read(dir.path().join("good0.wav")).unwrap();
    let nan_wav = {
        let spec = hound::WavSpec {
            channels: 1,
            sample_rate: 16_000,
            bits_per_sample: 32,
            sample_format: hound::SampleFormat::Float,
        };
        let path = dir.path().join("nan-template.wav");
        let mut writer = hound::WavWriter::create(&path, spec).unwrap();
        for n in 0..8000 {
            writer
                .write_sample(if n == 4000 { f32::NAN } else { 0.01 })
                .unwrap();
        }
        writer.finalize().unwrap();
        fs::read(&path).unwrap()
    };
    // (kind, what the listed reason must say)
    let kinds: [(&str, &str); 5] = [
        ("truncated", "truncated"),
        ("text", "not"),
        ("empty", "empty"),
        ("nan", "not a finite number"),
        ("missing", "no such file"),
    ];
    let mut corrupt = Vec::new();
    for n in 0..50 {
        let (kind, reason) = kinds[n % 5];
        let name = format!("{kind}{n}.wav");
        let path = dir.path().join(&name);
        match kind {
            "truncated" => fs::write(&path, &good_wav[..30]).unwrap(),
            "text" => fs::write(&path, "id\ttext\nthis is a transcript, not audio\n").unwrap(),
            "empty" => fs::write(&path, "").unwrap(),
            "nan" => fs::write(&path, &nan_wav).unwrap(),
            _ => {}
        }
        let id = format!("bad{n:02}");
        // Spread through the batch: after every 19 good rows, one corrupt one.
        rows.insert(n * 20 + 19, format!("{id}\t{name}\t0\t"));
        corrupt.push((id, name, reason));
    }
    assert_eq!(rows.len(), 1000);
    let manifest = write_manifest(dir.path(), "batch.tsv", &rows);
    let out = dir.path().join("hyp.tsv");

    let first = run(&mut transcribe_command(&manifest, &out, false));
    let stderr = String::from_utf8_lossy(&first.stderr);
    assert_eq!(first.status.code(), Some(2), "{stderr}");
    let written: Vec<String> = fs::read_to_string(&out)
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| l.split('\t').next().unwrap().to_string())
        .collect();
    let expected: Vec<String> = (0..950).map(|i| format!("ok{i:04}")).collect();
    assert_eq!(written, expected, "every good item, in manifest order");
    assert!(stderr.contains("50 items failed:"), "{stderr}");
    for (id, name, reason) in &corrupt {
        let line = stderr
            .lines()
            .find(|l| l.trim_start().starts_with(&format!("{id}:")))
            .unwrap_or_else(|| panic!("{id} is not listed:\n{stderr}"));
        assert!(
            line.contains(name.as_str()) && line.to_lowercase().contains(reason),
            "{id} ({name}) should be listed with `{reason}`: {line}"
        );
        // The file's name is said once.
        assert_eq!(line.matches(name.as_str()).count(), 1, "{line}");
    }
    assert_eq!(journal_ids(&out).len(), 950);

    // The rerun decodes only the 50 failed items (they fail again), keeps the 950.
    let before = fs::read(&out).unwrap();
    let second = run(&mut transcribe_command(&manifest, &out, true));
    let stderr = String::from_utf8_lossy(&second.stderr);
    assert_eq!(second.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains("(950 resumed)"), "{stderr}");
    assert!(stderr.contains("50 items failed:"), "{stderr}");
    assert_eq!(journal_ids(&out).len(), 950, "nothing decoded twice");
    assert_eq!(fs::read(&out).unwrap(), before);
}

/// Small deterministic generator for the kill points (SplitMix64).
fn next_random(state: &mut u64) -> u64 {
    *state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Issue 16: `transcribe` killed with SIGKILL mid-batch (after a random number of journalled
/// items), then `--resume`: every item journalled before the kill is kept and not decoded
/// again, and the final output is byte for byte that of an uninterrupted run. Three kill points
/// by default; `ISOGLOSS_KILL_POINTS` asks for more.
#[test]
fn transcribe_killed_mid_batch_resumes_without_loss_or_repeats() {
    let points: usize = std::env::var("ISOGLOSS_KILL_POINTS")
        .map(|v| v.parse().expect("ISOGLOSS_KILL_POINTS: a whole number"))
        .unwrap_or(3);
    let dir = tempfile::tempdir().unwrap();
    let lengths = good_recordings(dir.path(), 10);
    let items = 300;
    let manifest = write_manifest(dir.path(), "batch.tsv", &good_rows(&lengths, items));
    let reference = dir.path().join("reference.tsv");
    let whole = run(&mut transcribe_command(&manifest, &reference, false));
    assert!(
        whole.status.success(),
        "{}",
        String::from_utf8_lossy(&whole.stderr)
    );
    let reference = fs::read(&reference).unwrap();

    let mut state = 16;
    let mut landed = 0;
    for point in 0..points {
        let out = dir.path().join(format!("killed{point}.tsv"));
        // Kill after a random number of journalled items, up to two thirds of the batch.
        let target = 1 + (next_random(&mut state) % (items as u64 * 2 / 3)) as usize;
        let mut child = transcribe_command(&manifest, &out, false)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let started = Instant::now();
        let killed = loop {
            if child.try_wait().unwrap().is_some() {
                break false;
            }
            if journal_ids(&out).len() >= target {
                child.kill().unwrap(); // SIGKILL
                child.wait().unwrap();
                break true;
            }
            assert!(
                started.elapsed() < Duration::from_secs(300),
                "the run hangs"
            );
            std::thread::sleep(Duration::from_millis(2));
        };
        if !killed {
            continue;
        }
        landed += 1;
        assert!(!out.exists(), "no output file before the batch ends");
        let kept = journal_ids(&out);
        println!(
            "kill point {point}: SIGKILL after {} of {items} items journalled",
            kept.len()
        );
        let resumed = run(&mut transcribe_command(&manifest, &out, true));
        let stderr = String::from_utf8_lossy(&resumed.stderr);
        assert!(resumed.status.success(), "{stderr}");
        assert!(
            stderr.contains(&format!("({} resumed)", kept.len())),
            "{} items were journalled before the kill: {stderr}",
            kept.len()
        );
        let after = journal_ids(&out);
        let unique: HashSet<&String> = after.iter().collect();
        assert!(
            kept.iter().all(|id| unique.contains(id)),
            "journalled items kept"
        );
        assert_eq!((after.len(), unique.len()), (items, items), "none twice");
        assert_eq!(fs::read(&out).unwrap(), reference, "kill point {point}");
    }
    println!("{landed} of {points} kills landed mid-batch; every resumed run matched");
    assert!(
        landed * 2 >= points,
        "only {landed} of {points} kills landed mid-batch"
    );
}

fn train_command(out: &Path, resume: bool) -> Command {
    let mini = repo("tests/data/mini/manifest.tsv");
    let mut command = Command::new(env!("CARGO_BIN_EXE_isogloss"));
    command
        .args(["train", "--manifest", text(&mini), "--dev", text(&mini)])
        .args([
            "--column",
            "dialectal",
            "--out",
            text(out),
            "--epochs",
            "100",
        ])
        .args([
            "--config",
            text(&repo("crates/fuzz/seeds/model-config/tiny.toml")),
        ])
        // Same threads in every run, so that the sums come out the same.
        .env("RAYON_NUM_THREADS", "2");
    if resume {
        command.arg("--resume");
    }
    command
}

/// Issue 16: `train` (a tiny network on the mini corpus, 100 epochs, under a second) killed
/// with SIGKILL at random times — during feature caching, an epoch or a checkpoint write — then
/// `--resume`: the checkpoint left behind always loads, and the final weights are byte for byte
/// those of an uninterrupted run with the same seed and threads. A kill before the first
/// checkpoint leaves nothing to resume; the rerun then starts afresh. Three kill points by
/// default; `ISOGLOSS_KILL_POINTS` asks for more.
#[test]
fn train_killed_at_random_points_resumes_to_the_same_weights() {
    let points: usize = std::env::var("ISOGLOSS_KILL_POINTS")
        .map(|v| v.parse().expect("ISOGLOSS_KILL_POINTS: a whole number"))
        .unwrap_or(3);
    let dir = tempfile::tempdir().unwrap();
    let reference = dir.path().join("reference");
    let whole = run(&mut train_command(&reference, false));
    assert!(
        whole.status.success(),
        "{}",
        String::from_utf8_lossy(&whole.stderr)
    );
    let started = Instant::now();
    run(&mut train_command(&dir.path().join("timing"), false));
    let wall = started.elapsed();
    let reference = fs::read(reference.join("model.safetensors")).unwrap();

    let mut state = 61;
    let mut resumed_from_checkpoint = 0;
    for point in 0..points {
        let out = dir.path().join(format!("killed{point}"));
        let delay = wall.mul_f64((next_random(&mut state) % 1000) as f64 / 1000.0 * 0.9);
        let mut child = train_command(&out, false)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(delay);
        child.kill().unwrap(); // SIGKILL (an error only if it had already ended)
        child.wait().unwrap();
        let has_checkpoint = out.join("checkpoint.safetensors").exists();
        let rerun = run(&mut train_command(&out, has_checkpoint));
        let stderr = String::from_utf8_lossy(&rerun.stderr);
        assert!(rerun.status.success(), "kill point {point}: {stderr}");
        resumed_from_checkpoint += usize::from(has_checkpoint);
        println!(
            "kill point {point}: SIGKILL after {:.0} ms, {}",
            delay.as_secs_f64() * 1e3,
            if has_checkpoint {
                "resumed from its checkpoint"
            } else {
                "no checkpoint yet, started afresh"
            }
        );
        assert_eq!(
            fs::read(out.join("model.safetensors")).unwrap(),
            reference,
            "kill point {point}: final weights differ from the uninterrupted run"
        );
    }
    println!("{resumed_from_checkpoint} of {points} runs resumed from a checkpoint");
}
