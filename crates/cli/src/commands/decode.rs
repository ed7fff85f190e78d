//! Batch transcription helpers for `isogloss transcribe`: deterministic sharding, a journal that
//! makes `--resume` and crash safety work, atomic output in every format, and the batch loop
//! that carries on past a failing item.
//!
//! The journal (`OUT.journal.jsonl`, one JSON line per finished item, flushed as it finishes)
//! is the record of what was done; the output file is regenerated from it atomically at the end.
//! Each journal line carries a fingerprint of the model, LM, lexicon and search settings, so that
//! `--resume` only skips items decoded the same way.

use std::collections::HashMap;
use std::fs::{self, File, OpenOptions};
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Instant;

use anyhow::{bail, Context};
use isogloss_corpus::tsv::{write_atomically, Table};
#[cfg(test)]
use isogloss_decoder::output::TranscriptDocument;
use isogloss_decoder::output::{write_items, ItemTranscript, OutputFormat, TimedSegment};
use isogloss_decoder::pipeline::{transcribe_stream, StreamSettings};
use isogloss_decoder::segment::VadConfig;
use isogloss_decoder::{
    DecodeError, Decoder, GreedyDecoder, LanguageModel, NoLanguageModel, PrefixBeamSearch,
    SearchGraph, SearchOptions, Transcript,
};
use ndarray::{Array2, ArrayView2};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::Outcome;

/// Flags of `isogloss transcribe`.
#[derive(Debug, Clone, clap::Args)]
pub struct TranscribeArgs {
    /// Model directory (model.safetensors + model.toml).
    #[arg(long)]
    pub model: PathBuf,
    /// ARPA language model (.arpa or .arpa.gz).
    #[arg(long)]
    pub lm: Option<PathBuf>,
    /// Lexicon (word<TAB>units); without one, words are spelled from the units.
    #[arg(long)]
    pub lexicon: Option<PathBuf>,
    /// Manifest whose rows (segments) to transcribe.
    #[arg(long, conflicts_with = "audio", required_unless_present = "audio")]
    pub manifest: Option<PathBuf>,
    /// Audio files, each segmented by voice activity.
    pub audio: Vec<PathBuf>,
    /// Output file (for WebVTT and several recordings: a directory, one ID.vtt per recording).
    #[arg(long)]
    pub out: PathBuf,
    /// Output format.
    #[arg(long, value_enum, default_value = "tsv")]
    pub format: FormatArg,
    /// Hypotheses kept per frame.
    #[arg(long, default_value_t = 16)]
    pub beam: usize,
    /// Weight of the LM's natural-log probabilities (default: the pair tuned on the demo's dev
    /// split; tune your own with `isogloss sweep`).
    #[arg(long, default_value_t = isogloss_decoder::DEFAULT_LM_WEIGHT)]
    pub lm_weight: f32,
    /// Score added per word (default tuned together with --lm-weight).
    #[arg(long, default_value_t = isogloss_decoder::DEFAULT_WORD_BONUS)]
    pub word_bonus: f32,
    /// Only units whose log posterior is within this many nats of the frame's best unit extend
    /// hypotheses.
    #[arg(long, default_value_t = 8.0)]
    pub unit_margin: f32,
    /// Frames whose blank probability reaches this are not searched for new units (1 = never skip).
    #[arg(long, default_value_t = 0.999)]
    pub skip_blank_above: f32,
    /// Do not rank partial words by their best LM unigram below them in the lexicon.
    #[arg(long)]
    pub no_lookahead: bool,
    /// Best-path decoding: no beam, lexicon or LM.
    #[arg(long)]
    pub greedy: bool,
    /// Longest voice-activity segment, seconds.
    #[arg(long, default_value_t = 30.0)]
    pub max_segment: f64,
    /// Skip items already transcribed into OUT's journal with the same model and settings.
    #[arg(long)]
    pub resume: bool,
    /// Take only share K of N (1 ≤ K ≤ N), by a hash of the item id.
    #[arg(long)]
    pub shard: Option<Shard>,
}

impl TranscribeArgs {
    fn search_options(&self) -> SearchOptions {
        SearchOptions {
            beam: self.beam.max(1),
            lm_weight: self.lm_weight,
            word_bonus: self.word_bonus,
            unit_margin: Some(self.unit_margin),
            skip_blank_above: (self.skip_blank_above < 1.0).then_some(self.skip_blank_above),
            lookahead: !self.no_lookahead,
            ..SearchOptions::default()
        }
    }

    fn check(&self) -> anyhow::Result<()> {
        if !(self.lm_weight.is_finite() && self.word_bonus.is_finite() && self.unit_margin > 0.0) {
            bail!("--lm-weight and --word-bonus must be numbers and --unit-margin positive");
        }
        if !(0.0..=1.0).contains(&self.skip_blank_above)
            || self.max_segment.is_nan()
            || self.max_segment < 1.0
        {
            bail!("--skip-blank-above must be in [0, 1] and --max-segment at least 1 second");
        }
        Ok(())
    }
}

/// What transcription needs from the acoustic side: the model's units, its frame shift, and
/// posteriors for 16 kHz samples (features included).
pub trait Recognizer: Sync {
    /// Unit symbols, blank at 0.
    fn units(&self) -> Vec<String>;
    /// Seconds between two posterior frames.
    fn frame_shift_seconds(&self) -> f64;
    /// Natural-log posteriors `[frames, units]` for 16 kHz mono samples.
    fn log_posteriors(&self, samples: &[f32]) -> anyhow::Result<Array2<f32>>;
    /// Files whose content identifies the model (hashed for `--resume`).
    fn files(&self) -> Vec<PathBuf>;
}

/// What transcription needs from the audio side.
pub trait AudioSource: Sync {
    /// 16 kHz mono samples of `[start, end)` seconds of a file (`end` None: to the end).
    fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> anyhow::Result<Vec<f32>>;
    /// The whole file as a stream of 16 kHz mono chunks, in bounded memory.
    fn chunks(
        &self,
        path: &Path,
    ) -> anyhow::Result<Box<dyn Iterator<Item = anyhow::Result<Vec<f32>>> + '_>>;
}

/// Sample rate of everything the audio side delivers.
const SAMPLE_RATE: u32 = 16_000;

/// Either decoder, so that one code path serves `--greedy` and the beam search.
enum AnyDecoder<'a, L: LanguageModel> {
    Greedy(GreedyDecoder<'a>),
    Beam(Box<PrefixBeamSearch<'a, L>>),
}

impl<L: LanguageModel> Decoder for AnyDecoder<'_, L> {
    fn decode(&mut self, log_posteriors: ArrayView2<'_, f32>) -> Result<Transcript, DecodeError> {
        match self {
            AnyDecoder::Greedy(d) => d.decode(log_posteriors),
            AnyDecoder::Beam(d) => d.decode(log_posteriors),
        }
    }
}

/// `isogloss transcribe`, given the acoustic model and audio reader. The caller loads both
/// (see the module docs); everything else — lexicon, LM, batch, output — happens here.
pub fn transcribe_with(
    args: &TranscribeArgs,
    recognizer: &impl Recognizer,
    audio: &impl AudioSource,
) -> anyhow::Result<Outcome> {
    args.check()?;
    let units = recognizer.units();
    let graph = match (&args.lexicon, args.greedy) {
        (Some(path), false) => {
            let lexicon = isogloss_lexicon::Lexicon::read(path)?;
            let (graph, report) = SearchGraph::with_lexicon(units, &lexicon.entries)
                .with_context(|| format!("{}: lexicon does not fit the model", path.display()))?;
            if let Some((word, unit)) = report.unknown_units.first() {
                eprintln!(
                    "warning: {}: {} lexicon entries use units the model does not know and are skipped (first: word {word:?}, unit {unit:?})",
                    path.display(),
                    report.unknown_units.len()
                );
            }
            graph
        }
        _ => SearchGraph::lexicon_free(units)?,
    };
    let mut fingerprint = Fingerprint::new();
    for file in recognizer.files() {
        fingerprint.file(&file)?;
    }
    for file in [&args.lm, &args.lexicon].into_iter().flatten() {
        fingerprint.file(file)?;
    }
    fingerprint.text(&format!(
        "{:?} greedy={} max_segment={}",
        args.search_options(),
        args.greedy,
        args.max_segment
    ));
    let fingerprint = fingerprint.finish();
    let lm = match (&args.lm, args.greedy) {
        (Some(path), false) => {
            let lm = isogloss_lm::ArpaModel::read(path)?;
            let missing = graph.unreachable_words(lm.vocabulary());
            if !missing.is_empty() {
                eprintln!(
                    "warning: {}: {} of the LM's words are not in the lexicon and can never be output (e.g. {:?})",
                    path.display(),
                    missing.len(),
                    missing[0]
                );
            }
            Some(lm)
        }
        _ => None,
    };
    match &lm {
        Some(lm) => run_items(args, &graph, lm, recognizer, audio, &fingerprint),
        None => run_items(
            args,
            &graph,
            &NoLanguageModel,
            recognizer,
            audio,
            &fingerprint,
        ),
    }
}

/// Items from the manifest (its `id`, `audio`, `start`, `end` columns) or the audio paths.
pub fn batch_items(args: &TranscribeArgs) -> anyhow::Result<Vec<BatchItem>> {
    let mut items = Vec::new();
    if let Some(manifest) = &args.manifest {
        let table = Table::read_with_header(manifest)?;
        let (id, audio) = (table.column("id")?, table.column("audio")?);
        let (start, end) = (table.column("start")?, table.column("end")?);
        let folder = manifest.parent().unwrap_or(Path::new(""));
        for record in &table.records {
            let seconds = |column: usize, name: &str| -> anyhow::Result<Option<f64>> {
                let text = record.fields[column].trim();
                if text.is_empty() {
                    return Ok(None);
                }
                match text.parse::<f64>() {
                    Ok(v) if v >= 0.0 && v.is_finite() => Ok(Some(v)),
                    _ => bail!(
                        "{}, line {}: column {name}: expected seconds, found {text:?}",
                        manifest.display(),
                        record.line
                    ),
                }
            };
            // A manifest row is an utterance, already cut: it is decoded whole (from 0 when
            // `start` is empty), never re-segmented; voice-activity segmentation is for the
            // recordings given as AUDIO arguments.
            items.push(BatchItem {
                id: record.fields[id].clone(),
                audio: folder.join(&record.fields[audio]),
                start: Some(seconds(start, "start")?.unwrap_or(0.0)),
                end: seconds(end, "end")?,
            });
        }
    } else {
        let mut seen: HashMap<String, usize> = HashMap::new();
        for path in &args.audio {
            let stem = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            let n = seen.entry(stem.clone()).or_insert(0);
            *n += 1;
            let id = if *n == 1 { stem } else { format!("{stem}-{n}") };
            items.push(BatchItem {
                id,
                audio: path.clone(),
                start: None,
                end: None,
            });
        }
    }
    if let Some(shard) = args.shard {
        items.retain(|item| shard.takes(&item.id));
    }
    Ok(items)
}

fn run_items<L: LanguageModel>(
    args: &TranscribeArgs,
    graph: &SearchGraph,
    lm: &L,
    recognizer: &impl Recognizer,
    audio: &impl AudioSource,
    fingerprint: &str,
) -> anyhow::Result<Outcome> {
    let items = batch_items(args)?;
    let options = args.search_options();
    let new_decoder = || {
        if args.greedy {
            AnyDecoder::Greedy(GreedyDecoder::new(graph))
        } else {
            AnyDecoder::Beam(Box::new(PrefixBeamSearch::new(graph, lm, options.clone())))
        }
    };
    let shift = recognizer.frame_shift_seconds();
    let settings = StreamSettings {
        sample_rate: SAMPLE_RATE,
        vad: VadConfig {
            max_segment_seconds: args.max_segment,
            ..VadConfig::default()
        },
        batch_segments: 2 * rayon::current_num_threads(),
        frame_shift_seconds: shift,
    };
    let transcribe_one = |item: &BatchItem,
                          decoder: &mut AnyDecoder<'_, L>|
     -> anyhow::Result<(ItemTranscript, f64)> {
        let audio_name = item.audio.display().to_string();
        match (item.start, item.end) {
            (None, None) => {
                let mut seconds = 0.0;
                let segments = transcribe_stream(
                    audio.chunks(&item.audio)?,
                    &settings,
                    |samples| recognizer.log_posteriors(samples),
                    new_decoder,
                    |s| seconds = s,
                )?;
                Ok((
                    ItemTranscript {
                        id: item.id.clone(),
                        audio: audio_name,
                        segments,
                    },
                    seconds,
                ))
            }
            (start, end) => {
                let start = start.unwrap_or(0.0);
                let samples = audio.read_cut(&item.audio, start, end)?;
                let seconds = samples.len() as f64 / SAMPLE_RATE as f64;
                let posteriors = recognizer.log_posteriors(&samples)?;
                let transcript = decoder.decode(posteriors.view())?;
                let segment =
                    TimedSegment::from_transcript(&transcript, start, start + seconds, shift);
                Ok((
                    ItemTranscript {
                        id: item.id.clone(),
                        audio: audio_name,
                        segments: vec![segment],
                    },
                    seconds,
                ))
            }
        }
    };
    let (mut journal, done) = Journal::open(&args.out, fingerprint, args.resume)?;
    let report = run_batch(&items, &mut journal, done, |group| {
        group
            .par_iter()
            .map_init(new_decoder, |decoder, item| transcribe_one(item, decoder))
            .collect()
    })?;
    write_output(&args.out, &report.items, args.format.into())?;
    eprintln!(
        "transcribed {} items ({} resumed) into {}; {:.1} s of audio in {:.1} s (RTF {:.3})",
        report.items.len(),
        report.resumed,
        args.out.display(),
        report.audio_seconds,
        report.wall_seconds,
        if report.audio_seconds > 0.0 {
            report.wall_seconds / report.audio_seconds
        } else {
            0.0
        }
    );
    if report.failed.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!("{} items failed:", report.failed.len());
    for (id, error) in &report.failed {
        eprintln!("  {id}: {error}");
    }
    Ok(Outcome::SomeItemsFailed)
}

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
    /// Cut from the file, seconds (`None`: a whole recording given on the command line,
    /// segmented by voice activity; manifest rows always have a start).
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

/// Runs `transcribe` over the items not yet in the journal, a group at a time (a group is
/// decoded in parallel), recording each success as soon as its group ends; failures are
/// collected, not fatal. `transcribe` returns, per item of the group and in order, the
/// transcript and the audio seconds it read.
pub fn run_batch(
    items: &[BatchItem],
    journal: &mut Journal,
    mut done: HashMap<String, ItemTranscript>,
    mut transcribe: impl FnMut(&[&BatchItem]) -> Vec<anyhow::Result<(ItemTranscript, f64)>>,
) -> anyhow::Result<BatchReport> {
    let started = Instant::now();
    let todo: Vec<&BatchItem> = items.iter().filter(|i| !done.contains_key(&i.id)).collect();
    let resumed = items.len() - todo.len();
    let bar = crate::progress::bar(todo.len() as u64, "transcribe");
    let mut failed = Vec::new();
    let mut audio_seconds = 0.0;
    let group_size = 2 * rayon::current_num_threads();
    for group in todo.chunks(group_size) {
        for (item, result) in group.iter().zip(transcribe(group)) {
            match result {
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
        }
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
        let report = run_batch(&items, &mut journal, done, |group| {
            group
                .iter()
                .map(|i| {
                    if i.id == "b" {
                        bail!("cannot decode")
                    }
                    Ok((item(&i.id, "first"), 1.0))
                })
                .collect()
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
        let report = run_batch(&items, &mut journal, done, |group| {
            group
                .iter()
                .map(|i| {
                    seen.push(i.id.clone());
                    Ok((item(&i.id, "second"), 1.0))
                })
                .collect()
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

    /// Stands in for a (peaky) CTC acoustic model: 10 ms frames; the first frame of a loud
    /// stretch says unit "a", every other frame blank, so every loud stretch is the word "a".
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
        fn log_posteriors(&self, samples: &[f32]) -> anyhow::Result<Array2<f32>> {
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

    /// Files named `burst*.wav` hold 10 s with loud stretches at 2 s and 6 s; anything else
    /// cannot be read.
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
        fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> anyhow::Result<Vec<f32>> {
            let all = self.chunks(path)?.next().unwrap()?;
            let a = (start * 16_000.0) as usize;
            let b = end
                .map_or(all.len(), |e| (e * 16_000.0) as usize)
                .min(all.len());
            Ok(all[a.min(b)..b].to_vec())
        }
        fn chunks(
            &self,
            path: &Path,
        ) -> anyhow::Result<Box<dyn Iterator<Item = anyhow::Result<Vec<f32>>> + '_>> {
            let name = path.file_name().unwrap().to_string_lossy();
            if !name.starts_with("burst") {
                bail!("not an audio file");
            }
            Ok(Box::new(std::iter::once(Ok(bursts()))))
        }
    }

    fn args(dir: &Path, audio: &[&str], format: FormatArg, out: &str) -> TranscribeArgs {
        let lexicon = dir.join("lexicon.tsv");
        fs::write(&lexicon, "a\ta\nab\ta b\nqq\tq\n").unwrap();
        TranscribeArgs {
            model: dir.to_path_buf(),
            lm: None,
            lexicon: Some(lexicon),
            manifest: None,
            audio: audio.iter().map(|a| dir.join(a)).collect(),
            out: dir.join(out),
            format,
            beam: 8,
            lm_weight: 0.5,
            word_bonus: 1.0,
            unit_margin: 8.0,
            skip_blank_above: 0.999,
            no_lookahead: false,
            greedy: false,
            max_segment: 30.0,
            resume: false,
            shard: None,
        }
    }

    #[test]
    fn a_batch_carries_on_past_a_bad_file_and_resume_retries_only_that() {
        let dir = tempfile::tempdir().unwrap();
        let model = dir.path().join("model.toml");
        fs::write(&model, "fake").unwrap();
        let recognizer = FakeRecognizer(model);
        let mut a = args(
            dir.path(),
            &["burst1.wav", "broken.wav", "burst2.wav"],
            FormatArg::Json,
            "out.json",
        );
        let outcome = transcribe_with(&a, &recognizer, &FakeAudio).unwrap();
        assert!(matches!(outcome, Outcome::SomeItemsFailed));
        let items =
            serde_json::from_str::<TranscriptDocument>(&fs::read_to_string(&a.out).unwrap())
                .unwrap()
                .items;
        let ids: Vec<&str> = items.iter().map(|i| i.id.as_str()).collect();
        assert_eq!(ids, vec!["burst1", "burst2"]);
        for item in &items {
            assert_eq!(item.text(), "a a", "{:#?}", item.segments);
            // JSON word times: monotonic and inside their segment, near the loud stretches
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
        // the lexicon entry with an unknown unit was skipped, not fatal; resume redoes only broken
        a.resume = true;
        let outcome = transcribe_with(&a, &recognizer, &FakeAudio).unwrap();
        assert!(matches!(outcome, Outcome::SomeItemsFailed));
        let journal = fs::read_to_string(Journal::path_for(&a.out)).unwrap();
        assert_eq!(journal.lines().count(), 2);
        // the same run as WebVTT and from a manifest of cuts
        let manifest = dir.path().join("cuts.tsv");
        fs::write(
            &manifest,
            "id\taudio\tstart\tend\tspeaker\tdialect\ttext\nc1\tburst1.wav\t1.5\t3\ts\t\tx\nc2\tburst1.wav\t5.5\t\ts\t\tx\n",
        )
        .unwrap();
        let mut m = args(dir.path(), &[], FormatArg::Tsv, "cuts-hyp.tsv");
        m.manifest = Some(manifest);
        assert!(matches!(
            transcribe_with(&m, &recognizer, &FakeAudio).unwrap(),
            Outcome::Done
        ));
        assert_eq!(
            fs::read_to_string(&m.out).unwrap(),
            "id\ttext\nc1\ta\nc2\ta\n"
        );
        let v = args(dir.path(), &["burst1.wav"], FormatArg::Vtt, "one.vtt");
        transcribe_with(&v, &recognizer, &FakeAudio).unwrap();
        let vtt = fs::read_to_string(&v.out).unwrap();
        assert!(vtt.starts_with("WEBVTT\n\n1\n00:00:02.0"), "{vtt}");
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
