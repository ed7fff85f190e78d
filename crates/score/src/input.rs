//! Reading what is scored: the reference (a manifest: id, a transcript column and grouping
//! columns) and the hypotheses (`id<TAB>text`).
//!
//! The reference is read through the shared table reader and only the columns scoring needs, so
//! that scoring works on any manifest-shaped file and does not depend on the full manifest model.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use isogloss_corpus::tsv::Table;

use crate::ScoreError;

/// One reference utterance.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReferenceUtterance {
    /// Utterance id.
    pub id: String,
    /// 1-based line in the reference file.
    pub line: usize,
    /// The reference transcript (untokenized).
    pub text: String,
    /// Values of the grouping columns, in the order of [`Reference::group_columns`].
    pub groups: Vec<String>,
}

/// The reference side of a scoring run.
#[derive(Debug, Clone)]
pub struct Reference {
    /// The file it was read from.
    pub path: PathBuf,
    /// The transcript column scored against.
    pub column: String,
    /// Grouping columns (e.g. `dialect`, `speaker`).
    pub group_columns: Vec<String>,
    /// Utterances in file order; ids are unique.
    pub utterances: Vec<ReferenceUtterance>,
}

impl Reference {
    /// Reads the `id` column, the transcript column `column` and the grouping columns of a
    /// manifest. Duplicate ids are an error naming both lines.
    pub fn read(
        path: &Path,
        column: &str,
        group_columns: &[String],
    ) -> Result<Reference, ScoreError> {
        Reference::read_joined(path, column, group_columns, None)
    }

    /// As [`Reference::read`], with grouping columns that the manifest lacks taken from a
    /// speaker table: a file with a header, a `speaker` column and any others (age group, sex,
    /// locality, recording device, …), joined on the manifest's `speaker` column. A column the
    /// manifest has is read from the manifest. Errors name the file and line: a speaker listed
    /// twice in the table, a manifest speaker missing from it, a column in neither file.
    pub fn read_with_speakers(
        path: &Path,
        column: &str,
        group_columns: &[String],
        speakers: &Path,
    ) -> Result<Reference, ScoreError> {
        Reference::read_joined(path, column, group_columns, Some(speakers))
    }

    fn read_joined(
        path: &Path,
        column: &str,
        group_columns: &[String],
        speakers: Option<&Path>,
    ) -> Result<Reference, ScoreError> {
        let table = Table::read_with_header(path)?;
        let id_column = table.column("id")?;
        let text_column = table.column(column)?;
        let speakers = speakers.map(SpeakerTable::read).transpose()?;
        // Where each grouping column comes from: the manifest, or the speaker table.
        let mut sources = Vec::with_capacity(group_columns.len());
        for name in group_columns {
            let source = match (&speakers, table.header.iter().position(|h| h == name)) {
                (_, Some(index)) => Source::Manifest(index),
                (Some(speakers), None) => match speakers.table.header.iter().position(|h| h == name) {
                    Some(index) => Source::Speakers(index),
                    None => {
                        return Err(ScoreError::Format {
                            path: path.to_path_buf(),
                            line: 1,
                            message: format!(
                                "expected a column named `{name}` here or in the speaker table {} (its columns: {}), found only: {}",
                                speakers.table.path.display(),
                                speakers.table.header.join(", "),
                                table.header.join(", ")
                            ),
                        })
                    }
                },
                (None, None) => Source::Manifest(table.column(name)?),
            };
            sources.push(source);
        }
        let speaker_column = if sources.iter().any(|s| matches!(s, Source::Speakers(_))) {
            Some(table.column("speaker")?)
        } else {
            None
        };
        let mut utterances = Vec::with_capacity(table.records.len());
        for record in &table.records {
            let joined = match (&speakers, speaker_column) {
                (Some(speakers), Some(index)) => {
                    let speaker = record.fields[index].trim();
                    match speakers.rows.get(speaker) {
                        Some(&row) => Some(&speakers.table.records[row]),
                        None => {
                            return Err(ScoreError::Format {
                                path: path.to_path_buf(),
                                line: record.line,
                                message: format!(
                                    "expected speaker `{speaker}` in the speaker table {}, found no row for it",
                                    speakers.table.path.display()
                                ),
                            })
                        }
                    }
                }
                _ => None,
            };
            let groups = sources
                .iter()
                .map(|source| match (source, joined) {
                    (Source::Manifest(i), _) => record.fields[*i].trim().to_string(),
                    (Source::Speakers(i), Some(row)) => row.fields[*i].trim().to_string(),
                    (Source::Speakers(_), None) => unreachable!("a speaker column is read"),
                })
                .collect();
            utterances.push(ReferenceUtterance {
                id: record.fields[id_column].trim().to_string(),
                line: record.line,
                text: record.fields[text_column].clone(),
                groups,
            });
        }
        check_ids(path, utterances.iter().map(|u| (u.id.as_str(), u.line)))?;
        Ok(Reference {
            path: path.to_path_buf(),
            column: column.to_string(),
            group_columns: group_columns.to_vec(),
            utterances,
        })
    }
}

/// Where a grouping column's values come from.
enum Source {
    /// This column of the manifest.
    Manifest(usize),
    /// This column of the speaker table, through the manifest's `speaker` column.
    Speakers(usize),
}

/// A speaker table, indexed by speaker.
struct SpeakerTable {
    table: Table,
    /// Row index of each speaker.
    rows: HashMap<String, usize>,
}

impl SpeakerTable {
    fn read(path: &Path) -> Result<SpeakerTable, ScoreError> {
        let table = Table::read_with_header(path)?;
        let column = table.column("speaker")?;
        let mut rows: HashMap<String, usize> = HashMap::new();
        for (index, record) in table.records.iter().enumerate() {
            let speaker = record.fields[column].trim().to_string();
            if let Some(&first) = rows.get(&speaker) {
                return Err(ScoreError::Format {
                    path: path.to_path_buf(),
                    line: record.line,
                    message: format!(
                        "expected each speaker once, found `{speaker}` again (first on line {})",
                        table.records[first].line
                    ),
                });
            }
            rows.insert(speaker, index);
        }
        Ok(SpeakerTable { table, rows })
    }
}

/// One hypothesis line.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Hypothesis {
    /// Utterance id.
    pub id: String,
    /// 1-based line in the hypotheses file (0 for hypotheses made in memory).
    pub line: usize,
    /// The recognized text (untokenized).
    pub text: String,
}

/// The hypotheses of one system.
#[derive(Debug, Clone)]
pub struct Hypotheses {
    /// The file they were read from (a label for hypotheses made in memory).
    pub path: PathBuf,
    /// Hypotheses in file order.
    pub entries: Vec<Hypothesis>,
}

impl Hypotheses {
    /// Reads a hypotheses file with header `id<TAB>text`. Duplicate ids are an error.
    pub fn read(path: &Path) -> Result<Hypotheses, ScoreError> {
        let table = Table::read_with_header(path)?;
        let id_column = table.column("id")?;
        let text_column = table.column("text")?;
        let entries: Vec<Hypothesis> = table
            .records
            .iter()
            .map(|record| Hypothesis {
                id: record.fields[id_column].trim().to_string(),
                line: record.line,
                text: record.fields[text_column].clone(),
            })
            .collect();
        check_ids(path, entries.iter().map(|h| (h.id.as_str(), h.line)))?;
        Ok(Hypotheses {
            path: path.to_path_buf(),
            entries,
        })
    }
}

/// Refuses empty and duplicate ids, naming the file and the lines.
fn check_ids<'a>(
    path: &Path,
    ids: impl Iterator<Item = (&'a str, usize)>,
) -> Result<(), ScoreError> {
    let mut seen: HashMap<&str, usize> = HashMap::new();
    for (id, line) in ids {
        if id.is_empty() {
            return Err(ScoreError::Format {
                path: path.to_path_buf(),
                line,
                message: "expected an utterance id in the `id` column, found an empty field".into(),
            });
        }
        if let Some(&first_line) = seen.get(id) {
            return Err(ScoreError::DuplicateId {
                path: path.to_path_buf(),
                line,
                id: id.to_string(),
                first_line,
            });
        }
        seen.insert(id, line);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(dir: &tempfile::TempDir, name: &str, text: &str) -> PathBuf {
        let path = dir.path().join(name);
        std::fs::write(&path, text).unwrap();
        path
    }

    const MANIFEST: &str = "id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n\
        u1\ta.wav\t\t\tmartha\tfells\toor hoose\tour house\n\
        u2\ta.wav\t1.0\t2.0\tzoë\tmarsh\towd\told\n";

    #[test]
    fn reads_the_columns_scoring_needs() {
        let dir = tempfile::tempdir().unwrap();
        let path = file(&dir, "ref.tsv", MANIFEST);
        let reference =
            Reference::read(&path, "normalized", &["dialect".into(), "speaker".into()]).unwrap();
        assert_eq!(reference.utterances.len(), 2);
        assert_eq!(reference.utterances[1].text, "old");
        assert_eq!(reference.utterances[1].groups, ["marsh", "zoë"]);
        assert_eq!(reference.utterances[1].line, 3);
    }

    #[test]
    fn a_missing_column_is_named() {
        let dir = tempfile::tempdir().unwrap();
        let path = file(&dir, "ref.tsv", MANIFEST);
        let message = Reference::read(&path, "phonetic", &[])
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("ref.tsv") && message.contains("`phonetic`"),
            "{message}"
        );
        let message = Reference::read(&path, "dialectal", &["region".into()])
            .unwrap_err()
            .to_string();
        assert!(message.contains("`region`"), "{message}");
    }

    #[test]
    fn duplicate_ids_name_both_lines() {
        let dir = tempfile::tempdir().unwrap();
        let path = file(&dir, "hyp.tsv", "id\ttext\nu1\ta\nu2\tb\nu1\tc\n");
        let message = Hypotheses::read(&path).unwrap_err().to_string();
        assert!(
            message.contains("hyp.tsv")
                && message.contains("line 4")
                && message.contains("`u1`")
                && message.contains("line 2"),
            "{message}"
        );
        let path = file(
            &dir,
            "ref.tsv",
            &format!("{MANIFEST}u2\tb.wav\t\t\tmartha\t\tx\ty\n"),
        );
        let message = Reference::read(&path, "dialectal", &[])
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("line 4") && message.contains("`u2`"),
            "{message}"
        );
    }

    #[test]
    fn a_speaker_table_adds_grouping_columns() {
        let dir = tempfile::tempdir().unwrap();
        let path = file(&dir, "ref.tsv", MANIFEST);
        let speakers = file(
            &dir,
            "speakers.tsv",
            "speaker\tage\tdialect\nzoë\t80+\tother\nmartha\t60-79\tother\n",
        );
        let reference = Reference::read_with_speakers(
            &path,
            "dialectal",
            &["age".into(), "dialect".into()],
            &speakers,
        )
        .unwrap();
        // `age` from the table; `dialect` from the manifest, which has it.
        assert_eq!(reference.utterances[0].groups, ["60-79", "fells"]);
        assert_eq!(reference.utterances[1].groups, ["80+", "marsh"]);

        let message = Reference::read_with_speakers(&path, "dialectal", &["era".into()], &speakers)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("ref.tsv")
                && message.contains("`era`")
                && message.contains("speakers.tsv")
                && message.contains("age"),
            "{message}"
        );
        let short = file(&dir, "short.tsv", "speaker\tage\nmartha\t60-79\n");
        let message = Reference::read_with_speakers(&path, "dialectal", &["age".into()], &short)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("ref.tsv") && message.contains("line 3") && message.contains("`zoë`"),
            "{message}"
        );
        let twice = file(
            &dir,
            "twice.tsv",
            "speaker\tage\nmartha\t60-79\nzoë\t80+\nmartha\t40-59\n",
        );
        let message = Reference::read_with_speakers(&path, "dialectal", &["age".into()], &twice)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("twice.tsv")
                && message.contains("line 4")
                && message.contains("`martha`")
                && message.contains("line 2"),
            "{message}"
        );
        let nameless = file(&dir, "nameless.tsv", "who\tage\nmartha\t60-79\n");
        let message = Reference::read_with_speakers(&path, "dialectal", &["age".into()], &nameless)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("nameless.tsv") && message.contains("`speaker`"),
            "{message}"
        );
    }

    #[test]
    fn hypotheses_need_id_and_text_columns() {
        let dir = tempfile::tempdir().unwrap();
        let path = file(&dir, "hyp.tsv", "id\ttranscript\nu1\ta\n");
        let message = Hypotheses::read(&path).unwrap_err().to_string();
        assert!(message.contains("`text`"), "{message}");
    }
}
