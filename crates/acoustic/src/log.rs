//! The training log `training.jsonl` read back, and the training curve drawn from it.
//!
//! The log is one JSON object a line, its `event` naming the kind (`start`, `resume`, `epoch`,
//! `batch_skipped`, …). Reading takes from each epoch line only the fields the curve needs and
//! ignores the others, so a log with more fields per line (from a newer version) still reads.
//! [`pipeline::train`](crate::pipeline::train) redraws `training-curve.svg` in the model
//! directory after every epoch from this log, so the curve of a resumed run shows every epoch.

use std::path::Path;

use isogloss_chart::{EpochPoint, TrainingCurve};
use serde::Deserialize;

use crate::AcousticError;

/// The file name of the training curve in a model directory.
pub const CURVE_FILE: &str = "training-curve.svg";

/// The figures of one epoch line that the curve needs.
#[derive(Debug, Clone, PartialEq, Deserialize)]
pub struct LoggedEpoch {
    /// 1-based epoch number.
    pub epoch: usize,
    /// Mean per-frame training loss (not a number when it was not finite: the log writes
    /// `null`).
    #[serde(deserialize_with = "number_or_nan")]
    pub train_loss: f64,
    /// Per-frame dev loss.
    #[serde(deserialize_with = "number_or_nan")]
    pub dev_loss: f64,
    /// Greedy dev unit error rate, as a fraction.
    #[serde(deserialize_with = "number_or_nan")]
    pub dev_unit_error_rate: f64,
    /// Whether the dev loss was the best so far.
    #[serde(default)]
    pub improved: bool,
    /// Whether the model directory was written with this epoch; `None` in logs from before
    /// `[training] keep`, where that was `improved`.
    #[serde(default)]
    pub saved: Option<bool>,
}

impl LoggedEpoch {
    /// Whether the model directory was written with this epoch.
    pub fn saved(&self) -> bool {
        self.saved.unwrap_or(self.improved)
    }
}

fn number_or_nan<'de, D: serde::Deserializer<'de>>(deserializer: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(deserializer)?.unwrap_or(f64::NAN))
}

#[derive(Deserialize)]
struct Event {
    event: Option<String>,
    epochs_done: Option<usize>,
}

/// The epochs of the latest run in a training log, in order. A `start` line begins a new run
/// (epochs logged before it belong to an earlier one); a `resume` line continues from its
/// `epochs_done`, dropping any epoch logged after that; an epoch logged twice keeps its last
/// line.
pub fn read_epochs(path: &Path) -> Result<Vec<LoggedEpoch>, AcousticError> {
    let text = std::fs::read_to_string(path).map_err(|source| AcousticError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let mut epochs: Vec<LoggedEpoch> = Vec::new();
    for (index, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let at_line = |problem: String| AcousticError::Line {
            path: path.to_path_buf(),
            line: index + 1,
            problem,
        };
        let event: Event = serde_json::from_str(line).map_err(|e| {
            at_line(format!(
                "expected a JSON object with an `event` field ({e})"
            ))
        })?;
        match event.event.as_deref() {
            Some("start") => epochs.clear(),
            Some("resume") => {
                let done = event.epochs_done.ok_or_else(|| {
                    at_line("expected `epochs_done` in a resume line, found none".into())
                })?;
                epochs.retain(|e| e.epoch <= done);
            }
            Some("epoch") => {
                let epoch: LoggedEpoch = serde_json::from_str(line)
                    .map_err(|e| at_line(format!("an epoch line without its figures: {e}")))?;
                epochs.retain(|e| e.epoch != epoch.epoch);
                epochs.push(epoch);
            }
            Some(_) => {}
            None => return Err(at_line("expected an `event` field, found none".into())),
        }
    }
    epochs.sort_by_key(|e| e.epoch);
    Ok(epochs)
}

/// The training curve of `epochs` as SVG, titled with the model's `name`; the kept epoch is
/// the last one saved (the one the model directory holds).
pub fn training_curve(name: &str, epochs: &[LoggedEpoch]) -> String {
    let kept = epochs.iter().rfind(|e| e.saved()).map(|e| e.epoch);
    TrainingCurve {
        title: format!("Training curve: {name}"),
        notes: vec![
            "Loss per frame (CTC) on the training batches and on dev; greedy unit error rate on dev. The dashed line marks the epoch the model directory holds (the last, or with keep = \"best-dev-loss\" the lowest dev loss).".into(),
        ],
        epochs: epochs
            .iter()
            .map(|e| EpochPoint {
                epoch: e.epoch,
                train_loss: e.train_loss,
                dev_loss: e.dev_loss,
                dev_unit_error_percent: 100.0 * e.dev_unit_error_rate,
            })
            .collect(),
        kept,
    }
    .to_svg()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn log(lines: &[&str]) -> (tempfile::TempDir, std::path::PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("training.jsonl");
        std::fs::write(&path, lines.join("\n")).unwrap();
        (dir, path)
    }

    #[test]
    fn epochs_of_the_latest_run_with_unknown_fields_ignored() {
        let (_dir, path) = log(&[
            r#"{"event":"start","epochs_done":0}"#,
            r#"{"event":"epoch","epoch":1,"train_loss":9.0,"dev_loss":9.0,"dev_unit_error_rate":0.9,"improved":true}"#,
            r#"{"event":"start","epochs_done":0,"seed":2}"#,
            r#"{"event":"epoch","epoch":1,"train_loss":2.0,"dev_loss":1.5,"dev_unit_error_rate":0.8,"improved":true,"train_seconds":12.5,"updates":40}"#,
            r#"{"event":"batch_skipped","reason":"non-finite loss","utterances":["a"]}"#,
            r#"{"event":"epoch","epoch":2,"train_loss":null,"dev_loss":1.4,"dev_unit_error_rate":0.7,"improved":true}"#,
            r#"{"event":"epoch","epoch":3,"train_loss":1.0,"dev_loss":1.6,"dev_unit_error_rate":0.7,"improved":false}"#,
            // Resumed from the checkpoint of epoch 2: the logged epoch 3 is replaced.
            r#"{"event":"resume","epochs_done":2}"#,
            r#"{"event":"epoch","epoch":3,"train_loss":1.1,"dev_loss":1.3,"dev_unit_error_rate":0.6,"improved":true}"#,
            "",
        ]);
        let epochs = read_epochs(&path).unwrap();
        assert_eq!(
            epochs.iter().map(|e| e.epoch).collect::<Vec<_>>(),
            [1, 2, 3]
        );
        assert_eq!(epochs[0].train_loss, 2.0);
        assert!(epochs[1].train_loss.is_nan());
        assert_eq!(epochs[2].dev_loss, 1.3);
        let svg = training_curve("mine", &epochs);
        assert!(svg.contains("Training curve: mine") && svg.contains("kept: epoch 3"));
    }

    #[test]
    fn the_kept_epoch_is_the_last_saved_and_old_logs_count_improved_as_saved() {
        // keep = "last": epoch 3 did not improve but was saved, and is the one kept.
        let (_dir, path) = log(&[
            r#"{"event":"start","epochs_done":0}"#,
            r#"{"event":"epoch","epoch":1,"train_loss":2.0,"dev_loss":1.5,"dev_unit_error_rate":0.8,"improved":true,"saved":true}"#,
            r#"{"event":"epoch","epoch":2,"train_loss":1.5,"dev_loss":1.2,"dev_unit_error_rate":0.7,"improved":true,"saved":true}"#,
            r#"{"event":"epoch","epoch":3,"train_loss":1.2,"dev_loss":1.3,"dev_unit_error_rate":0.6,"improved":false,"saved":true}"#,
        ]);
        let epochs = read_epochs(&path).unwrap();
        assert!(epochs.iter().all(LoggedEpoch::saved));
        assert!(training_curve("last", &epochs).contains("kept: epoch 3"));
        // A log from before `saved`: the improved epochs were the saved ones.
        let (_dir, path) = log(&[
            r#"{"event":"start","epochs_done":0}"#,
            r#"{"event":"epoch","epoch":1,"train_loss":2.0,"dev_loss":1.5,"dev_unit_error_rate":0.8,"improved":true}"#,
            r#"{"event":"epoch","epoch":2,"train_loss":1.5,"dev_loss":1.2,"dev_unit_error_rate":0.7,"improved":true}"#,
            r#"{"event":"epoch","epoch":3,"train_loss":1.2,"dev_loss":1.3,"dev_unit_error_rate":0.6,"improved":false}"#,
        ]);
        let epochs = read_epochs(&path).unwrap();
        assert_eq!(
            epochs.iter().map(LoggedEpoch::saved).collect::<Vec<_>>(),
            [true, true, false]
        );
        assert!(training_curve("old", &epochs).contains("kept: epoch 2"));
    }

    #[test]
    fn a_bad_line_is_named_by_file_and_line() {
        let (_dir, path) = log(&[
            r#"{"event":"start","epochs_done":0}"#,
            r#"{"event":"epoch","epoch":1,"dev_loss":1.5}"#,
        ]);
        let message = read_epochs(&path).unwrap_err().to_string();
        assert!(
            message.starts_with(&format!(
                "{}, line 2: an epoch line without its figures",
                path.display()
            )),
            "{message}"
        );
        let (_dir, path) = log(&[r#"{"event":"start""#]);
        let message = read_epochs(&path).unwrap_err().to_string();
        assert!(
            message.contains(", line 1: expected a JSON object"),
            "{message}"
        );
    }
}
