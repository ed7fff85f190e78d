//! The joint-sequence G2P against an open dataset: a 3000-word random subset of the CMU
//! Pronouncing Dictionary (CMUdict, Carnegie Mellon University, BSD-style licence; converted by
//! `scripts/reference/cmudict_subset.py`, stress digits stripped), 10% of the words held out.

use std::path::Path;

use isogloss_lexicon::graphone::{evaluate, DecodeConfig, G2pConfig, G2pModel};
use isogloss_lexicon::Lexicon;

#[test]
fn phoneme_error_rate_on_held_out_cmudict_words() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/lexicon/cmudict-subset.tsv");
    let dictionary = Lexicon::read(&path).unwrap();
    let (train, held_out) = dictionary.split_held_out(0.1, 1);
    assert_eq!(held_out.words().len(), 300);
    let config = G2pConfig {
        order: 4,
        ..G2pConfig::default()
    };
    let (model, skipped) = G2pModel::train(&train, &config, &mut |_| {}).unwrap();
    assert!(skipped.is_empty());
    let result = evaluate(&model, &held_out, &DecodeConfig::default());
    let per = result.phoneme_error_rate();
    let wer = result.word_error_rate();
    eprintln!("CMUdict subset, 300 held-out words: WER {wer:.4}, PER {per:.4}");
    // Thresholds: measured on this split (PER 16.0%, WER 56.7% with the LM crate's modified
    // Kneser-Ney, order 4) plus a margin of about 2.5 and 5 points. Far fewer training words
    // than the full dictionary, hence far above the full-dictionary figures.
    assert!(per < 0.19, "phoneme error rate {per}");
    assert!(wer < 0.62, "word error rate {wer}");
}
