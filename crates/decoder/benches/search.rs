//! Search speed on synthetic data: a 10,000-word grapheme lexicon, a 4-gram modified
//! Kneser-Ney LM estimated from generated sentences, and peaky CTC posteriors generated from
//! word sequences of that lexicon (the shape a trained CTC model produces: one to two frames per
//! unit, blank in between). Prints the real-time factor on the current thread (one core) for
//! 10 ms and 30 ms posterior frames (thread CPU time, so that other processes on the machine
//! do not count), and how many words come back right (by position).
//!
//! Run: `cargo bench -p isogloss-decoder --bench search`

use std::time::Instant;

use isogloss_decoder::{
    Decoder, GreedyDecoder, LanguageModel, NoLanguageModel, PrefixBeamSearch, SearchGraph,
    SearchOptions,
};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// CPU time of this thread in seconds (first field of `/proc/thread-self/schedstat`, in ns):
/// on a shared machine wall time measures the neighbours too.
fn thread_cpu_seconds() -> f64 {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|s| {
            s.split_whitespace()
                .next()
                .and_then(|v| v.parse::<f64>().ok())
        })
        .map_or(0.0, |ns| ns * 1e-9)
}

const LETTERS: &str = "abcdefghijklmnopqrstuvwxyzäöüß";

fn main() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let letters: Vec<String> = LETTERS.chars().map(|c| c.to_string()).collect();
    let mut units = vec!["<ctc-blank>".to_string()];
    units.extend(letters.iter().cloned());
    units.push("<wb>".to_string());

    // 10,000 distinct words of 2–9 letters
    let mut words = std::collections::BTreeSet::new();
    while words.len() < 10_000 {
        let len = rng.random_range(2..=9);
        let w: String = (0..len)
            .map(|_| letters[rng.random_range(0..letters.len())].as_str())
            .collect();
        words.insert(w);
    }
    let words: Vec<String> = words.into_iter().collect();
    let lexicon: Vec<(String, Vec<String>)> = words
        .iter()
        .map(|w| (w.clone(), w.chars().map(|c| c.to_string()).collect()))
        .collect();
    let (graph, _) = SearchGraph::with_lexicon(units.clone(), &lexicon).expect("lexicon");

    // Zipf-distributed sentences → 4-gram LM
    let weights: Vec<f64> = (1..=words.len()).map(|r| 1.0 / r as f64).collect();
    let total: f64 = weights.iter().sum();
    let cumulative: Vec<f64> = weights
        .iter()
        .scan(0.0, |acc, w| {
            *acc += w / total;
            Some(*acc)
        })
        .collect();
    let draw = |rng: &mut ChaCha8Rng| {
        let x: f64 = rng.random();
        cumulative.partition_point(|&c| c < x).min(words.len() - 1)
    };
    let started = Instant::now();
    let sentences: Vec<Vec<String>> = (0..40_000)
        .map(|_| {
            (0..rng.random_range(3..12))
                .map(|_| words[draw(&mut rng)].clone())
                .collect()
        })
        .collect();
    let counts = isogloss_lm::NgramCounts::from_sentences(sentences, 4).expect("counts");
    let lm = isogloss_lm::estimate(&counts, isogloss_lm::Smoothing::ModifiedKneserNey)
        .expect("estimate")
        .model;
    eprintln!(
        "LM: order {}, n-grams {:?}, built in {:.1} s",
        lm.order(),
        lm.ngram_counts(),
        started.elapsed().as_secs_f64()
    );

    // utterances: 12 words each, peaky posteriors with confusions
    let utterances: Vec<(Vec<String>, Array2<f32>)> = (0..40)
        .map(|_| {
            let said: Vec<String> = (0..12).map(|_| words[draw(&mut rng)].clone()).collect();
            let mut frames: Vec<usize> = Vec::new();
            for (i, w) in said.iter().enumerate() {
                if i > 0 {
                    frames.push(units.len() - 1);
                }
                for c in w.chars() {
                    let u = 1 + LETTERS.chars().position(|x| x == c).unwrap_or(0);
                    for _ in 0..rng.random_range(1..=2) {
                        frames.push(u);
                    }
                    let gap = rng.random_range(1..=4);
                    frames.extend(std::iter::repeat_n(0, gap));
                }
            }
            let mut posteriors = Array2::<f32>::zeros((frames.len(), units.len()));
            for (t, &u) in frames.iter().enumerate() {
                let peak: f32 = rng.random_range(0.45..0.97);
                let rival = rng.random_range(1..units.len());
                let mut row: Vec<f32> = (0..units.len())
                    .map(|_| rng.random_range(0.0..0.01))
                    .collect();
                row[rival] += (1.0 - peak) * 0.8;
                row[u] += peak;
                let sum: f32 = row.iter().sum();
                for (k, v) in row.iter().enumerate() {
                    posteriors[[t, k]] = (v / sum).ln();
                }
            }
            (said, posteriors)
        })
        .collect();
    let frames: usize = utterances.iter().map(|u| u.1.nrows()).sum();

    let run = |name: &str, decoder: &mut dyn Decoder| {
        // one warm-up pass, then timed
        decoder.decode(utterances[0].1.view()).expect("decode");
        let started = thread_cpu_seconds();
        let mut correct = 0;
        let mut total_words = 0;
        for (said, posteriors) in &utterances {
            let out = decoder.decode(posteriors.view()).expect("decode");
            total_words += said.len();
            correct += out
                .words
                .iter()
                .zip(said)
                .filter(|(a, b)| &a.text == *b)
                .count();
        }
        let seconds = thread_cpu_seconds() - started;
        if std::env::var("SHOW").is_ok() {
            let out = decoder.decode(utterances[1].1.view()).expect("decode");
            eprintln!(
                "said {:?}\ngot  {:?}",
                utterances[1].0.join(" "),
                out.text()
            );
        }
        println!(
            "{name:<44} {:>8.2} ms CPU  RTF {:.5} (10 ms frames)  {:.5} (30 ms frames)  words right {}/{}",
            seconds * 1000.0,
            seconds / (frames as f64 * 0.01),
            seconds / (frames as f64 * 0.03),
            correct,
            total_words
        );
    };
    println!(
        "{} utterances, {} frames, lexicon {} words, units {}",
        utterances.len(),
        frames,
        graph.words().len(),
        units.len()
    );
    run("greedy", &mut GreedyDecoder::new(&graph));
    fn search<'a, L: LanguageModel>(
        graph: &'a SearchGraph,
        lm: &'a L,
        options: SearchOptions,
    ) -> PrefixBeamSearch<'a, L> {
        PrefixBeamSearch::new(graph, lm, options)
    }
    let defaults = SearchOptions::default();
    run(
        &format!("beam {}, 4-gram, lexicon (defaults)", defaults.beam),
        &mut search(&graph, &lm, defaults.clone()),
    );
    run(
        &format!("beam {}, 4-gram, lexicon, no blank skip", defaults.beam),
        &mut search(
            &graph,
            &lm,
            SearchOptions {
                skip_blank_above: None,
                ..defaults.clone()
            },
        ),
    );
    run(
        &format!("beam {}, 4-gram, lexicon, no look-ahead", defaults.beam),
        &mut search(
            &graph,
            &lm,
            SearchOptions {
                lookahead: false,
                ..defaults.clone()
            },
        ),
    );
    run(
        "beam 16, 4-gram, lexicon (old default)",
        &mut search(
            &graph,
            &lm,
            SearchOptions {
                beam: 16,
                ..defaults.clone()
            },
        ),
    );
    // Without an LM a word bonus only splits words; without a lexicon it must pay for the LM
    // cost of every boundary, so each configuration gets the bonus it needs.
    run(
        &format!("beam {}, no LM, lexicon, bonus 0", defaults.beam),
        &mut search(
            &graph,
            &NoLanguageModel,
            SearchOptions {
                word_bonus: 0.0,
                ..defaults.clone()
            },
        ),
    );
    let free = SearchGraph::lexicon_free(units.clone()).expect("units");
    run(
        &format!("beam {}, 4-gram, no lexicon, bonus 6", defaults.beam),
        &mut search(
            &free,
            &lm,
            SearchOptions {
                word_bonus: 6.0,
                ..defaults.clone()
            },
        ),
    );
}
