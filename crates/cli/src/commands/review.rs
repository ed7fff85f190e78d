//! `isogloss review`: review pages for a transcript JSON (one page per recording, an index, the
//! audio beside them). The pages are made by `isogloss_review`.

use std::collections::HashMap;
use std::path::PathBuf;

use clap::{Args, ValueEnum};
use isogloss_confidence::Calibration;
use isogloss_corpus::Manifest;
use isogloss_decoder::output::TranscriptDocument;
use isogloss_review::{recordings, write_review, ConvertAudio, ReviewOptions};

use super::transcripts::{labels, resolve_audio};
use crate::Outcome;

/// Flags of `isogloss review`.
#[derive(Args, Debug)]
pub struct ReviewArgs {
    /// Transcript JSON written by `isogloss transcribe --format json`.
    #[arg(value_name = "TRANSCRIPT.json")]
    pub transcript: PathBuf,
    /// Folder to write (index.html, one page per recording, audio/).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// The manifest that was transcribed: its speaker and dialect fill the pages' fields.
    #[arg(long, value_name = "MANIFEST")]
    pub manifest: Option<PathBuf>,
    /// Folder that the transcript's relative audio paths start from (default: the current
    /// folder if the file is there, else the transcript's folder).
    #[arg(long, value_name = "DIR")]
    pub audio_root: Option<PathBuf>,
    /// Name of the transcript column in the exported TSV.
    #[arg(long, default_value = "text")]
    pub column: String,
    /// Write a 16 kHz WAV copy of the audio: for formats browsers do not play (auto), always
    /// (the page falls back to it if the browser refuses the original), or never.
    #[arg(long, value_enum, default_value = "auto")]
    pub convert_audio: ConvertArg,
    /// Calibration from `isogloss calibrate`: colours show calibrated confidence.
    #[arg(long, value_name = "calibration.toml")]
    pub calibration: Option<PathBuf>,
    /// Words below this are visited by the "next low-confidence word" key and counted in the
    /// index.
    #[arg(long, default_value_t = 0.7)]
    pub low_confidence: f64,
}

/// `--convert-audio`.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum ConvertArg {
    /// Only for formats browsers do not play.
    Auto,
    /// Always.
    Always,
    /// Never.
    Never,
}

/// Runs `isogloss review`.
pub fn run(args: ReviewArgs) -> anyhow::Result<Outcome> {
    if !(0.0..=1.0).contains(&args.low_confidence) {
        anyhow::bail!(
            "--low-confidence: expected a number in [0, 1], found {}",
            args.low_confidence
        );
    }
    let document = TranscriptDocument::read(&args.transcript)?;
    let labels = match &args.manifest {
        Some(path) => labels(&Manifest::read(path)?),
        None => HashMap::new(),
    };
    let calibration = match &args.calibration {
        Some(path) => Calibration::read(path)?,
        None => Calibration::IDENTITY,
    };
    let options = ReviewOptions {
        column: args.column.clone(),
        convert: match args.convert_audio {
            ConvertArg::Auto => ConvertAudio::Auto,
            ConvertArg::Always => ConvertAudio::Always,
            ConvertArg::Never => ConvertAudio::Never,
        },
        low_confidence: args.low_confidence,
        calibration,
    };
    let recordings = recordings(
        &document,
        |audio| resolve_audio(&args.transcript, args.audio_root.as_deref(), audio),
        &labels,
    );
    let report = write_review(&args.out, &recordings, &options)?;
    for page in &report.pages {
        // the page against the transcript JSON of the same items, as `transcribe` writes it
        let items: Vec<_> = document
            .items
            .iter()
            .filter(|i| {
                recordings
                    .iter()
                    .any(|r| r.name == page.name && r.source == i.audio)
            })
            .cloned()
            .collect();
        let json = serde_json::to_string_pretty(&TranscriptDocument::new(items))?.len();
        eprintln!(
            "{}: {} words, {} below {:.2}, {:.1} min of audio; page {:.1} kB ({:.2} × its transcript JSON){}",
            page.page.display(),
            page.words,
            page.low_words,
            args.low_confidence,
            page.audio_seconds / 60.0,
            page.page_bytes as f64 / 1000.0,
            page.page_bytes as f64 / json.max(1) as f64,
            page.converted
                .as_ref()
                .map_or(String::new(), |c| format!("; converted audio {}", c.display()))
        );
    }
    eprintln!(
        "wrote {} review pages and {}",
        report.pages.len(),
        args.out.join("index.html").display()
    );
    if report.failed.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!("{} recordings failed:", report.failed.len());
    for (name, error) in &report.failed {
        eprintln!("  {name}: {error}");
    }
    Ok(Outcome::SomeItemsFailed)
}
