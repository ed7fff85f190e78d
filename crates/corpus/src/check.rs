//! Validating manifests before anything is trained on them: structure, audio, times, duplicates,
//! and leakage of speakers between manifests; plus the numbers a corpus description needs
//! (hours, utterances and speakers per dialect, vocabulary per transcript column).

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::{Path, PathBuf};

use isogloss_audio::{AudioError, AudioInfo, END_TOLERANCE_SECONDS};
use serde::Serialize;

use crate::manifest::{Manifest, Problem, Severity, Utterance};

/// Segments shorter than one 25 ms analysis window give no feature frame at all.
const SHORTEST_USEFUL_SECONDS: f64 = 0.025;

/// How thoroughly audio is examined.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AudioCheck {
    /// Decode every audio file completely (finds truncation, NaN, damage). The default.
    Decode,
    /// Read only headers (fast; lengths as the headers state them).
    HeaderOnly,
}

/// Label used in reports for rows whose dialect field is empty.
pub const NO_DIALECT: &str = "(none)";

/// The outcome of checking one or more manifests.
#[derive(Debug, Clone, Serialize)]
pub struct CheckReport {
    /// Usable utterances over all manifests.
    pub utterances: usize,
    /// Their total duration in hours.
    pub hours: f64,
    /// Distinct speakers over all manifests.
    pub speakers: usize,
    /// Number of problems of severity error.
    pub errors: usize,
    /// How many of the errors are audio files that could not be read or decoded (missing,
    /// damaged, or the decoder failed inside): failed items of the check, not faults of the
    /// manifest's text.
    pub audio_errors: usize,
    /// Number of problems of severity warning.
    pub warnings: usize,
    /// One summary per manifest, in the order given.
    pub manifests: Vec<ManifestSummary>,
    /// Speakers heard in more than one manifest (train/dev/test leakage), per pair.
    pub shared_speakers: Vec<SharedSpeakers>,
    /// Every problem, manifest by manifest in line order.
    pub problems: Vec<Problem>,
}

/// Figures for one manifest.
#[derive(Debug, Clone, Serialize)]
pub struct ManifestSummary {
    /// The manifest.
    pub path: PathBuf,
    /// Usable utterances.
    pub utterances: usize,
    /// Their duration in hours.
    pub hours: f64,
    /// Distinct speakers.
    pub speakers: usize,
    /// Distinct audio files.
    pub audio_files: usize,
    /// Per dialect, sorted by label ([`NO_DIALECT`] for empty labels).
    pub dialects: Vec<DialectSummary>,
    /// Per transcript column, in file order.
    pub vocabulary: Vec<ColumnVocabulary>,
}

/// Figures for one dialect within a manifest.
#[derive(Debug, Clone, Serialize)]
pub struct DialectSummary {
    /// The dialect label.
    pub dialect: String,
    /// Utterances.
    pub utterances: usize,
    /// Hours.
    pub hours: f64,
    /// Distinct speakers.
    pub speakers: usize,
}

/// Vocabulary of one transcript column: tokens are split on white space, nothing else.
#[derive(Debug, Clone, Serialize)]
pub struct ColumnVocabulary {
    /// The column name.
    pub column: String,
    /// Distinct tokens (vocabulary size).
    pub types: usize,
    /// Running tokens.
    pub tokens: usize,
}

/// Speakers found in both of two manifests.
#[derive(Debug, Clone, Serialize)]
pub struct SharedSpeakers {
    /// The earlier manifest.
    pub first: PathBuf,
    /// The later manifest.
    pub second: PathBuf,
    /// The shared speaker labels, sorted.
    pub speakers: Vec<String>,
}

/// Checks the manifests at `paths`, collecting every problem rather than stopping at the first.
/// `progress(done, total)` is called as audio files are examined.
pub fn check_manifests(
    paths: &[PathBuf],
    audio_check: AudioCheck,
    progress: &mut dyn FnMut(usize, usize),
) -> CheckReport {
    let examine = |file: &Path| match audio_check {
        AudioCheck::Decode => isogloss_audio::verify(file),
        AudioCheck::HeaderOnly => isogloss_audio::probe(file),
    };
    check_manifests_with(paths, &examine, progress)
}

/// [`check_manifests`] with `examine` reading each audio file once (what tests replace to make
/// one file's reading fail or panic). A panic inside `examine` is that file's error.
pub fn check_manifests_with(
    paths: &[PathBuf],
    examine: &dyn Fn(&Path) -> Result<AudioInfo, AudioError>,
    progress: &mut dyn FnMut(usize, usize),
) -> CheckReport {
    let mut problems = Vec::new();
    let mut read = Vec::new();
    for path in paths {
        match Manifest::read_collecting(path) {
            Ok((manifest, found)) => {
                problems.extend(found);
                read.push(manifest);
            }
            Err(error) => problems.push(Problem::from_corpus_error(error)),
        }
    }
    let audio_files: BTreeSet<&Path> = read
        .iter()
        .flat_map(|m| m.utterances.iter().map(|u| u.audio.as_path()))
        .collect();
    let total = audio_files.len();
    let mut audio: HashMap<&Path, Result<AudioInfo, String>> = HashMap::new();
    for (done, file) in audio_files.into_iter().enumerate() {
        // A panic while reading one file is that file's problem; the check goes on.
        let result = isogloss_audio::isolated(file, || examine(file));
        audio.insert(file, result.map_err(|e| e.to_string()));
        progress(done + 1, total);
    }
    let mut manifests = Vec::new();
    let mut all_speakers = BTreeSet::new();
    let mut audio_errors = 0;
    for manifest in &read {
        let (summary, found, failed_audio) = check_one(manifest, &audio);
        audio_errors += failed_audio;
        all_speakers.extend(manifest.utterances.iter().map(|u| u.speaker.as_str()));
        problems.extend(found);
        manifests.push(summary);
    }
    let (shared_speakers, leaks) = leakage(&read);
    problems.extend(leaks);
    // Manifest by manifest in the order given, then by line; file-wide findings last.
    problems.sort_by_key(|p| {
        let file = paths.iter().position(|path| *path == p.file);
        (file, p.line.is_none(), p.line)
    });
    let errors = problems
        .iter()
        .filter(|p| p.severity == Severity::Error)
        .count();
    CheckReport {
        utterances: manifests.iter().map(|m| m.utterances).sum(),
        hours: manifests.iter().map(|m| m.hours).sum(),
        speakers: all_speakers.len(),
        errors,
        audio_errors,
        warnings: problems.len() - errors,
        manifests,
        shared_speakers,
        problems,
    }
}

/// Audio and content checks of one manifest whose text has been read; also returns how many of
/// the problems are rows whose audio could not be read.
fn check_one(
    manifest: &Manifest,
    audio: &HashMap<&Path, Result<AudioInfo, String>>,
) -> (ManifestSummary, Vec<Problem>, usize) {
    let path = manifest.path.as_path();
    let mut problems = Vec::new();
    let mut audio_errors = 0;
    let mut reported_files: HashMap<&Path, usize> = HashMap::new();
    let mut first_line_of_segment: HashMap<(&Path, u64, u64), (usize, &str)> = HashMap::new();
    let mut usable: Vec<(&Utterance, f64)> = Vec::new();
    for utterance in &manifest.utterances {
        let line = Some(utterance.line);
        let id = &utterance.id;
        let info = match audio.get(utterance.audio.as_path()) {
            Some(Ok(info)) => *info,
            Some(Err(message)) => {
                audio_errors += 1;
                // One message per bad file: a long recording may be cut into hundreds of rows.
                match reported_files.get(utterance.audio.as_path()) {
                    Some(&first) => problems.push(Problem::error(
                        path,
                        line,
                        format!("audio of `{id}` cannot be used (see line {first})"),
                    )),
                    None => {
                        reported_files.insert(&utterance.audio, utterance.line);
                        problems.push(Problem::error(path, line, format!("`{id}`: {message}")));
                    }
                }
                continue;
            }
            None => continue,
        };
        let start = utterance.start.unwrap_or(0.0);
        let duration = info.duration_seconds;
        if start >= duration {
            problems.push(Problem::error(
                path,
                line,
                format!(
                    "expected `{id}` to start inside its audio ({:.3} s long), found start {start} s",
                    duration
                ),
            ));
            continue;
        }
        let end = match utterance.end {
            Some(end) if end > duration + END_TOLERANCE_SECONDS => {
                problems.push(Problem::error(
                    path,
                    line,
                    format!(
                        "expected `{id}` to end inside its audio ({duration:.3} s long), found end {end} s"
                    ),
                ));
                continue;
            }
            Some(end) => end.min(duration),
            None => duration,
        };
        let seconds = end - start;
        if seconds < SHORTEST_USEFUL_SECONDS {
            problems.push(Problem::warning(
                path,
                line,
                format!(
                    "`{id}` lasts {:.1} ms, shorter than one 25 ms analysis window",
                    seconds * 1000.0
                ),
            ));
        }
        // The same stretch of the same recording under two ids counts its audio twice.
        let key = (
            utterance.audio.as_path(),
            (start * 1000.0).round() as u64,
            (end * 1000.0).round() as u64,
        );
        match first_line_of_segment.get(&key) {
            Some(&(first, first_id)) => problems.push(Problem::warning(
                path,
                line,
                format!("`{id}` is the same audio segment as `{first_id}` on line {first}"),
            )),
            None => {
                first_line_of_segment.insert(key, (utterance.line, id));
            }
        }
        usable.push((utterance, seconds));
    }
    problems.sort_by_key(|p| p.line);
    (summarize(manifest, &usable), problems, audio_errors)
}

fn summarize(manifest: &Manifest, usable: &[(&Utterance, f64)]) -> ManifestSummary {
    #[derive(Default)]
    struct Tally<'a> {
        utterances: usize,
        seconds: f64,
        speakers: BTreeSet<&'a str>,
    }
    let mut overall = Tally::default();
    let mut by_dialect: BTreeMap<&str, Tally> = BTreeMap::new();
    let mut vocabularies: Vec<(BTreeSet<&str>, usize)> =
        vec![(BTreeSet::new(), 0); manifest.transcript_columns.len()];
    let mut files = BTreeSet::new();
    for &(utterance, seconds) in usable {
        let dialect = match utterance.dialect.as_str() {
            "" => NO_DIALECT,
            label => label,
        };
        for tally in [&mut overall, by_dialect.entry(dialect).or_default()] {
            tally.utterances += 1;
            tally.seconds += seconds;
            tally.speakers.insert(&utterance.speaker);
        }
        for ((types, tokens), text) in vocabularies.iter_mut().zip(&utterance.transcripts) {
            for token in text.split_whitespace() {
                types.insert(token);
                *tokens += 1;
            }
        }
        files.insert(utterance.audio.as_path());
    }
    ManifestSummary {
        path: manifest.path.clone(),
        utterances: overall.utterances,
        hours: overall.seconds / 3600.0,
        speakers: overall.speakers.len(),
        audio_files: files.len(),
        dialects: by_dialect
            .into_iter()
            .map(|(dialect, tally)| DialectSummary {
                dialect: dialect.to_string(),
                utterances: tally.utterances,
                hours: tally.seconds / 3600.0,
                speakers: tally.speakers.len(),
            })
            .collect(),
        vocabulary: manifest
            .transcript_columns
            .iter()
            .zip(vocabularies)
            .map(|(column, (types, tokens))| ColumnVocabulary {
                column: column.clone(),
                types: types.len(),
                tokens,
            })
            .collect(),
    }
}

/// Speakers and ids that occur in more than one manifest. Both are warnings: checking a train
/// and a test manifest together is how leakage is found, but a user may share them on purpose.
fn leakage(manifests: &[Manifest]) -> (Vec<SharedSpeakers>, Vec<Problem>) {
    let mut shared = Vec::new();
    let mut problems = Vec::new();
    for (i, first) in manifests.iter().enumerate() {
        let speakers: BTreeSet<&str> = first
            .utterances
            .iter()
            .map(|u| u.speaker.as_str())
            .filter(|s| !s.is_empty())
            .collect();
        let ids: HashMap<&str, usize> = first
            .utterances
            .iter()
            .map(|u| (u.id.as_str(), u.line))
            .collect();
        for second in &manifests[i + 1..] {
            let mut common = BTreeSet::new();
            for utterance in &second.utterances {
                if speakers.contains(utterance.speaker.as_str()) {
                    common.insert(utterance.speaker.clone());
                }
                if let Some(&line) = ids.get(utterance.id.as_str()) {
                    problems.push(Problem::warning(
                        &second.path,
                        Some(utterance.line),
                        format!(
                            "id `{}` also appears in {}, line {line}",
                            utterance.id,
                            first.path.display()
                        ),
                    ));
                }
            }
            if common.is_empty() {
                continue;
            }
            let names: Vec<&str> = common.iter().take(10).map(String::as_str).collect();
            let more = common.len().saturating_sub(names.len());
            problems.push(Problem::warning(
                &second.path,
                None,
                format!(
                    "{} speaker(s) also heard in {} (leakage between training and evaluation): {}{}",
                    common.len(),
                    first.path.display(),
                    names.join(", "),
                    if more > 0 {
                        format!(" and {more} more")
                    } else {
                        String::new()
                    }
                ),
            ));
            shared.push(SharedSpeakers {
                first: first.path.clone(),
                second: second.path.clone(),
                speakers: common.into_iter().collect(),
            });
        }
    }
    (shared, problems)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Writes a 16 kHz mono 16-bit WAV of `seconds` of a quiet tone.
    fn wav(path: &Path, seconds: f64) {
        let spec = hound::WavSpec {
            channels: 1,
            sample_rate: 16_000,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut writer = hound::WavWriter::create(path, spec).unwrap();
        for i in 0..(seconds * 16_000.0) as usize {
            writer.write_sample(((i % 50) as i16 - 25) * 100).unwrap();
        }
        writer.finalize().unwrap();
    }

    fn check_rows(rows: &str, audio_check: AudioCheck) -> CheckReport {
        let dir = tempfile::tempdir().unwrap();
        wav(&dir.path().join("one.wav"), 1.0);
        wav(&dir.path().join("two.wav"), 2.0);
        wav(&dir.path().join("cut.wav"), 1.0);
        let cut = dir.path().join("cut.wav");
        let bytes = std::fs::read(&cut).unwrap();
        std::fs::write(&cut, &bytes[..bytes.len() - 1000]).unwrap();
        std::fs::write(dir.path().join("text.wav"), "not audio\n").unwrap();
        let path = dir.path().join("m.tsv");
        std::fs::write(
            &path,
            format!("id\taudio\tstart\tend\tspeaker\tdialect\ttext\n{rows}"),
        )
        .unwrap();
        check_manifests(&[path], audio_check, &mut |_, _| {})
    }

    fn messages(report: &CheckReport) -> Vec<String> {
        report.problems.iter().map(ToString::to_string).collect()
    }

    #[test]
    fn figures_per_dialect_and_vocabulary() {
        let report = check_rows(
            "a\tone.wav\t\t\ts1\tnorth\thoose doon hoose\n\
             b\ttwo.wav\t0.5\t1.5\ts2\tnorth\tdoon\n\
             c\ttwo.wav\t1.5\t\ts3\t\taye\n",
            AudioCheck::Decode,
        );
        assert_eq!(report.errors, 0, "{:?}", messages(&report));
        assert_eq!(report.utterances, 3);
        assert!((report.hours * 3600.0 - 2.5).abs() < 1e-9);
        let summary = &report.manifests[0];
        assert_eq!(summary.audio_files, 2);
        let north = &summary.dialects[1];
        assert_eq!(
            (north.dialect.as_str(), north.utterances, north.speakers),
            ("north", 2, 2)
        );
        assert!((north.hours * 3600.0 - 2.0).abs() < 1e-9);
        assert_eq!(summary.dialects[0].dialect, NO_DIALECT);
        assert_eq!(
            (summary.vocabulary[0].types, summary.vocabulary[0].tokens),
            (3, 5)
        );
    }

    #[test]
    fn segment_bounds_are_checked_against_the_audio() {
        let report = check_rows(
            "a\tone.wav\t0.5\t1.005\ts\td\tx\n\
             b\tone.wav\t0.5\t1.2\ts\td\tx\n\
             c\tone.wav\t1.0\t\ts\td\tx\n\
             d\tone.wav\t0.5\t0.51\ts\td\tx\n",
            AudioCheck::Decode,
        );
        let listed = messages(&report);
        assert_eq!((report.errors, report.warnings), (2, 1), "{listed:?}");
        assert!(listed[0].contains("line 3") && listed[0].contains("found end 1.2 s"));
        assert!(listed[1].contains("line 4") && listed[1].contains("found start 1 s"));
        assert!(listed[2].contains("line 5") && listed[2].contains("shorter than one 25 ms"));
    }

    #[test]
    fn the_same_segment_under_two_ids_is_a_warning() {
        let report = check_rows(
            "a\ttwo.wav\t0\t1\ts\td\tx\nb\ttwo.wav\t0.0\t1.0\ts\td\ty\n",
            AudioCheck::Decode,
        );
        let listed = messages(&report);
        assert_eq!((report.errors, report.warnings), (0, 1), "{listed:?}");
        assert!(
            listed[0].contains("same audio segment as `a` on line 2"),
            "{listed:?}"
        );
    }

    #[test]
    fn a_bad_file_is_explained_once_however_many_rows_use_it() {
        let report = check_rows(
            "a\ttext.wav\t0\t1\ts\td\tx\nb\ttext.wav\t1\t2\ts\td\tx\nc\ttext.wav\t2\t3\ts\td\tx\n",
            AudioCheck::Decode,
        );
        let listed = messages(&report);
        assert_eq!(report.errors, 3, "{listed:?}");
        assert!(
            listed[0].contains("text.wav: not a readable audio file"),
            "{listed:?}"
        );
        assert!(
            listed[2].contains("line 4") && listed[2].contains("(see line 2)"),
            "{listed:?}"
        );
    }

    #[test]
    fn only_decoding_finds_a_truncated_file() {
        let rows = "a\tcut.wav\t\t\ts\td\tx\n";
        let decoded = check_rows(rows, AudioCheck::Decode);
        assert_eq!(decoded.errors, 1);
        assert!(messages(&decoded)[0].contains("truncated"));
        assert_eq!(check_rows(rows, AudioCheck::HeaderOnly).errors, 0);
    }

    /// Issue 16: a panic while one audio file is read (as a decoding library can on a crafted
    /// file) is that file's error, listed with its reason; every other file is still checked.
    #[test]
    fn a_panic_while_reading_one_file_is_that_files_error() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.tsv");
        std::fs::write(
            &path,
            "id\taudio\tstart\tend\tspeaker\tdialect\ttext\n\
             a\tone.wav\t\t\ts1\td\tx\n\
             b\tpanic.wav\t\t\ts1\td\ty\n\
             c\tpanic.wav\t0\t0.5\ts2\td\ty\n\
             d\tthree.wav\t\t\ts2\td\tz\n",
        )
        .unwrap();
        let examined = std::sync::Mutex::new(Vec::new());
        let examine = |file: &Path| -> Result<AudioInfo, AudioError> {
            let name = file.file_name().unwrap().to_string_lossy().into_owned();
            examined.lock().unwrap().push(name.clone());
            if name == "panic.wav" {
                panic!("internal state the reader did not expect");
            }
            Ok(AudioInfo {
                sample_rate: 16_000,
                channels: 1,
                frames: 16_000,
                duration_seconds: 1.0,
            })
        };
        let report = check_manifests_with(&[path], &examine, &mut |_, _| {});
        let listed = messages(&report);
        assert_eq!(examined.lock().unwrap().len(), 3, "every file is read once");
        assert_eq!((report.errors, report.audio_errors), (2, 2), "{listed:?}");
        assert_eq!(report.utterances, 2, "{listed:?}");
        assert!(
            listed[0].contains("line 3")
                && listed[0].contains(
                    "panic.wav: the audio data is damaged: the decoder failed inside (internal state the reader did not expect)"
                ),
            "{listed:?}"
        );
        assert!(listed[1].contains("(see line 3)"), "{listed:?}");
    }
}
