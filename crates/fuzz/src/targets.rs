//! The parsers under test: every file format isogloss reads from a user.
//!
//! Each target writes the input to one file in a scratch folder (beside companion files that
//! stay fixed, such as the weights next to a mutated `model.toml`) and calls the public reading
//! function a command would call, including what the command builds right after reading (the
//! feature extractor of a feature config, the derived sizes of a network description). A
//! target returns `Ok` or the typed error's message.

use std::path::Path;

use isogloss_acoustic::config::ModelConfig;
use isogloss_acoustic::train::Trainer;
use isogloss_acoustic::AcousticModel;
use isogloss_audio::ChunkReader;
use isogloss_batch::Journal;
use isogloss_corpus::Manifest;
use isogloss_decoder::output::TranscriptDocument;
use isogloss_features::{read_features, FeatureConfig, FeatureExtractor};
use isogloss_lexicon::graphone::G2pModel;
use isogloss_lexicon::rules::RuleSet;
use isogloss_lexicon::Lexicon;
use isogloss_lm::ArpaModel;
use isogloss_score::{Hypotheses, Reference, TokenRules, VariantMap};
use isogloss_sweep::Sweep;

/// One parser under test.
pub struct Target {
    /// Name (also the folder of its seeds and regressions).
    pub name: &'static str,
    /// Name of the input file in the scratch folder; error messages must contain it.
    pub file_name: &'static str,
    /// Keywords of the format, inserted by the mutator.
    pub dictionary: &'static [&'static str],
    /// Whether every error must name the input file (false where the message names a
    /// companion instead, e.g. the folder of a model).
    pub errors_name_the_file: bool,
    /// Puts the companion files into the scratch folder (`companions` is the crate's
    /// `seeds/companions` folder).
    pub prepare: fn(scratch: &Path, companions: &Path),
    /// Reads the input file.
    pub run: fn(input: &Path) -> Result<(), String>,
}

fn nothing(_: &Path, _: &Path) {}

fn copy_companion(scratch: &Path, companions: &Path, name: &str) {
    let from = companions.join(name);
    std::fs::copy(&from, scratch.join(name))
        .unwrap_or_else(|error| panic!("{}: cannot copy: {error}", from.display()));
}

/// Decodes the whole stream at the file's own rate, then again resampled to 16 kHz in chunks,
/// keeping nothing: what `corpus check` and `transcribe` do with a recording.
fn audio(input: &Path) -> Result<(), String> {
    isogloss_audio::probe(input).map_err(|e| e.to_string())?;
    isogloss_audio::verify(input).map_err(|e| e.to_string())?;
    let mut reader = ChunkReader::open(input, 1 << 14).map_err(|e| e.to_string())?;
    while reader.next_chunk().map_err(|e| e.to_string())?.is_some() {}
    Ok(())
}

const AUDIO_WORDS: &[&str] = &[
    "RIFF",
    "WAVE",
    "fmt ",
    "data",
    "LIST",
    "fLaC",
    "OggS",
    "vorbis",
    "ID3",
    "Xing",
    "Info",
    "LAME",
    "\u{ff}\u{fb}",
];

const TABLE_WORDS: &[&str] = &[
    "\t",
    "\n",
    "\r\n",
    "\u{feff}",
    "id",
    "audio",
    "start",
    "end",
    "speaker",
    "dialect",
    "dialectal",
    "normalized",
    "text",
    "variant",
    "..",
    "/",
    "\t\t",
    "é",
    "\u{0301}",
];

const ARPA_WORDS: &[&str] = &[
    "\\data\\\n",
    "ngram 1=",
    "ngram 2=",
    "ngram 7=",
    "\\1-grams:\n",
    "\\2-grams:\n",
    "\\3-grams:\n",
    "\\end\\\n",
    "<s>",
    "</s>",
    "<unk>",
    "-99",
    "\t",
    " ",
];

const JSON_WORDS: &[&str] = &[
    "{",
    "}",
    "[",
    "]",
    "\"",
    ",",
    ":",
    "\n",
    "null",
    "1e308",
    "-0",
    "\\u0000",
    "\"fingerprint\"",
    "\"item\"",
    "\"id\"",
    "\"stretches\"",
    "\"tokens\"",
    "\"from_s\"",
    "\"to_s\"",
    "\"certainty\"",
    "\"format\"",
    "\"version\"",
    "\"items\"",
];

const TOML_WORDS: &[&str] = &[
    "=",
    "[",
    "]",
    "[[",
    "]]",
    "\"",
    "{",
    "}",
    ",",
    "\n",
    "true",
    "false",
    "[features]",
    "[model]",
    "[training]",
    "[[layers]]",
    "fft_size = ",
    "window_samples = ",
    "hop_samples = ",
    "mel_filters = ",
    "sample_rate = ",
    "taps = ",
    "width = ",
    "keep_every = ",
    "resamples = ",
    "beam = ",
    "epochs = ",
    "batch_frames = ",
    "order = ",
];

fn all_targets() -> Vec<Target> {
    vec![
        Target {
            name: "wav",
            file_name: "input.wav",
            dictionary: AUDIO_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: audio,
        },
        Target {
            name: "flac",
            file_name: "input.flac",
            dictionary: AUDIO_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: audio,
        },
        Target {
            name: "mp3",
            file_name: "input.mp3",
            dictionary: AUDIO_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: audio,
        },
        Target {
            name: "ogg",
            file_name: "input.ogg",
            dictionary: AUDIO_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: audio,
        },
        Target {
            name: "manifest",
            file_name: "manifest.tsv",
            dictionary: TABLE_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                Manifest::read_collecting(input).map_err(|e| e.to_string())?;
                Manifest::read(input).map(drop).map_err(|e| e.to_string())
            },
        },
        Target {
            name: "arpa",
            file_name: "model.arpa",
            dictionary: ARPA_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| ArpaModel::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "arpa-gzip",
            file_name: "model.arpa.gz",
            dictionary: ARPA_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| ArpaModel::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "lexicon",
            file_name: "lexicon.tsv",
            dictionary: TABLE_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| Lexicon::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "g2p",
            file_name: "model.g2p",
            dictionary: &[
                "isogloss joint-sequence grapheme-to-phoneme model\n",
                "format\t1\n",
                "graphones\t",
                "\\data\\\n",
                "ngram 1=",
                "\\1-grams:\n",
                "\\end\\\n",
                "</s>",
                "\t",
            ],
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| G2pModel::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "variants",
            file_name: "variants.tsv",
            dictionary: TABLE_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                VariantMap::read(input, &TokenRules::default())
                    .map(drop)
                    .map_err(|e| e.to_string())
            },
        },
        Target {
            name: "hypotheses",
            file_name: "hyp.tsv",
            dictionary: TABLE_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                Hypotheses::read(input).map_err(|e| e.to_string())?;
                Reference::read(input, "text", &["id".to_string()])
                    .map(drop)
                    .map_err(|e| e.to_string())
            },
        },
        Target {
            name: "journal",
            file_name: "out.tsv.journal.jsonl",
            dictionary: JSON_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            // What `transcribe --resume` does: the entries of one fingerprint are kept.
            run: |input| {
                Journal::open(&input.with_file_name("out.tsv"), "0f3c9a", true)
                    .map(drop)
                    .map_err(|e| e.to_string())
            },
        },
        Target {
            name: "transcript",
            file_name: "transcript.json",
            dictionary: JSON_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                TranscriptDocument::read(input)
                    .map(drop)
                    .map_err(|e| e.to_string())
            },
        },
        Target {
            name: "feature-config",
            file_name: "features.toml",
            dictionary: TOML_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                let config = FeatureConfig::from_toml_file(input).map_err(|e| e.to_string())?;
                FeatureExtractor::new(&config)
                    .map(drop)
                    .map_err(|e| format!("{}: {e}", input.display()))
            },
        },
        Target {
            name: "model-config",
            file_name: "tdnn.toml",
            dictionary: TOML_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                let config = ModelConfig::read(input).map_err(|e| e.to_string())?;
                let architecture = &config.model;
                architecture.context();
                architecture.subsampling();
                architecture.parameter_count(config.features.dims(), 100);
                FeatureExtractor::new(&config.features)
                    .map(drop)
                    .map_err(|e| format!("{}: {e}", input.display()))
            },
        },
        Target {
            name: "sweep-config",
            file_name: "sweep.toml",
            dictionary: TOML_WORDS,
            errors_name_the_file: true,
            prepare: |scratch, _| {
                for folder in ["models/a", "models/b"] {
                    std::fs::create_dir_all(scratch.join(folder)).expect("scratch folder");
                }
                for file in [
                    "test.tsv",
                    "dev.tsv",
                    "train.dialectal.txt",
                    "train.normalized.txt",
                    "ood.txt",
                    "lm.arpa",
                    "rules.toml",
                    "lexicon.tsv",
                    "variants.tsv",
                    "model.g2p",
                ] {
                    std::fs::write(scratch.join(file), "").expect("scratch file");
                }
            },
            run: |input| Sweep::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "rules",
            file_name: "rules.toml",
            dictionary: TOML_WORDS,
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| RuleSet::read(input).map(drop).map_err(|e| e.to_string()),
        },
        Target {
            name: "model-toml",
            file_name: "model.toml",
            dictionary: TOML_WORDS,
            errors_name_the_file: false,
            prepare: |scratch, companions| {
                copy_companion(scratch, companions, "model.safetensors");
            },
            run: model,
        },
        Target {
            name: "model-weights",
            file_name: "model.safetensors",
            dictionary: &[
                "F32",
                "F64",
                "dtype",
                "shape",
                "data_offsets",
                "__metadata__",
                "{",
                "}",
            ],
            errors_name_the_file: false,
            prepare: |scratch, companions| copy_companion(scratch, companions, "model.toml"),
            run: model,
        },
        Target {
            name: "checkpoint",
            file_name: "checkpoint.safetensors",
            dictionary: &[
                "F32",
                "dtype",
                "shape",
                "data_offsets",
                "__metadata__",
                "progress",
                "config",
                "units",
                "input_dims",
                "adam_step",
                "adam.first/",
                "param/",
                "width",
            ],
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| {
                Trainer::load_checkpoint(input)
                    .map(drop)
                    .map_err(|e| e.to_string())
            },
        },
        Target {
            name: "features-file",
            file_name: "features.safetensors",
            dictionary: &[
                "F32",
                "F16",
                "I64",
                "dtype",
                "shape",
                "data_offsets",
                "features",
            ],
            errors_name_the_file: true,
            prepare: nothing,
            run: |input| read_features(input).map(drop).map_err(|e| e.to_string()),
        },
    ]
}

/// Runs the model-directory reader on the scratch folder, then the network on one frame.
fn model(input: &Path) -> Result<(), String> {
    let folder = input.parent().unwrap_or(Path::new("."));
    let model = AcousticModel::load(folder).map_err(|e| e.to_string())?;
    let dims = model.feature_config().dims();
    let frames = ndarray::Array2::<f32>::zeros((4, dims));
    model
        .log_posteriors(&frames)
        .map(drop)
        .map_err(|e| e.to_string())
}

/// The target called `name`.
pub fn target(name: &str) -> Option<Target> {
    all_targets().into_iter().find(|t| t.name == name)
}

/// Every target's name.
pub fn names() -> Vec<&'static str> {
    all_targets().iter().map(|t| t.name).collect()
}
