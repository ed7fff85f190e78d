//! Timed transcripts and the files they are written to: TSV (`id<TAB>text`, what `score`
//! reads), the isogloss transcript JSON with word times and certainties, WebVTT cues (W3C
//! WebVTT), and plain text. `docs/formats.md` shows each with an example.
//!
//! The JSON document (`--format json`) is one object:
//!
//! ```json
//! {
//!   "format": "isogloss-transcript",
//!   "version": 1,
//!   "items": [
//!     {
//!       "id": "interview1",
//!       "audio": "interviews/interview1.ogg",
//!       "stretches": [
//!         {
//!           "from_s": 0.52,
//!           "to_s": 2.87,
//!           "text": "we went doon tae the river",
//!           "tokens": [
//!             { "spelling": "we", "from_s": 0.61, "to_s": 0.74, "certainty": 0.98 }
//!           ]
//!         }
//!       ]
//!     }
//!   ]
//! }
//! ```
//!
//! An *item* is one audio file or one manifest row; a *stretch* is one decoded piece of it (a
//! manifest row, or a stretch of speech between pauses); a *token* is a recognized word. Times
//! are seconds from the start of the audio file.

use std::io::{self, Write};
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::transcript::Transcript;
use crate::DecodeError;

/// A word with times in seconds from the start of its recording (a *token* in the JSON).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TimedWord {
    /// The word as spelled by the lexicon or the units (`spelling`).
    #[serde(rename = "spelling")]
    pub word: String,
    /// Start time, seconds (`from_s`).
    #[serde(rename = "from_s")]
    pub start: f64,
    /// End time, seconds, not before `start` (`to_s`).
    #[serde(rename = "to_s")]
    pub end: f64,
    /// Certainty in (0, 1] as defined by [`crate::DecodedWord::confidence`] (`certainty`).
    #[serde(rename = "certainty")]
    pub confidence: f32,
}

/// One decoded stretch of a recording (a manifest row or a voice-activity segment).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TimedSegment {
    /// Start time, seconds from the start of the recording (`from_s`).
    #[serde(rename = "from_s")]
    pub start: f64,
    /// End time, seconds (`to_s`).
    #[serde(rename = "to_s")]
    pub end: f64,
    /// The words joined by spaces.
    pub text: String,
    /// The words with times inside `[start, end]`, in order (`tokens`).
    #[serde(rename = "tokens")]
    pub words: Vec<TimedWord>,
}

impl TimedSegment {
    /// Places a transcript decoded from the audio `[start, end]` (seconds) on the recording's
    /// time line; `frame_shift` is the seconds between two posterior frames. Word times are
    /// clamped into the segment (a model's last frame may reach past the audio).
    pub fn from_transcript(
        transcript: &Transcript,
        start: f64,
        end: f64,
        frame_shift: f64,
    ) -> Self {
        let clamp = |t: f64| t.clamp(start, end);
        let words = transcript
            .words
            .iter()
            .map(|w| TimedWord {
                word: w.text.clone(),
                start: clamp(start + w.start_frame as f64 * frame_shift),
                end: clamp(start + w.end_frame as f64 * frame_shift),
                confidence: w.confidence,
            })
            .collect();
        TimedSegment {
            start,
            end,
            text: transcript.text(),
            words,
        }
    }
}

/// The transcript of one item of a batch: an audio file, or one manifest row.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ItemTranscript {
    /// Item id (manifest id, or the audio file's stem).
    pub id: String,
    /// The audio file as given.
    pub audio: String,
    /// Decoded stretches in time order (`stretches`).
    #[serde(rename = "stretches")]
    pub segments: Vec<TimedSegment>,
}

/// The value of `format` in a transcript JSON document.
pub const TRANSCRIPT_FORMAT: &str = "isogloss-transcript";
/// The version of the transcript JSON layout this crate writes.
pub const TRANSCRIPT_VERSION: u32 = 1;

/// The transcript JSON document: a format tag and version, then the items.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TranscriptDocument {
    /// Always [`TRANSCRIPT_FORMAT`].
    pub format: String,
    /// [`TRANSCRIPT_VERSION`] when written by this crate.
    pub version: u32,
    /// The items in the order they were asked for.
    pub items: Vec<ItemTranscript>,
}

impl TranscriptDocument {
    /// A document of the current format and version.
    pub fn new(items: Vec<ItemTranscript>) -> Self {
        TranscriptDocument {
            format: TRANSCRIPT_FORMAT.to_string(),
            version: TRANSCRIPT_VERSION,
            items,
        }
    }

    /// Reads a transcript JSON file and checks it ([`TranscriptDocument::parse`]).
    pub fn read(path: &Path) -> Result<TranscriptDocument, DecodeError> {
        let text = std::fs::read_to_string(path).map_err(|error| DecodeError::TranscriptFile {
            path: path.to_path_buf(),
            problem: format!("cannot read the transcript: {error}"),
        })?;
        TranscriptDocument::parse_placed(&text).map_err(|problem| match problem {
            (Some((line, column)), message) => DecodeError::TranscriptSyntax {
                path: path.to_path_buf(),
                line,
                column,
                message,
            },
            (None, problem) => DecodeError::TranscriptFile {
                path: path.to_path_buf(),
                problem,
            },
        })
    }

    /// Parses a transcript JSON document. Other JSON (no `"format": "isogloss-transcript"`), a
    /// newer version, and times or certainties that cannot be right (`to_s` before `from_s`, a
    /// token outside its stretch, a certainty outside [0, 1]) are refused with a message that
    /// says where (line, or item, stretch and token) and what was expected and found.
    pub fn parse(text: &str) -> Result<TranscriptDocument, String> {
        TranscriptDocument::parse_placed(text).map_err(|problem| match problem {
            (Some((line, column)), message) => format!("line {line}, column {column}: {message}"),
            (None, message) => message,
        })
    }

    /// [`TranscriptDocument::parse`] with the line and column of the JSON text apart from the
    /// message, when the problem is placed there.
    fn parse_placed(text: &str) -> Result<TranscriptDocument, PlacedProblem> {
        let value: serde_json::Value =
            serde_json::from_str(text).map_err(|e| json_problem("not JSON", &e))?;
        let format = value.get("format");
        if format.and_then(|f| f.as_str()) != Some(TRANSCRIPT_FORMAT) {
            let found = match format {
                Some(f) => f.to_string(),
                None if value.is_object() => "no \"format\" key".to_string(),
                None => "JSON that is not an object".to_string(),
            };
            return Err(unplaced(format!(
                "not an isogloss transcript: expected \"format\": \"{TRANSCRIPT_FORMAT}\" (written by `isogloss transcribe --format json`), found {found}"
            )));
        }
        match value.get("version").and_then(|v| v.as_u64()) {
            Some(v) if v <= TRANSCRIPT_VERSION as u64 => {}
            found => {
                return Err(unplaced(format!(
                    "expected transcript \"version\" {TRANSCRIPT_VERSION} or lower, found {}",
                    found.map_or("none".to_string(), |v| v.to_string())
                )))
            }
        }
        let document: TranscriptDocument = serde_json::from_str(text)
            .map_err(|e| json_problem("not the transcript layout of docs/formats.md", &e))?;
        for item in &document.items {
            for (s, stretch) in item.segments.iter().enumerate() {
                let here = format!("item `{}`, stretch {}", item.id, s + 1);
                if !(stretch.start.is_finite() && stretch.end.is_finite())
                    || stretch.start < 0.0
                    || stretch.end < stretch.start
                {
                    return Err(unplaced(format!(
                        "{here}: expected 0 ≤ from_s ≤ to_s, found from_s {} and to_s {}",
                        stretch.start, stretch.end
                    )));
                }
                for (t, token) in stretch.words.iter().enumerate() {
                    let here = format!("{here}, token {} (`{}`)", t + 1, token.word);
                    if !(token.start.is_finite() && token.end.is_finite())
                        || token.end < token.start
                        || token.start < stretch.start
                        || token.end > stretch.end
                    {
                        return Err(unplaced(format!(
                            "{here}: expected from_s ≤ to_s inside the stretch [{}, {}], found {} to {}",
                            stretch.start, stretch.end, token.start, token.end
                        )));
                    }
                    if !(0.0..=1.0).contains(&token.confidence) {
                        return Err(unplaced(format!(
                            "{here}: expected a certainty in [0, 1], found {}",
                            token.confidence
                        )));
                    }
                }
            }
        }
        Ok(document)
    }

    /// The latest time (seconds) any stretch or token of `item` reaches.
    pub fn last_time(item: &ItemTranscript) -> f64 {
        item.segments
            .iter()
            .map(|s| s.words.iter().map(|w| w.end).fold(s.end, f64::max))
            .fold(0.0, f64::max)
    }
}

/// A problem of a transcript document: the line and column of the JSON text where it is, when
/// it is placed there, and what was expected and found.
type PlacedProblem = (Option<(usize, usize)>, String);

fn unplaced(message: String) -> PlacedProblem {
    (None, message)
}

/// A JSON parser error placed at its line and column, its message without the position (which
/// the parser appends) so that the position is said once.
fn json_problem(what: &str, error: &serde_json::Error) -> PlacedProblem {
    let message = error.to_string();
    let position = format!(" at line {} column {}", error.line(), error.column());
    let message = message.strip_suffix(&position).unwrap_or(&message);
    (
        Some((error.line(), error.column())),
        format!("{what}: {message}"),
    )
}

impl ItemTranscript {
    /// All words of all segments joined by spaces.
    pub fn text(&self) -> String {
        let parts: Vec<&str> = self
            .segments
            .iter()
            .map(|s| s.text.as_str())
            .filter(|t| !t.is_empty())
            .collect();
        parts.join(" ")
    }
}

/// Output file formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutputFormat {
    /// `id<TAB>text` with a header, the hypotheses format.
    Tsv,
    /// The transcript JSON document ([`TranscriptDocument`]): items, stretches, timed tokens.
    Json,
    /// WebVTT cues.
    Vtt,
    /// Plain text, one line per segment.
    Txt,
}

/// Writes `items` in `format`. For WebVTT several items are written one after the other only
/// if that keeps cue times increasing; callers write one file per recording.
pub fn write_items(
    out: &mut impl Write,
    items: &[ItemTranscript],
    format: OutputFormat,
) -> io::Result<()> {
    match format {
        OutputFormat::Tsv => {
            writeln!(out, "id\ttext")?;
            for item in items {
                writeln!(out, "{}\t{}", one_line(&item.id), one_line(&item.text()))?;
            }
        }
        OutputFormat::Json => {
            let document = TranscriptDocument::new(items.to_vec());
            serde_json::to_writer_pretty(&mut *out, &document).map_err(io::Error::other)?;
            writeln!(out)?;
        }
        OutputFormat::Txt => {
            for item in items {
                for segment in item.segments.iter().filter(|s| !s.text.is_empty()) {
                    writeln!(out, "{}", one_line(&segment.text))?;
                }
            }
        }
        OutputFormat::Vtt => {
            let segments: Vec<&TimedSegment> = items.iter().flat_map(|i| &i.segments).collect();
            write_webvtt(out, segments, &CueLimits::default())?;
        }
    }
    Ok(())
}

fn one_line(text: &str) -> String {
    text.replace(['\t', '\n', '\r'], " ")
}

/// How long a subtitle cue may get before it is split at a word.
#[derive(Debug, Clone, PartialEq)]
pub struct CueLimits {
    /// Longest cue, seconds.
    pub max_seconds: f64,
    /// Most words in a cue.
    pub max_words: usize,
}

impl Default for CueLimits {
    fn default() -> Self {
        CueLimits {
            max_seconds: 6.0,
            max_words: 14,
        }
    }
}

/// Writes a WebVTT file: the `WEBVTT` header, then one cue per group of words (split by
/// `limits`), timed from the first word's start to the last word's end. Cue start times never
/// decrease and every cue ends after it starts, as the W3C WebVTT syntax requires.
pub fn write_webvtt<'a>(
    out: &mut impl Write,
    segments: impl IntoIterator<Item = &'a TimedSegment>,
    limits: &CueLimits,
) -> io::Result<()> {
    write!(out, "WEBVTT\n\n")?;
    let mut last_start = 0.0f64;
    let mut cue_number = 0;
    for segment in segments {
        let mut group: Vec<&TimedWord> = Vec::new();
        let mut groups = Vec::new();
        for word in &segment.words {
            if let Some(first) = group.first() {
                if group.len() >= limits.max_words || word.end - first.start > limits.max_seconds {
                    groups.push(std::mem::take(&mut group));
                }
            }
            group.push(word);
        }
        if !group.is_empty() {
            groups.push(group);
        }
        for group in groups {
            let start = group[0].start.max(last_start);
            // a cue must end after it starts; one millisecond is the format's resolution
            let end = group[group.len() - 1].end.max(start + 0.001);
            last_start = start;
            cue_number += 1;
            let text: Vec<String> = group.iter().map(|w| escape_cue_text(&w.word)).collect();
            write!(
                out,
                "{cue_number}\n{} --> {}\n{}\n\n",
                vtt_timestamp(start),
                vtt_timestamp(end),
                text.join(" ")
            )?;
        }
    }
    Ok(())
}

/// `HH:MM:SS.mmm` (hours take more digits past 99), rounded to the millisecond.
pub fn vtt_timestamp(seconds: f64) -> String {
    let millis = (seconds.max(0.0) * 1000.0).round() as u64;
    let (h, rest) = (millis / 3_600_000, millis % 3_600_000);
    let (m, rest) = (rest / 60_000, rest % 60_000);
    let (s, ms) = (rest / 1000, rest % 1000);
    format!("{h:02}:{m:02}:{s:02}.{ms:03}")
}

/// Cue text may not hold `&`, `<` or the arrow `-->`: escape the first two (which also breaks
/// any arrow) and flatten line breaks, which would end the cue.
fn escape_cue_text(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace(['\n', '\r'], " ")
}

#[cfg(test)]
pub(crate) mod webvtt_validator {
    //! A checker for the parts of the W3C WebVTT specification ("WebVTT: The Web Video Text
    //! Tracks Format", W3C Candidate Recommendation, section 4 "Syntax") that our writer
    //! touches: the file signature, block separation, cue timings and their timestamp syntax,
    //! cue order, and cue payload restrictions. Written from the spec's prose, not from any
    //! other implementation.

    /// Parses a WebVTT timestamp: `(hours ":")? minutes ":" seconds "." thousandths`, hours at
    /// least two digits, minutes and seconds exactly two digits in 00–59, three fraction digits
    /// (spec 4.5 "WebVTT timestamp").
    pub fn timestamp(text: &str) -> Result<f64, String> {
        let parts: Vec<&str> = text.split(':').collect();
        let (hours, minutes, rest) = match parts.as_slice() {
            [m, r] => ("0", *m, *r),
            [h, m, r] if h.len() >= 2 => (*h, *m, *r),
            _ => return Err(format!("{text:?}: expected [hh:]mm:ss.ttt")),
        };
        let digits = |s: &str| !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit());
        let (seconds, fraction) = rest
            .split_once('.')
            .ok_or_else(|| format!("{text:?}: no '.' before the milliseconds"))?;
        if !digits(hours)
            || minutes.len() != 2
            || !digits(minutes)
            || seconds.len() != 2
            || !digits(seconds)
            || fraction.len() != 3
            || !digits(fraction)
        {
            return Err(format!("{text:?}: wrong digit counts"));
        }
        let (h, m, s, f): (f64, f64, f64, f64) = (
            hours.parse().map_err(|_| text.to_string())?,
            minutes.parse().map_err(|_| text.to_string())?,
            seconds.parse().map_err(|_| text.to_string())?,
            fraction.parse().map_err(|_| text.to_string())?,
        );
        if m > 59.0 || s > 59.0 {
            return Err(format!("{text:?}: minutes and seconds must be 00–59"));
        }
        Ok(h * 3600.0 + m * 60.0 + s + f / 1000.0)
    }

    /// Checks a whole file; returns the cues as `(start, end, payload)`.
    pub fn validate(file: &str) -> Result<Vec<(f64, f64, String)>, String> {
        // 4.1: optional BOM, "WEBVTT", then space, tab or a line terminator (or the end).
        let body = file.strip_prefix('\u{feff}').unwrap_or(file);
        let after = body
            .strip_prefix("WEBVTT")
            .ok_or("file does not start with WEBVTT")?;
        if !(after.is_empty() || after.starts_with([' ', '\t', '\n', '\r'])) {
            return Err("WEBVTT must be followed by a space, tab or line break".into());
        }
        let normalized = body.replace("\r\n", "\n").replace('\r', "\n");
        let mut blocks = normalized
            .split("\n\n")
            .filter(|b| !b.trim_matches('\n').is_empty());
        let header = blocks.next().ok_or("empty file")?;
        if header.contains("-->") {
            return Err(
                "the header block must be separated from the first cue by a blank line".into(),
            );
        }
        let mut cues = Vec::new();
        let mut last_start = f64::NEG_INFINITY;
        for block in blocks {
            let lines: Vec<&str> = block.trim_matches('\n').split('\n').collect();
            if lines[0].starts_with("NOTE") || lines[0] == "STYLE" || lines[0] == "REGION" {
                continue;
            }
            // 4.4: optional identifier (no "-->"), then the timings line.
            let (timing, payload) = if lines[0].contains("-->") {
                (lines[0], &lines[1..])
            } else {
                (
                    *lines
                        .get(1)
                        .ok_or(format!("cue {:?} has no timings", lines[0]))?,
                    &lines[2..],
                )
            };
            let (start, rest) = timing
                .split_once(" --> ")
                .ok_or(format!("{timing:?}: expected 'start --> end'"))?;
            let end = rest.split([' ', '\t']).next().unwrap_or("");
            let (start, end) = (timestamp(start.trim_end())?, timestamp(end)?);
            // 4.4: end strictly after start; start not before any earlier cue's start.
            if end <= start {
                return Err(format!("{timing:?}: end is not after start"));
            }
            if start < last_start {
                return Err(format!("{timing:?}: starts before the previous cue"));
            }
            last_start = start;
            for line in payload {
                if line.contains("-->") {
                    return Err(format!("cue text {line:?} contains -->"));
                }
            }
            let text = payload.join("\n");
            if text.contains('<')
                || text
                    .replace("&amp;", "")
                    .replace("&lt;", "")
                    .replace("&gt;", "")
                    .contains('&')
            {
                return Err(format!("cue text {text:?} has an unescaped & or <"));
            }
            cues.push((start, end, text));
        }
        Ok(cues)
    }
}

#[cfg(test)]
mod tests {
    use super::webvtt_validator::{timestamp, validate};
    use super::*;

    fn word(w: &str, start: f64, end: f64) -> TimedWord {
        TimedWord {
            word: w.into(),
            start,
            end,
            confidence: 0.9,
        }
    }

    #[test]
    fn timestamps_follow_the_webvtt_syntax() {
        assert_eq!(vtt_timestamp(0.0), "00:00:00.000");
        assert_eq!(vtt_timestamp(3723.4567), "01:02:03.457");
        assert_eq!(vtt_timestamp(100.0 * 3600.0), "100:00:00.000");
        // values from the W3C WebVTT spec's examples: "00:00:11.000", "00:01:14.815" (4.1 example)
        assert_eq!(timestamp("00:01:14.815").unwrap(), 74.815);
        assert_eq!(timestamp("01:14.815").unwrap(), 74.815);
        for bad in [
            "1:14.815",
            "00:60:00.000",
            "00:00:00,000",
            "00:00:00.00",
            "0:00:00.000",
        ] {
            assert!(timestamp(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn the_validator_rejects_what_the_spec_forbids() {
        assert!(validate("WEBVTT\n\n00:01.000 --> 00:02.000\nhi\n").is_ok());
        assert!(validate("WEBVTTX\n\n").is_err());
        assert!(validate("WEBVT\n\n").is_err());
        assert!(validate("WEBVTT\n\n00:02.000 --> 00:01.000\nhi\n").is_err());
        assert!(
            validate("WEBVTT\n\n00:03.000 --> 00:04.000\na\n\n00:01.000 --> 00:02.000\nb\n")
                .is_err()
        );
        assert!(validate("WEBVTT\n\n00:01.000 --> 00:02.000\na --> b\n").is_err());
        assert!(validate("WEBVTT\n\n00:01.000 --> 00:02.000\na < b\n").is_err());
    }

    #[test]
    fn written_webvtt_validates_and_keeps_every_word() {
        let segments = vec![
            TimedSegment {
                start: 0.5,
                end: 9.0,
                text: String::new(),
                words: (0..20)
                    .map(|i| word(&format!("w{i}"), 0.5 + i as f64 * 0.4, 0.8 + i as f64 * 0.4))
                    .collect(),
            },
            TimedSegment {
                start: 3725.0,
                end: 3726.0,
                text: String::new(),
                // zero-length word and characters that need escaping
                words: vec![word("R&D", 3725.1, 3725.1), word("<b>", 3725.2, 3725.5)],
            },
            TimedSegment {
                start: 3727.0,
                end: 3728.0,
                text: String::new(),
                words: vec![],
            },
        ];
        let mut out = Vec::new();
        write_webvtt(&mut out, &segments, &CueLimits::default()).unwrap();
        let text = String::from_utf8(out).unwrap();
        let cues = validate(&text).unwrap_or_else(|e| panic!("{e}\n{text}"));
        let words: usize = cues.iter().map(|c| c.2.split(' ').count()).sum();
        assert_eq!(words, 22);
        assert!(cues.iter().all(|c| c.1 - c.0 <= 6.0 + 1e-9));
        assert_eq!(cues.last().unwrap().2, "R&amp;D &lt;b&gt;");
        assert!(text.contains("01:02:05.100 --> 01:02:05.500"));
    }

    #[test]
    fn tsv_and_txt_are_one_line_per_item_or_segment() {
        let item = ItemTranscript {
            id: "int-01".into(),
            audio: "a.wav".into(),
            segments: vec![
                TimedSegment {
                    start: 0.0,
                    end: 1.0,
                    text: "guten tag".into(),
                    words: vec![],
                },
                TimedSegment {
                    start: 1.0,
                    end: 2.0,
                    text: String::new(),
                    words: vec![],
                },
                TimedSegment {
                    start: 2.0,
                    end: 3.0,
                    text: "servus".into(),
                    words: vec![],
                },
            ],
        };
        let mut out = Vec::new();
        write_items(&mut out, std::slice::from_ref(&item), OutputFormat::Tsv).unwrap();
        assert_eq!(
            String::from_utf8(out).unwrap(),
            "id\ttext\nint-01\tguten tag servus\n"
        );
        let mut out = Vec::new();
        write_items(&mut out, std::slice::from_ref(&item), OutputFormat::Txt).unwrap();
        assert_eq!(String::from_utf8(out).unwrap(), "guten tag\nservus\n");
        let mut out = Vec::new();
        write_items(&mut out, std::slice::from_ref(&item), OutputFormat::Json).unwrap();
        let back: TranscriptDocument = serde_json::from_slice(&out).unwrap();
        assert_eq!(back, TranscriptDocument::new(vec![item]));
    }

    #[test]
    fn json_uses_the_documented_keys() {
        let item = ItemTranscript {
            id: "int-01".into(),
            audio: "a.wav".into(),
            segments: vec![TimedSegment {
                start: 0.5,
                end: 2.0,
                text: "guten tag".into(),
                words: vec![word("guten", 0.6, 0.9), word("tag", 1.0, 1.4)],
            }],
        };
        let mut out = Vec::new();
        write_items(&mut out, &[item], OutputFormat::Json).unwrap();
        let value: serde_json::Value = serde_json::from_slice(&out).unwrap();
        assert_eq!(value["format"], "isogloss-transcript");
        assert_eq!(value["version"], 1);
        let stretch = &value["items"][0]["stretches"][0];
        assert_eq!(
            (stretch["from_s"].as_f64(), stretch["to_s"].as_f64()),
            (Some(0.5), Some(2.0))
        );
        let token = &stretch["tokens"][1];
        assert_eq!(token["spelling"], "tag");
        assert_eq!(
            (token["from_s"].as_f64(), token["to_s"].as_f64()),
            (Some(1.0), Some(1.4))
        );
        assert!(token["certainty"].is_number());
    }

    #[test]
    fn other_json_and_impossible_times_are_refused_with_their_place() {
        let not_json = TranscriptDocument::parse("{\n  \"items\": [,]\n}").unwrap_err();
        assert!(
            not_json.starts_with("line 2, column 13: not JSON: expected value")
                && !not_json.contains(" at line "),
            "{not_json}"
        );
        let other = TranscriptDocument::parse(r#"{"segments": []}"#).unwrap_err();
        assert!(
            other.contains("not an isogloss transcript") && other.contains("no \"format\" key"),
            "{other}"
        );
        let newer = TranscriptDocument::parse(
            r#"{"format": "isogloss-transcript", "version": 9, "items": []}"#,
        )
        .unwrap_err();
        assert!(newer.contains("found 9"), "{newer}");
        let outside = r#"{"format": "isogloss-transcript", "version": 1, "items": [{"id": "a",
            "audio": "a.wav", "stretches": [{"from_s": 1.0, "to_s": 2.0, "text": "x",
            "tokens": [{"spelling": "x", "from_s": 1.5, "to_s": 2.5, "certainty": 0.5}]}]}]}"#;
        let outside = TranscriptDocument::parse(outside).unwrap_err();
        assert!(
            outside.starts_with("item `a`, stretch 1, token 1 (`x`)") && outside.contains("2.5"),
            "{outside}"
        );
    }

    /// The example in `docs/formats.md` is a document this crate reads.
    #[test]
    fn the_documented_example_reads() {
        let docs = include_str!("../../../docs/formats.md");
        let start = docs
            .find("```json\n{\n  \"format\": \"isogloss-transcript\"")
            .expect("docs/formats.md shows a transcript JSON example")
            + "```json\n".len();
        let end = start + docs[start..].find("```").unwrap();
        let document = TranscriptDocument::parse(&docs[start..end]).unwrap();
        assert_eq!(document.format, TRANSCRIPT_FORMAT);
        assert!(!document.items[0].segments[0].words.is_empty());
    }
}
