//! `isogloss transcribe`: flags, the acoustic model and audio reader behind them, and the
//! report on stderr. The batch engine (sharding, resume journal, parallel decoding, atomic
//! output, carrying on past failed items) is `isogloss_batch`.

use std::path::{Path, PathBuf};

use anyhow::bail;
use indicatif::ProgressBar;
use isogloss_acoustic::AcousticModel;
use isogloss_audio::{ChunkReader, Segment};
use isogloss_batch::{
    batch_items, transcribe, AudioSource, Chunks, Event, ItemSource, Recognizer, Shard, SideError,
    TranscribeSettings,
};
use isogloss_decoder::output::OutputFormat;
use isogloss_decoder::pipeline::Reading;
use isogloss_decoder::segment::VadConfig;
use isogloss_decoder::{DecodeError, SearchOptions};
use isogloss_features::{CmvnMode, FeatureExtractor};
use ndarray::Array2;

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
    /// Hypotheses kept per frame (wider: fewer search errors, slower).
    #[arg(long, default_value_t = isogloss_decoder::DEFAULT_BEAM)]
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
    /// Checks the numbers and turns the flags into the engine's settings.
    fn settings(&self) -> anyhow::Result<TranscribeSettings> {
        // Each setting is checked against its limit (docs/limits.md) and named by its flag.
        let flag = |error: DecodeError| match error {
            DecodeError::InvalidSetting {
                setting,
                expected,
                found,
            } => anyhow::anyhow!(
                "--{}: expected {expected}, found {found}",
                match setting {
                    "max_segment_seconds" => "max-segment".to_string(),
                    other => other.replace('_', "-"),
                }
            ),
            other => other.into(),
        };
        if !(0.0..=1.0).contains(&self.skip_blank_above) {
            bail!(
                "--skip-blank-above: expected from 0 to 1, found {}",
                self.skip_blank_above
            );
        }
        let search = SearchOptions {
            beam: self.beam,
            lm_weight: self.lm_weight,
            word_bonus: self.word_bonus,
            unit_margin: Some(self.unit_margin),
            skip_blank_above: (self.skip_blank_above < 1.0).then_some(self.skip_blank_above),
            lookahead: !self.no_lookahead,
            ..SearchOptions::default()
        };
        search.validate().map_err(flag)?;
        VadConfig {
            max_segment_seconds: self.max_segment,
            ..VadConfig::default()
        }
        .validate()
        .map_err(flag)?;
        Ok(TranscribeSettings {
            lm: self.lm.clone(),
            lexicon: self.lexicon.clone(),
            search,
            greedy: self.greedy,
            max_segment_seconds: self.max_segment,
            out: self.out.clone(),
            format: self.format.into(),
            resume: self.resume,
        })
    }
}

/// `--format`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum FormatArg {
    /// `id<TAB>text`, for `isogloss score`.
    Tsv,
    /// The transcript JSON (docs/formats.md): stretches of speech with timed words.
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

/// A trained model with its own front end (shared with `train --untranscribed`).
pub(crate) struct ModelRecognizer {
    model: AcousticModel,
    extractor: FeatureExtractor,
    dir: PathBuf,
}

impl ModelRecognizer {
    /// Loads the model directory `dir`.
    pub(crate) fn load(dir: &Path) -> anyhow::Result<ModelRecognizer> {
        let model = AcousticModel::load(dir)?;
        let extractor = FeatureExtractor::new(model.feature_config())?;
        Ok(ModelRecognizer {
            model,
            extractor,
            dir: dir.to_path_buf(),
        })
    }
}

impl Recognizer for ModelRecognizer {
    fn units(&self) -> Vec<String> {
        self.model.units().to_vec()
    }

    fn frame_shift_seconds(&self) -> f64 {
        self.model.frame_shift_seconds()
    }

    fn log_posteriors(&self, samples: &[f32]) -> Result<Array2<f32>, SideError> {
        Ok(self.model.segment_posteriors(&self.extractor, samples)?.0)
    }

    fn readings(&self, samples: &[f32]) -> Result<Vec<Reading>, SideError> {
        let readings = self.model.segment_readings(&self.extractor, samples)?;
        // Frames of a segment read at another tempo lie `speed` times as far apart.
        let shift = self.model.frame_shift_seconds();
        Ok(readings
            .into_iter()
            .map(|(posteriors, candidate)| (posteriors, shift * candidate.speed))
            .collect())
    }

    fn files(&self) -> Vec<PathBuf> {
        let mut files = vec![
            self.dir.join("model.safetensors"),
            self.dir.join("model.toml"),
        ];
        if self.model.speaker_vectors().is_some() {
            files.push(self.dir.join(isogloss_speaker::EXTRACTOR_TENSORS));
            files.push(self.dir.join(isogloss_speaker::EXTRACTOR_DESCRIPTION));
        }
        files
    }
}

/// Audio files decoded by the audio crate.
pub(crate) struct FileAudio;

impl AudioSource for FileAudio {
    fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> Result<Vec<f32>, SideError> {
        let mut cuts = isogloss_audio::read_segments(path, &[Segment { start, end }])?;
        Ok(cuts.pop().unwrap_or_default())
    }

    fn chunks(&self, path: &Path) -> Result<Chunks<'_>, SideError> {
        // Ten seconds at 16 kHz per chunk: memory stays flat however long the recording.
        let reader = ChunkReader::open(path, 160_000)?;
        Ok(Box::new(reader.map(|chunk| chunk.map_err(Into::into))))
    }
}

/// Runs `isogloss transcribe`.
pub fn run(args: TranscribeArgs) -> anyhow::Result<Outcome> {
    let settings = args.settings()?;
    let source = match &args.manifest {
        Some(manifest) => ItemSource::Manifest(manifest.clone()),
        None => ItemSource::Recordings(args.audio.clone()),
    };
    let items = batch_items(&source, args.shard)?;
    let recognizer = ModelRecognizer::load(&args.model)?;
    if recognizer.model.feature_config().cmvn == CmvnMode::Speaker {
        eprintln!(
            "warning: {}: the model was trained with cmvn = \"speaker\", but transcribe normalizes each segment by its own statistics (the speakers of a recording are unknown); expect error rates other than those measured with speaker normalization (isogloss sweep on a speaker-labelled manifest). Train with cmvn = \"utterance\" for transcription.",
            args.model.join("model.toml").display()
        );
    }
    let mut bar: Option<ProgressBar> = None;
    let mut events = |event: Event| match event {
        Event::Warning(message) => eprintln!("warning: {message}"),
        Event::Progress(progress) => {
            let bar = bar
                .get_or_insert_with(|| crate::progress::bar(progress.total as u64, "transcribe"));
            bar.set_position(progress.done as u64);
            if progress.audio_seconds > 0.0 {
                bar.set_message(format!(
                    "RTF {:.3}",
                    progress.wall_seconds / progress.audio_seconds
                ));
            }
        }
    };
    let report = transcribe(&settings, &items, &recognizer, &FileAudio, &mut events)?;
    if let Some(bar) = bar {
        bar.finish_and_clear();
    }
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
