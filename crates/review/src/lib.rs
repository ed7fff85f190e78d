//! Review pages for machine transcripts: one self-contained HTML page per recording in which a
//! transcriber listens, sees every word coloured by how certain the recognizer was, corrects
//! words in place, labels each stretch with speaker and dialect, and exports the corrected
//! transcript as manifest rows (TSV) or WebVTT.
//!
//! # Key design decision
//!
//! The page is a file, not an application: the folder [`write_review`] writes (pages, an index,
//! the audio beside them) opens from the file system with no server, no network and nothing
//! fetched — the script and styles are our own and inlined — so it can be copied to a
//! transcriber's laptop or an archive's offline machine with the recordings, which are
//! personal data. Corrections live in the browser's local storage, keyed by the recording and
//! a fingerprint of the transcript, so a closed tab loses nothing and a re-generated page for
//! the same transcript finds them again; the export is the way out of the browser.
//!
//! The transcript travels inside the page as compact JSON (word times in milliseconds,
//! certainties in percent) and the script builds the word elements on load: a one-hour
//! recording's page is 0.19 × its transcript JSON (270 kB for 6 619 words), and stretches
//! outside the window skip rendering, so it is on screen in 548 ms (median of 5, loaded 2-core
//! machine; 919 ms without skipping; `cargo bench -p isogloss-review --bench open_page`, figures
//! in `DEVELOPERS.md`).
//!
//! Times are checked against the audio before a page is written (a transcript of another
//! recording is refused, naming the stretch and the lengths), and audio a browser is not
//! expected to play gets a converted WAV copy ([`audio`]).
//!
//! # Example
//!
//! ```
//! use isogloss_decoder::output::{ItemTranscript, TimedSegment, TimedWord};
//! use isogloss_review::{render_page, PageAudio, Recording, ReviewOptions, Stretch};
//!
//! let stretch = TimedSegment {
//!     start: 0.5,
//!     end: 1.5,
//!     text: "hoose".into(),
//!     words: vec![TimedWord { word: "hoose".into(), start: 0.6, end: 1.1, confidence: 0.42 }],
//! };
//! let recording = Recording {
//!     name: "interview1".into(),
//!     audio: "interview1.ogg".into(),
//!     source: "interviews/interview1.ogg".into(),
//!     stretches: vec![Stretch { id: "interview1".into(), segment: stretch, speaker: String::new(), dialect: "fells".into() }],
//! };
//! let audio = PageAudio { href: "audio/interview1.ogg".into(), converted: None, note: None };
//! let html = render_page(&recording, &audio, &ReviewOptions::default());
//! assert!(html.starts_with("<!doctype html>") && html.contains("\"hoose\""));
//! ```
#![deny(missing_docs)]

use std::collections::HashMap;
use std::fs;
use std::path::{Path, PathBuf};

use isogloss_confidence::Calibration;
use isogloss_decoder::output::{TimedSegment, TranscriptDocument};

pub mod audio;
mod page;

pub use page::{render_index, render_page, IndexEntry, PageAudio};

/// Everything that can go wrong writing review pages. Every message names the file or
/// recording once.
#[derive(Debug, thiserror::Error)]
pub enum ReviewError {
    /// The audio could not be read (the audio crate names the file).
    #[error(transparent)]
    Audio(#[from] isogloss_audio::AudioError),
    /// A file could not be read, linked or copied.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// A file could not be written.
    #[error("{path}: cannot write: {problem}")]
    Write {
        /// The file.
        path: PathBuf,
        /// What went wrong.
        problem: String,
    },
    /// The transcript reaches past the end of the recording.
    #[error("{audio}: the transcript's stretch {stretch} (`{id}`) reaches {time:.3} s, but the audio lasts {duration:.3} s: expected times within the audio (is this the transcript of another recording?)")]
    TimesBeyondAudio {
        /// The audio file.
        audio: PathBuf,
        /// 1-based stretch number within the recording.
        stretch: usize,
        /// The stretch id.
        id: String,
        /// The latest time the stretch or one of its words reaches.
        time: f64,
        /// The audio's length.
        duration: f64,
    },
}

/// What to do with audio for the page.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ConvertAudio {
    /// Write a WAV copy only for formats browsers are not expected to play.
    #[default]
    Auto,
    /// Always write a WAV copy beside the original (the page falls back to it at run time).
    Always,
    /// Never convert; the page says so when the browser cannot play the audio.
    Never,
}

/// How pages are written.
#[derive(Debug, Clone)]
pub struct ReviewOptions {
    /// Name of the transcript column in the exported TSV (the writing being corrected).
    pub column: String,
    /// Audio conversion.
    pub convert: ConvertAudio,
    /// Words below this confidence are the ones the "next low-confidence word" key visits.
    pub low_confidence: f64,
    /// Applied to the certainties before colouring (identity: raw certainties).
    pub calibration: Calibration,
}

impl Default for ReviewOptions {
    fn default() -> Self {
        ReviewOptions {
            column: "text".into(),
            convert: ConvertAudio::Auto,
            low_confidence: 0.7,
            calibration: Calibration::IDENTITY,
        }
    }
}

/// One stretch of a recording as the page shows it.
#[derive(Debug, Clone, PartialEq)]
pub struct Stretch {
    /// The id it is exported under: the item id when an item is one stretch (a manifest row),
    /// `ITEM-NNN` (1-based) for the stretches of a recording cut at pauses.
    pub id: String,
    /// Times and words.
    pub segment: TimedSegment,
    /// Speaker label to start from (may be empty).
    pub speaker: String,
    /// Dialect label to start from (may be empty).
    pub dialect: String,
}

/// A recording and all the stretches transcribed from it.
#[derive(Debug, Clone, PartialEq)]
pub struct Recording {
    /// Page name (file stem of the audio, made unique).
    pub name: String,
    /// The audio file on this machine.
    pub audio: PathBuf,
    /// The audio path as the transcript names it (what the exported TSV's `audio` column holds).
    pub source: String,
    /// Stretches in time order.
    pub stretches: Vec<Stretch>,
}

/// Groups the items of a transcript by audio file, in order of first appearance: a manifest
/// transcribed row by row becomes one page per recording, not one per row. `resolve` turns the
/// transcript's audio path into a file on this machine; `labels` gives speaker and dialect by
/// item id (e.g. from the manifest that was transcribed).
pub fn recordings(
    document: &TranscriptDocument,
    resolve: impl Fn(&str) -> PathBuf,
    labels: &HashMap<String, (String, String)>,
) -> Vec<Recording> {
    let mut order: Vec<Recording> = Vec::new();
    let mut index: HashMap<&str, usize> = HashMap::new();
    let mut names: HashMap<String, usize> = HashMap::new();
    for item in &document.items {
        let slot = *index.entry(item.audio.as_str()).or_insert_with(|| {
            let stem = Path::new(&item.audio)
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| item.id.clone());
            let stem: String = stem
                .chars()
                .map(|c| {
                    if c.is_alphanumeric() || "-_.".contains(c) {
                        c
                    } else {
                        '_'
                    }
                })
                .collect();
            let seen = names.entry(stem.clone()).or_insert(0);
            *seen += 1;
            let name = if *seen == 1 {
                stem
            } else {
                format!("{stem}-{seen}")
            };
            order.push(Recording {
                name,
                audio: resolve(&item.audio),
                source: item.audio.clone(),
                stretches: Vec::new(),
            });
            order.len() - 1
        });
        let (speaker, dialect) = labels.get(&item.id).cloned().unwrap_or_default();
        let single = item.segments.len() == 1;
        for (k, segment) in item.segments.iter().enumerate() {
            order[slot].stretches.push(Stretch {
                id: if single {
                    item.id.clone()
                } else {
                    format!("{}-{:03}", item.id, k + 1)
                },
                segment: segment.clone(),
                speaker: speaker.clone(),
                dialect: dialect.clone(),
            });
        }
    }
    for recording in &mut order {
        recording
            .stretches
            .sort_by(|a, b| a.segment.start.total_cmp(&b.segment.start));
    }
    order
}

/// What was written for one recording.
#[derive(Debug, Clone, PartialEq)]
pub struct PageSummary {
    /// The recording's page name.
    pub name: String,
    /// The page file.
    pub page: PathBuf,
    /// Size of the page in bytes.
    pub page_bytes: u64,
    /// Words on the page.
    pub words: usize,
    /// Words below the low-confidence threshold.
    pub low_words: usize,
    /// Length of the audio, seconds.
    pub audio_seconds: f64,
    /// The converted WAV copy, when one was written.
    pub converted: Option<PathBuf>,
}

/// What [`write_review`] did.
#[derive(Debug, Default)]
pub struct ReviewReport {
    /// Pages written, in order.
    pub pages: Vec<PageSummary>,
    /// Recordings that failed (name and error); the others were written.
    pub failed: Vec<(String, ReviewError)>,
}

/// Writes the review folder `out`: `index.html`, one `NAME.html` per recording and the audio
/// in `audio/` (hard-linked where the file system allows, copied otherwise; converted copies
/// as `audio/NAME-16k.wav`). A recording that fails (unreadable audio, times beyond its end) is
/// reported and the others are written; the index lists both.
pub fn write_review(
    out: &Path,
    recordings: &[Recording],
    options: &ReviewOptions,
) -> Result<ReviewReport, ReviewError> {
    let audio_dir = out.join("audio");
    fs::create_dir_all(&audio_dir).map_err(|source| ReviewError::Io {
        path: audio_dir.clone(),
        source,
    })?;
    let mut report = ReviewReport::default();
    let mut entries = Vec::new();
    for recording in recordings {
        match write_one(out, recording, options) {
            Ok(summary) => {
                entries.push(IndexEntry {
                    name: summary.name.clone(),
                    source: recording.source.clone(),
                    audio_seconds: summary.audio_seconds,
                    words: summary.words,
                    low_words: summary.low_words,
                    problem: None,
                });
                report.pages.push(summary);
            }
            Err(error) => {
                entries.push(IndexEntry {
                    name: recording.name.clone(),
                    source: recording.source.clone(),
                    audio_seconds: 0.0,
                    words: 0,
                    low_words: 0,
                    problem: Some(error.to_string()),
                });
                report.failed.push((recording.name.clone(), error));
            }
        }
    }
    let index = out.join("index.html");
    write_file(&index, render_index(&entries, options).as_bytes())?;
    Ok(report)
}

fn write_file(path: &Path, bytes: &[u8]) -> Result<(), ReviewError> {
    fs::write(path, bytes).map_err(|e| ReviewError::Write {
        path: path.to_path_buf(),
        problem: e.to_string(),
    })
}

fn write_one(
    out: &Path,
    recording: &Recording,
    options: &ReviewOptions,
) -> Result<PageSummary, ReviewError> {
    let info = isogloss_audio::probe(&recording.audio)?;
    let tolerance = isogloss_audio::END_TOLERANCE_SECONDS;
    for (k, stretch) in recording.stretches.iter().enumerate() {
        let time = stretch
            .segment
            .words
            .iter()
            .map(|w| w.end)
            .fold(stretch.segment.end, f64::max);
        if time > info.duration_seconds + tolerance {
            return Err(ReviewError::TimesBeyondAudio {
                audio: recording.audio.clone(),
                stretch: k + 1,
                id: stretch.id.clone(),
                time,
                duration: info.duration_seconds,
            });
        }
    }
    let extension = recording
        .audio
        .extension()
        .map(|e| format!(".{}", e.to_string_lossy().to_lowercase()))
        .unwrap_or_default();
    let copy_name = format!("audio/{}{extension}", recording.name);
    let converted_name = format!("audio/{}-16k.wav", recording.name);
    let verdict = audio::playability(&recording.audio)?;
    let convert = match options.convert {
        ConvertAudio::Always => true,
        ConvertAudio::Never => false,
        ConvertAudio::Auto => verdict != audio::Playability::Plays,
    };
    let mut page_audio = PageAudio {
        href: copy_name.clone(),
        converted: None,
        note: None,
    };
    let mut converted = None;
    if convert {
        let target = out.join(&converted_name);
        audio::write_converted(&recording.audio, &target)?;
        page_audio.converted = Some(converted_name.clone());
        converted = Some(target);
    }
    match (&verdict, convert) {
        (audio::Playability::Unlikely(why), true) => {
            page_audio.href = converted_name.clone();
            page_audio.note = Some(format!(
                "{} is {why}, which browsers do not play; this page plays the converted copy {converted_name} (16 kHz, mono).",
                recording.source
            ));
        }
        _ => place_audio(&recording.audio, &out.join(&copy_name))?,
    }
    let html = render_page(recording, &page_audio, options);
    let page = out.join(format!("{}.html", recording.name));
    write_file(&page, html.as_bytes())?;
    let low_words = recording
        .stretches
        .iter()
        .flat_map(|s| &s.segment.words)
        .filter(|w| options.calibration.apply(w.confidence) < options.low_confidence)
        .count();
    Ok(PageSummary {
        name: recording.name.clone(),
        page,
        page_bytes: html.len() as u64,
        words: recording
            .stretches
            .iter()
            .map(|s| s.segment.words.len())
            .sum(),
        low_words,
        audio_seconds: info.duration_seconds,
        converted,
    })
}

/// Puts the original audio beside the page: a hard link when possible (no space used), a copy
/// otherwise. An older file of the same name is replaced.
fn place_audio(source: &Path, target: &Path) -> Result<(), ReviewError> {
    if target.exists() {
        fs::remove_file(target).map_err(|source| ReviewError::Io {
            path: target.to_path_buf(),
            source,
        })?;
    }
    if fs::hard_link(source, target).is_ok() {
        return Ok(());
    }
    fs::copy(source, target)
        .map(|_| ())
        .map_err(|e| ReviewError::Write {
            path: target.to_path_buf(),
            problem: format!("cannot copy {}: {e}", source.display()),
        })
}
