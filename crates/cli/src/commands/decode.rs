//! Batch transcription helpers for `isogloss transcribe`: deterministic sharding, a journal that
//! makes `--resume` and crash safety work, atomic output in every format, and the batch loop
//! that carries on past a failing item.
//!
//! The journal (`OUT.journal.jsonl`, one JSON line per finished item, flushed as it finishes)
//! is the record of what was done; the output file is regenerated from it atomically at the end.
//! Each journal line carries a fingerprint of the model, LM, lexicon and search settings, so that
//! `--resume` only skips items decoded the same way.
// The coordinator wires `run` into `enum Command`; until then the helpers are unused.
#![allow(dead_code)]

use std::collections::HashMap;
use std::fs::{self, File, OpenOptions};
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Instant;

use anyhow::{bail, Context};
use isogloss_corpus::tsv::write_atomically;
use isogloss_decoder::output::{write_items, ItemTranscript, OutputFormat};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// `--shard K/N`: this process takes the items whose id hashes to `K-1` modulo `N`
/// (1 ≤ K ≤ N). Hashing the id (not the position) keeps an item's shard fixed when the list
/// is reordered or extended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// 1-based shard number.
    pub index: u64,
    /// Number of shards.
    pub count: u64,
}

impl FromStr for Shard {
    type Err = String;

    fn from_str(text: &str) -> Result<Self, String> {
        let (k, n) = text
            .split_once('/')
            .ok_or_else(|| format!("--shard {text:?}: expected K/N, e.g. 3/8"))?;
        let parse = |s: &str| s.trim().parse::<u64>().ok();
        match (parse(k), parse(n)) {
            (Some(index), Some(count)) if count >= 1 && (1..=count).contains(&index) => {
                Ok(Shard { index, count })
            }
            _ => Err(format!(
                "--shard {text:?}: expected K/N with whole numbers 1 ≤ K ≤ N"
            )),
        }
    }
}

impl Shard {
    /// True when the item `id` belongs to this shard.
    pub fn takes(&self, id: &str) -> bool {
        let digest = Sha256::digest(id.as_bytes());
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        u64::from_le_bytes(first) % self.count == self.index - 1
    }
}

/// `--format`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum FormatArg {
    /// `id<TAB>text`, for `isogloss score`.
    Tsv,
    /// Words with times and confidences.
    Json,
    /// WebVTT subtitles (one file per recording when there are several).
    Vtt,
    /// Plain text, one line per segment.
    Txt,
}

impl From<FormatArg> for OutputFormat {
    fn from(format: FormatArg) -> Self {
        match format {
            FormatArg::Tsv => OutputFormat::Tsv,
            FormatArg::Json => OutputFormat::Json,
            FormatArg::Vtt => OutputFormat::Vtt,
            FormatArg::Txt => OutputFormat::Txt,
        }
    }
}

/// A SHA-256 over the files and settings that determine a transcript.
pub struct Fingerprint(Sha256);

impl Fingerprint {
    /// An empty fingerprint.
    pub fn new() -> Self {
        Fingerprint(Sha256::new())
    }

    /// Mixes in a file's name-independent content.
    pub fn file(&mut self, path: &Path) -> anyhow::Result<()> {
        let mut file =
            File::open(path).with_context(|| format!("{}: cannot open", path.display()))?;
        let mut buffer = vec![0u8; 1 << 16];
        loop {
            let n = file
                .read(&mut buffer)
                .with_context(|| format!("{}: cannot read", path.display()))?;
            if n == 0 {
                break;
            }
            self.0.update(&buffer[..n]);
        }
        self.0.update([0xff]);
        Ok(())
    }

    /// Mixes in a setting.
    pub fn text(&mut self, text: &str) {
        self.0.update(text.as_bytes());
        self.0.update([0xff]);
    }

    /// The hex digest.
    pub fn finish(self) -> String {
        self.0
            .finalize()
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    }
}

#[derive(Serialize, Deserialize)]
struct JournalLine {
    fingerprint: String,
    item: ItemTranscript,
}

/// Append-only record of finished items next to the output.
pub struct Journal {
    path: PathBuf,
    file: File,
    fingerprint: String,
}

impl Journal {
    /// The journal's path for an output path.
    pub fn path_for(out: &Path) -> PathBuf {
        let mut name = out.as_os_str().to_owned();
        name.push(".journal.jsonl");
        PathBuf::from(name)
    }

    /// Opens the journal of `out`. With `resume`, returns the items already done with the same
    /// fingerprint (a torn last line from a crash is ignored); without, starts it afresh.
    pub fn open(
        out: &Path,
        fingerprint: &str,
        resume: bool,
    ) -> anyhow::Result<(Journal, HashMap<String, ItemTranscript>)> {
        let path = Journal::path_for(out);
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            fs::create_dir_all(parent)
                .with_context(|| format!("{}: cannot create", parent.display()))?;
        }
        let mut done = HashMap::new();
        if resume && path.exists() {
            let reader = BufReader::new(
                File::open(&path).with_context(|| format!("{}: cannot open", path.display()))?,
            );
            let lines: Vec<String> = reader
                .lines()
                .collect::<Result<_, _>>()
                .with_context(|| format!("{}: cannot read", path.display()))?;
            let last = lines.len();
            for (number, line) in lines.iter().enumerate() {
                match serde_json::from_str::<JournalLine>(line) {
                    Ok(entry) if entry.fingerprint == fingerprint => {
                        done.insert(entry.item.id.clone(), entry.item);
                    }
                    Ok(_) => {}
                    // an interrupted run may leave half a line at the end
                    Err(_) if number + 1 == last => {}
                    Err(error) => bail!(
                        "{}, line {}: expected a journal entry (JSON with fingerprint and item), found {error}",
                        path.display(),
                        number + 1
                    ),
                }
            }
        }
        let file = if resume {
            OpenOptions::new().create(true).append(true).open(&path)
        } else {
            File::create(&path)
        }
        .with_context(|| format!("{}: cannot write", path.display()))?;
        let mut journal = Journal {
            path,
            file,
            fingerprint: fingerprint.to_string(),
        };
        // rewrite the kept entries so that stale and torn lines do not accumulate
        if resume {
            journal.file = File::create(&journal.path)
                .with_context(|| format!("{}: cannot write", journal.path.display()))?;
            let mut kept: Vec<&ItemTranscript> = done.values().collect();
            kept.sort_by(|a, b| a.id.cmp(&b.id));
            for item in kept {
                journal.record(item)?;
            }
        }
        Ok((journal, done))
    }

    /// Appends one finished item and flushes it to disk.
    pub fn record(&mut self, item: &ItemTranscript) -> anyhow::Result<()> {
        let line = serde_json::to_string(&JournalLine {
            fingerprint: self.fingerprint.clone(),
            item: item.clone(),
        })?;
        writeln!(self.file, "{line}")
            .and_then(|_| self.file.sync_data())
            .with_context(|| format!("{}: cannot write", self.path.display()))
    }
}

/// Writes the items atomically: one file in `format`, or for WebVTT with several items one
/// `ID.vtt` per item inside the directory `out`.
pub fn write_output(
    out: &Path,
    items: &[ItemTranscript],
    format: OutputFormat,
) -> anyhow::Result<()> {
    if format == OutputFormat::Vtt && items.len() > 1 {
        for item in items {
            let mut bytes = Vec::new();
            write_items(&mut bytes, std::slice::from_ref(item), format)?;
            let name = format!("{}.vtt", item.id.replace(['/', '\\'], "_"));
            write_atomically(&out.join(name), &bytes)?;
        }
        return Ok(());
    }
    let mut bytes = Vec::new();
    write_items(&mut bytes, items, format)?;
    write_atomically(out, &bytes)?;
    Ok(())
}

/// One thing to transcribe.
#[derive(Debug, Clone)]
pub struct BatchItem {
    /// Manifest id or file stem.
    pub id: String,
    /// The audio file.
    pub audio: PathBuf,
    /// Cut from the file, seconds (`None`: whole file, segmented by voice activity).
    pub start: Option<f64>,
    /// End of the cut, seconds.
    pub end: Option<f64>,
}

/// What a batch did.
#[derive(Debug)]
pub struct BatchReport {
    /// Every item of the shard, in input order (resumed ones included).
    pub items: Vec<ItemTranscript>,
    /// Items skipped because the journal had them.
    pub resumed: usize,
    /// `(id, error)` of the items that failed.
    pub failed: Vec<(String, String)>,
    /// Seconds of audio decoded in this run.
    pub audio_seconds: f64,
    /// Wall-clock seconds of this run.
    pub wall_seconds: f64,
}

/// Runs `transcribe` over the items not yet in the journal, recording each success; failures
/// are collected, not fatal. `transcribe` returns the transcript and the audio seconds it read.
pub fn run_batch(
    items: &[BatchItem],
    journal: &mut Journal,
    mut done: HashMap<String, ItemTranscript>,
    mut transcribe: impl FnMut(&BatchItem) -> anyhow::Result<(ItemTranscript, f64)>,
) -> anyhow::Result<BatchReport> {
    let started = Instant::now();
    let todo: Vec<&BatchItem> = items.iter().filter(|i| !done.contains_key(&i.id)).collect();
    let resumed = items.len() - todo.len();
    let bar = crate::progress::bar(todo.len() as u64, "transcribe");
    let mut failed = Vec::new();
    let mut audio_seconds = 0.0;
    for item in todo {
        match transcribe(item) {
            Ok((transcript, seconds)) => {
                journal.record(&transcript)?;
                done.insert(item.id.clone(), transcript);
                audio_seconds += seconds;
            }
            Err(error) => failed.push((
                item.id.clone(),
                format!("{}: {error:#}", item.audio.display()),
            )),
        }
        bar.inc(1);
        let wall = started.elapsed().as_secs_f64();
        if audio_seconds > 0.0 {
            bar.set_message(format!("RTF {:.3}", wall / audio_seconds));
        }
    }
    bar.finish_and_clear();
    let items = items.iter().filter_map(|i| done.remove(&i.id)).collect();
    Ok(BatchReport {
        items,
        resumed,
        failed,
        audio_seconds,
        wall_seconds: started.elapsed().as_secs_f64(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use isogloss_decoder::output::TimedSegment;

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
    fn shards_partition_the_items() {
        assert!("0/3".parse::<Shard>().is_err());
        assert!("4/3".parse::<Shard>().is_err());
        assert!("x".parse::<Shard>().is_err());
        let shards: Vec<Shard> = (1..=3).map(|k| format!("{k}/3").parse().unwrap()).collect();
        let ids: Vec<String> = (0..300).map(|i| format!("utt{i:04}")).collect();
        let mut sizes = [0; 3];
        for id in &ids {
            let owners: Vec<usize> = (0..3).filter(|&s| shards[s].takes(id)).collect();
            assert_eq!(owners.len(), 1, "{id} belongs to exactly one shard");
            sizes[owners[0]] += 1;
        }
        assert!(sizes.iter().all(|&n| n > 60), "{sizes:?}");
    }

    #[test]
    fn resume_skips_what_the_same_settings_finished_and_redoes_the_rest() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("hyp.tsv");
        let items: Vec<BatchItem> = ["a", "b", "c"].iter().map(|id| batch_item(id)).collect();
        // first run: "b" fails
        let (mut journal, done) = Journal::open(&out, "model-1", false).unwrap();
        let report = run_batch(&items, &mut journal, done, |i| {
            if i.id == "b" {
                bail!("cannot decode")
            }
            Ok((item(&i.id, "first"), 1.0))
        })
        .unwrap();
        assert_eq!(report.failed.len(), 1);
        assert!(report.failed[0].1.contains("b.wav"));
        write_output(&out, &report.items, OutputFormat::Tsv).unwrap();
        assert_eq!(
            fs::read_to_string(&out).unwrap(),
            "id\ttext\na\tfirst\nc\tfirst\n"
        );
        // a torn line at the end, as a crash would leave
        let mut f = OpenOptions::new()
            .append(true)
            .open(Journal::path_for(&out))
            .unwrap();
        write!(f, "{{\"fingerprint\":\"model-1\",\"it").unwrap();
        drop(f);
        // resume with the same model: only "b" is decoded
        let (mut journal, done) = Journal::open(&out, "model-1", true).unwrap();
        let mut seen = Vec::new();
        let report = run_batch(&items, &mut journal, done, |i| {
            seen.push(i.id.clone());
            Ok((item(&i.id, "second"), 1.0))
        })
        .unwrap();
        assert_eq!(seen, vec!["b"]);
        assert_eq!(report.resumed, 2);
        let texts: Vec<String> = report.items.iter().map(|i| i.text()).collect();
        assert_eq!(texts, vec!["first", "second", "first"]);
        // resume with another model: everything again
        let (_, done) = Journal::open(&out, "model-2", true).unwrap();
        assert!(done.is_empty());
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
