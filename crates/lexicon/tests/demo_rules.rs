//! The shipped rule file for the demo corpus's dialectal writing
//! (`configs/rules-demo-dialectal.toml`) pronounces every word of the demo's `dialectal`
//! column, in every manifest, and gets a few hand-checked words right.

use std::path::{Path, PathBuf};

use isogloss_corpus::tsv::Table;
use isogloss_lexicon::rules::RuleSet;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

#[test]
fn every_dialectal_word_of_the_demo_corpus_gets_a_pronunciation() {
    let rules = RuleSet::read(&root().join("configs/rules-demo-dialectal.toml")).unwrap();
    let mut words = Vec::new();
    for manifest in ["train", "dev", "test", "interviews"] {
        let table =
            Table::read_with_header(&root().join(format!("tests/data/demo/{manifest}.tsv")))
                .unwrap();
        let column = table.column("dialectal").unwrap();
        for record in &table.records {
            // The demo transcripts are lower case without punctuation: white space splits them.
            words.extend(record.fields[column].split_whitespace().map(str::to_string));
        }
    }
    assert!(
        words.len() > 1000,
        "the demo corpus has more words than {}",
        words.len()
    );
    let (lexicon, uncovered) = rules.lexicon(words.iter().map(String::as_str));
    assert!(uncovered.is_empty(), "not pronounced: {uncovered:?}");
    // Hand-checked eye-dialect spellings (English-like letter-to-sound correspondences).
    for (word, expected) in [
        ("doon", "D UW N"),
        ("dat", "D AE T"),
        ("telt", "T EH L T"),
        ("ah", "AA"),
        ("owd", "OW D"),
        ("goin'", "G OW IH N"),
        ("nuffink", "N AH F IH NG K"),
        ("the", "DH AH"),
        ("night", "N AY T"),
        ("school", "S K UW L"),
        ("time", "T AY M"),
    ] {
        let found: Vec<String> = lexicon
            .pronunciations(word)
            .iter()
            .map(|p| p.join(" "))
            .collect();
        assert_eq!(found, [expected], "{word}");
    }
}
