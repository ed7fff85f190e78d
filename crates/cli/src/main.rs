//! `isogloss`: the command-line interface. It parses flags, shows progress and wires the library
//! crates together; no algorithm lives here.
//!
//! Exit codes (`docs/exit-codes.md`): 0 success; 1 bad input or usage, with a message naming the file and
//! line; 2 a batch finished but some items failed (they are listed on stderr); 3 a data-parallel
//! `train` job ended because a rank stopped answering (set by the rank that timed out).

mod commands;
mod progress;

use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// isogloss: speech recognition for dialects, on a CPU and offline. Train a recognizer on a
/// transcribed corpus, transcribe recordings (word times, WebVTT), and compare language models and
/// lexicons by WER and flexible WER per dialect, with confidence intervals.
#[derive(Parser)]
#[command(name = "isogloss", version)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Run the whole job on the shipped demo data and model: check, build LMs, transcribe, score.
    Demo(commands::demo::DemoArgs),
    /// Check corpus manifests, or split one into speaker-disjoint train/dev/test.
    Corpus(commands::corpus::CorpusArgs),
    /// Compute MFCC or log-mel features of one audio file into a safetensors file.
    Features(commands::features::FeaturesArgs),
    /// Word error rate and flexible WER of hypotheses against a reference manifest.
    Score(commands::score::ScoreArgs),
    /// Train a TDNN acoustic model with CTC.
    Train(commands::train::TrainArgs),
    /// Transcribe recordings or a manifest: beam search with LM and lexicon, or greedy.
    Transcribe(commands::transcribe::TranscribeArgs),
    /// Decode and score a grid of LM, lexicon, writing and decoder choices.
    Sweep(commands::sweep::SweepArgs),
    /// Build a spelling-variant map from two word-aligned transcript columns.
    Variants(commands::variants::VariantsArgs),
    /// N-gram language models: build, eval, mix, prune.
    Lm(commands::lm::LmArgs),
    /// Make pronunciation lexicons (rules, trained G2P) and measure their coverage.
    Lexicon(commands::lexicon::LexiconArgs),
    /// Review pages for a transcript: listen, correct words, label speakers, export TSV/WebVTT.
    Review(commands::review::ReviewArgs),
    /// Calibrate word certainties on dev (temperature, shift); ECE and a reliability chart.
    Calibrate(commands::calibrate::CalibrateArgs),
    /// Rank untranscribed segments for human transcription within a budget of minutes.
    Shortlist(commands::shortlist::ShortlistArgs),
}

/// How a command that did not fail outright ended.
pub enum Outcome {
    /// Everything asked for was done.
    Done,
    /// The batch ran to the end but the listed items failed; exit code 2.
    SomeItemsFailed,
}

fn main() -> ExitCode {
    // A closed pipe (`isogloss score --json | head`) ends the program quietly, as it ends any
    // other command-line tool, instead of making `println!` panic.
    #[cfg(unix)]
    // SAFETY: restoring the default action of one signal before any thread starts.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    // Usage errors are bad input (exit 1, `docs/exit-codes.md`); help and version are successes.
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(error) => {
            let _ = error.print();
            return if error.use_stderr() {
                ExitCode::from(1)
            } else {
                ExitCode::SUCCESS
            };
        }
    };
    let result: anyhow::Result<Outcome> = match cli.command {
        Command::Demo(args) => commands::demo::run(args),
        Command::Corpus(args) => commands::corpus::run(args),
        Command::Features(args) => commands::features::run(args),
        Command::Score(args) => commands::score::run(args),
        Command::Variants(args) => commands::variants::run(args),
        Command::Lm(args) => commands::lm::run(args),
        Command::Lexicon(args) => commands::lexicon::run(args),
        Command::Train(args) => commands::train::run(args),
        Command::Transcribe(args) => commands::transcribe::run(args),
        Command::Sweep(args) => commands::sweep::run(args),
        Command::Review(args) => commands::review::run(args),
        Command::Calibrate(args) => commands::calibrate::run(args),
        Command::Shortlist(args) => commands::shortlist::run(args),
    };
    match result {
        Ok(Outcome::Done) => ExitCode::SUCCESS,
        Ok(Outcome::SomeItemsFailed) => ExitCode::from(2),
        Err(error) => {
            eprintln!("error: {}", said_once(&error));
            ExitCode::from(1)
        }
    }
}

/// The error and its chain of causes, each said once. Library errors name their file and
/// usually print their cause too (`x.tsv: No such file or directory (os error 2)`), and the
/// cause is also their `source`; printing the chain blindly would repeat it. A cause whose text
/// the message already holds is left out.
pub(crate) fn said_once(error: &anyhow::Error) -> String {
    let mut text = error.to_string();
    for cause in error.chain().skip(1) {
        let cause = cause.to_string();
        if !text.contains(&cause) {
            text.push_str(": ");
            text.push_str(&cause);
        }
    }
    text
}

#[cfg(test)]
mod tests {
    use super::said_once;

    /// A library error as they are written: it names its file, prints its cause and returns it
    /// as its source.
    #[derive(Debug)]
    struct Shown {
        path: String,
        source: std::io::Error,
    }

    impl std::fmt::Display for Shown {
        fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            write!(f, "{}: {}", self.path, self.source)
        }
    }

    impl std::error::Error for Shown {
        fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
            Some(&self.source)
        }
    }

    #[test]
    fn a_cause_already_shown_is_not_repeated_and_a_new_one_is_added() {
        let missing = || std::io::Error::new(std::io::ErrorKind::NotFound, "No such file");
        let error = anyhow::Error::new(Shown {
            path: "hyp.tsv".into(),
            source: missing(),
        });
        assert_eq!(said_once(&error), "hyp.tsv: No such file");
        let error = anyhow::Error::new(missing()).context("creating out");
        assert_eq!(said_once(&error), "creating out: No such file");
        let error = anyhow::Error::new(Shown {
            path: "x.tsv".into(),
            source: missing(),
        })
        .context("training into models/mine");
        assert_eq!(
            said_once(&error),
            "training into models/mine: x.tsv: No such file"
        );
    }
}
