//! The corpus manifest: one utterance a row, `id audio start end speaker dialect` and one or more
//! transcript columns (`docs/formats.md`, "Manifest").

use std::collections::HashMap;
use std::path::{Component, Path, PathBuf};

use serde::Serialize;

use crate::tsv::{self, Table};
use crate::CorpusError;

/// Columns every manifest has, in the order written by [`Manifest::write`]. All other columns
/// are transcripts.
pub const REQUIRED_COLUMNS: [&str; 6] = ["id", "audio", "start", "end", "speaker", "dialect"];

/// One row of a manifest.
#[derive(Debug, Clone, PartialEq)]
pub struct Utterance {
    /// 1-based line in the manifest (for messages).
    pub line: usize,
    /// Unique utterance id.
    pub id: String,
    /// The audio file, resolved against the manifest's folder.
    pub audio: PathBuf,
    /// Start of the segment in seconds; `None` means the start of the file.
    pub start: Option<f64>,
    /// End of the segment in seconds; `None` means the end of the file.
    pub end: Option<f64>,
    /// Speaker label (may be empty: unknown).
    pub speaker: String,
    /// Dialect label (may be empty).
    pub dialect: String,
    /// Transcripts in the order of [`Manifest::transcript_columns`].
    pub transcripts: Vec<String>,
}

impl Utterance {
    /// The segment to cut from the audio file.
    pub fn segment(&self) -> isogloss_audio::Segment {
        isogloss_audio::Segment {
            start: self.start.unwrap_or(0.0),
            end: self.end,
        }
    }
}

/// A whole manifest file.
#[derive(Debug, Clone, PartialEq)]
pub struct Manifest {
    /// The file it was read from.
    pub path: PathBuf,
    /// Names of the transcript columns, in file order.
    pub transcript_columns: Vec<String>,
    /// The rows, in file order.
    pub utterances: Vec<Utterance>,
}

/// How serious a [`Problem`] is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Severity {
    /// The data is wrong and must be fixed before training.
    Error,
    /// Suspicious but usable.
    Warning,
}

/// One finding of a manifest check, naming the file and (when it belongs to one) the line.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Problem {
    /// Error or warning.
    pub severity: Severity,
    /// The manifest.
    pub file: PathBuf,
    /// 1-based line, when the problem belongs to one row.
    pub line: Option<usize>,
    /// What was expected and what was found.
    pub message: String,
}

impl Problem {
    pub(crate) fn error(file: &Path, line: Option<usize>, message: String) -> Problem {
        Problem {
            severity: Severity::Error,
            file: file.to_path_buf(),
            line,
            message,
        }
    }

    pub(crate) fn warning(file: &Path, line: Option<usize>, message: String) -> Problem {
        Problem {
            severity: Severity::Warning,
            ..Problem::error(file, line, message)
        }
    }

    pub(crate) fn from_corpus_error(error: CorpusError) -> Problem {
        match error {
            CorpusError::Format {
                path,
                line,
                message,
            } => Problem::error(&path, Some(line), message),
            CorpusError::Io { path, source } => {
                Problem::error(&path, None, format!("cannot read the file: {source}"))
            }
            CorpusError::Audio { path, line, source } => {
                Problem::error(&path, Some(line), source.to_string())
            }
            other => {
                let path = other.path().to_path_buf();
                Problem::error(&path, None, other.to_string())
            }
        }
    }
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let severity = match self.severity {
            Severity::Error => "error",
            Severity::Warning => "warning",
        };
        match self.line {
            Some(line) => write!(
                f,
                "{severity}: {}, line {line}: {}",
                self.file.display(),
                self.message
            ),
            None => write!(f, "{severity}: {}: {}", self.file.display(), self.message),
        }
    }
}

impl Manifest {
    /// Reads a manifest, failing on the first structural error (missing column, bad time,
    /// duplicate id, …). Use [`Manifest::read_collecting`] to list every problem instead.
    pub fn read(path: &Path) -> Result<Manifest, CorpusError> {
        let (manifest, problems) = Manifest::read_collecting(path)?;
        match problems.into_iter().find(|p| p.severity == Severity::Error) {
            None => Ok(manifest),
            Some(problem) => Err(CorpusError::Format {
                path: problem.file,
                line: problem.line.unwrap_or(1),
                message: problem.message,
            }),
        }
    }

    /// Reads a manifest, skipping rows that cannot be used and listing every problem found in
    /// the text alone (audio is not opened; see [`crate::check`]). Fails outright only when the
    /// file cannot be read or its header lacks a required column.
    pub fn read_collecting(path: &Path) -> Result<(Manifest, Vec<Problem>), CorpusError> {
        Manifest::read_collecting_with(path, true)
    }

    /// Reads a manifest of untranscribed segments: as [`Manifest::read`], except that it may
    /// have no transcript column (any it has are read as usual).
    pub fn read_untranscribed(path: &Path) -> Result<Manifest, CorpusError> {
        let (manifest, problems) = Manifest::read_collecting_with(path, false)?;
        match problems.into_iter().find(|p| p.severity == Severity::Error) {
            None => Ok(manifest),
            Some(problem) => Err(CorpusError::Format {
                path: problem.file,
                line: problem.line.unwrap_or(1),
                message: problem.message,
            }),
        }
    }

    fn read_collecting_with(
        path: &Path,
        need_transcripts: bool,
    ) -> Result<(Manifest, Vec<Problem>), CorpusError> {
        let (table, row_errors) = Table::read_with_header_collecting(path)?;
        let mut problems: Vec<Problem> = row_errors
            .into_iter()
            .map(Problem::from_corpus_error)
            .collect();
        let columns = Columns::find(&table, need_transcripts)?;
        let transcript_columns: Vec<String> = columns
            .transcripts
            .iter()
            .map(|&i| table.header[i].clone())
            .collect();
        let folder = path.parent().unwrap_or(Path::new(""));
        let mut utterances = Vec::with_capacity(table.records.len());
        let mut first_line_of_id: HashMap<&str, usize> = HashMap::new();
        let mut first_line_of_row: HashMap<&[String], usize> = HashMap::new();
        for record in &table.records {
            let line = record.line;
            let field = |index: usize| record.fields[index].trim();
            let mut row_error = |message: String| {
                problems.push(Problem::error(path, Some(line), message));
            };
            if let Some(&first) = first_line_of_row.get(record.fields.as_slice()) {
                row_error(format!("this row repeats line {first} exactly"));
                continue;
            }
            first_line_of_row.insert(&record.fields, line);
            let id = field(columns.id);
            if id.is_empty() {
                row_error("expected an utterance id, found an empty `id` field".into());
                continue;
            }
            if let Some(&first) = first_line_of_id.get(id) {
                row_error(format!(
                    "expected unique ids, found `{id}` again (first on line {first})"
                ));
                continue;
            }
            first_line_of_id.insert(id, line);
            let audio = field(columns.audio);
            if audio.is_empty() {
                row_error(format!(
                    "expected an audio file for `{id}`, found an empty `audio` field"
                ));
                continue;
            }
            let start = match parse_seconds(field(columns.start)) {
                Ok(start) => start,
                Err(found) => {
                    row_error(format!("`start` of `{id}`: {found}"));
                    continue;
                }
            };
            let end = match parse_seconds(field(columns.end)) {
                Ok(end) => end,
                Err(found) => {
                    row_error(format!("`end` of `{id}`: {found}"));
                    continue;
                }
            };
            if let (Some(start), Some(end)) = (start, end) {
                if start >= end {
                    row_error(format!(
                        "expected start < end for `{id}`, found start {start} s and end {end} s"
                    ));
                    continue;
                }
            }
            let speaker = field(columns.speaker).to_string();
            if speaker.is_empty() {
                problems.push(Problem::warning(
                    path,
                    Some(line),
                    format!(
                        "no speaker for `{id}`: all rows without a speaker count as one unknown \
                         speaker when splitting and normalizing"
                    ),
                ));
            }
            let transcripts: Vec<String> = columns
                .transcripts
                .iter()
                .map(|&i| field(i).to_string())
                .collect();
            for (name, text) in transcript_columns.iter().zip(&transcripts) {
                if text.is_empty() {
                    problems.push(Problem::warning(
                        path,
                        Some(line),
                        format!("empty `{name}` transcript for `{id}`"),
                    ));
                }
            }
            utterances.push(Utterance {
                line,
                id: id.to_string(),
                audio: resolve(folder, audio),
                start,
                end,
                speaker,
                dialect: field(columns.dialect).to_string(),
                transcripts,
            });
        }
        problems.sort_by_key(|p| p.line);
        Ok((
            Manifest {
                path: path.to_path_buf(),
                transcript_columns,
                utterances,
            },
            problems,
        ))
    }

    /// Position of a transcript column among [`Manifest::transcript_columns`].
    pub fn column_index(&self, name: &str) -> Result<usize, CorpusError> {
        self.transcript_columns
            .iter()
            .position(|c| c == name)
            .ok_or_else(|| CorpusError::Format {
                path: self.path.clone(),
                line: 1,
                message: format!(
                    "expected a transcript column named `{name}`, found only: {}",
                    self.transcript_columns.join(", ")
                ),
            })
    }

    /// The transcript of utterance `utterance` (an index into `utterances`) in column `column`.
    pub fn transcript(&self, utterance: usize, column: &str) -> Result<&str, CorpusError> {
        let index = self.column_index(column)?;
        let row = self
            .utterances
            .get(utterance)
            .ok_or_else(|| CorpusError::Format {
                path: self.path.clone(),
                line: 1,
                message: format!(
                    "expected an utterance number below {}, found {utterance}",
                    self.utterances.len()
                ),
            })?;
        Ok(&row.transcripts[index])
    }

    /// Writes the given utterances (a subset, e.g. one split) as a manifest at `path`, columns in
    /// the standard order, audio paths relative to the new file's folder when both are on the
    /// same tree (absolute otherwise). Written atomically.
    pub fn write_subset(&self, path: &Path, utterances: &[&Utterance]) -> Result<(), CorpusError> {
        let io = |source| CorpusError::Io {
            path: path.to_path_buf(),
            source,
        };
        let folder = path.parent().filter(|p| !p.as_os_str().is_empty());
        if let Some(folder) = folder {
            std::fs::create_dir_all(folder).map_err(io)?;
        }
        let target_folder = absolute(folder.unwrap_or(Path::new("."))).map_err(io)?;
        let mut header: Vec<&str> = REQUIRED_COLUMNS.to_vec();
        header.extend(self.transcript_columns.iter().map(String::as_str));
        let mut rows = Vec::with_capacity(utterances.len());
        for utterance in utterances {
            let audio = absolute(&utterance.audio).map_err(io)?;
            let audio = relative_to(&audio, &target_folder).unwrap_or(audio);
            let mut row = vec![
                utterance.id.clone(),
                audio.to_string_lossy().replace('\\', "/"),
                utterance.start.map_or_else(String::new, |s| s.to_string()),
                utterance.end.map_or_else(String::new, |s| s.to_string()),
                utterance.speaker.clone(),
                utterance.dialect.clone(),
            ];
            row.extend(utterance.transcripts.iter().cloned());
            rows.push(row);
        }
        tsv::write_table(path, &header, &rows)
    }
}

/// Where the required and transcript columns are.
struct Columns {
    id: usize,
    audio: usize,
    start: usize,
    end: usize,
    speaker: usize,
    dialect: usize,
    transcripts: Vec<usize>,
}

impl Columns {
    fn find(table: &Table, need_transcripts: bool) -> Result<Columns, CorpusError> {
        let header_error = |message: String| CorpusError::Format {
            path: table.path.clone(),
            line: 1,
            message,
        };
        for (i, name) in table.header.iter().enumerate() {
            if table.header[..i].contains(name) {
                return Err(header_error(format!(
                    "expected each column name once, found `{name}` twice in the header"
                )));
            }
        }
        let missing: Vec<&str> = REQUIRED_COLUMNS
            .iter()
            .copied()
            .filter(|name| !table.header.iter().any(|h| h == name))
            .collect();
        if !missing.is_empty() {
            return Err(header_error(format!(
                "expected the columns {} and one or more transcript columns; missing: {}; found: {}",
                REQUIRED_COLUMNS.join(", "),
                missing.join(", "),
                table.header.join(", ")
            )));
        }
        let position = |name: &str| table.column(name);
        let transcripts: Vec<usize> = (0..table.header.len())
            .filter(|&i| !REQUIRED_COLUMNS.contains(&table.header[i].as_str()))
            .collect();
        if need_transcripts && transcripts.is_empty() {
            return Err(header_error(format!(
                "expected at least one transcript column besides {}, found none",
                REQUIRED_COLUMNS.join(", ")
            )));
        }
        if let Some(&empty) = transcripts.iter().find(|&&i| table.header[i].is_empty()) {
            return Err(header_error(format!(
                "expected a name for every column, found an empty name in column {}",
                empty + 1
            )));
        }
        Ok(Columns {
            id: position("id")?,
            audio: position("audio")?,
            start: position("start")?,
            end: position("end")?,
            speaker: position("speaker")?,
            dialect: position("dialect")?,
            transcripts,
        })
    }
}

/// Parses a time field: empty → `None`; otherwise a finite number of seconds ≥ 0.
fn parse_seconds(text: &str) -> Result<Option<f64>, String> {
    if text.is_empty() {
        return Ok(None);
    }
    let limit = isogloss_audio::MAX_TIME_SECONDS;
    match text.parse::<f64>() {
        Ok(seconds) if (0.0..=limit).contains(&seconds) => Ok(Some(seconds)),
        _ => Err(format!(
            "expected seconds from 0 to {limit} such as 12.5 (or empty), found `{text}`"
        )),
    }
}

/// The audio path as written, resolved against the manifest's folder unless absolute.
fn resolve(folder: &Path, audio: &str) -> PathBuf {
    let audio = Path::new(audio);
    if audio.is_absolute() {
        audio.to_path_buf()
    } else {
        folder.join(audio)
    }
}

/// An absolute, lexically normalized path (no `.` or `..`), without touching the file system
/// beyond the current directory, so that it works for files that do not exist yet.
fn absolute(path: &Path) -> std::io::Result<PathBuf> {
    let joined = if path.is_absolute() {
        path.to_path_buf()
    } else {
        std::env::current_dir()?.join(path)
    };
    let mut normalized = PathBuf::new();
    for component in joined.components() {
        match component {
            Component::CurDir => {}
            Component::ParentDir => {
                normalized.pop();
            }
            other => normalized.push(other.as_os_str()),
        }
    }
    Ok(normalized)
}

/// `path` relative to `folder` (both absolute and normalized), if they share more than the
/// root (a manifest in /tmp pointing at /home/... is clearer with an absolute path).
fn relative_to(path: &Path, folder: &Path) -> Option<PathBuf> {
    let path_parts: Vec<Component> = path.components().collect();
    let folder_parts: Vec<Component> = folder.components().collect();
    let common = path_parts
        .iter()
        .zip(&folder_parts)
        .take_while(|(a, b)| a == b)
        .count();
    let shares_a_folder = path_parts
        .iter()
        .take(common)
        .any(|c| matches!(c, Component::Normal(_)));
    if !shares_a_folder {
        return None;
    }
    let mut relative = PathBuf::new();
    for _ in common..folder_parts.len() {
        relative.push("..");
    }
    for part in &path_parts[common..] {
        relative.push(part.as_os_str());
    }
    Some(relative)
}

#[cfg(test)]
mod tests {
    use super::*;

    const HEADER: &str = "id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n";

    fn manifest_with(rows: &str) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("corpus.tsv");
        std::fs::write(&path, format!("{HEADER}{rows}")).unwrap();
        (dir, path)
    }

    #[test]
    fn reads_rows_resolving_audio_against_the_manifest_folder() {
        let (dir, path) = manifest_with(
            "u1\ta/one.wav\t\t\tsp1\tnorth\thoose doon\thouse down\n\
             u2\t/abs/two.flac\t1.5\t3\tsp2\t\taye\tyes\n",
        );
        let manifest = Manifest::read(&path).unwrap();
        assert_eq!(manifest.transcript_columns, ["dialectal", "normalized"]);
        let [u1, u2] = &manifest.utterances[..] else {
            panic!("expected two rows")
        };
        assert_eq!(u1.audio, dir.path().join("a/one.wav"));
        assert_eq!((u1.start, u1.end, u1.line), (None, None, 2));
        assert_eq!(u2.audio, PathBuf::from("/abs/two.flac"));
        assert_eq!(
            (u2.start, u2.end, u2.dialect.as_str()),
            (Some(1.5), Some(3.0), "")
        );
        assert_eq!(manifest.transcript(1, "normalized").unwrap(), "yes");
        let message = manifest.transcript(0, "phones").unwrap_err().to_string();
        assert!(message.contains("dialectal, normalized"), "{message}");
    }

    /// Issue 16: an `end` beyond about 1.2e15 s saturated to the "end of file" marker when
    /// turned into a sample index and was silently read as "to the end of the file".
    #[test]
    fn times_beyond_the_limit_are_errors_naming_the_line() {
        let (_dir, path) = manifest_with(
            "u1\ta.wav\t0\t1.3e15\tsp\tn\ta\ta\nu2\ta.wav\t2000000\t\tsp\tn\ta\ta\n\
             u3\ta.wav\t0\t1000000\tsp\tn\ta\ta\n",
        );
        let (manifest, problems) = Manifest::read_collecting(&path).unwrap();
        let messages: Vec<String> = problems.iter().map(|p| p.to_string()).collect();
        assert_eq!(messages.len(), 2, "{messages:?}");
        assert!(
            messages[0].contains("corpus.tsv, line 2")
                && messages[0].contains("`end` of `u1`")
                && messages[0].contains("from 0 to 1000000")
                && messages[0].contains("1.3e15"),
            "{messages:?}"
        );
        assert!(messages[1].contains("line 3") && messages[1].contains("`start` of `u2`"));
        assert_eq!(manifest.utterances.len(), 1);
    }

    #[test]
    fn missing_column_is_reported_with_what_was_found() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.tsv");
        std::fs::write(
            &path,
            "id\taudio\tstart\tend\tdialect\ttext\nu\tx.wav\t\t\tn\thi\n",
        )
        .unwrap();
        let message = Manifest::read(&path).unwrap_err().to_string();
        assert!(
            message.contains("m.tsv, line 1") && message.contains("missing: speaker"),
            "{message}"
        );
        std::fs::write(&path, "id\taudio\tstart\tend\tspeaker\tdialect\n").unwrap();
        let message = Manifest::read(&path).unwrap_err().to_string();
        assert!(message.contains("transcript column"), "{message}");
    }

    #[test]
    fn an_untranscribed_manifest_needs_no_transcript_column_but_the_rest_is_checked() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("pool.tsv");
        std::fs::write(
            &path,
            "id\taudio\tstart\tend\tspeaker\tdialect\nu1\ta.ogg\t\t\tsp\tfells\n",
        )
        .unwrap();
        let manifest = Manifest::read_untranscribed(&path).unwrap();
        assert!(manifest.transcript_columns.is_empty());
        assert_eq!(manifest.utterances[0].audio, dir.path().join("a.ogg"));
        std::fs::write(
            &path,
            "id\taudio\tstart\tend\tspeaker\tdialect\nu1\ta.ogg\tsoon\t\tsp\tfells\n",
        )
        .unwrap();
        let message = Manifest::read_untranscribed(&path).unwrap_err().to_string();
        assert!(message.contains("pool.tsv, line 2"), "{message}");
        std::fs::write(&path, "id\taudio\tstart\tend\tspeaker\n").unwrap();
        let message = Manifest::read_untranscribed(&path).unwrap_err().to_string();
        assert!(message.contains("missing: dialect"), "{message}");
    }

    #[test]
    fn every_row_problem_is_listed_with_its_line() {
        let (_dir, path) = manifest_with(
            "u1\tx.wav\t\t\ts\td\ta\tb\n\
             u1\ty.wav\t\t\ts\td\ta\tb\n\
             u3\tz.wav\t4\t2\ts\td\ta\tb\n\
             u4\tz.wav\tsoon\t\ts\td\ta\tb\n\
             u5\tz.wav\t\t\t\td\t\tb\n\
             u1\tx.wav\t\t\ts\td\ta\tb\n",
        );
        let (manifest, problems) = Manifest::read_collecting(&path).unwrap();
        let listed: Vec<String> = problems.iter().map(ToString::to_string).collect();
        assert_eq!(manifest.utterances.len(), 2, "{listed:?}");
        let expect = |line: usize, severity: Severity, text: &str| {
            assert!(
                problems.iter().any(|p| p.line == Some(line)
                    && p.severity == severity
                    && p.message.contains(text)),
                "line {line} `{text}` not in {listed:?}"
            );
        };
        expect(3, Severity::Error, "found `u1` again (first on line 2)");
        expect(4, Severity::Error, "start 4 s and end 2 s");
        expect(5, Severity::Error, "found `soon`");
        expect(6, Severity::Warning, "no speaker");
        expect(6, Severity::Warning, "empty `dialectal` transcript");
        expect(7, Severity::Error, "repeats line 2 exactly");
        let first = Manifest::read(&path).unwrap_err().to_string();
        assert!(first.contains("corpus.tsv, line 3"), "{first}");
    }

    #[test]
    fn relative_paths_only_within_a_shared_folder() {
        let relative = |a: &str, b: &str| relative_to(Path::new(a), Path::new(b));
        assert_eq!(
            relative("/data/corpus/audio/a.flac", "/data/corpus/splits"),
            Some(PathBuf::from("../audio/a.flac"))
        );
        assert_eq!(
            relative("/data/corpus/a.flac", "/data/corpus"),
            Some(PathBuf::from("a.flac"))
        );
        assert_eq!(relative("/home/archive/a.flac", "/tmp/out"), None);
    }

    #[test]
    fn subsets_are_written_with_audio_relative_to_the_new_folder() {
        let (dir, path) = manifest_with("u1\taudio/one.wav\t0.5\t2\ts\td\ta\tb\n");
        let manifest = Manifest::read(&path).unwrap();
        let out = dir.path().join("splits/train.tsv");
        let rows: Vec<&Utterance> = manifest.utterances.iter().collect();
        manifest.write_subset(&out, &rows).unwrap();
        let text = std::fs::read_to_string(&out).unwrap();
        assert_eq!(
            text,
            format!("{HEADER}u1\t../audio/one.wav\t0.5\t2\ts\td\ta\tb\n")
        );
        let again = Manifest::read(&out).unwrap();
        assert_eq!(
            absolute(&again.utterances[0].audio).unwrap(),
            absolute(&manifest.utterances[0].audio).unwrap()
        );
    }
}
