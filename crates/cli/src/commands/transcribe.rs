//! `isogloss transcribe`: the acoustic model and the audio reader behind the batch transcription
//! flow of [`super::decode`] (beam search with LM and lexicon, or greedy; tsv, json, WebVTT, txt;
//! `--resume`, `--shard`).

use std::path::{Path, PathBuf};

use isogloss_acoustic::AcousticModel;
use isogloss_audio::{ChunkReader, Segment};
use isogloss_features::{Cmvn, CmvnMode, FeatureExtractor};
use ndarray::Array2;

use super::decode::{transcribe_with, AudioSource, Recognizer, TranscribeArgs};
use crate::Outcome;

/// A trained model with its own front end.
struct ModelRecognizer {
    model: AcousticModel,
    extractor: FeatureExtractor,
    dir: PathBuf,
}

impl Recognizer for ModelRecognizer {
    fn units(&self) -> Vec<String> {
        self.model.units().to_vec()
    }

    fn frame_shift_seconds(&self) -> f64 {
        self.model.frame_shift_seconds()
    }

    fn log_posteriors(&self, samples: &[f32]) -> anyhow::Result<Array2<f32>> {
        let mut features = self.extractor.extract(samples);
        if features.nrows() == 0 {
            return Ok(Array2::zeros((0, self.model.units().len())));
        }
        let config = self.model.feature_config();
        // A segment of a recording is normalized by its own statistics. A model trained with
        // per-speaker statistics sees a slightly different normalization here, because the
        // speakers of an arbitrary recording are unknown; the demo model trains per utterance.
        if config.cmvn != CmvnMode::None {
            let cmvn = Cmvn::from_features(&features, config.unit_variance, "segment")?;
            cmvn.apply(&mut features, "segment")?;
        }
        Ok(self.model.log_posteriors(&features)?)
    }

    fn files(&self) -> Vec<PathBuf> {
        vec![
            self.dir.join("model.safetensors"),
            self.dir.join("model.toml"),
        ]
    }
}

/// Audio files decoded by the audio crate.
struct FileAudio;

impl AudioSource for FileAudio {
    fn read_cut(&self, path: &Path, start: f64, end: Option<f64>) -> anyhow::Result<Vec<f32>> {
        let mut cuts = isogloss_audio::read_segments(path, &[Segment { start, end }])?;
        Ok(cuts.pop().unwrap_or_default())
    }

    fn chunks(
        &self,
        path: &Path,
    ) -> anyhow::Result<Box<dyn Iterator<Item = anyhow::Result<Vec<f32>>> + '_>> {
        // Ten seconds at 16 kHz per chunk: memory stays flat however long the recording.
        let reader = ChunkReader::open(path, 160_000)?;
        Ok(Box::new(reader.map(|chunk| chunk.map_err(Into::into))))
    }
}

/// Runs `isogloss transcribe`.
pub fn run(args: TranscribeArgs) -> anyhow::Result<Outcome> {
    let model = AcousticModel::load(&args.model)?;
    let extractor = FeatureExtractor::new(model.feature_config())?;
    let recognizer = ModelRecognizer {
        model,
        extractor,
        dir: args.model.clone(),
    };
    transcribe_with(&args, &recognizer, &FileAudio)
}
