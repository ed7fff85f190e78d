//! The review page in a real browser (headless Chromium over the DevTools protocol): it loads
//! from `file://` without console errors, a click on a word puts the player at the word's
//! start, a correction and a stretch label survive a reload, the export is the corrected
//! transcript, the keyboard reaches the next low-certainty word, and audio the browser cannot
//! play falls back to the converted copy with a notice; and two open copies of one page take in
//! each other's corrections instead of overwriting them.
//!
//! Chromium is required: without it the test fails and says how to get it, unless
//! `ISOGLOSS_SKIP_BROWSER_TESTS=1` is set (for a local run without a browser; CI installs
//! Debian's `chromium`).

#[path = "support/cdp.rs"]
// shared by the browser test, the benchmark and the screenshot example; each uses a part
#[allow(dead_code)]
mod cdp;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use isogloss_decoder::output::{ItemTranscript, TimedSegment, TimedWord, TranscriptDocument};
use isogloss_review::{recordings, write_review, ConvertAudio, ReviewOptions};

fn chromium_or_skip() -> Option<PathBuf> {
    match cdp::find_chromium() {
        Some(path) => Some(path),
        None if std::env::var_os("ISOGLOSS_SKIP_BROWSER_TESTS").is_some() => {
            eprintln!("ISOGLOSS_SKIP_BROWSER_TESTS is set and no Chromium was found: the review page browser test is skipped");
            None
        }
        None => panic!(
            "the review page browser test needs headless Chromium: install Debian's `chromium` package \
             (`apt-get install chromium`; .ci/run does), or point ISOGLOSS_CHROMIUM at a Chromium binary; \
             set ISOGLOSS_SKIP_BROWSER_TESTS=1 to skip this test on a machine without one"
        ),
    }
}

/// Eight seconds of a quiet 220 Hz tone, 16 kHz 16-bit mono.
fn write_wav(path: &Path) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 16_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut writer = hound::WavWriter::create(path, spec).unwrap();
    for n in 0..8 * 16_000 {
        let x = (2.0 * std::f64::consts::PI * 220.0 * n as f64 / 16_000.0).sin() * 3000.0;
        writer.write_sample(x as i16).unwrap();
    }
    writer.finalize().unwrap();
}

fn word(text: &str, start: f64, end: f64, certainty: f32) -> TimedWord {
    TimedWord {
        word: text.into(),
        start,
        end,
        confidence: certainty,
    }
}

fn transcript(audio: &str) -> TranscriptDocument {
    let stretch = |start: f64, end: f64, words: Vec<TimedWord>| TimedSegment {
        start,
        end,
        text: words
            .iter()
            .map(|w| w.word.clone())
            .collect::<Vec<_>>()
            .join(" "),
        words,
    };
    TranscriptDocument::new(vec![ItemTranscript {
        id: "talk".into(),
        audio: audio.into(),
        segments: vec![
            stretch(
                0.5,
                3.0,
                vec![
                    word("we", 0.61, 0.74, 0.98),
                    word("went", 0.77, 1.02, 0.91),
                    word("doon", 1.25, 1.6, 0.42),
                    word("tae", 1.7, 1.9, 0.95),
                ],
            ),
            stretch(
                4.0,
                6.5,
                vec![
                    word("the", 4.2, 4.4, 0.97),
                    word("river", 4.5, 5.0, 0.55),
                    word("<&>", 5.2, 5.6, 0.8),
                ],
            ),
        ],
    }])
}

fn file_url(path: &Path) -> String {
    format!("file://{}", path.canonicalize().unwrap().display())
}

/// The review folder of the test transcript (with a converted copy of the audio) in `dir`.
fn review_folder(dir: &Path) -> PathBuf {
    let audio = dir.join("talk.wav");
    write_wav(&audio);
    let document = transcript("recordings/talk.wav");
    let labels: HashMap<String, (String, String)> =
        [("talk".to_string(), (String::new(), "fells".to_string()))].into();
    let recs = recordings(&document, |_| audio.clone(), &labels);
    let out = dir.join("review");
    let options = ReviewOptions {
        column: "dialectal".into(),
        convert: ConvertAudio::Always,
        ..ReviewOptions::default()
    };
    let report = write_review(&out, &recs, &options).unwrap();
    assert!(report.failed.is_empty());
    out
}

/// Double-clicks word `k` of the current page, types `text` over it and presses Enter.
fn correct(browser: &mut cdp::Browser, k: usize, text: &str) {
    browser.click(&format!("span[data-k=\"{k}\"]"), 2);
    browser.wait_until("document.activeElement && document.activeElement.className === 'edit'");
    browser.type_text(text);
    browser.press("Enter", "Enter", 13);
}

#[test]
fn two_open_copies_of_a_page_keep_each_others_corrections() {
    let Some(chromium) = chromium_or_skip() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let out = review_folder(dir.path());
    let url = file_url(&out.join("talk.html"));
    let mut browser = cdp::Browser::start(&chromium, 1100, 800);
    browser.open_new_page(&url);
    browser.wait_until("typeof window.isoglossReview === 'object'");
    let other = browser.open_other_page(&url);
    let text_of = |k: usize| format!("document.querySelector('span[data-k=\"{k}\"]').textContent");

    // a correction in the first copy reaches the second one, open since before it was made
    correct(&mut browser, 2, "down");
    browser.in_page(&other, |page| {
        page.wait_until("typeof window.isoglossReview === 'object'");
        page.wait_until(&format!("{} === 'down'", text_of(2)));
        // the second copy corrects another word and labels a stretch; its save must not wipe
        // out the first copy's correction
        correct(page, 5, "rover");
        page.click("input.lab[data-s=\"1\"][data-f=\"speaker\"]", 1);
        page.type_text("Mrs Hale");
        page.press("Escape", "Escape", 27);
    });
    browser.wait_until(&format!("{} === 'rover'", text_of(5)));
    browser.wait_until(
        "document.querySelector('input.lab[data-s=\"1\"][data-f=\"speaker\"]').value === 'Mrs Hale'",
    );
    assert_eq!(browser.eval(&text_of(2)), "down");

    // what is stored is the union: a fresh load of the page shows both corrections
    browser.reload_until(&format!(
        "typeof window.isoglossReview === 'object' && {} === 'down' && {} === 'rover'",
        text_of(2),
        text_of(5)
    ));
    let expected = "id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\n\
                    talk-001\trecordings/talk.wav\t0.500\t3.000\t\tfells\twe went down tae\n\
                    talk-002\trecordings/talk.wav\t4.000\t6.500\tMrs Hale\tfells\tthe rover <&>\n";
    assert_eq!(browser.eval("isoglossReview.exportTsv()"), expected);
    browser.in_page(&other, |page| {
        assert_eq!(page.eval("isoglossReview.exportTsv()"), expected);
    });
    let errors = browser.errors();
    assert!(errors.is_empty(), "console errors: {errors:#?}");
}

#[test]
fn the_review_page_works_in_headless_chromium() {
    let Some(chromium) = chromium_or_skip() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let out = review_folder(dir.path());

    let mut browser = cdp::Browser::start(&chromium, 1100, 800);
    browser.open_new_page(&file_url(&out.join("talk.html")));
    browser.wait_until("typeof window.isoglossReview === 'object'");
    browser.wait_until("document.getElementById('player').readyState >= 1");
    assert_eq!(browser.eval("isoglossReview.words"), 7);
    assert_eq!(
        browser.eval("document.querySelectorAll('span.w[data-k]').length"),
        7
    );
    assert!(browser
        .eval("document.getElementById('player').src")
        .as_str()
        .unwrap()
        .ends_with("/review/audio/talk.wav"));
    assert_eq!(
        browser.eval("document.getElementById('audio-notice').hidden"),
        true
    );

    // a click on "doon" plays from its start, 1.25 s; read back at once, it may have played on
    // a little (read-back follows the HTML media element's "official playback position")
    browser.click("span[data-k=\"2\"]", 1);
    let at = browser
        .eval("(() => { const a = document.getElementById('player'); a.pause(); return a.currentTime; })()")
        .as_f64()
        .unwrap();
    assert!(
        (1.25..1.25 + 0.3).contains(&at),
        "currentTime {at} after clicking a word at 1.25 s"
    );

    // correct "doon" to "down", label the second stretch's speaker
    correct(&mut browser, 2, "down");
    assert_eq!(
        browser.eval("document.querySelector('span[data-k=\"2\"]').textContent"),
        "down"
    );
    browser.click("input.lab[data-s=\"1\"][data-f=\"speaker\"]", 1);
    browser.type_text("Mrs Hale");
    browser.press("Escape", "Escape", 27);

    // everything survives a reload. Chromium hands a page's local-storage writes to its storage
    // service asynchronously, and on a loaded machine a page reloaded at once can start before
    // they arrive: seen here with three busy loops on two cores, in about 1 run of 10, the
    // writes arriving more than a second late (the page is right to say they were saved: a later
    // reload shows them). So reload until the edit shows, within the client's timeout; an edit
    // that never reaches the storage still fails here.
    let reloads = browser.reload_until(
        "typeof window.isoglossReview === 'object' && \
         document.querySelector('span[data-k=\"2\"]').textContent === 'down'",
    );
    if reloads > 1 {
        eprintln!("the edit showed after {reloads} reloads");
    }
    assert_eq!(
        browser.eval("document.querySelector('span[data-k=\"2\"]').classList.contains('ed')"),
        true
    );
    assert_eq!(
        browser.eval("document.querySelector('input.lab[data-s=\"1\"][data-f=\"speaker\"]').value"),
        "Mrs Hale"
    );

    // the export is the corrected transcript, as manifest rows
    let expected = "id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\n\
                    talk-001\trecordings/talk.wav\t0.500\t3.000\t\tfells\twe went down tae\n\
                    talk-002\trecordings/talk.wav\t4.000\t6.500\tMrs Hale\tfells\tthe river <&>\n";
    assert_eq!(browser.eval("isoglossReview.exportTsv()"), expected);
    let vtt = browser.eval("isoglossReview.exportVtt()");
    assert_eq!(
        vtt,
        "WEBVTT\n\n1\n00:00:00.500 --> 00:00:03.000\nwe went down tae\n\n\
         2\n00:00:04.000 --> 00:00:06.500\n<v Mrs Hale>the river &lt;&amp;&gt;\n\n"
    );

    // keyboard: from "we", `n` goes to the next word below 0.70 ("down", 0.42), then "river"
    browser.click("span[data-k=\"0\"]", 1);
    browser.press("n", "KeyN", 78);
    assert_eq!(
        browser.eval("document.querySelector('span.sel').dataset.k"),
        "2"
    );
    browser.press("n", "KeyN", 78);
    assert_eq!(
        browser.eval("document.querySelector('span.sel').dataset.k"),
        "5"
    );
    browser.eval("document.getElementById('player').pause()");

    let errors = browser.errors();
    assert!(errors.is_empty(), "console errors: {errors:#?}");

    // audio the browser cannot play: the page says so and plays the converted copy
    std::fs::remove_file(out.join("audio/talk.wav")).unwrap();
    std::fs::write(
        out.join("audio/talk.wav"),
        b"RIFF\x10\0\0\0WAVEnot really audio",
    )
    .unwrap();
    browser.reload();
    browser.wait_until("!document.getElementById('audio-notice').hidden");
    browser.wait_until("document.getElementById('player').src.endsWith('/audio/talk-16k.wav')");
    browser.wait_until("document.getElementById('player').readyState >= 1");
    let notice = browser.eval("document.getElementById('audio-notice').textContent");
    assert!(
        notice
            .as_str()
            .unwrap()
            .contains("cannot play recordings/talk.wav"),
        "{notice}"
    );
}
