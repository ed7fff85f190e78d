//! The whole flow on stand-ins: a peaky fake acoustic model and synthetic audio.

use std::fs;
use std::path::{Path, PathBuf};

use isogloss_decoder::output::{OutputFormat, TranscriptDocument};
use isogloss_decoder::SearchOptions;
use ndarray::Array2;

use crate::*;

/// Stands in for a (peaky) CTC acoustic model: 10 ms frames; the first frame of a loud stretch
/// says unit "a", every other frame blank, so every loud stretch is the word "a".
struct FakeRecognizer(PathBuf);

impl Recognizer for FakeRecognizer {
    fn units(&self) -> Vec<String> {
        ["<ctc-blank>", "a", "b", "<wb>"]
            .iter()
            .map(|s| s.to_string())
            .collect()
    }
    fn frame_shift_seconds(&self) -> f64 {
        0.01
    }
    fn log_posteriors(&self, samples: &[f32]) -> Result<Array2<f32>, SideError> {
        let frames = samples.len() / 160;
        let loud = |t: usize| {
            samples[t * 160..(t + 1) * 160]
                .iter()
                .any(|x| x.abs() > 0.1)
        };
        Ok(Array2::from_shape_fn((frames, 4), |(t, u)| {
            let onset = loud(t) && (t == 0 || !loud(t - 1));
            let hit = if onset { u == 1 } else { u == 0 };
            if hit {
                (0.9998f32).ln()
            } else {
                (0.0001f32).ln()
            }
        }))
    }
    fn files(&self) -> Vec<PathBuf> {
        vec![self.0.clone()]
    }
}

/// Files named `burst*.wav` hold 10 s with loud stretches at 2 s and 6 s; anything else cannot
/// be read.
struct FakeAudio;

fn bursts() -> Vec<f32> {
    (0..10 * 16_000)
        .map(|n| {
            let t = n as f64 / 16_000.0;
            let loud = (2.0..2.4).contains(&t) || (6.0..6.4).contains(&t);
            let sign = if (n / 40) % 2 == 0 { 1.0 } else { -1.0 };
            sign * if loud { 0.5 } else { 0.001 }
        })
        .collect()
}

impl AudioSource for FakeAudio {
    fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> Result<Vec<f32>, SideError> {
        let all = self.chunks(path)?.next().unwrap()?;
        let a = (start * 16_000.0) as usize;
        let b = end
            .map_or(all.len(), |e| (e * 16_000.0) as usize)
            .min(all.len());
        Ok(all[a.min(b)..b].to_vec())
    }
    fn chunks(&self, path: &Path) -> Result<Chunks<'_>, SideError> {
        let name = path.file_name().unwrap().to_string_lossy();
        if !name.starts_with("burst") {
            return Err("not an audio file".into());
        }
        Ok(Box::new(std::iter::once(Ok(bursts()))))
    }
}

fn settings(dir: &Path, format: OutputFormat, out: &str) -> TranscribeSettings {
    let lexicon = dir.join("lexicon.tsv");
    fs::write(&lexicon, "a\ta\nab\ta b\nqq\tq\n").unwrap();
    TranscribeSettings {
        lm: None,
        lexicon: Some(lexicon),
        search: SearchOptions {
            beam: 8,
            ..SearchOptions::default()
        },
        greedy: false,
        max_segment_seconds: 30.0,
        out: dir.join(out),
        format,
        resume: false,
    }
}

fn recordings(dir: &Path, names: &[&str]) -> Vec<BatchItem> {
    let paths = names.iter().map(|n| dir.join(n)).collect();
    batch_items(&ItemSource::Recordings(paths), None).unwrap()
}

#[test]
fn a_batch_carries_on_past_a_bad_file_and_resume_retries_only_that() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("model.toml");
    fs::write(&model, "fake").unwrap();
    let recognizer = FakeRecognizer(model);
    let items = recordings(dir.path(), &["burst1.wav", "broken.wav", "burst2.wav"]);
    let mut settings = settings(dir.path(), OutputFormat::Json, "out.json");
    let mut warnings = Vec::new();
    let mut progress = 0;
    let mut events = |event: Event| match event {
        Event::Warning(w) => warnings.push(w),
        Event::Progress(_) => progress += 1,
    };
    let report = transcribe(&settings, &items, &recognizer, &FakeAudio, &mut events).unwrap();
    assert_eq!(progress, 3);
    // the lexicon entry with a unit the model lacks ("q") is skipped with a warning, not fatal
    assert_eq!(warnings.len(), 1, "{warnings:?}");
    assert!(warnings[0].contains("lexicon.tsv") && warnings[0].contains("\"q\""));
    assert_eq!(report.failed.len(), 1);
    let (id, error) = &report.failed[0];
    assert_eq!(id, "broken");
    assert!(error.ends_with("broken.wav: not an audio file"), "{error}");
    let document: TranscriptDocument =
        serde_json::from_str(&fs::read_to_string(&settings.out).unwrap()).unwrap();
    let ids: Vec<&str> = document.items.iter().map(|i| i.id.as_str()).collect();
    assert_eq!(ids, vec!["burst1", "burst2"]);
    for item in &document.items {
        assert_eq!(item.text(), "a a", "{:#?}", item.segments);
        // word times: increasing and inside their stretch, at the loud stretches
        let mut last = 0.0;
        for segment in &item.segments {
            for w in &segment.words {
                assert!(segment.start <= w.start && w.start < w.end && w.end <= segment.end);
                assert!(w.start >= last);
                last = w.end;
            }
        }
        let starts: Vec<f64> = item
            .segments
            .iter()
            .flat_map(|s| &s.words)
            .map(|w| w.start)
            .collect();
        assert!(
            (starts[0] - 2.0).abs() < 0.02 && (starts[1] - 6.0).abs() < 0.02,
            "{starts:?}"
        );
    }
    // resume redoes only the broken file
    settings.resume = true;
    let report = transcribe(&settings, &items, &recognizer, &FakeAudio, &mut |_| {}).unwrap();
    assert_eq!((report.resumed, report.failed.len()), (2, 1));
    let journal = fs::read_to_string(Journal::path_for(&settings.out)).unwrap();
    assert_eq!(journal.lines().count(), 2);
    // a changed search setting is another fingerprint: everything is decoded again
    settings.search.word_bonus += 1.0;
    let report = transcribe(&settings, &items, &recognizer, &FakeAudio, &mut |_| {}).unwrap();
    assert_eq!(report.resumed, 0);
}

#[test]
fn manifest_rows_are_decoded_whole_and_webvtt_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("model.toml");
    fs::write(&model, "fake").unwrap();
    let recognizer = FakeRecognizer(model);
    let manifest = dir.path().join("cuts.tsv");
    fs::write(
        &manifest,
        "id\taudio\tstart\tend\tspeaker\tdialect\ttext\nc1\tburst1.wav\t1.5\t3\ts\t\tx\nc2\tburst1.wav\t5.5\t\ts\t\tx\n",
    )
    .unwrap();
    let items = batch_items(&ItemSource::Manifest(manifest.clone()), None).unwrap();
    assert_eq!(items[0].start, Some(1.5));
    assert_eq!(items[1].end, None);
    let tsv = settings(dir.path(), OutputFormat::Tsv, "cuts-hyp.tsv");
    let report = transcribe(&tsv, &items, &recognizer, &FakeAudio, &mut |_| {}).unwrap();
    assert!(report.failed.is_empty());
    assert_eq!(
        fs::read_to_string(&tsv.out).unwrap(),
        "id\ttext\nc1\ta\nc2\ta\n"
    );
    let vtt = settings(dir.path(), OutputFormat::Vtt, "one.vtt");
    let items = recordings(dir.path(), &["burst1.wav"]);
    transcribe(&vtt, &items, &recognizer, &FakeAudio, &mut |_| {}).unwrap();
    let text = fs::read_to_string(&vtt.out).unwrap();
    assert!(text.starts_with("WEBVTT\n\n1\n00:00:02.0"), "{text}");

    // a bad time in the manifest names the file, line and column
    fs::write(
        &manifest,
        "id\taudio\tstart\tend\tspeaker\tdialect\ttext\nc1\tburst1.wav\tsoon\t3\ts\t\tx\n",
    )
    .unwrap();
    let error = batch_items(&ItemSource::Manifest(manifest), None)
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("cuts.tsv, line 2")
            && error.contains("column start")
            && error.contains("\"soon\""),
        "{error}"
    );
}

#[test]
fn shards_split_a_batch_without_overlap() {
    let paths: Vec<PathBuf> = (0..40)
        .map(|i| PathBuf::from(format!("r{i}.ogg")))
        .collect();
    let all = batch_items(&ItemSource::Recordings(paths.clone()), None).unwrap();
    let mut joined: Vec<String> = (1..=3)
        .flat_map(|k| {
            let shard: Shard = format!("{k}/3").parse().unwrap();
            batch_items(&ItemSource::Recordings(paths.clone()), Some(shard)).unwrap()
        })
        .map(|item| item.id)
        .collect();
    joined.sort();
    let mut ids: Vec<String> = all.into_iter().map(|item| item.id).collect();
    ids.sort();
    assert_eq!(joined, ids);
}
