//! Batch transcription for isogloss: many recordings or manifest rows through one acoustic
//! model, lexicon and LM, in a way an archive team can trust with thousands of files.
//!
//! # Key design decision
//!
//! The journal, not the output file, is the record of what was done. Every finished item is
//! appended to `OUT.journal.jsonl` and flushed to disk the moment its group ends, with a
//! [`Fingerprint`] (SHA-256 of the model files, LM, lexicon and search settings); the output
//! file is regenerated from the transcripts atomically at the end ([`write_output`]). So a run
//! killed at any point loses at most the items of the group in flight, `resume` skips exactly
//! the items decoded the same way (a changed model or setting decodes everything again), and a
//! reader never sees half an output file. A failing item (an unreadable file, audio the decoder
//! rejects) is listed in the [`BatchReport`] with its error and the batch goes on; only what
//! would make every item fail (an unreadable lexicon, a journal that cannot be written) stops
//! it. Items are split between machines by [`Shard`], a hash of the item id, so that a share
//! does not change when the list is reordered or extended.
//!
//! The acoustic model and the audio reader come in through the [`Recognizer`] and
//! [`AudioSource`] traits, so that the whole flow is tested here on stand-ins, without a
//! trained model or audio files.
//!
//! ```
//! use isogloss_batch::{batch_items, ItemSource, Shard};
//! use std::path::PathBuf;
//!
//! let recordings = ["a/int1.ogg", "b/int1.ogg", "int2.flac"].map(PathBuf::from).to_vec();
//! let items = batch_items(&ItemSource::Recordings(recordings), None)?;
//! let ids: Vec<&str> = items.iter().map(|i| i.id.as_str()).collect();
//! assert_eq!(ids, ["int1", "int1-2", "int2"]);
//! let half: Shard = "1/2".parse()?;
//! let mine = batch_items(&ItemSource::Recordings(vec![PathBuf::from("int2.flac")]), Some(half))?;
//! assert_eq!(mine.len(), usize::from(half.takes("int2")));
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```
#![deny(missing_docs)]

mod error;
mod fingerprint;
mod journal;
mod run;
mod shard;
mod transcribe;

pub use error::{BatchError, SideError};
pub use fingerprint::Fingerprint;
pub use journal::Journal;
pub use run::{run_batch, write_output, BatchItem, BatchReport, Progress};
pub use shard::Shard;
pub use transcribe::{
    batch_items, transcribe, AudioSource, Chunks, Event, ItemSource, Recognizer,
    TranscribeSettings, SAMPLE_RATE,
};

#[cfg(test)]
mod tests;
