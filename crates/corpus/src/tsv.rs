//! Tab-separated tables as every isogloss text format uses them: UTF-8, one record a line, fields
//! split on tab, no quoting, `#` never special, and (for most formats) a header row naming the
//! columns. Errors name the file and the 1-based line.

use std::fs::{self, File};
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::CorpusError;

/// One data row of a table, with the 1-based line it came from (for error messages).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Record {
    /// 1-based line number in the file.
    pub line: usize,
    /// The fields, split on tab.
    pub fields: Vec<String>,
}

/// A whole tab-separated file: its header (when it has one) and its data rows.
#[derive(Debug, Clone)]
pub struct Table {
    /// The file it was read from.
    pub path: PathBuf,
    /// Column names from the header row; empty for headerless formats.
    pub header: Vec<String>,
    /// Data rows in file order. Blank lines are skipped.
    pub records: Vec<Record>,
}

impl Table {
    /// Reads a table whose first line is a header. Every row must have as many fields as the
    /// header; a trailing `\r` (Windows line ends) is removed. Stops at the first bad row.
    pub fn read_with_header(path: &Path) -> Result<Table, CorpusError> {
        let (table, mut problems) = Table::read_with_header_collecting(path)?;
        match problems.is_empty() {
            true => Ok(table),
            false => Err(problems.swap_remove(0)),
        }
    }

    /// Reads a table whose first line is a header, skipping the rows that cannot be read (not
    /// UTF-8, wrong number of fields) and returning a line-numbered error for each, so that a
    /// validator can list every problem at once. Only an unreadable file or a missing header
    /// row fails outright.
    pub fn read_with_header_collecting(
        path: &Path,
    ) -> Result<(Table, Vec<CorpusError>), CorpusError> {
        let bytes = fs::read(path).map_err(|source| CorpusError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let format_error = |line: usize, message: String| CorpusError::Format {
            path: path.to_path_buf(),
            line,
            message,
        };
        let mut problems = Vec::new();
        let mut header: Option<Vec<String>> = None;
        let mut records = Vec::new();
        let mut offset = 0;
        for (index, raw) in bytes.split(|&b| b == b'\n').enumerate() {
            let line_number = index + 1;
            let line_start = offset;
            offset += raw.len() + 1;
            let line = match std::str::from_utf8(raw) {
                Ok(line) => line.trim_end_matches('\r'),
                Err(error) => {
                    let problem = format_error(
                        line_number,
                        format!(
                            "expected UTF-8 text, found an invalid byte sequence at byte {}",
                            line_start + error.valid_up_to()
                        ),
                    );
                    if header.is_none() {
                        return Err(problem);
                    }
                    problems.push(problem);
                    continue;
                }
            };
            let Some(header) = &header else {
                if line.trim().is_empty() {
                    return Err(format_error(
                        1,
                        "expected a header row naming the columns, found an empty line or an empty file"
                            .into(),
                    ));
                }
                // A byte-order mark (some spreadsheet exports) is not part of the first name.
                let line = line.trim_start_matches('\u{feff}');
                header = Some(line.split('\t').map(|f| f.trim().to_string()).collect());
                continue;
            };
            if line.trim().is_empty() {
                continue;
            }
            let fields: Vec<String> = line.split('\t').map(str::to_string).collect();
            if fields.len() != header.len() {
                problems.push(format_error(
                    line_number,
                    format!(
                        "expected {} tab-separated fields as in the header, found {}",
                        header.len(),
                        fields.len()
                    ),
                ));
                continue;
            }
            records.push(Record {
                line: line_number,
                fields,
            });
        }
        let Some(header) = header else {
            return Err(format_error(
                1,
                "expected a header row naming the columns, found an empty line or an empty file"
                    .into(),
            ));
        };
        Ok((
            Table {
                path: path.to_path_buf(),
                header,
                records,
            },
            problems,
        ))
    }

    /// Reads a headerless table (e.g. a lexicon); every row must have at least `min_fields` fields.
    pub fn read_without_header(path: &Path, min_fields: usize) -> Result<Table, CorpusError> {
        let text = read_utf8(path)?;
        let mut records = Vec::new();
        for (index, line) in text.lines().enumerate() {
            let line = line.trim_end_matches('\r');
            if line.trim().is_empty() {
                continue;
            }
            let fields: Vec<String> = line.split('\t').map(str::to_string).collect();
            if fields.len() < min_fields {
                return Err(CorpusError::Format {
                    path: path.to_path_buf(),
                    line: index + 1,
                    message: format!(
                        "expected at least {min_fields} tab-separated fields, found {}",
                        fields.len()
                    ),
                });
            }
            records.push(Record {
                line: index + 1,
                fields,
            });
        }
        Ok(Table {
            path: path.to_path_buf(),
            header: Vec::new(),
            records,
        })
    }

    /// Position of a named column, or an error naming the file and the columns it does have.
    pub fn column(&self, name: &str) -> Result<usize, CorpusError> {
        self.header
            .iter()
            .position(|h| h == name)
            .ok_or_else(|| CorpusError::Format {
                path: self.path.clone(),
                line: 1,
                message: format!(
                    "expected a column named `{name}` in the header, found only: {}",
                    self.header.join(", ")
                ),
            })
    }
}

/// Reads a whole file as UTF-8, naming the file and the first bad line when it is not.
pub fn read_utf8(path: &Path) -> Result<String, CorpusError> {
    let bytes = fs::read(path).map_err(|source| CorpusError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    String::from_utf8(bytes).map_err(|error| {
        let valid = error.utf8_error().valid_up_to();
        let line = error.as_bytes()[..valid]
            .iter()
            .filter(|&&b| b == b'\n')
            .count()
            + 1;
        CorpusError::Format {
            path: path.to_path_buf(),
            line,
            message: format!("expected UTF-8 text, found an invalid byte sequence at byte {valid}"),
        }
    })
}

/// Writes a header and rows as a tab-separated file, atomically: to a temporary file beside the
/// target, then renamed, so that an interrupted run never leaves half a file.
pub fn write_table(path: &Path, header: &[&str], rows: &[Vec<String>]) -> Result<(), CorpusError> {
    let mut text = String::new();
    if !header.is_empty() {
        text.push_str(&header.join("\t"));
        text.push('\n');
    }
    for row in rows {
        text.push_str(&row.join("\t"));
        text.push('\n');
    }
    write_atomically(path, text.as_bytes())
}

/// Writes bytes to `path` through a temporary file in the same folder and a rename.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), CorpusError> {
    let io = |source| CorpusError::Io {
        path: path.to_path_buf(),
        source,
    };
    if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
        fs::create_dir_all(parent).map_err(io)?;
    }
    let mut temporary = path.as_os_str().to_owned();
    temporary.push(".tmp");
    let temporary = PathBuf::from(temporary);
    // Written and flushed to disk in full before it replaces the previous file; on failure
    // (a full disk) the partial copy is removed and the previous file stays as it was.
    let written = File::create(&temporary)
        .and_then(|mut file| file.write_all(bytes).and_then(|_| file.sync_all()))
        .and_then(|_| fs::rename(&temporary, path));
    if written.is_err() {
        let _ = fs::remove_file(&temporary);
    }
    written.map_err(io)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A write that fails (here the temporary copy cannot be created, as on a full disk or a
    /// read-only folder) is an error naming the file, and the previous output stays whole.
    #[test]
    fn a_failed_write_leaves_the_previous_file_intact() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("hyp.tsv");
        write_atomically(&path, b"id\ttext\nu1\tolder\n").unwrap();
        fs::create_dir(dir.path().join("hyp.tsv.tmp")).unwrap();
        let message = write_atomically(&path, b"id\ttext\nu1\tnewer\n")
            .unwrap_err()
            .to_string();
        assert!(message.contains("hyp.tsv"), "{message}");
        assert_eq!(fs::read(&path).unwrap(), b"id\ttext\nu1\tolder\n");
    }

    fn file_with(text: &[u8]) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("table.tsv");
        fs::write(&path, text).unwrap();
        (dir, path)
    }

    #[test]
    fn reads_header_and_rows_with_line_numbers() {
        let (_dir, path) = file_with(b"id\ttext\r\na\thello world\n\nb\t# not a comment\n");
        let table = Table::read_with_header(&path).unwrap();
        assert_eq!(table.header, ["id", "text"]);
        assert_eq!(table.records.len(), 2);
        assert_eq!(table.records[1].line, 4);
        assert_eq!(table.records[1].fields[1], "# not a comment");
        assert_eq!(table.column("text").unwrap(), 1);
    }

    #[test]
    fn wrong_field_count_names_the_line() {
        let (_dir, path) = file_with(b"id\ttext\na\tb\tc\n");
        let message = Table::read_with_header(&path).unwrap_err().to_string();
        assert!(
            message.contains("table.tsv") && message.contains("line 2"),
            "{message}"
        );
    }

    #[test]
    fn missing_column_lists_the_columns_found() {
        let (_dir, path) = file_with(b"id\ttext\n");
        let message = Table::read_with_header(&path)
            .unwrap()
            .column("speaker")
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("`speaker`") && message.contains("id, text"),
            "{message}"
        );
    }

    #[test]
    fn invalid_utf8_names_the_line() {
        let (_dir, path) = file_with(b"id\ttext\na\tok\nb\t\xff\n");
        let message = Table::read_with_header(&path).unwrap_err().to_string();
        assert!(
            message.contains("line 3") && message.contains("UTF-8"),
            "{message}"
        );
    }

    #[test]
    fn collecting_reader_lists_every_bad_row_and_keeps_the_good_ones() {
        let (_dir, path) = file_with(b"id\ttext\na\tok\nb\t\xff\nc\tx\ty\nd\tfine\n");
        let (table, problems) = Table::read_with_header_collecting(&path).unwrap();
        assert_eq!(table.records.len(), 2);
        assert_eq!(table.records[1].line, 5);
        let messages: Vec<String> = problems.iter().map(|p| p.to_string()).collect();
        assert_eq!(messages.len(), 2, "{messages:?}");
        assert!(messages[0].contains("line 3") && messages[0].contains("UTF-8"));
        assert!(messages[1].contains("line 4") && messages[1].contains("found 3"));
    }

    #[test]
    fn empty_file_has_no_header() {
        let (_dir, path) = file_with(b"");
        let message = Table::read_with_header(&path).unwrap_err().to_string();
        assert!(
            message.contains("line 1") && message.contains("header"),
            "{message}"
        );
    }

    #[test]
    fn atomic_write_round_trips() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out/hyp.tsv");
        write_table(&path, &["id", "text"], &[vec!["u1".into(), "a b".into()]]).unwrap();
        let table = Table::read_with_header(&path).unwrap();
        assert_eq!(table.records[0].fields, ["u1", "a b"]);
        assert!(!dir.path().join("out/hyp.tsv.tmp").exists());
    }
}
