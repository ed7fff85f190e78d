//! The resume journal: an append-only record of finished items next to the output.

use std::collections::HashMap;
use std::fs::{self, File};
use std::io::{BufRead, BufReader, Write};
use std::path::{Path, PathBuf};

use isogloss_decoder::output::ItemTranscript;
use serde::{Deserialize, Serialize};

use crate::BatchError;

#[derive(Serialize, Deserialize)]
struct JournalLine {
    fingerprint: String,
    item: ItemTranscript,
}

/// `OUT.journal.jsonl`: one JSON line per finished item, flushed to disk as it finishes, each
/// with the fingerprint of how it was decoded.
pub struct Journal {
    path: PathBuf,
    file: File,
    fingerprint: String,
}

impl Journal {
    /// The journal's path for an output path.
    pub fn path_for(out: &Path) -> PathBuf {
        let mut name = out.as_os_str().to_owned();
        name.push(".journal.jsonl");
        PathBuf::from(name)
    }

    /// Opens the journal of `out`. With `resume`, returns the items already done with the same
    /// fingerprint (a torn last line from a crash is ignored, entries of other fingerprints are
    /// dropped); without, starts it afresh.
    pub fn open(
        out: &Path,
        fingerprint: &str,
        resume: bool,
    ) -> Result<(Journal, HashMap<String, ItemTranscript>), BatchError> {
        let path = Journal::path_for(out);
        let io = |path: &Path, action, source| BatchError::Io {
            path: path.to_path_buf(),
            action,
            source,
        };
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            fs::create_dir_all(parent).map_err(|e| io(parent, "create", e))?;
        }
        let mut done = HashMap::new();
        if resume && path.exists() {
            let reader = BufReader::new(File::open(&path).map_err(|e| io(&path, "open", e))?);
            let lines: Vec<String> = reader
                .lines()
                .collect::<Result<_, _>>()
                .map_err(|e| io(&path, "read", e))?;
            let last = lines.len();
            for (number, line) in lines.iter().enumerate() {
                match serde_json::from_str::<JournalLine>(line) {
                    Ok(entry) if entry.fingerprint == fingerprint => {
                        done.insert(entry.item.id.clone(), entry.item);
                    }
                    Ok(_) => {}
                    // an interrupted run may leave half a line at the end
                    Err(_) if number + 1 == last => {}
                    Err(error) => {
                        return Err(BatchError::Line {
                            path,
                            line: number + 1,
                            message: format!(
                                "expected a journal entry (JSON with fingerprint and item), found {error}"
                            ),
                        })
                    }
                }
            }
        }
        // Rewritten from the kept entries, so that stale and torn lines do not accumulate.
        let file = File::create(&path).map_err(|e| io(&path, "write", e))?;
        let mut journal = Journal {
            path,
            file,
            fingerprint: fingerprint.to_string(),
        };
        let mut kept: Vec<&ItemTranscript> = done.values().collect();
        kept.sort_by(|a, b| a.id.cmp(&b.id));
        for item in kept {
            journal.record(item)?;
        }
        Ok((journal, done))
    }

    /// Appends one finished item and flushes it to disk.
    pub fn record(&mut self, item: &ItemTranscript) -> Result<(), BatchError> {
        let line = serde_json::to_string(&JournalLine {
            fingerprint: self.fingerprint.clone(),
            item: item.clone(),
        })
        .map_err(|e| BatchError::Setting(format!("an item does not serialise: {e}")))?;
        writeln!(self.file, "{line}")
            .and_then(|_| self.file.sync_data())
            .map_err(|source| BatchError::Io {
                path: self.path.clone(),
                action: "write",
                source,
            })
    }
}
