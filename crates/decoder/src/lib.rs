//! Decoding for isogloss: from per-frame CTC log posteriors to timed words.
//!
//! The centre is a CTC prefix beam search ([`PrefixBeamSearch`], after Graves & Jaitly 2014 and
//! Hannun et al. 2014) that walks a lexicon prefix trie and scores each completed word with a
//! word-level n-gram language model behind the state-based [`LanguageModel`] trait. A greedy
//! best-path decoder ([`GreedyDecoder`]) shares the [`Decoder`] trait.
//!
//! Key design decision: a hypothesis is a node in a prefix tree that lives for one utterance
//! (an arena), not a label string in a hash map. Two hypotheses with the same labels but a
//! different word segmentation or homophone stay distinct nodes, so the search is exact when
//! nothing is pruned — which is how it is tested, against enumeration of all alignments — and
//! extending a hypothesis never copies its history. Per-frame work touches only the beam; the
//! scratch buffers live in the search object and are reused across frames and utterances.
//!
//! Around the search: [`segment`] cuts long recordings by voice activity in bounded memory,
//! [`pipeline`] decodes the segments in parallel (rayon) and puts word times on the recording's
//! time line, and [`output`] writes TSV, JSON, WebVTT and plain text.
//!
//! Posteriors are natural-log softmax outputs shaped `[frames, units]`, blank at unit 0. How a
//! unit sequence becomes words depends on the model and lexicon ([`WordRule`]): grapheme models
//! end words at the boundary unit `<wb>`, phone models at lexicon word ends.
//!
//! ```
//! use isogloss_decoder::{BigramModel, Decoder, PrefixBeamSearch, SearchGraph, SearchOptions};
//! use ndarray::Array2;
//!
//! let units: Vec<String> = ["<ctc-blank>", "a", "b", "<wb>"].iter().map(|s| s.to_string()).collect();
//! let lexicon = vec![("ab".to_string(), vec!["a".to_string(), "b".to_string()])];
//! let (graph, _report) = SearchGraph::with_lexicon(units, &lexicon).unwrap();
//! let lm = BigramModel::new(vec!["ab".into()], vec![vec![-0.1], vec![-0.2]], vec![-0.3, -0.4]).unwrap();
//! // four frames that say "a", blank, "b", blank
//! let mut posteriors = Array2::from_elem((4, 4), (0.02f32).ln());
//! for (t, u) in [1, 0, 2, 0].into_iter().enumerate() {
//!     posteriors[[t, u]] = (0.94f32).ln();
//! }
//! let mut search = PrefixBeamSearch::new(&graph, &lm, SearchOptions::default());
//! let transcript = search.decode(posteriors.view()).unwrap();
//! assert_eq!(transcript.text(), "ab");
//! assert_eq!(transcript.words[0].start_frame, 0);
//! ```
#![deny(missing_docs)]

mod graph;
mod greedy;
mod lm;
pub mod output;
pub mod pipeline;
mod search;
pub mod segment;
mod transcript;

#[cfg(test)]
mod brute_force;

pub use graph::{LexiconReport, SearchGraph, WordRule, BOUNDARY_UNIT};
pub use greedy::GreedyDecoder;
pub use lm::{BigramModel, LanguageModel, NoLanguageModel};
pub use search::{
    PrefixBeamSearch, SearchOptions, DEFAULT_BEAM, DEFAULT_LM_WEIGHT, DEFAULT_WORD_BONUS, MAX_BEAM,
};
pub use transcript::{DecodedWord, Transcript};

use ndarray::ArrayView2;

/// Everything that can go wrong while decoding; each message names what was expected and found.
#[derive(Debug, thiserror::Error)]
pub enum DecodeError {
    /// The posteriors do not have one column per model unit.
    #[error("posteriors have {found} units per frame, but the model has {expected} units")]
    UnitCountMismatch {
        /// Units in the model.
        expected: usize,
        /// Columns in the posteriors.
        found: usize,
    },
    /// A posterior is NaN or +∞ (a broken acoustic model or feature file).
    #[error("posterior at frame {frame}, unit {unit} is {value}, expected a finite log probability or -inf")]
    BadPosterior {
        /// Frame index.
        frame: usize,
        /// Unit index.
        unit: usize,
        /// The value found.
        value: f32,
    },
    /// The unit inventory cannot support decoding.
    #[error("the model has {0} units; decoding needs the blank and at least one more")]
    TooFewUnits(usize),
    /// A search or segmentation setting outside its valid range.
    #[error("`{setting}` must be {expected}, found {found}")]
    InvalidSetting {
        /// The setting's name.
        setting: &'static str,
        /// The valid range.
        expected: String,
        /// The value given.
        found: String,
    },
    /// A transcript JSON file is not JSON or not of the transcript layout, at a line and column.
    #[error("{path}, line {line}, column {column}: {message}")]
    TranscriptSyntax {
        /// The file.
        path: std::path::PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What was expected and found.
        message: String,
    },
    /// A transcript JSON file cannot be read or is not an isogloss transcript.
    #[error("{path}: {problem}")]
    TranscriptFile {
        /// The file.
        path: std::path::PathBuf,
        /// Where in the file (line, item, stretch, token) and what was expected and found.
        problem: String,
    },
    /// No lexicon entry could be spelled with the model's units.
    #[error("none of the {entries} lexicon entries can be spelled with the model's units (e.g. {example})")]
    UnusableLexicon {
        /// Entries in the lexicon.
        entries: usize,
        /// One offending entry.
        example: String,
    },
}

/// A decoder turns one utterance's log posteriors `[frames, units]` into a transcript.
pub trait Decoder {
    /// Decodes one utterance.
    fn decode(&mut self, log_posteriors: ArrayView2<'_, f32>) -> Result<Transcript, DecodeError>;

    /// Decodes one utterance read several ways (the candidates of a test-time search, ordered
    /// by the acoustic side, its preferred first) and keeps one: the transcript and the index
    /// of the reading it came from. By default the first reading alone is decoded; a decoder
    /// that compares hypotheses ([`PrefixBeamSearch`]) decodes every reading with frames and
    /// keeps the transcript with the highest acoustic score, the earliest on a tie. An empty
    /// list gives an empty transcript.
    fn decode_readings(
        &mut self,
        readings: &[ArrayView2<'_, f32>],
    ) -> Result<(Transcript, usize), DecodeError> {
        match readings.first() {
            Some(first) => Ok((self.decode(*first)?, 0)),
            None => Ok((Transcript::empty(), 0)),
        }
    }
}

/// The reading whose best hypothesis has the highest acoustic score (the earliest on a tie),
/// among those with frames; the first reading when none has frames.
pub(crate) fn decode_each_reading<D: Decoder + ?Sized>(
    decoder: &mut D,
    readings: &[ArrayView2<'_, f32>],
) -> Result<(Transcript, usize), DecodeError> {
    let mut best: Option<(Transcript, usize)> = None;
    for (i, reading) in readings.iter().enumerate() {
        if reading.nrows() == 0 {
            continue;
        }
        let transcript = decoder.decode(*reading)?;
        if best
            .as_ref()
            .is_none_or(|(b, _)| transcript.acoustic_score > b.acoustic_score)
        {
            best = Some((transcript, i));
        }
    }
    match (best, readings.first()) {
        (Some(best), _) => Ok(best),
        (None, Some(first)) => Ok((decoder.decode(*first)?, 0)),
        (None, None) => Ok((Transcript::empty(), 0)),
    }
}

fn check_posteriors(
    graph: &SearchGraph,
    log_posteriors: ArrayView2<'_, f32>,
) -> Result<(), DecodeError> {
    if log_posteriors.ncols() != graph.units().len() {
        return Err(DecodeError::UnitCountMismatch {
            expected: graph.units().len(),
            found: log_posteriors.ncols(),
        });
    }
    for ((frame, unit), &value) in log_posteriors.indexed_iter() {
        if value.is_nan() || value == f32::INFINITY {
            return Err(DecodeError::BadPosterior { frame, unit, value });
        }
    }
    Ok(())
}
