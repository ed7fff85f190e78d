//! Benchmark of the joint-sequence G2P on a pronunciation dictionary: a random held-out share of
//! the words (all their variants together) is set aside, the model is trained on the rest, and
//! the word and phoneme error rates on the held-out words are printed with the timings.
//!
//! ```text
//! ../venv/bin/python scripts/reference/cmudict_subset.py --full /tmp/cmudict.tsv
//! cargo run --release -p isogloss-lexicon --example g2p_benchmark -- /tmp/cmudict.tsv \
//!     [--held-out 0.1] [--seed 1] [--order 6] [--iterations 10] [--penalty 0.3] [--beam 40]
//! ```
//!
//! Measured 2026-12-02 on the full CMU Pronouncing Dictionary (CMUdict, Carnegie Mellon
//! University, BSD-style licence; 126 052 words, stress removed), seed 1, 10% of the words held
//! out, order 6, beam 40, on 12 605 held-out words: penalty 0.3 (the default) WER 25.82%,
//! PER 6.31%; penalty 0.1 WER 25.99%, PER 6.36%; penalty 0.5 WER 26.33%, PER 6.43%; penalty 0.3 with beam 100: the same as with beam 40,
//! so the beam is not what limits accuracy (training
//! 1–2 min, decoding 7–22 min on a shared, heavily loaded 2-core machine). Published
//! joint-sequence figures for CMUdict (Bisani & Ney 2008, from memory): about 24–25% WER and
//! 6% PER.
//!
//! Environment: `G2P_DUMP=PATH` also writes the trained model there; `G2P_ON_TRAINING=1`
//! scores the training words instead of the held-out ones (a sanity check: near zero errors).

use std::path::PathBuf;
use std::time::Instant;

use isogloss_lexicon::graphone::{evaluate, DecodeConfig, G2pConfig, G2pModel};
use isogloss_lexicon::Lexicon;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut args = std::env::args().skip(1);
    let mut path = None;
    let mut held_out = 0.1;
    let mut seed = 1u64;
    let mut config = G2pConfig::default();
    let mut decode = DecodeConfig::default();
    while let Some(arg) = args.next() {
        let mut value = || args.next().ok_or(format!("{arg} needs a value"));
        match arg.as_str() {
            "--held-out" => held_out = value()?.parse()?,
            "--seed" => seed = value()?.parse()?,
            "--order" => config.order = value()?.parse()?,
            "--iterations" => config.iterations = value()?.parse()?,
            "--max-letters" => config.max_letters = value()?.parse()?,
            "--max-phonemes" => config.max_phonemes = value()?.parse()?,
            "--penalty" => config.multi_symbol_penalty = value()?.parse()?,
            "--beam" => decode.beam = value()?.parse()?,
            _ => path = Some(PathBuf::from(arg)),
        }
    }
    let path = path.ok_or("usage: g2p_benchmark DICTIONARY.tsv [options]")?;
    let dictionary = Lexicon::read(&path)?;
    let (train, test) = dictionary.split_held_out(held_out, seed);
    println!(
        "{}: {} words; training on {} entries, testing on {} words (seed {seed})",
        path.display(),
        dictionary.words().len(),
        train.entries.len(),
        test.words().len()
    );
    let started = Instant::now();
    let (model, _) = G2pModel::train(&train, &config, &mut |p| {
        eprintln!(
            "  [{}/{}] {} ({:.0?})",
            p.step,
            p.steps,
            p.message,
            started.elapsed()
        )
    })?;
    let trained = started.elapsed();
    if let Ok(dump) = std::env::var("G2P_DUMP") {
        model.write(std::path::Path::new(&dump))?;
    }
    let started = Instant::now();
    let test = if std::env::var("G2P_ON_TRAINING").is_ok() {
        train
    } else {
        test
    };
    let result = evaluate(&model, &test, &decode);
    println!(
        "order {} iterations {} shape {}x{} penalty {} beam {}: WER {:.2}%  PER {:.2}%  ({} words, {} reference phonemes); \
         training {:.1?}, decoding {:.1?}",
        config.order,
        config.iterations,
        config.max_letters,
        config.max_phonemes,
        config.multi_symbol_penalty,
        decode.beam,
        100.0 * result.word_error_rate(),
        100.0 * result.phoneme_error_rate(),
        result.words,
        result.reference_phonemes,
        trained,
        started.elapsed()
    );
    Ok(())
}
