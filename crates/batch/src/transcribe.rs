//! Transcription of a batch: the lexicon and LM set up once, every item decoded in parallel
//! (greedy or beam search), timed transcripts journalled and written.

use std::any::Any;
use std::collections::HashMap;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};

use isogloss_corpus::tsv::Table;
use isogloss_decoder::output::{ItemTranscript, OutputFormat, TimedSegment};
use isogloss_decoder::pipeline::{decode_timed, transcribe_stream, Reading, StreamSettings};
use isogloss_decoder::segment::VadConfig;
use isogloss_decoder::{
    DecodeError, Decoder, GreedyDecoder, LanguageModel, NoLanguageModel, PrefixBeamSearch,
    SearchGraph, SearchOptions, Transcript,
};
use ndarray::{Array2, ArrayView2};
use rayon::prelude::*;

use crate::error::SideError;
use crate::{run_batch, write_output, BatchError, BatchItem, BatchReport, Fingerprint, Journal};
use crate::{Progress, Shard};

/// Sample rate of everything the audio side delivers.
pub const SAMPLE_RATE: u32 = 16_000;

/// What transcription needs from the acoustic side: the model's units, its frame shift, and
/// posteriors for 16 kHz samples (features included).
pub trait Recognizer: Sync {
    /// Unit symbols, blank at 0.
    fn units(&self) -> Vec<String>;
    /// Seconds between two posterior frames.
    fn frame_shift_seconds(&self) -> f64;
    /// Natural-log posteriors `[frames, units]` for 16 kHz mono samples.
    fn log_posteriors(&self, samples: &[f32]) -> Result<Array2<f32>, SideError>;
    /// The readings the decoder chooses from ([`Decoder::decode_readings`]), each posteriors
    /// with the seconds between two of their frames in the segment, the preferred first: by
    /// default [`Recognizer::log_posteriors`] alone at [`Recognizer::frame_shift_seconds`]. A
    /// recognizer with a test-time search (the `[inference]` of its `model.toml`) gives one per
    /// candidate; transcription places the words with the frame shift of the reading the
    /// decoder kept.
    fn readings(&self, samples: &[f32]) -> Result<Vec<Reading>, SideError> {
        Ok(vec![(
            self.log_posteriors(samples)?,
            self.frame_shift_seconds(),
        )])
    }
    /// Files whose content identifies the model (hashed for resuming).
    fn files(&self) -> Vec<PathBuf>;
}

/// A stream of 16 kHz mono chunks of one recording.
pub type Chunks<'a> = Box<dyn Iterator<Item = Result<Vec<f32>, SideError>> + 'a>;

/// What transcription needs from the audio side.
pub trait AudioSource: Sync {
    /// 16 kHz mono samples of `[start, end)` seconds of a file (`end` None: to the end).
    fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> Result<Vec<f32>, SideError>;
    /// The whole file as a stream of 16 kHz mono chunks, in bounded memory.
    fn chunks(&self, path: &Path) -> Result<Chunks<'_>, SideError>;
}

/// Where the items come from.
#[derive(Debug, Clone, PartialEq)]
pub enum ItemSource {
    /// The rows of a manifest (`id`, `audio`, `start`, `end`), each decoded whole.
    Manifest(PathBuf),
    /// Whole recordings, each segmented at pauses; ids are the file stems (`stem-2`, … for
    /// repeated stems).
    Recordings(Vec<PathBuf>),
}

/// How to transcribe.
#[derive(Debug, Clone, PartialEq)]
pub struct TranscribeSettings {
    /// ARPA language model (ignored when greedy).
    pub lm: Option<PathBuf>,
    /// Lexicon (`word<TAB>units`; ignored when greedy); without one, words are spelled from
    /// the units.
    pub lexicon: Option<PathBuf>,
    /// Beam search settings.
    pub search: SearchOptions,
    /// Best-path decoding: no beam, lexicon or LM.
    pub greedy: bool,
    /// Longest stretch of speech cut from a recording, seconds.
    pub max_segment_seconds: f64,
    /// The output file (for WebVTT with several recordings: a folder).
    pub out: PathBuf,
    /// The output format.
    pub format: OutputFormat,
    /// Skip items the journal of `out` holds with the same fingerprint.
    pub resume: bool,
}

/// What a transcription run tells its caller as it goes.
#[derive(Debug, Clone, PartialEq)]
pub enum Event {
    /// Something the user should know that does not stop the run (names the file).
    Warning(String),
    /// One more item finished or failed.
    Progress(Progress),
}

/// The items of `source`, keeping only those of `shard` when given.
pub fn batch_items(
    source: &ItemSource,
    shard: Option<Shard>,
) -> Result<Vec<BatchItem>, BatchError> {
    let mut items = Vec::new();
    match source {
        ItemSource::Manifest(manifest) => {
            let table = Table::read_with_header(manifest)?;
            let (id, audio) = (table.column("id")?, table.column("audio")?);
            let (start, end) = (table.column("start")?, table.column("end")?);
            let folder = manifest.parent().unwrap_or(Path::new(""));
            for record in &table.records {
                let seconds = |column: usize, name: &str| -> Result<Option<f64>, BatchError> {
                    let text = record.fields[column].trim();
                    if text.is_empty() {
                        return Ok(None);
                    }
                    let limit = isogloss_audio::MAX_TIME_SECONDS;
                    match text.parse::<f64>() {
                        Ok(v) if (0.0..=limit).contains(&v) => Ok(Some(v)),
                        _ => Err(BatchError::Line {
                            path: manifest.clone(),
                            line: record.line,
                            message: format!(
                                "column {name}: expected seconds from 0 to {limit}, found {text:?}"
                            ),
                        }),
                    }
                };
                // A manifest row is an utterance, already cut: it is decoded whole (from 0 when
                // `start` is empty), never re-segmented.
                items.push(BatchItem {
                    id: record.fields[id].clone(),
                    audio: folder.join(&record.fields[audio]),
                    start: Some(seconds(start, "start")?.unwrap_or(0.0)),
                    end: seconds(end, "end")?,
                });
            }
        }
        ItemSource::Recordings(paths) => {
            let mut seen: HashMap<String, usize> = HashMap::new();
            for path in paths {
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
    }
    if let Some(shard) = shard {
        items.retain(|item| shard.takes(&item.id));
    }
    Ok(items)
}

/// Either decoder, so that one code path serves greedy decoding and the beam search.
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

    fn decode_readings(
        &mut self,
        readings: &[ArrayView2<'_, f32>],
    ) -> Result<(Transcript, usize), DecodeError> {
        match self {
            AnyDecoder::Greedy(d) => d.decode_readings(readings),
            AnyDecoder::Beam(d) => d.decode_readings(readings),
        }
    }
}

/// Transcribes `items` and writes the output; returns what was done. Items already in the
/// journal (with `resume`) are not decoded again; a failing item is listed in the report and
/// the others go on. Errors are only what stops the whole run: an unreadable lexicon or LM, a
/// lexicon that does not fit the model, a journal or output that cannot be written.
pub fn transcribe(
    settings: &TranscribeSettings,
    items: &[BatchItem],
    recognizer: &impl Recognizer,
    audio: &impl AudioSource,
    events: &mut dyn FnMut(Event),
) -> Result<BatchReport, BatchError> {
    settings
        .search
        .validate()
        .map_err(|e| BatchError::Setting(e.to_string()))?;
    VadConfig {
        max_segment_seconds: settings.max_segment_seconds,
        ..VadConfig::default()
    }
    .validate()
    .map_err(|e| BatchError::Setting(e.to_string()))?;
    let units = recognizer.units();
    let graph = match (&settings.lexicon, settings.greedy) {
        (Some(path), false) => {
            let lexicon = isogloss_lexicon::Lexicon::read(path)?;
            let (graph, report) =
                SearchGraph::with_lexicon(units, &lexicon.entries).map_err(|source| {
                    BatchError::Lexicon {
                        path: path.clone(),
                        source,
                    }
                })?;
            if let Some((word, unit)) = report.unknown_units.first() {
                events(Event::Warning(format!(
                    "{}: {} lexicon entries use units the model does not know and are skipped (first: word {word:?}, unit {unit:?})",
                    path.display(),
                    report.unknown_units.len()
                )));
            }
            graph
        }
        _ => SearchGraph::lexicon_free(units)?,
    };
    let mut fingerprint = Fingerprint::new();
    for file in recognizer.files() {
        fingerprint.file(&file)?;
    }
    for file in [&settings.lm, &settings.lexicon].into_iter().flatten() {
        fingerprint.file(file)?;
    }
    fingerprint.text(&format!(
        "{:?} greedy={} max_segment={}",
        settings.search, settings.greedy, settings.max_segment_seconds
    ));
    let fingerprint = fingerprint.finish();
    let lm = match (&settings.lm, settings.greedy) {
        (Some(path), false) => {
            let lm = isogloss_lm::ArpaModel::read(path)?;
            let missing = graph.unreachable_words(lm.vocabulary());
            if let Some(first) = missing.first() {
                events(Event::Warning(format!(
                    "{}: {} of the LM's words are not in the lexicon and can never be output (e.g. {first:?})",
                    path.display(),
                    missing.len(),
                )));
            }
            Some(lm)
        }
        _ => None,
    };
    let report = match &lm {
        Some(lm) => run_items(
            settings,
            items,
            &graph,
            lm,
            recognizer,
            audio,
            &fingerprint,
            events,
        ),
        None => run_items(
            settings,
            items,
            &graph,
            &NoLanguageModel,
            recognizer,
            audio,
            &fingerprint,
            events,
        ),
    }?;
    write_output(&settings.out, &report.items, settings.format)?;
    Ok(report)
}

/// The text a panic was raised with.
pub(crate) fn panic_message(payload: &(dyn Any + Send)) -> String {
    payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "no message".into())
}

#[allow(clippy::too_many_arguments)]
fn run_items<L: LanguageModel>(
    settings: &TranscribeSettings,
    items: &[BatchItem],
    graph: &SearchGraph,
    lm: &L,
    recognizer: &impl Recognizer,
    audio: &impl AudioSource,
    fingerprint: &str,
    events: &mut dyn FnMut(Event),
) -> Result<BatchReport, BatchError> {
    let new_decoder = || {
        if settings.greedy {
            AnyDecoder::Greedy(GreedyDecoder::new(graph))
        } else {
            AnyDecoder::Beam(Box::new(PrefixBeamSearch::new(
                graph,
                lm,
                settings.search.clone(),
            )))
        }
    };
    let group_size = 2 * rayon::current_num_threads();
    let stream = StreamSettings {
        sample_rate: SAMPLE_RATE,
        vad: VadConfig {
            max_segment_seconds: settings.max_segment_seconds,
            ..VadConfig::default()
        },
        batch_segments: group_size,
    };
    let transcribe_one = |item: &BatchItem,
                          decoder: &mut AnyDecoder<'_, L>|
     -> Result<(ItemTranscript, f64), BatchError> {
        let audio_name = item.audio.display().to_string();
        match (item.start, item.end) {
            (None, None) => {
                let mut seconds = 0.0;
                let chunks = audio.chunks(&item.audio).map_err(BatchError::Side)?;
                let segments = transcribe_stream(
                    chunks,
                    &stream,
                    |samples| recognizer.readings(samples),
                    new_decoder,
                    |s| seconds = s,
                )
                .map_err(BatchError::Side)?;
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
                let samples = audio
                    .read_cut(&item.audio, start, end)
                    .map_err(BatchError::Side)?;
                let seconds = samples.len() as f64 / f64::from(SAMPLE_RATE);
                let readings = recognizer.readings(&samples).map_err(BatchError::Side)?;
                let (transcript, shift) = decode_timed(decoder, &readings)?;
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
    let (mut journal, done) = Journal::open(&settings.out, fingerprint, settings.resume)?;
    run_batch(
        items,
        &mut journal,
        done,
        group_size,
        |group| {
            group
                .par_iter()
                .map_init(new_decoder, |decoder, item| {
                    // A panic is this item's error; the decoder it may have left half-updated
                    // is replaced.
                    catch_unwind(AssertUnwindSafe(|| transcribe_one(item, decoder))).unwrap_or_else(
                        |payload| {
                            *decoder = new_decoder();
                            Err(BatchError::Panic(panic_message(payload.as_ref())))
                        },
                    )
                })
                .collect()
        },
        &mut |progress| events(Event::Progress(progress)),
    )
}
