//! Speaker-disjoint, dialect-stratified train/dev/test splits.
//!
//! No speaker may be heard in two parts (a recognizer evaluated on voices it was trained on
//! looks better than it is), and every dialect should be represented in each part in about the
//! requested proportion. So speakers, not utterances, are dealt out: each speaker belongs to
//! the dialect in which they speak longest, and within each dialect the speakers are shuffled
//! (ChaCha8 seeded by the user, so a seed always gives the same split) and handed to test, then
//! dev, while that brings the part closer to its target share of the dialect's **duration**;
//! the rest go to train. Fractions are of audio duration, not utterance counts, because hours
//! are what training and evaluation consume.
//!
//! A dialect with few speakers often cannot give a fraction of a speaker; what it falls short
//! of (or overshoots) its target is carried over to the next dialect (in shuffled order), so
//! that six dialects of three speakers each still yield a test set of about the size asked.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::check::NO_DIALECT;
use crate::manifest::{Manifest, Utterance};
use crate::CorpusError;

/// What fraction of each dialect's audio goes to dev and to test, and the shuffling seed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SplitConfig {
    /// Share of duration for the development set (0 ≤ dev < 1).
    pub dev: f64,
    /// Share of duration for the test set (0 ≤ test < 1, dev + test < 1).
    pub test: f64,
    /// Seed of the speaker shuffle.
    pub seed: u64,
}

impl Default for SplitConfig {
    fn default() -> Self {
        SplitConfig {
            dev: 0.1,
            test: 0.1,
            seed: 0,
        }
    }
}

impl SplitConfig {
    /// Checks the fractions; call at the edge (flags, config files).
    pub fn validate(&self) -> Result<(), CorpusError> {
        let fraction = |value: f64| value.is_finite() && (0.0..1.0).contains(&value);
        if fraction(self.dev) && fraction(self.test) && self.dev + self.test < 1.0 {
            Ok(())
        } else {
            Err(CorpusError::InvalidParameter {
                what: "split shares",
                expected: "dev and test shares each from 0 to below 1, together below 1",
                found: format!("dev {} and test {}", self.dev, self.test),
            })
        }
    }
}

/// Which utterances (indices into [`Manifest::utterances`], in file order) go where.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Split {
    /// Training set.
    pub train: Vec<usize>,
    /// Development set.
    pub dev: Vec<usize>,
    /// Test set.
    pub test: Vec<usize>,
}

/// Figures of one part of a split.
#[derive(Debug, Clone, Serialize)]
pub struct PartSummary {
    /// `train`, `dev` or `test`.
    pub part: &'static str,
    /// Utterances.
    pub utterances: usize,
    /// Hours of audio.
    pub hours: f64,
    /// Distinct speakers.
    pub speakers: usize,
    /// Hours per dialect label.
    pub dialect_hours: BTreeMap<String, f64>,
}

/// The duration of every utterance in seconds: `end − start` when both are given, otherwise
/// measured from the audio file's header (each file is probed once).
pub fn utterance_durations(manifest: &Manifest) -> Result<Vec<f64>, CorpusError> {
    let mut lengths: BTreeMap<&Path, f64> = BTreeMap::new();
    let mut durations = Vec::with_capacity(manifest.utterances.len());
    for utterance in &manifest.utterances {
        let start = utterance.start.unwrap_or(0.0);
        let end = match utterance.end {
            Some(end) => end,
            None => match lengths.get(utterance.audio.as_path()) {
                Some(&length) => length,
                None => {
                    let info = isogloss_audio::probe(&utterance.audio).map_err(|source| {
                        CorpusError::Audio {
                            path: manifest.path.clone(),
                            line: utterance.line,
                            source,
                        }
                    })?;
                    lengths.insert(&utterance.audio, info.duration_seconds);
                    info.duration_seconds
                }
            },
        };
        durations.push((end - start).max(0.0));
    }
    Ok(durations)
}

/// Deals the speakers of `manifest` out to train, dev and test (see the module overview).
/// `durations` holds one value per utterance, e.g. from [`utterance_durations`].
pub fn split_by_speaker(
    manifest: &Manifest,
    durations: &[f64],
    config: &SplitConfig,
) -> Result<Split, CorpusError> {
    config.validate()?;
    if durations.len() != manifest.utterances.len() {
        return Err(CorpusError::InvalidParameter {
            what: "utterance durations",
            expected: "one per utterance of the manifest",
            found: format!(
                "{} for {} utterances",
                durations.len(),
                manifest.utterances.len()
            ),
        });
    }
    // Seconds per speaker and per (speaker, dialect).
    let mut speaker_seconds: BTreeMap<&str, f64> = BTreeMap::new();
    let mut speaker_dialect_seconds: BTreeMap<(&str, &str), f64> = BTreeMap::new();
    for (utterance, &seconds) in manifest.utterances.iter().zip(durations) {
        *speaker_seconds.entry(&utterance.speaker).or_default() += seconds;
        *speaker_dialect_seconds
            .entry((&utterance.speaker, &utterance.dialect))
            .or_default() += seconds;
    }
    // Each speaker's home dialect: where they speak longest (ties: the first label).
    let mut home: BTreeMap<&str, (&str, f64)> = BTreeMap::new();
    for (&(speaker, dialect), &seconds) in &speaker_dialect_seconds {
        let entry = home.entry(speaker).or_insert((dialect, seconds));
        if seconds > entry.1 {
            *entry = (dialect, seconds);
        }
    }
    let mut speakers_of_dialect: BTreeMap<&str, Vec<&str>> = BTreeMap::new();
    for (&speaker, &(dialect, _)) in &home {
        speakers_of_dialect
            .entry(dialect)
            .or_default()
            .push(speaker);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
    // Sorted (from the BTreeMaps) before shuffling, so the order depends on the seed only.
    let mut dialects: Vec<Vec<&str>> = speakers_of_dialect.into_values().collect();
    dialects.shuffle(&mut rng);
    let mut part_of_speaker: BTreeMap<&str, Part> = BTreeMap::new();
    // Seconds by which earlier dialects fell short of their test and dev targets.
    let (mut test_carry, mut dev_carry) = (0.0, 0.0);
    for speakers in &mut dialects {
        speakers.shuffle(&mut rng);
        let total: f64 = speakers.iter().map(|s| speaker_seconds[s]).sum();
        let test_target = config.test * total + test_carry;
        let dev_target = config.dev * total + dev_carry;
        let (mut test, mut dev) = (0.0, 0.0);
        for &speaker in speakers.iter() {
            let seconds = speaker_seconds[speaker];
            // Adding the speaker brings a part closer to its target iff it is less than half
            // a speaker short of it.
            let part = if test + seconds / 2.0 < test_target {
                test += seconds;
                Part::Test
            } else if dev + seconds / 2.0 < dev_target {
                dev += seconds;
                Part::Dev
            } else {
                Part::Train
            };
            part_of_speaker.insert(speaker, part);
        }
        test_carry = test_target - test;
        dev_carry = dev_target - dev;
    }
    let mut split = Split::default();
    for (index, utterance) in manifest.utterances.iter().enumerate() {
        match part_of_speaker[utterance.speaker.as_str()] {
            Part::Train => split.train.push(index),
            Part::Dev => split.dev.push(index),
            Part::Test => split.test.push(index),
        }
    }
    Ok(split)
}

#[derive(Debug, Clone, Copy)]
enum Part {
    Train,
    Dev,
    Test,
}

impl Split {
    /// The three parts with their names, in the order train, dev, test.
    pub fn parts(&self) -> [(&'static str, &[usize]); 3] {
        [
            ("train", &self.train),
            ("dev", &self.dev),
            ("test", &self.test),
        ]
    }

    /// Figures of each part.
    pub fn summarize(&self, manifest: &Manifest, durations: &[f64]) -> Vec<PartSummary> {
        self.parts()
            .into_iter()
            .map(|(part, indices)| {
                let mut speakers = BTreeSet::new();
                let mut dialect_hours: BTreeMap<String, f64> = BTreeMap::new();
                let mut seconds = 0.0;
                for &i in indices {
                    let utterance = &manifest.utterances[i];
                    speakers.insert(utterance.speaker.as_str());
                    let label = match utterance.dialect.as_str() {
                        "" => NO_DIALECT,
                        label => label,
                    };
                    *dialect_hours.entry(label.to_string()).or_default() += durations[i] / 3600.0;
                    seconds += durations[i];
                }
                PartSummary {
                    part,
                    utterances: indices.len(),
                    hours: seconds / 3600.0,
                    speakers: speakers.len(),
                    dialect_hours,
                }
            })
            .collect()
    }

    /// Writes `train.tsv`, `dev.tsv` and `test.tsv` into `out_dir` (audio paths relative to
    /// it) and returns their paths.
    pub fn write(&self, manifest: &Manifest, out_dir: &Path) -> Result<Vec<PathBuf>, CorpusError> {
        let mut written = Vec::new();
        for (part, indices) in self.parts() {
            let path = out_dir.join(format!("{part}.tsv"));
            let rows: Vec<&Utterance> = indices.iter().map(|&i| &manifest.utterances[i]).collect();
            manifest.write_subset(&path, &rows)?;
            written.push(path);
        }
        Ok(written)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const DIALECTS: [&str; 6] = ["fells", "marsh", "vale", "corran", "quays", "larch"];

    /// A manifest of `speakers_per_dialect` speakers in each of the first `dialects` dialects,
    /// each speaker with 4 utterances of 1 + (speaker number mod 3) seconds, or of 1 s each when
    /// `equal`.
    fn corpus(dialects: usize, speakers_per_dialect: usize, equal: bool) -> (Manifest, Vec<f64>) {
        let mut utterances = Vec::new();
        let mut durations = Vec::new();
        for dialect in &DIALECTS[..dialects] {
            for s in 0..speakers_per_dialect {
                for u in 0..4 {
                    let seconds = if equal { 1.0 } else { 1.0 + (s % 3) as f64 };
                    utterances.push(Utterance {
                        line: utterances.len() + 2,
                        id: format!("{dialect}{s:02}-{u}"),
                        audio: PathBuf::from(format!("{dialect}{s:02}.wav")),
                        start: Some(0.0),
                        end: Some(seconds),
                        speaker: format!("{dialect}{s:02}"),
                        dialect: dialect.to_string(),
                        transcripts: vec!["a b".into()],
                    });
                    durations.push(seconds);
                }
            }
        }
        let manifest = Manifest {
            path: PathBuf::from("all.tsv"),
            transcript_columns: vec!["text".into()],
            utterances,
        };
        (manifest, durations)
    }

    fn speakers(manifest: &Manifest, indices: &[usize]) -> BTreeSet<String> {
        indices
            .iter()
            .map(|&i| manifest.utterances[i].speaker.clone())
            .collect()
    }

    #[test]
    fn parts_are_speaker_disjoint_complete_and_stratified() {
        let (manifest, durations) = corpus(3, 20, false);
        let config = SplitConfig {
            dev: 0.1,
            test: 0.15,
            seed: 7,
        };
        let split = split_by_speaker(&manifest, &durations, &config).unwrap();
        let mut all: Vec<usize> = [&split.train[..], &split.dev, &split.test].concat();
        all.sort_unstable();
        assert_eq!(all, (0..manifest.utterances.len()).collect::<Vec<_>>());
        let (train, dev, test) = (
            speakers(&manifest, &split.train),
            speakers(&manifest, &split.dev),
            speakers(&manifest, &split.test),
        );
        assert!(train.is_disjoint(&dev) && train.is_disjoint(&test) && dev.is_disjoint(&test));
        let summary = split.summarize(&manifest, &durations);
        for (part, target) in [(&summary[1], 0.1), (&summary[2], 0.15)] {
            for dialect in ["fells", "marsh", "vale"] {
                let share = part.dialect_hours[dialect]
                    / summary
                        .iter()
                        .map(|p| p.dialect_hours[dialect])
                        .sum::<f64>();
                // Whole speakers of at most 12 s out of 160 s per dialect: within one speaker.
                assert!(
                    (share - target).abs() <= 12.0 / 160.0,
                    "{} {dialect}: {share}",
                    part.part
                );
            }
        }
    }

    #[test]
    fn small_dialects_together_still_fill_dev_and_test() {
        // Six dialects of three equal speakers: no dialect can give 10 % (0.3 of a speaker),
        // so without carrying the shortfall over dev and test would be empty. With it they hold
        // about 10 % of the audio, give or take one speaker (1/18 of the whole).
        let (manifest, durations) = corpus(6, 3, true);
        let config = SplitConfig {
            dev: 0.1,
            test: 0.1,
            seed: 1,
        };
        let split = split_by_speaker(&manifest, &durations, &config).unwrap();
        for part in &split.summarize(&manifest, &durations)[1..] {
            let share = part.speakers as f64 / 18.0;
            assert!(part.speakers >= 1, "{}: empty", part.part);
            assert!((share - 0.1).abs() <= 1.0 / 18.0, "{}: {share}", part.part);
        }
    }

    #[test]
    fn same_seed_same_split_other_seed_other_split() {
        let (manifest, durations) = corpus(3, 12, false);
        let config = SplitConfig {
            dev: 0.2,
            test: 0.2,
            seed: 42,
        };
        let first = split_by_speaker(&manifest, &durations, &config).unwrap();
        let again = split_by_speaker(&manifest, &durations, &config).unwrap();
        assert_eq!(first, again);
        let other =
            split_by_speaker(&manifest, &durations, &SplitConfig { seed: 43, ..config }).unwrap();
        assert_ne!(first, other);
    }

    #[test]
    fn bad_fractions_are_rejected() {
        let (manifest, durations) = corpus(3, 3, false);
        for (dev, test) in [(0.6, 0.5), (-0.1, 0.1), (f64::NAN, 0.1), (0.1, 1.0)] {
            let config = SplitConfig { dev, test, seed: 0 };
            let message = split_by_speaker(&manifest, &durations, &config)
                .unwrap_err()
                .to_string();
            assert!(message.contains("split shares"), "{message}");
        }
    }
}
