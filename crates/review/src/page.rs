//! The HTML of a recording's page and of the index. The script and styles are ours and inlined
//! (`page.js`, `page.css`); the transcript is embedded as compact JSON that the script turns
//! into word elements on load.

use std::fmt::Write as _;

use serde::Serialize;

use crate::{Recording, ReviewOptions};

const SCRIPT: &str = include_str!("page.js");
const STYLE: &str = include_str!("page.css");

/// Confidence levels of the colour scale, in percent: a word at or above the first is shown
/// plain, each lower band darker.
const LEVELS: [u8; 3] = [90, 70, 50];

/// Where the page finds its audio.
#[derive(Debug, Clone, PartialEq)]
pub struct PageAudio {
    /// The file the player loads first, relative to the page.
    pub href: String,
    /// A converted WAV copy, relative to the page, when one was written.
    pub converted: Option<String>,
    /// Shown above the transcript from the start (e.g. why the converted copy plays).
    pub note: Option<String>,
}

#[derive(Serialize)]
struct PageData<'a> {
    name: &'a str,
    key: String,
    source: &'a str,
    audio: &'a str,
    converted: Option<&'a str>,
    note: Option<&'a str>,
    column: &'a str,
    levels: [u8; 3],
    low: u8,
    stretches: Vec<StretchData<'a>>,
}

/// One stretch: times in milliseconds, `t` the words' start and end times interleaved, `c` the
/// words' confidences in percent.
#[derive(Serialize)]
struct StretchData<'a> {
    id: &'a str,
    from: u64,
    to: u64,
    speaker: &'a str,
    dialect: &'a str,
    w: Vec<&'a str>,
    t: Vec<u64>,
    c: Vec<u8>,
}

fn millis(seconds: f64) -> u64 {
    (seconds.max(0.0) * 1000.0).round() as u64
}

fn percent(p: f64) -> u8 {
    (p * 100.0).round().clamp(0.0, 100.0) as u8
}

/// FNV-1a (64 bit) over the words and their times: the page's storage key changes when the
/// transcript does, so corrections are never applied to another transcript's words.
fn fingerprint(stretches: &[StretchData]) -> String {
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |bytes: &[u8]| {
        for &b in bytes {
            hash ^= b as u64;
            hash = hash.wrapping_mul(0x0100_0000_01b3);
        }
    };
    for s in stretches {
        eat(s.id.as_bytes());
        for (w, t) in s.w.iter().zip(s.t.chunks(2)) {
            eat(w.as_bytes());
            eat(&t[0].to_le_bytes());
            eat(&t[1].to_le_bytes());
        }
        eat(&[0xff]);
    }
    format!("{hash:016x}")
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// JSON that may sit inside a `<script>` element: `<` (which could close it), and the line
/// separators U+2028/U+2029, written as escapes.
fn script_json(value: &impl Serialize) -> String {
    serde_json::to_string(value)
        .expect("page data serializes")
        .replace('<', "\\u003c")
        .replace('\u{2028}', "\\u2028")
        .replace('\u{2029}', "\\u2029")
}

/// The page of one recording.
pub fn render_page(recording: &Recording, audio: &PageAudio, options: &ReviewOptions) -> String {
    let stretches: Vec<StretchData> = recording
        .stretches
        .iter()
        .map(|s| StretchData {
            id: &s.id,
            from: millis(s.segment.start),
            to: millis(s.segment.end),
            speaker: &s.speaker,
            dialect: &s.dialect,
            w: s.segment.words.iter().map(|w| w.word.as_str()).collect(),
            t: s.segment
                .words
                .iter()
                .flat_map(|w| [millis(w.start), millis(w.end)])
                .collect(),
            c: s.segment
                .words
                .iter()
                .map(|w| percent(options.calibration.apply(w.confidence)))
                .collect(),
        })
        .collect();
    let key = format!("{}:{}", recording.name, fingerprint(&stretches));
    let data = PageData {
        name: &recording.name,
        key,
        source: &recording.source,
        audio: &audio.href,
        converted: audio.converted.as_deref(),
        note: audio.note.as_deref(),
        column: &options.column,
        levels: LEVELS,
        low: percent(options.low_confidence),
        stretches,
    };
    let scale = if options.calibration.is_identity() {
        "certainty".to_string()
    } else {
        format!(
            "confidence (calibrated, {})",
            options.calibration.describe()
        )
    };
    let band = |i: usize| {
        let hi = if i == 0 { 100 } else { LEVELS[i - 1] };
        if i == 0 {
            format!("≥ {:.2}", LEVELS[0] as f64 / 100.0)
        } else if i == LEVELS.len() {
            format!("< {:.2}", LEVELS[i - 1] as f64 / 100.0)
        } else {
            format!("{:.2}–{:.2}", LEVELS[i] as f64 / 100.0, hi as f64 / 100.0)
        }
    };
    let mut legend = format!("<span>{scale}:</span>");
    for i in 0..=LEVELS.len() {
        let _ = write!(legend, r#"<span class="w l{i}">{}</span>"#, band(i));
    }
    legend.push_str(r#"<span class="w ed">corrected</span><span class="w ed del">deleted</span>"#);
    let title = escape(&recording.name);
    format!(
        r#"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Review: {title}</title>
<style>
{STYLE}</style>
</head>
<body>
<header>
<h1>{title} <small>{source}</small></h1>
<div class="bar"><audio id="player" controls preload="metadata"></audio>
<button id="export-tsv" title="the corrected transcript as manifest rows">Export TSV</button>
<button id="export-vtt" title="the corrected transcript as subtitles">Export WebVTT</button>
<button id="show-help" title="keyboard shortcuts (?)">Keys</button>
<button id="forget" title="remove this page's corrections from this browser">Forget corrections</button></div>
<div class="legend">{legend}</div>
<div id="help" hidden>Outside a text field: <kbd>Space</kbd> play or pause · click a word to play from it · <kbd>←</kbd> <kbd>→</kbd> previous or next word · <kbd>n</kbd> next and <kbd>N</kbd> previous word below {low:.2} · <kbd>r</kbd> replay the stretch · <kbd>Enter</kbd> or <kbd>e</kbd> (or a double click) correct the word. While correcting: <kbd>Enter</kbd> keep, <kbd>Esc</kbd> undo, <kbd>Tab</kbd> keep and correct the next word, <kbd>Ctrl</kbd>+<kbd>Space</kbd> play or pause. An empty correction deletes the word; type several words to insert.</div>
<p id="audio-notice" class="notice" hidden></p>
<p id="storage-notice" class="notice" hidden></p>
<div id="status"></div>
</header>
<main id="transcript"></main>
<script type="application/json" id="isogloss-data">{json}</script>
<script>
{SCRIPT}</script>
</body>
</html>
"#,
        source = escape(&recording.source),
        low = options.low_confidence,
        json = script_json(&data),
    )
}

/// A line of the index page.
#[derive(Debug, Clone, PartialEq)]
pub struct IndexEntry {
    /// Page name.
    pub name: String,
    /// The audio as the transcript names it.
    pub source: String,
    /// Audio length, seconds.
    pub audio_seconds: f64,
    /// Words.
    pub words: usize,
    /// Words below the low-confidence threshold.
    pub low_words: usize,
    /// Why no page was written, for a recording that failed.
    pub problem: Option<String>,
}

/// The index page: every recording with its length, words and share of low-confidence words
/// (the worst first is a sensible order of work), how many corrections this browser holds for
/// it, and the recordings that failed with the reason.
pub fn render_index(entries: &[IndexEntry], options: &ReviewOptions) -> String {
    let mut rows = String::new();
    let mut order: Vec<&IndexEntry> = entries.iter().collect();
    let share = |e: &IndexEntry| e.low_words as f64 / e.words.max(1) as f64;
    order.sort_by(|a, b| {
        (a.problem.is_none())
            .cmp(&b.problem.is_none())
            .then(share(b).total_cmp(&share(a)))
    });
    for e in order {
        match &e.problem {
            Some(problem) => {
                let _ = writeln!(
                    rows,
                    r#"<tr class="failed"><td>{}</td><td colspan="4">no page: {}</td></tr>"#,
                    escape(&e.name),
                    escape(problem)
                );
            }
            None => {
                let minutes = e.audio_seconds / 60.0;
                let _ = writeln!(
                    rows,
                    r#"<tr><td><a href="{href}.html">{name}</a><br><small>{source}</small></td><td>{minutes:.1}</td><td>{words}</td><td>{low:.1} %</td><td class="edits" data-name="{name}">–</td></tr>"#,
                    href = escape(&e.name),
                    name = escape(&e.name),
                    source = escape(&e.source),
                    words = e.words,
                    low = 100.0 * share(e),
                );
            }
        }
    }
    format!(
        r#"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>Review: recordings</title>
<style>
body {{ font: 16px/1.5 system-ui, "DejaVu Sans", sans-serif; margin: 1.5rem; color: #1d1d1d; }}
table {{ border-collapse: collapse; }}
th, td {{ border-bottom: 1px solid #d8d8d8; padding: 0.3rem 0.8rem; text-align: left; vertical-align: top; }}
td:nth-child(n+2) {{ text-align: right; font-variant-numeric: tabular-nums; }}
tr.failed td {{ color: #8a2b00; text-align: left; }}
small {{ color: #5b5b5b; }}
</style>
</head>
<body>
<h1>Recordings to review</h1>
<p>Worst first: the share of words below {low:.2} {scale}. Corrections are kept in this browser until exported from each page.</p>
<table>
<tr><th>recording</th><th>minutes</th><th>words</th><th>below {low:.2}</th><th>corrections here</th></tr>
{rows}</table>
<script>
(function () {{
  "use strict";
  var counts = {{}};
  try {{
    for (var i = 0; i < window.localStorage.length; i++) {{
      var key = window.localStorage.key(i);
      if (key.indexOf("isogloss-review:") !== 0) continue;
      var name = key.slice(16, key.lastIndexOf(":"));
      var kept = JSON.parse(window.localStorage.getItem(key));
      counts[name] = (counts[name] || 0) + Object.keys(kept.words || {{}}).length;
    }}
  }} catch (e) {{
    return;
  }}
  document.querySelectorAll("td.edits").forEach(function (cell) {{
    var n = counts[cell.getAttribute("data-name")];
    cell.textContent = n ? String(n) : "0";
  }});
}})();
</script>
</body>
</html>
"#,
        low = options.low_confidence,
        scale = if options.calibration.is_identity() {
            "certainty"
        } else {
            "calibrated confidence"
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::Stretch;
    use isogloss_decoder::output::{TimedSegment, TimedWord};

    fn recording(words: &[(&str, f64, f64, f32)]) -> Recording {
        Recording {
            name: "rec".into(),
            audio: "rec.wav".into(),
            source: "in/rec.wav".into(),
            stretches: vec![Stretch {
                id: "rec-001".into(),
                segment: TimedSegment {
                    start: 0.0,
                    end: 10.0,
                    text: String::new(),
                    words: words
                        .iter()
                        .map(|&(w, s, e, c)| TimedWord {
                            word: w.into(),
                            start: s,
                            end: e,
                            confidence: c,
                        })
                        .collect(),
                },
                speaker: "A".into(),
                dialect: String::new(),
            }],
        }
    }

    fn audio() -> PageAudio {
        PageAudio {
            href: "audio/rec.wav".into(),
            converted: None,
            note: None,
        }
    }

    #[test]
    fn words_that_look_like_markup_cannot_break_out_of_the_data() {
        let page = render_page(
            &recording(&[
                ("</script><b>", 1.0, 1.5, 0.5),
                ("a\u{2028}b", 2.0, 2.5, 0.9),
            ]),
            &audio(),
            &ReviewOptions::default(),
        );
        assert_eq!(
            page.matches("</script>").count(),
            2,
            "only our two scripts close"
        );
        assert!(page.contains(r#""\u003c/script>\u003cb>""#));
        assert!(page.contains("a\\u2028b"));
    }

    #[test]
    fn times_in_milliseconds_and_certainties_in_percent_after_calibration() {
        let words = [("x", 1.2345, 1.5, 0.9f32)];
        let plain = render_page(&recording(&words), &audio(), &ReviewOptions::default());
        assert!(plain.contains(r#""t":[1235,1500],"c":[90]"#), "{plain}");
        let softer = ReviewOptions {
            calibration: isogloss_confidence::Calibration::new(2.0, 0.0).unwrap(),
            ..ReviewOptions::default()
        };
        let page = render_page(&recording(&words), &audio(), &softer);
        // σ(logit(0.9) / 2) = 3 / (3 + 1) = 0.75
        assert!(page.contains(r#""c":[75]"#));
        assert!(page.contains("calibrated, T = 2.00"));
    }

    #[test]
    fn the_storage_key_follows_the_transcript() {
        let a = render_page(
            &recording(&[("x", 1.0, 1.5, 0.9)]),
            &audio(),
            &ReviewOptions::default(),
        );
        let b = render_page(
            &recording(&[("y", 1.0, 1.5, 0.9)]),
            &audio(),
            &ReviewOptions::default(),
        );
        let key = |page: &str| page.split("\"key\":\"").nth(1).unwrap()[..20].to_string();
        assert_ne!(key(&a), key(&b));
        assert!(key(&a).starts_with("rec:"));
    }

    #[test]
    fn the_page_fetches_nothing() {
        let page = render_page(
            &recording(&[("x", 1.0, 1.5, 0.9)]),
            &audio(),
            &ReviewOptions::default(),
        );
        for outside in ["http://", "https://", "<link", "src=\"", "@import", "url("] {
            assert!(!page.contains(outside), "{outside}");
        }
    }
}
