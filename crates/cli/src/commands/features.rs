//! `isogloss features`: one audio file in, one safetensors feature file (`features` [frames, dims])
//! out, with the front end of a TOML config (the default front end of `docs/features.md` without `--config`). The
//! algorithms live in `isogloss_features`; decoding and resampling in `isogloss_audio`.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use clap::Args;
use isogloss_audio::AudioError;
use isogloss_features::{
    write_features, Cmvn, CmvnMode, FeatureConfig, FeatureExtractor, FeatureKind,
};
use ndarray::Array2;

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
    let (samples, mut features) =
        features_of(&args.audio, &extractor, &isogloss_audio::read_mono_16k)?;
    if features.nrows() == 0 {
        bail!(
            "{}: {} samples ({:.3} s) is shorter than one frame of {} samples; no features to write",
            args.audio.display(),
            samples,
            samples as f64 / f64::from(config.sample_rate),
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
        samples as f64 / f64::from(config.sample_rate),
        args.out.display()
    );
    Ok(Outcome::Done)
}

/// Decodes `audio` with `read` (16 kHz mono) and computes its features: the number of samples
/// and the feature matrix. A panic inside either step (a decoding library failing on a crafted
/// file, or a defect) is this file's error, naming it, instead of a crash.
fn features_of(
    audio: &Path,
    extractor: &FeatureExtractor,
    read: &dyn Fn(&Path) -> Result<Vec<f32>, AudioError>,
) -> Result<(usize, Array2<f32>), AudioError> {
    isogloss_audio::isolated(audio, || {
        let samples = read(audio)?;
        Ok((samples.len(), extractor.extract(&samples)))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Issue 16: a panic while the file is decoded becomes an error naming the file and what
    /// happened; a reader that works gives the features.
    #[test]
    fn a_panic_while_decoding_is_the_files_error() {
        let extractor = FeatureExtractor::new(&FeatureConfig::default()).unwrap();
        let panicking = |_: &Path| -> Result<Vec<f32>, AudioError> {
            panic!("internal state the reader did not expect")
        };
        let error = features_of(Path::new("interviews/int7.mp3"), &extractor, &panicking)
            .unwrap_err()
            .to_string();
        assert_eq!(
            error,
            "interviews/int7.mp3: the audio data is damaged: the decoder failed inside (internal state the reader did not expect)"
        );
        let silence = |_: &Path| -> Result<Vec<f32>, AudioError> { Ok(vec![0.0; 16_000]) };
        let (samples, features) =
            features_of(Path::new("quiet.wav"), &extractor, &silence).unwrap();
        // The default front end: 400-sample windows every 160 samples, (16000 − 400) / 160 + 1.
        assert_eq!((samples, features.nrows()), (16_000, 98));
    }
}
