//! Building the language models and lexicons a sweep's axes name, once per (axis value,
//! transcript column), cached as files under the sweep's output folder.

use std::path::{Path, PathBuf};

use isogloss_lexicon::rules::RuleSet;
use isogloss_lexicon::Lexicon;
use isogloss_lm::{
    estimate, estimate_weights, merge, ArpaModel, NgramCounts, SENTENCE_END, SENTENCE_START,
    UNKNOWN_WORD,
};
use sha2::{Digest, Sha256};

use crate::config::{with_column, LexiconChoice, LexiconKind, LmChoice};
use crate::SweepError;

/// Content hash of files and settings, hex-encoded: the cache key of everything built.
#[derive(Default)]
pub struct ContentKey(Sha256);

impl ContentKey {
    /// Starts an empty key.
    pub fn new() -> ContentKey {
        ContentKey(Sha256::new())
    }

    /// Adds a file's bytes (and its length, so that two files never run together).
    pub fn file(&mut self, path: &Path) -> Result<(), SweepError> {
        let bytes = std::fs::read(path).map_err(|source| SweepError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        self.0.update((bytes.len() as u64).to_le_bytes());
        self.0.update(&bytes);
        Ok(())
    }

    /// Adds a setting.
    pub fn text(&mut self, text: &str) {
        self.0.update((text.len() as u64).to_le_bytes());
        self.0.update(text.as_bytes());
    }

    /// The hex digest (first 16 bytes: ample to tell cache entries apart).
    pub fn finish(self) -> String {
        self.0.finalize()[..16]
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    }
}

/// A language model ready for decoding, with where it lives on disk.
pub struct BuiltLm {
    /// The ARPA file (given, or built into the cache).
    pub path: PathBuf,
    /// The model.
    pub model: ArpaModel,
    /// The out-of-domain mixture weight, when the LM build mixes.
    pub out_of_domain_weight: Option<f64>,
    /// Estimation warnings to show the user.
    pub warnings: Vec<String>,
}

fn lm_error(error: isogloss_lm::LmError) -> SweepError {
    SweepError::Build(error.to_string())
}

/// Builds (or loads from the cache) the LM of one axis value for one transcript column.
/// `dev_sentences` are the dev transcripts of that column, used to estimate the out-of-domain
/// mixture weight.
pub fn build_lm(
    choice: &LmChoice,
    column: &str,
    dev_sentences: Option<&[Vec<String>]>,
    cache: &Path,
) -> Result<BuiltLm, SweepError> {
    let (name, order, smoothing, text, out_of_domain, out_of_domain_weight) = match choice {
        LmChoice::File { path, .. } => {
            let model = ArpaModel::read(path).map_err(lm_error)?;
            return Ok(BuiltLm {
                path: path.clone(),
                model,
                out_of_domain_weight: None,
                warnings: Vec::new(),
            });
        }
        LmChoice::Build {
            name,
            order,
            smoothing,
            text,
            out_of_domain,
            out_of_domain_weight,
        } => (
            name,
            *order,
            *smoothing,
            text,
            out_of_domain,
            out_of_domain_weight,
        ),
    };
    let texts: Vec<PathBuf> = text.iter().map(|t| with_column(t, column)).collect();
    let mut key = ContentKey::new();
    key.text(&format!(
        "lm v1 {order} {smoothing} {out_of_domain_weight:?}"
    ));
    for t in &texts {
        key.file(t)?;
    }
    if let Some(out_of_domain) = out_of_domain {
        key.file(out_of_domain)?;
        if out_of_domain_weight.is_none() {
            for sentence in dev_sentences.unwrap_or_default() {
                key.text(&sentence.join(" "));
            }
        }
    }
    let path = cache.join(format!("{name}.{column}.{}.arpa", key.finish()));
    let weight_path = path.with_extension("weight");
    if path.exists() {
        let model = ArpaModel::read(&path).map_err(lm_error)?;
        let out_of_domain_weight = std::fs::read_to_string(&weight_path)
            .ok()
            .and_then(|w| w.trim().parse().ok());
        return Ok(BuiltLm {
            path,
            model,
            out_of_domain_weight,
            warnings: Vec::new(),
        });
    }
    std::fs::create_dir_all(cache).map_err(|source| SweepError::Io {
        path: cache.to_path_buf(),
        source,
    })?;
    let options = isogloss_lm::CountOptions::default();
    let counts = NgramCounts::from_text_files(&texts, order, &options).map_err(lm_error)?;
    let in_domain = estimate(&counts, smoothing).map_err(lm_error)?;
    let mut warnings = in_domain.warnings;
    let (model, weight) = match out_of_domain {
        None => (in_domain.model, None),
        Some(text) => {
            let counts = NgramCounts::from_text_files(std::slice::from_ref(text), order, &options)
                .map_err(lm_error)?;
            let out_of_domain_lm = estimate(&counts, smoothing).map_err(lm_error)?;
            warnings.extend(out_of_domain_lm.warnings);
            let models = [in_domain.model, out_of_domain_lm.model];
            let tuning: Vec<Vec<String>> = dev_sentences.map(<[_]>::to_vec).unwrap_or_default();
            let weights = match out_of_domain_weight {
                Some(w) => vec![1.0 - w, *w],
                None => {
                    estimate_weights(&models, &tuning)
                        .map_err(lm_error)?
                        .weights
                }
            };
            (
                merge(&models, &weights, &tuning).map_err(lm_error)?,
                Some(weights[1]),
            )
        }
    };
    model.write_arpa(&path).map_err(lm_error)?;
    // Decode and evaluate with the model as the ARPA file stores it (probabilities rounded to
    // the file's precision), so that a fresh run, a cached run and `transcribe --lm FILE` agree
    // to the last digit.
    let model = ArpaModel::read(&path).map_err(lm_error)?;
    if let Some(weight) = weight {
        std::fs::write(&weight_path, format!("{weight}\n")).map_err(|source| SweepError::Io {
            path: weight_path.clone(),
            source,
        })?;
    }
    Ok(BuiltLm {
        path,
        model,
        out_of_domain_weight: weight,
        warnings,
    })
}

/// The words an LM can predict (its vocabulary without sentence markers and `<unk>`): the word
/// list a lexicon is made for.
pub fn lm_words(model: &ArpaModel) -> Vec<String> {
    model
        .vocabulary()
        .filter(|w| ![SENTENCE_START, SENTENCE_END, UNKNOWN_WORD].contains(w))
        .map(str::to_string)
        .collect()
}

/// A lexicon made for a word list, and the words it could not cover.
pub struct BuiltLexicon {
    /// The lexicon.
    pub lexicon: Lexicon,
    /// Words the rules or G2P model could not pronounce.
    pub uncovered: Vec<String>,
}

/// Makes the lexicon of one axis value for `words`.
pub fn build_lexicon(choice: &LexiconChoice, words: &[String]) -> Result<BuiltLexicon, SweepError> {
    let lexicon_error = |e: isogloss_lexicon::LexiconError| SweepError::Build(e.to_string());
    match &choice.kind {
        LexiconKind::Grapheme => Ok(BuiltLexicon {
            // The decoder ends grapheme words at the model's boundary unit, so entries spell letters only.
            lexicon: Lexicon::graphemes(words.iter().map(String::as_str), None),
            uncovered: Vec::new(),
        }),
        LexiconKind::File(path) => Ok(BuiltLexicon {
            lexicon: Lexicon::read(path).map_err(lexicon_error)?,
            uncovered: Vec::new(),
        }),
        LexiconKind::Rules(path) => {
            let rules = RuleSet::read(path).map_err(lexicon_error)?;
            let (lexicon, uncovered) = rules.lexicon(words.iter().map(String::as_str));
            Ok(BuiltLexicon {
                lexicon,
                uncovered: uncovered.into_iter().map(|u| u.word).collect(),
            })
        }
        LexiconKind::G2p(path) => {
            let model = isogloss_lexicon::graphone::G2pModel::read(path).map_err(lexicon_error)?;
            let config = isogloss_lexicon::graphone::DecodeConfig::default();
            let mut entries = Vec::new();
            let mut uncovered = Vec::new();
            for word in words {
                match model.pronounce(word, &config) {
                    Ok(best) if !best.is_empty() => {
                        for pronunciation in best {
                            entries.push((word.clone(), pronunciation.phonemes));
                        }
                    }
                    _ => uncovered.push(word.clone()),
                }
            }
            Ok(BuiltLexicon {
                lexicon: Lexicon::from_entries(entries),
                uncovered,
            })
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use isogloss_lm::Smoothing;

    fn demo(file: &str) -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("../../tests/data/demo")
            .join(file)
    }

    #[test]
    fn an_lm_build_is_built_once_then_read_from_the_cache() {
        let cache = tempfile::tempdir().unwrap();
        let build = LmChoice::Build {
            name: "mixed".into(),
            order: 2,
            smoothing: Smoothing::ModifiedKneserNey,
            text: vec![demo("train.{column}.txt")],
            out_of_domain: Some(demo("ood.txt")),
            out_of_domain_weight: None,
        };
        let dev = isogloss_lm::read_sentences(&demo("dev.normalized.txt")).unwrap();
        let first = build_lm(&build, "normalized", Some(&dev), cache.path()).unwrap();
        let weight = first.out_of_domain_weight.unwrap();
        // EM keeps both components when each explains some dev words the other explains worse.
        assert!(weight > 0.0 && weight < 1.0, "{weight}");
        let second = build_lm(&build, "normalized", Some(&dev), cache.path()).unwrap();
        assert_eq!(first.path, second.path);
        assert_eq!(second.out_of_domain_weight, Some(weight));
        assert_eq!(first.model.ngram_counts(), second.model.ngram_counts());
        // The other writing is another model, in another cache file.
        let dev = isogloss_lm::read_sentences(&demo("dev.dialectal.txt")).unwrap();
        let dialectal = build_lm(&build, "dialectal", Some(&dev), cache.path()).unwrap();
        assert_ne!(dialectal.path, first.path);
        assert!(dialectal.model.word_index("nowt").is_some());
        assert!(first.model.word_index("nowt").is_none());
    }

    #[test]
    fn grapheme_lexicons_spell_letters_without_the_boundary_unit() {
        let choice = LexiconChoice {
            name: "letters".into(),
            kind: LexiconKind::Grapheme,
        };
        let built = build_lexicon(&choice, &["hoose".to_string(), "an'".to_string()]).unwrap();
        assert_eq!(built.lexicon.pronunciations("an'"), [["a", "n", "'"]]);
        assert!(built.uncovered.is_empty());
    }
}
