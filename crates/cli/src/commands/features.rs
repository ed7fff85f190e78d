//! `isogloss features`: one audio file in, one safetensors feature file (`features` [frames, dims])
//! out, with the front end of a TOML config (the default front end of `docs/features.md` without `--config`). The
//! algorithms live in `isogloss_features`; decoding and resampling in `isogloss_audio`.

use std::path::PathBuf;

use anyhow::{bail, Context};
use clap::Args;
use isogloss_features::{
    write_features, Cmvn, CmvnMode, FeatureConfig, FeatureExtractor, FeatureKind,
};

use crate::Outcome;

/// Flags of `isogloss features`.
#[derive(Args, Debug)]
pub struct FeaturesArgs {
    /// Audio file (WAV, FLAC, MP3 or Ogg Vorbis; any rate, resampled to 16 kHz mono).
    #[arg(value_name = "AUDIO")]
    pub audio: PathBuf,
    /// Output feature file (safetensors, one f32 tensor `features` [frames, dims]).
    #[arg(long, value_name = "OUT.safetensors")]
    pub out: PathBuf,
    /// Front-end settings (TOML, e.g. configs/features-logmel.toml); default: MFCC + Δ + ΔΔ.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
}

/// Runs `isogloss features`.
pub fn run(args: FeaturesArgs) -> anyhow::Result<Outcome> {
    let config = match &args.config {
        Some(path) => FeatureConfig::from_toml_file(path)?,
        None => FeatureConfig::default(),
    };
    if config.sample_rate != isogloss_audio::SAMPLE_RATE {
        bail!(
            "{}: sample_rate must be {} (audio is always resampled to it), found {}",
            args.config
                .as_deref()
                .map(|path| path.display().to_string())
                .unwrap_or_default(),
            isogloss_audio::SAMPLE_RATE,
            config.sample_rate
        );
    }
    let extractor = FeatureExtractor::new(&config)?;
    let samples = isogloss_audio::read_mono_16k(&args.audio)?;
    let mut features = extractor.extract(&samples);
    if features.nrows() == 0 {
        bail!(
            "{}: {} samples ({:.3} s) is shorter than one frame of {} samples; no features to write",
            args.audio.display(),
            samples.len(),
            samples.len() as f64 / f64::from(config.sample_rate),
            config.window_samples
        );
    }
    let item = args.audio.display().to_string();
    match config.cmvn {
        CmvnMode::None => {}
        // One file is one utterance of one speaker, so both modes use the file's statistics.
        CmvnMode::Utterance | CmvnMode::Speaker => {
            Cmvn::from_features(&features, config.unit_variance, &item)?
                .apply(&mut features, &item)?
        }
    }
    write_features(&args.out, &features)
        .with_context(|| format!("features of {}", args.audio.display()))?;
    eprintln!(
        "wrote {} frames × {} dims ({}, {:.2} s of audio) to {}",
        features.nrows(),
        features.ncols(),
        match config.kind {
            FeatureKind::Mfcc => "MFCC",
            FeatureKind::LogMel => "log-mel",
        },
        samples.len() as f64 / f64::from(config.sample_rate),
        args.out.display()
    );
    Ok(Outcome::Done)
}
