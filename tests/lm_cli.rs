//! End-to-end: `isogloss lm build | eval | mix | prune` through the binary.

use std::collections::HashMap;
use std::path::Path;
use std::process::{Command, Output};

fn isogloss(arguments: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(arguments)
        .output()
        .unwrap()
}

fn text(output: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&output.stdout).into_owned(),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

fn path(folder: &Path, name: &str) -> String {
    folder.join(name).display().to_string()
}

/// An ARPA file read independently of `isogloss-lm`: every n-gram with its log10 probability
/// and log10 back-off weight, and the back-off rule of the ARPA format (Katz 1987; the query
/// `docs/language-models.md` specifies): P(w | h) is the listed probability of `h w`, else
/// bo(h) · P(w | h without its first word), with bo(h) = 1 when `h` is not listed.
struct Arpa {
    ngrams: HashMap<Vec<String>, (f64, f64)>,
    order: usize,
}

impl Arpa {
    fn read(file: &str) -> Arpa {
        let mut ngrams = HashMap::new();
        let (mut section, mut order) = (0, 0);
        for line in std::fs::read_to_string(file).unwrap().lines() {
            if let Some(n) = line
                .strip_prefix('\\')
                .and_then(|l| l.strip_suffix("-grams:"))
            {
                section = n.parse().unwrap();
                order = order.max(section);
                continue;
            }
            let fields: Vec<&str> = line.split_whitespace().collect();
            if section == 0 || fields.len() < section + 1 || line.starts_with('\\') {
                continue;
            }
            let words = fields[1..=section].iter().map(|w| w.to_string()).collect();
            let backoff = fields.get(section + 1).map_or(0.0, |b| b.parse().unwrap());
            ngrams.insert(words, (fields[0].parse().unwrap(), backoff));
        }
        Arpa { ngrams, order }
    }

    fn log10_probability(&self, history: &[String], word: &str) -> f64 {
        let mut ngram = history.to_vec();
        ngram.push(word.to_string());
        if let Some((log10, _)) = self.ngrams.get(&ngram) {
            return *log10;
        }
        if history.is_empty() {
            return f64::NEG_INFINITY;
        }
        let backoff = self.ngrams.get(history).map_or(0.0, |v| v.1);
        backoff + self.log10_probability(&history[1..], word)
    }

    /// Perplexity over the sentences of a text: every word and `</s>` predicted, `<s>` as
    /// context, unknown words as `<unk>`, the history at most order − 1 words.
    fn perplexity(&self, text: &str) -> f64 {
        let (mut log10_sum, mut tokens) = (0.0, 0);
        for line in text.lines().filter(|l| !l.trim().is_empty()) {
            let mut history = vec!["<s>".to_string()];
            for word in line.split_whitespace().chain(["</s>"]) {
                let known = self.ngrams.contains_key(&vec![word.to_string()]);
                let word = if known { word } else { "<unk>" };
                let start = history.len().saturating_sub(self.order - 1);
                log10_sum += self.log10_probability(&history[start..], word);
                tokens += 1;
                history.push(word.to_string());
            }
        }
        10f64.powf(-log10_sum / tokens as f64)
    }

    fn probability(&self, history: &[String], word: &str) -> f64 {
        10f64.powf(self.log10_probability(history, word))
    }

    /// The relative entropy (nats) between this model and the same model without the n-gram
    /// `ngram`, from the definition: P(h) Σ_v P(v|h) ln(P(v|h) / P'(v|h)) over the whole
    /// vocabulary, where P' backs off for the removed word with a back-off weight renormalised
    /// so that P'(·|h) sums to one, and P(h) is the chain rule along h (`<s>` has probability 1).
    fn removal_divergence(&self, ngram: &[String]) -> f64 {
        let (history, removed) = (&ngram[..ngram.len() - 1], &ngram[ngram.len() - 1]);
        let vocabulary: Vec<&String> = self
            .ngrams
            .keys()
            .filter(|k| k.len() == 1 && k[0] != "<s>")
            .map(|k| &k[0])
            .collect();
        let listed = |v: &String| {
            let mut key = history.to_vec();
            key.push(v.clone());
            self.ngrams.contains_key(&key)
        };
        let (mut kept_high, mut kept_low) = (0.0, 0.0);
        for v in vocabulary
            .iter()
            .filter(|v| listed(v) && v.as_str() != removed.as_str())
        {
            kept_high += self.probability(history, v);
            kept_low += self.probability(&history[1..], v);
        }
        let new_backoff = (1.0 - kept_high) / (1.0 - kept_low);
        let mut divergence = 0.0;
        for v in &vocabulary {
            let old = self.probability(history, v);
            let new = if listed(v) && v.as_str() != removed.as_str() {
                old
            } else {
                new_backoff * self.probability(&history[1..], v)
            };
            divergence += old * (old / new).ln();
        }
        let mut history_probability = 1.0;
        for k in 0..history.len() {
            if !(k == 0 && history[0] == "<s>") {
                history_probability *= self.probability(&history[..k], &history[k]);
            }
        }
        history_probability * divergence
    }
}

#[test]
fn build_eval_mix_prune() {
    let folder = tempfile::tempdir().unwrap();
    let dir = folder.path();
    std::fs::write(
        dir.join("harbour.txt"),
        "the ferry leaves the north quay at dawn\nthe boats came back full of herring\n\
         my grandmother sold fish at the quay\nthe market was busy at dawn\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("farm.txt"),
        "the cows came back at dusk\nmy grandfather sold milk at the market\nthe barn was full of hay\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("dev.txt"),
        "the boats came back at dusk\nmy grandmother sold milk\n",
    )
    .unwrap();

    for (source, model, smoothing) in [
        ("harbour.txt", "harbour.arpa", "modified-kneser-ney"),
        ("farm.txt", "farm.arpa.gz", "witten-bell"),
    ] {
        let output = isogloss(&[
            "lm",
            "build",
            "--sentences",
            &path(dir, source),
            "--order",
            "3",
            "--smoothing",
            smoothing,
            "--out",
            &path(dir, model),
        ]);
        assert!(output.status.success(), "{:?}", text(&output));
    }

    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--sentences",
        &path(dir, "dev.txt"),
        "--json",
    ]);
    assert!(output.status.success(), "{:?}", text(&output));
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    // 6 + 4 words and two </s> are predicted (docs/language-models.md: every word and </s> counts).
    assert_eq!(report["tokens"], 12);
    // "dusk" and "milk" are not in the harbour text: 2 of 10 words.
    assert!((report["oov_rate"].as_f64().unwrap() - 0.2).abs() < 1e-12);
    // The perplexity the command prints is the one the written ARPA file gives by the ARPA
    // back-off rule, evaluated here without isogloss-lm.
    let dev = std::fs::read_to_string(dir.join("dev.txt")).unwrap();
    let independent = Arpa::read(&path(dir, "harbour.arpa")).perplexity(&dev);
    let printed = report["perplexity"].as_f64().unwrap();
    assert!(
        (printed - independent).abs() < 1e-6 * independent,
        "{printed} vs {independent}"
    );
    assert!(independent > 10.0, "{independent}"); // 2 of 12 tokens are <unk>

    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--arpa",
        &path(dir, "farm.arpa.gz"),
        "--sentences",
        &path(dir, "dev.txt"),
    ]);
    let (stdout, _) = text(&output);
    assert!(output.status.success());
    assert!(
        stdout.contains("harbour.arpa") && stdout.contains("farm.arpa.gz"),
        "{stdout}"
    );

    let output = isogloss(&[
        "lm",
        "mix",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--arpa",
        &path(dir, "farm.arpa.gz"),
        "--fit-sentences",
        &path(dir, "dev.txt"),
        "--out",
        &path(dir, "mixed.arpa"),
        "--json",
    ]);
    assert!(output.status.success(), "{:?}", text(&output));
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let weights: f64 = report["components"]
        .as_array()
        .unwrap()
        .iter()
        .map(|row| row["weight"].as_f64().unwrap())
        .sum();
    assert!((weights - 1.0).abs() < 1e-9);
    for row in report["components"].as_array().unwrap() {
        assert!(
            report["perplexity"].as_f64().unwrap() <= row["perplexity"].as_f64().unwrap() + 1e-9
        );
    }

    // Pruning, checked against its criterion: every removed n-gram changes the model by less
    // than the limit, every kept one by at least the limit unless a kept longer n-gram needs it
    // as prefix or suffix (docs/language-models.md). The change is computed here from the
    // definition of relative entropy, over the whole vocabulary.
    let original = Arpa::read(&path(dir, "mixed.arpa"));
    let mut divergences: Vec<(Vec<String>, f64)> = original
        .ngrams
        .keys()
        .filter(|k| k.len() >= 2)
        .map(|k| (k.clone(), original.removal_divergence(k)))
        .collect();
    divergences.sort_by(|a, b| a.1.total_cmp(&b.1));
    // A limit between two measured changes near the middle, so that about half go.
    let middle = divergences.len() / 2;
    let limit = 0.5 * (divergences[middle - 1].1 + divergences[middle].1);
    let output = isogloss(&[
        "lm",
        "prune",
        "--arpa",
        &path(dir, "mixed.arpa"),
        "--max-entropy-loss",
        &format!("{limit:e}"),
        "--out",
        &path(dir, "pruned.arpa"),
        "--sentences",
        &path(dir, "dev.txt"),
        "--json",
    ]);
    let (stdout, stderr) = text(&output);
    assert!(output.status.success(), "{stderr}");
    let pruned = Arpa::read(&path(dir, "pruned.arpa"));
    let needed = |ngram: &Vec<String>| {
        pruned.ngrams.keys().any(|longer| {
            longer.len() == ngram.len() + 1
                && (longer[..ngram.len()] == ngram[..] || longer[1..] == ngram[..])
        })
    };
    let (mut removed, mut kept) = (0, 0);
    for (ngram, divergence) in &divergences {
        let tolerance = 1e-9 * limit.max(*divergence);
        if pruned.ngrams.contains_key(ngram) {
            kept += 1;
            assert!(
                *divergence >= limit - tolerance || needed(ngram),
                "{ngram:?} was kept with a change of {divergence:e} < {limit:e}"
            );
        } else {
            removed += 1;
            assert!(
                *divergence < limit + tolerance,
                "{ngram:?} was removed with a change of {divergence:e} ≥ {limit:e}"
            );
        }
    }
    assert!(removed > 0 && kept > 0, "{removed} removed, {kept} kept");
    // Unigrams always stay; the perplexities printed are those of the two files.
    let unigrams = |model: &Arpa| model.ngrams.keys().filter(|k| k.len() == 1).count();
    assert_eq!(unigrams(&pruned), unigrams(&original));
    let report: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    for (side, model) in [("before", &original), ("after", &pruned)] {
        let printed = report[side]["perplexity"].as_f64().unwrap();
        let independent = model.perplexity(&dev);
        assert!(
            (printed - independent).abs() < 1e-6 * independent,
            "{side}: {printed} vs {independent}"
        );
    }
}

#[test]
fn bad_input_exits_with_1_and_names_the_problem() {
    let folder = tempfile::tempdir().unwrap();
    let dir = folder.path();
    std::fs::write(dir.join("empty.txt"), "").unwrap();
    std::fs::write(dir.join("one.txt"), "a b c\n").unwrap();
    let output = isogloss(&[
        "lm",
        "build",
        "--sentences",
        &path(dir, "one.txt"),
        "--order",
        "7",
        "--out",
        &path(dir, "x.arpa"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    assert!(text(&output).1.contains("order 7"), "{:?}", text(&output));
    let output = isogloss(&[
        "lm",
        "build",
        "--sentences",
        &path(dir, "empty.txt"),
        "--order",
        "3",
        "--out",
        &path(dir, "x.arpa"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    assert!(text(&output).1.contains("empty.txt"), "{:?}", text(&output));
    std::fs::write(
        dir.join("bad.arpa"),
        "\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5\t</s>\nhigh\tword\n\n\\end\\\n",
    )
    .unwrap();
    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "bad.arpa"),
        "--sentences",
        &path(dir, "one.txt"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let (_, stderr) = text(&output);
    assert!(
        stderr.contains("bad.arpa, line 6:") && stderr.contains("'high'"),
        "{stderr}"
    );
}
