//! The batch loop and its output: items in, transcripts out, failures listed, nothing lost.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

use isogloss_corpus::tsv::write_atomically;
use isogloss_decoder::output::{write_items, ItemTranscript, OutputFormat};

use crate::{BatchError, Journal};

/// One thing to transcribe.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchItem {
    /// Manifest id or file stem.
    pub id: String,
    /// The audio file.
    pub audio: PathBuf,
    /// Cut from the file, seconds (`None`: a whole recording, segmented by voice activity;
    /// manifest rows always have a start).
    pub start: Option<f64>,
    /// End of the cut, seconds (`None`: to the end of the file).
    pub end: Option<f64>,
}

/// What a batch did.
#[derive(Debug)]
pub struct BatchReport {
    /// Every item of the batch that has a transcript, in input order (resumed ones included).
    pub items: Vec<ItemTranscript>,
    /// Items skipped because the journal had them.
    pub resumed: usize,
    /// `(id, error)` of the items that failed; the error names the audio file.
    pub failed: Vec<(String, String)>,
    /// Seconds of audio decoded in this run.
    pub audio_seconds: f64,
    /// Wall-clock seconds of this run.
    pub wall_seconds: f64,
}

/// Progress of a batch, for a progress display: items finished (or failed) so far in this run,
/// items to do in this run, and audio seconds decoded so far.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Progress {
    /// Items finished or failed in this run.
    pub done: usize,
    /// Items this run has to do (the rest were resumed).
    pub total: usize,
    /// Seconds of audio decoded in this run.
    pub audio_seconds: f64,
    /// Wall-clock seconds since the run started.
    pub wall_seconds: f64,
}

/// Runs `transcribe` over the items not yet done, `group_size` at a time (a group is decoded in
/// parallel by the caller), recording each success in the journal as soon as its group ends.
/// A failure is collected with its item, never fatal: only a journal that cannot be written
/// stops the batch. `transcribe` returns, per item of the group and in order, the transcript and
/// the audio seconds it read, or the item's error.
pub fn run_batch(
    items: &[BatchItem],
    journal: &mut Journal,
    mut done: HashMap<String, ItemTranscript>,
    group_size: usize,
    mut transcribe: impl FnMut(&[&BatchItem]) -> Vec<Result<(ItemTranscript, f64), BatchError>>,
    progress: &mut dyn FnMut(Progress),
) -> Result<BatchReport, BatchError> {
    let started = Instant::now();
    let todo: Vec<&BatchItem> = items.iter().filter(|i| !done.contains_key(&i.id)).collect();
    let resumed = items.len() - todo.len();
    let mut failed = Vec::new();
    let mut audio_seconds = 0.0;
    let mut finished = 0;
    for group in todo.chunks(group_size.max(1)) {
        for (item, result) in group.iter().zip(transcribe(group)) {
            match result {
                Ok((transcript, seconds)) => {
                    journal.record(&transcript)?;
                    done.insert(item.id.clone(), transcript);
                    audio_seconds += seconds;
                }
                Err(error) => {
                    // Audio errors name their file already; others learn it here, once.
                    let audio = item.audio.display().to_string();
                    let message = error.to_string();
                    failed.push((
                        item.id.clone(),
                        if message.contains(&audio) {
                            message
                        } else {
                            format!("{audio}: {message}")
                        },
                    ));
                }
            }
            finished += 1;
            progress(Progress {
                done: finished,
                total: todo.len(),
                audio_seconds,
                wall_seconds: started.elapsed().as_secs_f64(),
            });
        }
    }
    let items = items.iter().filter_map(|i| done.remove(&i.id)).collect();
    Ok(BatchReport {
        items,
        resumed,
        failed,
        audio_seconds,
        wall_seconds: started.elapsed().as_secs_f64(),
    })
}

/// Writes the items atomically: one file in `format`, or, for WebVTT with several items, one
/// `ID.vtt` per item inside the folder `out`.
pub fn write_output(
    out: &Path,
    items: &[ItemTranscript],
    format: OutputFormat,
) -> Result<(), BatchError> {
    let encode = |items: &[ItemTranscript]| -> Result<Vec<u8>, BatchError> {
        let mut bytes = Vec::new();
        write_items(&mut bytes, items, format).map_err(|source| BatchError::Io {
            path: out.to_path_buf(),
            action: "write",
            source,
        })?;
        Ok(bytes)
    };
    if format == OutputFormat::Vtt && items.len() > 1 {
        for item in items {
            let name = format!("{}.vtt", item.id.replace(['/', '\\'], "_"));
            write_atomically(&out.join(name), &encode(std::slice::from_ref(item))?)?;
        }
        return Ok(());
    }
    write_atomically(out, &encode(items)?)?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use std::fs::{self, OpenOptions};
    use std::io::Write;

    use isogloss_decoder::output::TimedSegment;

    use super::*;

    fn item(id: &str, text: &str) -> ItemTranscript {
        ItemTranscript {
            id: id.into(),
            audio: format!("{id}.wav"),
            segments: vec![TimedSegment {
                start: 0.0,
                end: 1.0,
                text: text.into(),
                words: vec![],
            }],
        }
    }

    fn batch_item(id: &str) -> BatchItem {
        BatchItem {
            id: id.into(),
            audio: PathBuf::from(format!("{id}.wav")),
            start: None,
            end: None,
        }
    }

    #[test]
    fn resume_skips_what_the_same_settings_finished_and_redoes_the_rest() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("hyp.tsv");
        let items: Vec<BatchItem> = ["a", "b", "c"].iter().map(|id| batch_item(id)).collect();
        // first run: "b" fails; progress is reported once per item
        let (mut journal, done) = Journal::open(&out, "model-1", false).unwrap();
        let mut reported = Vec::new();
        let report = run_batch(
            &items,
            &mut journal,
            done,
            2,
            |group| {
                group
                    .iter()
                    .map(|i| {
                        if i.id == "b" {
                            return Err(BatchError::Setting("cannot decode".into()));
                        }
                        Ok((item(&i.id, "first"), 1.0))
                    })
                    .collect()
            },
            &mut |p| reported.push((p.done, p.total, p.audio_seconds)),
        )
        .unwrap();
        assert_eq!(reported, vec![(1, 3, 1.0), (2, 3, 1.0), (3, 3, 2.0)]);
        assert_eq!(report.failed.len(), 1);
        assert_eq!(report.failed[0].1, "b.wav: cannot decode");
        write_output(&out, &report.items, OutputFormat::Tsv).unwrap();
        assert_eq!(
            fs::read_to_string(&out).unwrap(),
            "id\ttext\na\tfirst\nc\tfirst\n"
        );
        // a torn line at the end, as a crash would leave
        let mut file = OpenOptions::new()
            .append(true)
            .open(Journal::path_for(&out))
            .unwrap();
        write!(file, "{{\"fingerprint\":\"model-1\",\"it").unwrap();
        drop(file);
        // resume with the same model: only "b" is decoded
        let (mut journal, done) = Journal::open(&out, "model-1", true).unwrap();
        let mut seen = Vec::new();
        let report = run_batch(
            &items,
            &mut journal,
            done,
            2,
            |group| {
                group
                    .iter()
                    .map(|i| {
                        seen.push(i.id.clone());
                        Ok((item(&i.id, "second"), 1.0))
                    })
                    .collect()
            },
            &mut |_| {},
        )
        .unwrap();
        assert_eq!(seen, vec!["b"]);
        assert_eq!(report.resumed, 2);
        let texts: Vec<String> = report.items.iter().map(|i| i.text()).collect();
        assert_eq!(texts, vec!["first", "second", "first"]);
        // the journal now holds the three items once each, and no torn line
        let journal = fs::read_to_string(Journal::path_for(&out)).unwrap();
        assert_eq!(journal.lines().count(), 3);
        // resume with another model: everything again
        let (_, done) = Journal::open(&out, "model-2", true).unwrap();
        assert!(done.is_empty());
    }

    #[test]
    fn a_broken_journal_line_in_the_middle_is_an_error_with_its_line() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("hyp.tsv");
        fs::write(Journal::path_for(&out), "not json\n{}\n").unwrap();
        let error = Journal::open(&out, "model-1", true)
            .err()
            .unwrap()
            .to_string();
        assert!(
            error.contains("hyp.tsv.journal.jsonl, line 1") && error.contains("journal entry"),
            "{error}"
        );
    }

    #[test]
    fn several_recordings_as_webvtt_become_one_file_each() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("subtitles");
        write_output(
            &out,
            &[item("x", "hallo"), item("y", "grüezi")],
            OutputFormat::Vtt,
        )
        .unwrap();
        assert!(fs::read_to_string(out.join("x.vtt"))
            .unwrap()
            .starts_with("WEBVTT"));
        assert!(out.join("y.vtt").exists());
    }
}
