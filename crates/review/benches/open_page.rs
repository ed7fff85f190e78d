//! How long a one-hour recording's review page takes to open in headless Chromium, and how big
//! it is against the transcript JSON it was made from.
//!
//! A one-hour transcript is generated (seeded): stretches of 3–15 words between pauses, about
//! 2.6 words a second of speech, certainties spread over (0, 1]; the audio beside it is an hour
//! of silence (16 kHz, 16-bit WAV, as a converted copy would be). Each round starts a fresh
//! browser, opens the page from `file://`, and reads from the page's own clock (milliseconds
//! from the start of navigation): the moment the script has built every word (`isogloss-ready`),
//! the first frame with the words on screen (`isogloss-shown`: the page is usable), and the
//! load event (which also waits for the player to read the audio's header).
//!
//! ```sh
//! cargo bench -p isogloss-review --bench open_page -- [ROUNDS]
//! ```

#[path = "../tests/support/cdp.rs"]
// shared by the browser test, the benchmark and the screenshot example; each uses a part
#[allow(dead_code)]
mod cdp;

use isogloss_decoder::output::{ItemTranscript, TimedSegment, TimedWord, TranscriptDocument};
use isogloss_review::{render_page, PageAudio, Recording, ReviewOptions, Stretch};

/// A small seeded generator (64-bit LCG, Knuth's MMIX constants): the same transcript every run.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

fn one_hour() -> ItemTranscript {
    let mut rng = Lcg(18);
    let letters = b"aeioulnrstdmkgwhbp";
    let vocabulary: Vec<String> = (0..800)
        .map(|_| {
            let n = 2 + (rng.next() * 8.0) as usize;
            (0..n)
                .map(|_| letters[(rng.next() * letters.len() as f64) as usize] as char)
                .collect()
        })
        .collect();
    let mut segments = Vec::new();
    let mut t = 0.5;
    while t < 3590.0 {
        let start = t;
        let mut words = Vec::new();
        for _ in 0..3 + (rng.next() * 13.0) as usize {
            let from = t + 0.02 + rng.next() * 0.08;
            let to = from + 0.15 + rng.next() * 0.35;
            let certainty = (1.0 - rng.next().powi(3) * 0.97) as f32;
            words.push(TimedWord {
                word: vocabulary[(rng.next() * vocabulary.len() as f64) as usize].clone(),
                start: from,
                end: to,
                confidence: certainty,
            });
            t = to;
        }
        let end = (t + 0.1).min(3600.0);
        segments.push(TimedSegment {
            start,
            end,
            text: words
                .iter()
                .map(|w| w.word.as_str())
                .collect::<Vec<_>>()
                .join(" "),
            words,
        });
        t = end + 0.5 + rng.next() * 1.5;
    }
    ItemTranscript {
        id: "one-hour".into(),
        audio: "one-hour.wav".into(),
        segments,
    }
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

fn main() {
    let rounds: usize = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .and_then(|a| a.parse().ok())
        .unwrap_or(5);
    let chromium =
        cdp::find_chromium().expect("install Debian's `chromium` or set ISOGLOSS_CHROMIUM");
    let item = one_hour();
    let words: usize = item.segments.iter().map(|s| s.words.len()).sum();
    let mut json = serde_json::to_vec_pretty(&TranscriptDocument::new(vec![item.clone()])).unwrap();
    json.push(b'\n');
    let recording = Recording {
        name: "one-hour".into(),
        audio: "one-hour.wav".into(),
        source: "one-hour.wav".into(),
        stretches: item
            .segments
            .iter()
            .enumerate()
            .map(|(k, s)| Stretch {
                id: format!("one-hour-{:03}", k + 1),
                segment: s.clone(),
                speaker: String::new(),
                dialect: String::new(),
            })
            .collect(),
    };
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("audio")).unwrap();
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 16_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut wav = hound::WavWriter::create(dir.path().join("audio/one-hour.wav"), spec).unwrap();
    for _ in 0..3600 * 16_000 {
        wav.write_sample(0i16).unwrap();
    }
    wav.finalize().unwrap();
    let html = render_page(
        &recording,
        &PageAudio {
            href: "audio/one-hour.wav".into(),
            converted: None,
            note: None,
        },
        &ReviewOptions::default(),
    );
    let page = dir.path().join("one-hour.html");
    std::fs::write(&page, &html).unwrap();
    println!(
        "one hour: {} stretches, {words} words; page {:.0} kB, transcript JSON {:.0} kB: page/transcript = {:.3}",
        item.segments.len(),
        html.len() as f64 / 1000.0,
        json.len() as f64 / 1000.0,
        html.len() as f64 / json.len() as f64
    );
    let url = format!("file://{}", page.display());
    let (mut ready, mut load, mut frame) = (Vec::new(), Vec::new(), Vec::new());
    for round in 1..=rounds {
        let mut browser = cdp::Browser::start(&chromium, 1200, 800);
        browser.open(&url);
        browser.wait_until("performance.getEntriesByName('isogloss-shown').length === 1");
        let times = browser.eval(
            "[performance.getEntriesByName('isogloss-ready')[0].startTime,\
              performance.getEntriesByType('navigation')[0].loadEventEnd,\
              performance.getEntriesByName('isogloss-shown')[0].startTime,\
              document.querySelectorAll('span.w[data-k]').length]",
        );
        let t: Vec<f64> = times
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        assert_eq!(t[3] as usize, words, "every word is on the page");
        println!(
            "round {round}: words built {:.0} ms, shown {:.0} ms, load event {:.0} ms (from navigation start)",
            t[0], t[2], t[1]
        );
        ready.push(t[0]);
        load.push(t[1]);
        frame.push(t[2]);
        let errors = browser.errors();
        assert!(errors.is_empty(), "{errors:?}");
    }
    println!(
        "median of {rounds}: words built {:.0} ms, shown {:.0} ms, load event {:.0} ms",
        median(&mut ready),
        median(&mut frame),
        median(&mut load)
    );
}
