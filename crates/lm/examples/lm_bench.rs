//! Benchmark (not a test): ARPA load time and back-off queries per second.
//!
//! ```text
//! cargo run --release -p isogloss-lm --example lm_bench -- MODEL.arpa TEXT.txt
//! ```
//!
//! Query patterns: (1) walking the text's sentences state by state, as a rescoring pass does;
//! (2) from every state along the text, scoring 16 pseudo-random vocabulary words, as a beam
//! search expanding a hypothesis does (mostly back-off paths).

use std::time::Instant;

use isogloss_lm::{read_sentences, ArpaModel, WordIndex};

/// CPU time of this thread in seconds (Linux `/proc/thread-self/schedstat`), so that the figures
/// mean something on a shared machine; `NaN` elsewhere.
fn cpu_seconds() -> f64 {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|text| {
            text.split_whitespace()
                .next()
                .and_then(|field| field.parse::<f64>().ok())
        })
        .map_or(f64::NAN, |nanoseconds| nanoseconds / 1e9)
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let arguments: Vec<String> = std::env::args().collect();
    let [_, model_path, text_path] = arguments.as_slice() else {
        return Err("usage: lm_bench MODEL.arpa TEXT.txt".into());
    };
    let started = Instant::now();
    let cpu = cpu_seconds();
    let model = ArpaModel::read(model_path)?;
    let load_seconds = started.elapsed().as_secs_f64();
    println!(
        "loaded {model_path} ({:?}) in {load_seconds:.2} s wall, {:.2} s CPU",
        model.ngram_counts(),
        cpu_seconds() - cpu
    );

    let unknown = model.unknown_word().ok_or("the model has no <unk>")?;
    let sentences: Vec<Vec<WordIndex>> = read_sentences(std::path::Path::new(text_path))?
        .into_iter()
        .map(|sentence| {
            sentence
                .iter()
                .map(|word| model.word_index(word).unwrap_or(unknown))
                .collect()
        })
        .collect();
    let tokens: usize = sentences.iter().map(|sentence| sentence.len() + 1).sum();

    let started = Instant::now();
    let cpu = cpu_seconds();
    let mut total = 0.0f64;
    let mut queries = 0usize;
    let rounds = (5_000_000 / tokens.max(1)).max(1);
    for _ in 0..rounds {
        for sentence in &sentences {
            let mut state = model.sentence_start();
            for &word in sentence {
                let (log10_prob, next) = model.score(&state, word);
                total += f64::from(log10_prob);
                state = next;
            }
            total += f64::from(model.sentence_end(&state));
            queries += sentence.len() + 1;
        }
    }
    report("text walk", queries, started, cpu, total);

    let vocabulary = model.vocabulary().count() as u64;
    let mut random = 0x9E37_79B9_7F4A_7C15u64;
    let started = Instant::now();
    let cpu = cpu_seconds();
    let mut total = 0.0f64;
    let mut queries = 0usize;
    'outer: for sentence in sentences.iter().cycle() {
        let mut state = model.sentence_start();
        for &word in sentence {
            for _ in 0..16 {
                random ^= random << 13;
                random ^= random >> 7;
                random ^= random << 17;
                let candidate = WordIndex((random % vocabulary) as u32);
                total += f64::from(model.score(&state, candidate).0);
            }
            queries += 16;
            state = model.score(&state, word).1;
            if queries >= 5_000_000 {
                break 'outer;
            }
        }
    }
    report("beam pattern", queries, started, cpu, total);
    Ok(())
}

fn report(label: &str, queries: usize, started: Instant, cpu: f64, checksum: f64) {
    let wall = started.elapsed().as_secs_f64();
    let cpu = cpu_seconds() - cpu;
    println!(
        "{label}: {queries} queries in {wall:.3} s wall = {:.2} M/s; {cpu:.3} s CPU = {:.2} M/s (checksum {checksum:.1})",
        queries as f64 / wall / 1e6,
        queries as f64 / cpu / 1e6
    );
}
