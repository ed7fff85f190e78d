//! Reader, writer and query checks on small hand-written ARPA files.

use crate::{ArpaModel, LmError, LmState, WordIndex};

/// A small trigram model in back-off form (values invented for the test; the back-off arithmetic
/// below follows the ARPA format's definition, common practice).
const TRIGRAM: &str = "\
free text before the header is ignored

\\data\\
ngram 1=5
ngram 2=4
ngram 3=2

\\1-grams:
-1.0\t<s>\t-0.5
-0.6\ta\t-0.3
-0.7\tb\t-0.2
-0.8\t</s>
-1.5\t<unk>

\\2-grams:
-0.2\t<s> a\t-0.1
-0.3\ta b\t-0.05
-0.4\tb </s>
-0.35\tb a

\\3-grams:
-0.1\t<s> a b
-0.15\ta b </s>

\\end\\
";

fn trigram() -> ArpaModel {
    ArpaModel::read_from(TRIGRAM.as_bytes(), "trigram.arpa").unwrap()
}

fn index(model: &ArpaModel, word: &str) -> WordIndex {
    model.word_index(word).unwrap()
}

#[test]
fn reads_counts_and_vocabulary() {
    let model = trigram();
    assert_eq!(model.order(), 3);
    assert_eq!(model.ngram_counts(), vec![5, 4, 2]);
    assert_eq!(
        model.vocabulary().collect::<Vec<_>>(),
        ["<s>", "a", "b", "</s>", "<unk>"]
    );
    assert_eq!(model.unknown_word(), Some(WordIndex(4)));
}

#[test]
fn back_off_follows_the_arpa_definition() {
    let model = trigram();
    let (s, a, b, end) = (
        index(&model, "<s>"),
        index(&model, "a"),
        index(&model, "b"),
        index(&model, "</s>"),
    );
    // P(a | <s>) is listed.
    assert!((model.log10_probability(&[s], a) - -0.2).abs() < 1e-12);
    // P(b | <s> a) is listed as a trigram.
    assert!((model.log10_probability(&[s, a], b) - -0.1).abs() < 1e-12);
    // P(a | <s> a): no trigram "<s> a a", back off with bo(<s> a) = -0.1 to P(a | a): no bigram
    // "a a", back off with bo(a) = -0.3 to P(a) = -0.6. Total -0.1 - 0.3 - 0.6 = -1.0.
    assert!((model.log10_probability(&[s, a], a) - -1.0).abs() < 1e-12);
    // P(</s> | b a): context "b a" has no extension (its back-off weight is 1), then P(</s> | a):
    // no bigram, bo(a) = -0.3, P(</s>) = -0.8. Total -1.1.
    assert!((model.log10_probability(&[b, a], end) - -1.1).abs() < 1e-12);
}

#[test]
fn state_queries_agree_with_the_back_off_recursion() {
    let model = trigram();
    let words: Vec<WordIndex> = model.predictable_words().collect();
    // Every sentence of up to four words over the vocabulary: the state-based path must give the
    // same total as the double-precision recursion over the full history.
    let mut sentences: Vec<Vec<WordIndex>> = vec![vec![]];
    for _ in 0..4 {
        let longer: Vec<Vec<WordIndex>> = sentences
            .iter()
            .flat_map(|sentence| {
                words.iter().map(move |&word| {
                    let mut next = sentence.clone();
                    next.push(word);
                    next
                })
            })
            .collect();
        sentences.extend(longer.into_iter().filter(|sentence| sentence.len() <= 4));
        sentences.sort();
        sentences.dedup();
    }
    let start = index(&model, "<s>");
    for sentence in &sentences {
        let mut state = model.sentence_start();
        let mut fast = 0.0f64;
        let mut slow = 0.0f64;
        let mut history = vec![start];
        for &word in sentence {
            let (log10_prob, next) = model.score(&state, word);
            fast += f64::from(log10_prob);
            slow += model.log10_probability(&history, word);
            history.push(word);
            state = next;
        }
        fast += f64::from(model.sentence_end(&state));
        slow += model.log10_probability(&history, index(&model, "</s>"));
        assert!((fast - slow).abs() < 1e-5, "{sentence:?}: {fast} vs {slow}");
    }
}

#[test]
fn states_keep_only_contexts_that_can_matter() {
    let model = trigram();
    let (a, b, end) = (
        index(&model, "a"),
        index(&model, "b"),
        index(&model, "</s>"),
    );
    // After "<s> a b" the longest suffix that is a context of a longer n-gram is "a b".
    let (_, state) = model.score(&model.sentence_start(), a);
    let (_, state) = model.score(&state, b);
    assert_eq!(state.context_length(), 2);
    // "b </s>" is nobody's prefix and "</s>" neither: the state becomes empty.
    let (_, state) = model.score(&state, end);
    assert_eq!(state, LmState::EMPTY);
    // "b a" has no extension, but "a" has: the state is the one-word context.
    let (_, after_b) = model.score(&LmState::EMPTY, b);
    let (_, state) = model.score(&after_b, a);
    assert_eq!(state.context_length(), 1);
}

#[test]
fn round_trips_through_plain_and_gzip_files() {
    let model = trigram();
    let folder = tempfile::tempdir().unwrap();
    for name in ["model.arpa", "model.arpa.gz"] {
        let path = folder.path().join(name);
        model.write_arpa(&path).unwrap();
        let again = ArpaModel::read(&path).unwrap();
        assert_eq!(again.ngram_counts(), model.ngram_counts());
        let mut first = Vec::new();
        let mut second = Vec::new();
        model.write_arpa_to(&mut first).unwrap();
        again.write_arpa_to(&mut second).unwrap();
        assert_eq!(first, second);
    }
}

fn read_error(text: &str) -> (usize, String) {
    match ArpaModel::read_from(text.as_bytes(), "bad.arpa") {
        Err(LmError::Arpa { line, message, .. }) => (line, message),
        other => panic!("expected an ARPA error, got {other:?}"),
    }
}

#[test]
fn wrong_counts_are_reported_with_the_line() {
    let text = TRIGRAM.replace("ngram 2=4", "ngram 2=5");
    let (line, message) = read_error(&text);
    assert_eq!(line, 21, "{message}"); // the '\3-grams:' line that ends the short section
    assert!(
        message.contains("announced 5 2-grams, found 4"),
        "{message}"
    );
    let text = TRIGRAM.replace("ngram 3=2", "ngram 3=1");
    let (line, message) = read_error(&text);
    assert_eq!(line, 23, "{message}");
    assert!(
        message.contains("announced 1 3-grams, found more"),
        "{message}"
    );
}

#[test]
fn a_missing_end_marker_is_reported() {
    let text = TRIGRAM.replace("\\end\\\n", "");
    let (line, message) = read_error(&text);
    assert_eq!(line, 24, "{message}"); // the last line of the file
    assert!(message.contains("expected '\\end\\'"), "{message}");
}

#[test]
fn a_non_numeric_probability_is_reported_with_the_line() {
    let text = TRIGRAM.replace("-0.7\tb\t-0.2", "minus\tb\t-0.2");
    let (line, message) = read_error(&text);
    assert_eq!(line, 11, "{message}");
    assert!(message.contains("found 'minus'"), "{message}");
    let text = TRIGRAM.replace("-0.3\ta b\t-0.05", "-0.3\ta b\tx");
    let (line, message) = read_error(&text);
    assert_eq!(line, 17, "{message}");
    assert!(message.contains("back-off weight"), "{message}");
}

#[test]
fn structural_problems_are_reported_with_the_line() {
    let (line, message) = read_error(&TRIGRAM.replace("-0.4\tb </s>", "-0.4\tb zzz"));
    assert_eq!(line, 18);
    assert!(
        message.contains("'zzz' is not in the unigram list"),
        "{message}"
    );
    let (line, message) = read_error(&TRIGRAM.replace("-0.35\tb a", "-0.35\ta b"));
    assert_eq!(line, 19);
    assert!(message.contains("listed twice"), "{message}");
    let (_, message) = read_error("no header at all\n");
    assert!(message.contains("\\data\\"), "{message}");
}

#[test]
fn missing_prefixes_and_suffixes_are_implied_without_changing_probabilities() {
    // "b a </s>" is listed but its suffix "a </s>" is not (as after some pruning tools).
    let model = ArpaModel::read_from(
        TRIGRAM
            .replace("-0.15\ta b </s>", "-0.15\tb a </s>")
            .as_bytes(),
        "x.arpa",
    )
    .unwrap();
    assert_eq!(model.implied_ngrams(), 1);
    assert_eq!(model.ngram_counts(), vec![5, 5, 2]);
    let (a, b, end) = (
        index(&model, "a"),
        index(&model, "b"),
        index(&model, "</s>"),
    );
    // The implied "a </s>" carries what back-off gave: bo(a) + P(</s>) = -0.3 - 0.8 = -1.1.
    assert!((model.log10_probability(&[a], end) - -1.1).abs() < 1e-12);
    assert!((model.log10_probability(&[b, a], end) - -0.15).abs() < 1e-12);
    // "b b </s>" is listed but its prefix "b b" is not: implied with bo(b) + P(b) = -0.9.
    let model = ArpaModel::read_from(
        TRIGRAM
            .replace("-0.15\ta b </s>", "-0.15\tb b </s>")
            .as_bytes(),
        "x.arpa",
    )
    .unwrap();
    assert_eq!(model.implied_ngrams(), 1);
    assert!((model.log10_probability(&[b], b) - -0.9).abs() < 1e-12);
    assert!((model.log10_probability(&[b, b], end) - -0.15).abs() < 1e-12);
    // The state-based path agrees with the recursion on the repaired model.
    let (log10_b, state) = model.score(&model.score(&LmState::EMPTY, b).1, b);
    assert!((f64::from(log10_b) - -0.9).abs() < 1e-6);
    assert!((f64::from(model.sentence_end(&state)) - -0.15).abs() < 1e-6);
}

/// Issue 16: a header count was used as an allocation size (an abort for `ngram 1=99999999999`,
/// a capacity-overflow panic for `ngram 2=9999999999999999999`). Now a count beyond what the
/// file can hold is an error naming the file, the line and the bound, and counts within it
/// reserve nothing beyond a fixed amount.
#[test]
fn header_counts_beyond_the_file_are_errors_not_allocations() {
    let folder = tempfile::tempdir().unwrap();
    let path = folder.path().join("huge.arpa");
    for (header, line) in [
        ("ngram 1=99999999999\n", 2),
        ("ngram 1=5\nngram 2=9999999999999999999\n", 3),
        ("ngram 1=18446744073709551615\n", 2),
    ] {
        std::fs::write(
            &path,
            format!("\\data\\\n{header}\n\\1-grams:\n-1\ta\n\\end\\\n"),
        )
        .unwrap();
        let message = ArpaModel::read(&path).unwrap_err().to_string();
        assert!(
            message.contains(&format!("huge.arpa, line {line}:"))
                && message.contains("holds at most"),
            "{message}"
        );
    }
    // The same count through a reader of unknown size: bounded by the per-order maximum, and
    // otherwise found out by the count check at the end of the section, without reserving it.
    let text = "\\data\\\nngram 1=4000000000\n\n\\1-grams:\n-1\ta\n\\end\\\n";
    let message = ArpaModel::read_from(text.as_bytes(), "stream.arpa")
        .unwrap_err()
        .to_string();
    assert!(message.contains("at most"), "{message}");
    let text = "\\data\\\nngram 1=40000000\n\n\\1-grams:\n-1\ta\n\\end\\\n";
    let message = ArpaModel::read_from(text.as_bytes(), "stream.arpa")
        .unwrap_err()
        .to_string();
    assert!(
        message.contains("announced 40000000 1-grams, found 1"),
        "{message}"
    );
}

/// A gzip stream can decompress into one endless line; lines are capped.
#[test]
fn an_endless_line_is_an_error() {
    let mut text = b"\\data\\\nngram 1=1\n\n\\1-grams:\n-1\t".to_vec();
    text.extend(std::iter::repeat_n(b'a', crate::arpa::MAX_LINE_BYTES + 10));
    let message = ArpaModel::read_from(text.as_slice(), "long.arpa")
        .unwrap_err()
        .to_string();
    assert!(
        message.contains("long.arpa, line 5:") && message.contains("longer"),
        "{message}"
    );
}
