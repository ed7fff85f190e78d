//! Issue 16: training's feature cache (dev) and PCM cache (train) isolate each audio file: a
//! panic while one file is decoded (as a decoding library can on a crafted file) is that file's
//! failure, listed with its reason, and every other file is decoded and cached. The audio
//! reader is replaced by one that panics on `panic.wav`, as the batch crate's tests do.

use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};

use isogloss_acoustic::audio_set::PcmStore;
use isogloss_acoustic::pipeline::manifest_features_with;
use isogloss_audio::{AudioError, Segment};
use isogloss_corpus::Manifest;
use isogloss_features::FeatureConfig;

const PANIC_MESSAGE: &str = "internal state the reader did not expect";

/// A manifest of four rows over three files; rows `b` and `c` cut `panic.wav`.
fn manifest(dir: &Path) -> Manifest {
    let path = dir.join("m.tsv");
    std::fs::write(
        &path,
        "id\taudio\tstart\tend\tspeaker\tdialect\ttext\n\
         a\tone.wav\t\t\ts1\td\tx\n\
         b\tpanic.wav\t0\t0.5\ts1\td\ty\n\
         c\tpanic.wav\t0.5\t1\ts2\td\ty\n\
         d\ttwo.wav\t\t\ts2\td\tz\n",
    )
    .unwrap();
    Manifest::read(&path).unwrap()
}

/// Half a second of a 440 Hz tone per segment, or a panic for `panic.wav`; counts its calls.
fn reader(
    calls: &AtomicUsize,
) -> impl Fn(&Path, &[Segment]) -> Result<Vec<Vec<f32>>, AudioError> + Sync + '_ {
    move |path, segments| {
        calls.fetch_add(1, Ordering::Relaxed);
        if path.ends_with("panic.wav") {
            panic!("{PANIC_MESSAGE}");
        }
        let tone: Vec<f32> = (0..8000)
            .map(|i| 0.3 * (2.0 * std::f32::consts::PI * 440.0 * i as f32 / 16_000.0).sin())
            .collect();
        Ok(segments.iter().map(|_| tone.clone()).collect())
    }
}

/// The reason listed for an utterance of `panic.wav`: the item (manifest, line, id), the file,
/// and what happened.
fn expected_reason(dir: &Path, line: usize, id: &str) -> String {
    format!(
        "{}, line {line} ({id}): {}: the audio data is damaged: the decoder failed inside ({PANIC_MESSAGE})",
        dir.join("m.tsv").display(),
        dir.join("panic.wav").display()
    )
}

#[test]
fn a_panic_while_caching_dev_features_fails_only_that_files_utterances() {
    let dir = tempfile::tempdir().unwrap();
    let manifest = manifest(dir.path());
    let cache = dir.path().join("cache");
    let calls = AtomicUsize::new(0);
    let features = manifest_features_with(
        &manifest,
        &FeatureConfig::default(),
        Some(&cache),
        &reader(&calls),
        &|_, _| {},
    )
    .unwrap();
    assert_eq!(features.len(), 4);
    for (row, id) in [(3, "b"), (4, "c")] {
        let reason = features[row - 2].as_ref().unwrap_err();
        assert_eq!(*reason, expected_reason(dir.path(), row, id));
    }
    for index in [0, 3] {
        let matrices = features[index].as_ref().unwrap();
        // The default front end: 400-sample windows every 160 samples, (8000 − 400) / 160 + 1.
        assert_eq!(matrices[0].nrows(), 48);
        assert!(cache.join(format!("{index}.safetensors")).exists());
    }
    assert!(!cache.join("1.safetensors").exists());
    assert_eq!(calls.load(Ordering::Relaxed), 3, "one decoding per file");
}

#[test]
fn a_panic_while_building_the_pcm_cache_fails_only_that_files_utterances() {
    let dir = tempfile::tempdir().unwrap();
    let manifest = manifest(dir.path());
    let path = dir.path().join("train.pcm");
    let calls = AtomicUsize::new(0);
    let (store, failures) =
        PcmStore::open_or_build_with(&path, &manifest, "digest", &reader(&calls), &|_, _| {})
            .unwrap();
    let rows: Vec<usize> = failures.iter().map(|(row, _)| *row).collect();
    assert_eq!(rows, [1, 2]);
    for ((_, reason), (line, id)) in failures.iter().zip([(3, "b"), (4, "c")]) {
        assert_eq!(*reason, expected_reason(dir.path(), line, id));
    }
    for row in [0, 3] {
        let samples = store
            .samples(row)
            .unwrap()
            .expect("the good files are cached");
        assert_eq!(samples.len(), 8000);
        // 16-bit quantisation: within half a step of the tone.
        assert!(
            (samples[100] - 0.3 * (2.0 * std::f32::consts::PI * 440.0 * 100.0 / 16_000.0).sin())
                .abs()
                < 1.0 / 32_767.0
        );
    }
    assert_eq!(store.samples(1).unwrap(), None);
    assert_eq!(calls.load(Ordering::Relaxed), 3);

    // The cache is reused: nothing is decoded again, and the failed rows are still reported.
    drop(store);
    let (_, again) =
        PcmStore::open_or_build_with(&path, &manifest, "digest", &reader(&calls), &|_, _| {})
            .unwrap();
    assert_eq!(calls.load(Ordering::Relaxed), 3);
    let rows: Vec<usize> = again.iter().map(|(row, _)| *row).collect();
    assert_eq!(rows, [1, 2]);
}
