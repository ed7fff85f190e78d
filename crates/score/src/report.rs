//! Scoring a system against a reference and summarizing it: overall and per group, the most
//! frequent confusions, bootstrap intervals and an optional paired comparison.
//!
//! Everything here returns plain serializable data; printing (Markdown, JSON, CSV) is the
//! caller's business, so the sweep and the demo reuse the same numbers.

use std::collections::{BTreeMap, HashMap};
use std::path::PathBuf;

use crate::align::{Edit, ErrorCounts};
use crate::bootstrap::{self, BootstrapOptions, Interval, PairedBootstrap, UtteranceErrors};
use crate::input::{Hypotheses, Reference};
use crate::tokens::{tokenize, TokenRules};
use crate::variants::align;
use crate::variants::VariantMap;
use crate::ScoreError;

/// Settings of a scoring run.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ScoreOptions {
    /// Token rules applied to reference and hypotheses alike.
    pub rules: TokenRules,
    /// Bootstrap settings for the intervals.
    pub bootstrap: BootstrapOptions,
    /// How many confusions the report lists.
    pub top_confusions: usize,
}

impl Default for ScoreOptions {
    fn default() -> Self {
        ScoreOptions {
            rules: TokenRules::default(),
            bootstrap: BootstrapOptions::default(),
            top_confusions: 20,
        }
    }
}

/// Scores of one utterance.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct UtteranceScore {
    /// Utterance id.
    pub id: String,
    /// Plain counts.
    pub plain: ErrorCounts,
    /// Counts with variant substitutions forgiven (present when a variant map was given).
    pub flexible: Option<ErrorCounts>,
    /// Whether the hypotheses lacked this utterance (scored as all deletions).
    pub missing: bool,
}

/// One system scored utterance by utterance, in reference order.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ScoredSystem {
    /// The hypotheses file (or label).
    pub hypotheses: PathBuf,
    /// One entry per reference utterance, in reference order.
    pub utterances: Vec<UtteranceScore>,
    /// Substitution counts by (reference word, hypothesis word), from the plain alignments.
    pub substitutions: BTreeMap<(String, String), u64>,
}

impl ScoredSystem {
    /// Ids of reference utterances the hypotheses lacked.
    pub fn missing(&self) -> Vec<String> {
        self.utterances
            .iter()
            .filter(|u| u.missing)
            .map(|u| u.id.clone())
            .collect()
    }
}

/// Scores hypotheses against a reference. Every hypothesis id must occur in the reference;
/// reference utterances without a hypothesis are scored as all deletions and marked missing.
pub fn score_system(
    reference: &Reference,
    hypotheses: &Hypotheses,
    variants: Option<&VariantMap>,
    rules: &TokenRules,
) -> Result<ScoredSystem, ScoreError> {
    let known: HashMap<&str, usize> = reference
        .utterances
        .iter()
        .enumerate()
        .map(|(index, u)| (u.id.as_str(), index))
        .collect();
    let mut texts: Vec<Option<&str>> = vec![None; reference.utterances.len()];
    let mut unknown = hypotheses
        .entries
        .iter()
        .filter(|h| !known.contains_key(h.id.as_str()));
    if let Some(first) = unknown.next() {
        return Err(ScoreError::UnknownHypothesis {
            path: hypotheses.path.clone(),
            line: first.line,
            id: first.id.clone(),
            reference: reference.path.clone(),
            more: unknown.count(),
        });
    }
    for hypothesis in &hypotheses.entries {
        texts[known[hypothesis.id.as_str()]] = Some(&hypothesis.text);
    }

    let no_variants = VariantMap::new();
    let mut substitutions = BTreeMap::new();
    let utterances = reference
        .utterances
        .iter()
        .zip(texts)
        .map(|(utterance, text)| {
            let reference_words = tokenize(&utterance.text, rules);
            let hypothesis_words = tokenize(text.unwrap_or(""), rules);
            let alignment = align(&reference_words, &hypothesis_words, &no_variants);
            for step in &alignment.steps {
                if let (Edit::Substitution, Some(r), Some(h)) =
                    (step.edit, step.reference, step.hypothesis)
                {
                    *substitutions
                        .entry((reference_words[r].clone(), hypothesis_words[h].clone()))
                        .or_insert(0) += 1;
                }
            }
            UtteranceScore {
                id: utterance.id.clone(),
                plain: alignment.counts(),
                flexible: variants
                    .map(|map| align(&reference_words, &hypothesis_words, map).counts()),
                missing: text.is_none(),
            }
        })
        .collect();
    Ok(ScoredSystem {
        hypotheses: hypotheses.path.clone(),
        utterances,
        substitutions,
    })
}

/// Error rates and counts over a set of utterances.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Summary {
    /// Utterances summed.
    pub utterances: usize,
    /// Reference words summed.
    pub ref_words: u64,
    /// Plain word error rate; `None` without reference words.
    pub wer: Option<f64>,
    /// Flexible word error rate (with a variant map).
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub flexible_wer: Option<f64>,
    /// Bootstrap interval of the plain rate.
    pub wer_interval: Option<Interval>,
    /// Bootstrap interval of the flexible rate.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub flexible_wer_interval: Option<Interval>,
    /// Plain counts.
    pub plain: ErrorCounts,
    /// Flexible counts.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub flexible: Option<ErrorCounts>,
}

fn errors_of(counts: &ErrorCounts) -> UtteranceErrors {
    UtteranceErrors {
        errors: counts.errors(),
        ref_words: counts.ref_words,
    }
}

/// Summarizes the given utterances, with bootstrap intervals.
pub fn summarize<'a>(
    utterances: impl IntoIterator<Item = &'a UtteranceScore>,
    bootstrap_options: &BootstrapOptions,
) -> Summary {
    let utterances: Vec<&UtteranceScore> = utterances.into_iter().collect();
    let plain: ErrorCounts = utterances.iter().map(|u| u.plain).sum();
    let flexible: Option<ErrorCounts> = utterances.iter().map(|u| u.flexible).sum();
    let plain_errors: Vec<UtteranceErrors> =
        utterances.iter().map(|u| errors_of(&u.plain)).collect();
    let flexible_errors: Option<Vec<UtteranceErrors>> = utterances
        .iter()
        .map(|u| u.flexible.as_ref().map(errors_of))
        .collect();
    Summary {
        utterances: utterances.len(),
        ref_words: plain.ref_words,
        wer: plain.error_rate(),
        flexible_wer: flexible.and_then(|c| c.error_rate()),
        wer_interval: bootstrap::interval(&plain_errors, bootstrap_options),
        flexible_wer_interval: flexible_errors
            .and_then(|errors| bootstrap::interval(&errors, bootstrap_options)),
        plain,
        flexible,
    }
}

/// The summary of one group (one value of one grouping column).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GroupSummary {
    /// The grouping column, e.g. `dialect`.
    pub column: String,
    /// The value shared by the group's utterances (may be empty).
    pub value: String,
    /// Rates and counts of the group.
    #[serde(flatten)]
    pub summary: Summary,
}

/// A reference word recognized as another word, and how often.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Confusion {
    /// The reference word.
    pub reference: String,
    /// The word recognized instead.
    pub hypothesis: String,
    /// How often (in the plain alignments).
    pub count: u64,
    /// Whether the variant map declares the pair permissible (so flexible WER forgives it).
    pub variant: bool,
}

/// A paired comparison of the reported system (system 1) with a second one.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Comparison {
    /// The second system's hypotheses.
    pub hypotheses: PathBuf,
    /// Reference utterances the second system lacks.
    pub missing_utterances: Vec<String>,
    /// The second system's overall summary.
    #[serde(flatten)]
    pub overall: Summary,
    /// Paired bootstrap of plain WER.
    pub wer_difference: Option<PairedDifference>,
    /// Paired bootstrap of flexible WER (with a variant map).
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub flexible_wer_difference: Option<PairedDifference>,
}

/// The difference of one rate between two systems.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PairedDifference {
    /// rate(system 2) − rate(system 1) on the whole test set.
    pub difference: f64,
    /// Paired bootstrap result.
    #[serde(flatten)]
    pub bootstrap: PairedBootstrap,
}

/// Everything a scoring run reports.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ScoreReport {
    /// The reference file.
    pub reference: PathBuf,
    /// The transcript column scored against.
    pub column: String,
    /// The hypotheses file.
    pub hypotheses: PathBuf,
    /// The settings used.
    pub options: ScoreOptions,
    /// Reference utterances the hypotheses lacked (scored as all deletions).
    pub missing_utterances: Vec<String>,
    /// Overall rates and counts.
    #[serde(flatten)]
    pub overall: Summary,
    /// One summary per value of each grouping column, columns in the order asked, values sorted.
    pub groups: Vec<GroupSummary>,
    /// The most frequent substitutions, most frequent first.
    pub confusions: Vec<Confusion>,
    /// Paired comparison with a second system, when asked for.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub comparison: Option<Comparison>,
}

/// Builds the report of a scored system; `second` adds a paired comparison.
pub fn report(
    reference: &Reference,
    system: &ScoredSystem,
    second: Option<&ScoredSystem>,
    variants: Option<&VariantMap>,
    options: &ScoreOptions,
) -> ScoreReport {
    let overall = summarize(&system.utterances, &options.bootstrap);

    let mut groups = Vec::new();
    for (column_index, column) in reference.group_columns.iter().enumerate() {
        let mut members: BTreeMap<&str, Vec<&UtteranceScore>> = BTreeMap::new();
        for (utterance, score) in reference.utterances.iter().zip(&system.utterances) {
            // A hand-built reference may lack a grouping value; it then falls in the empty group.
            let value = utterance
                .groups
                .get(column_index)
                .map_or("", String::as_str);
            members.entry(value).or_default().push(score);
        }
        for (value, scores) in members {
            groups.push(GroupSummary {
                column: column.clone(),
                value: value.to_string(),
                summary: summarize(scores, &options.bootstrap),
            });
        }
    }

    let mut confusions: Vec<Confusion> = system
        .substitutions
        .iter()
        .map(|((reference_word, hypothesis_word), &count)| Confusion {
            variant: variants.is_some_and(|map| {
                map.compare(reference_word, hypothesis_word) == crate::align::Match::Variant
            }),
            reference: reference_word.clone(),
            hypothesis: hypothesis_word.clone(),
            count,
        })
        .collect();
    // Stable sort over the alphabetical map order: ties stay alphabetical.
    confusions.sort_by_key(|c| std::cmp::Reverse(c.count));
    confusions.truncate(options.top_confusions);

    let comparison = second.map(|second| compare(system, second, options));

    ScoreReport {
        reference: reference.path.clone(),
        column: reference.column.clone(),
        hypotheses: system.hypotheses.clone(),
        options: *options,
        missing_utterances: system.missing(),
        overall,
        groups,
        confusions,
        comparison,
    }
}

fn compare(first: &ScoredSystem, second: &ScoredSystem, options: &ScoreOptions) -> Comparison {
    let overall1 = summarize(&first.utterances, &options.bootstrap);
    let overall2 = summarize(&second.utterances, &options.bootstrap);
    let plain = |system: &ScoredSystem| -> Vec<UtteranceErrors> {
        system
            .utterances
            .iter()
            .map(|u| errors_of(&u.plain))
            .collect()
    };
    let flexible = |system: &ScoredSystem| -> Option<Vec<UtteranceErrors>> {
        system
            .utterances
            .iter()
            .map(|u| u.flexible.as_ref().map(errors_of))
            .collect()
    };
    let difference =
        |rate1: Option<f64>, rate2: Option<f64>, e1: &[UtteranceErrors], e2: &[UtteranceErrors]| {
            let (rate1, rate2) = (rate1?, rate2?);
            Some(PairedDifference {
                difference: rate2 - rate1,
                bootstrap: bootstrap::paired(e1, e2, &options.bootstrap)?,
            })
        };
    let wer_difference = difference(overall1.wer, overall2.wer, &plain(first), &plain(second));
    let flexible_wer_difference = match (flexible(first), flexible(second)) {
        (Some(e1), Some(e2)) => difference(overall1.flexible_wer, overall2.flexible_wer, &e1, &e2),
        _ => None,
    };
    Comparison {
        hypotheses: second.hypotheses.clone(),
        missing_utterances: second.missing(),
        overall: overall2,
        wer_difference,
        flexible_wer_difference,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::input::{Hypothesis, ReferenceUtterance};

    fn reference(rows: &[(&str, &str, &str)]) -> Reference {
        Reference {
            path: "ref.tsv".into(),
            column: "dialectal".into(),
            group_columns: vec!["dialect".into()],
            utterances: rows
                .iter()
                .enumerate()
                .map(|(i, (id, dialect, text))| ReferenceUtterance {
                    id: id.to_string(),
                    line: i + 2,
                    text: text.to_string(),
                    groups: vec![dialect.to_string()],
                })
                .collect(),
        }
    }

    fn hypotheses(path: &str, rows: &[(&str, &str)]) -> Hypotheses {
        Hypotheses {
            path: path.into(),
            entries: rows
                .iter()
                .enumerate()
                .map(|(i, (id, text))| Hypothesis {
                    id: id.to_string(),
                    line: i + 2,
                    text: text.to_string(),
                })
                .collect(),
        }
    }

    fn variants() -> VariantMap {
        let mut map = VariantMap::new();
        map.insert("owd", "old");
        map.insert("auld", "old");
        map
    }

    const REFERENCE: [(&str, &str, &str); 3] = [
        ("u1", "fells", "Oor hoose wis auld."),
        ("u2", "marsh", "the coo were in milk"),
        ("u3", "marsh", "owd"),
    ];

    #[test]
    fn a_variant_substitution_is_forgiven_and_another_word_is_not() {
        let reference = reference(&REFERENCE);
        // u1: `owd` is a variant of `auld` (forgiven); u2: `cou` is not a variant of `coo`.
        let hyps = hypotheses(
            "hyp.tsv",
            &[
                ("u1", "oor hoose wis owd"),
                ("u2", "the cou were in milk"),
                ("u3", "owd"),
            ],
        );
        let map = variants();
        let scored = score_system(&reference, &hyps, Some(&map), &TokenRules::default()).unwrap();
        assert_eq!(scored.utterances[0].plain.substitutions, 1);
        let flexible = scored.utterances[0].flexible.unwrap();
        assert_eq!((flexible.errors(), flexible.forgiven), (0, 1));
        let flexible = scored.utterances[1].flexible.unwrap();
        assert_eq!((flexible.substitutions, flexible.forgiven), (1, 0));

        let report = report(
            &reference,
            &scored,
            None,
            Some(&map),
            &ScoreOptions::default(),
        );
        assert_eq!(report.overall.ref_words, 10);
        assert_eq!(report.overall.wer, Some(0.2));
        assert_eq!(report.overall.flexible_wer, Some(0.1));
        assert_eq!(report.confusions.len(), 2);
        let by_pair: Vec<(&str, &str, bool)> = report
            .confusions
            .iter()
            .map(|c| (c.reference.as_str(), c.hypothesis.as_str(), c.variant))
            .collect();
        // Both pairs occur once, so they stay in alphabetical order of the reference word.
        assert_eq!(by_pair, [("auld", "owd", true), ("coo", "cou", false)]);
    }

    #[test]
    fn an_empty_variant_map_gives_flexible_equal_to_plain() {
        let reference = reference(&REFERENCE);
        let hyps = hypotheses("hyp.tsv", &[("u1", "oor hoose wis owd"), ("u2", "the coo")]);
        let empty = VariantMap::new();
        let scored = score_system(&reference, &hyps, Some(&empty), &TokenRules::default()).unwrap();
        let report = report(
            &reference,
            &scored,
            None,
            Some(&empty),
            &ScoreOptions::default(),
        );
        assert_eq!(report.overall.flexible_wer, report.overall.wer);
        assert_eq!(report.overall.flexible, Some(report.overall.plain));
    }

    #[test]
    fn missing_utterances_are_all_deletions_and_groups_add_up() {
        let reference = reference(&REFERENCE);
        let hyps = hypotheses("hyp.tsv", &[("u1", "oor hoose wis auld")]);
        let scored = score_system(&reference, &hyps, None, &TokenRules::default()).unwrap();
        assert_eq!(scored.missing(), ["u2", "u3"]);
        let report = report(&reference, &scored, None, None, &ScoreOptions::default());
        assert_eq!(report.missing_utterances, ["u2", "u3"]);
        assert_eq!(report.overall.plain.deletions, 6);
        assert_eq!(report.overall.flexible_wer, None);
        let groups: Vec<(&str, u64, usize)> = report
            .groups
            .iter()
            .map(|g| {
                (
                    g.value.as_str(),
                    g.summary.plain.errors(),
                    g.summary.utterances,
                )
            })
            .collect();
        assert_eq!(groups, [("fells", 0, 1), ("marsh", 6, 2)]);
    }

    #[test]
    fn an_unknown_hypothesis_id_names_file_and_line() {
        let reference = reference(&REFERENCE);
        let hyps = hypotheses("hyp.tsv", &[("u1", "a"), ("u9", "b"), ("u8", "c")]);
        let message = score_system(&reference, &hyps, None, &TokenRules::default())
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("hyp.tsv")
                && message.contains("line 3")
                && message.contains("`u9`")
                && message.contains("ref.tsv")
                && message.contains("1 more"),
            "{message}"
        );
    }

    #[test]
    fn comparison_reports_the_better_second_system() {
        let rows: Vec<(String, &str, String)> = (0..40)
            .map(|i| (format!("u{i}"), "fells", format!("oor hoose wis auld {i}")))
            .collect();
        let rows: Vec<(&str, &str, &str)> = rows
            .iter()
            .map(|(id, d, t)| (id.as_str(), *d, t.as_str()))
            .collect();
        let reference = reference(&rows);
        // Of 5 reference words, `worse` drops 3 (rate 0.6) and `better` drops 2 (rate 0.4).
        let worse: Vec<(&str, &str)> = rows.iter().map(|(id, _, _)| (*id, "oor wis")).collect();
        let better: Vec<(&str, &str)> = rows
            .iter()
            .map(|(id, _, _)| (*id, "oor hoose wis"))
            .collect();
        let rules = TokenRules::default();
        let first = score_system(&reference, &hypotheses("a.tsv", &worse), None, &rules).unwrap();
        let second = score_system(&reference, &hypotheses("b.tsv", &better), None, &rules).unwrap();
        let options = ScoreOptions::default();
        let report = report(&reference, &first, Some(&second), None, &options);
        let comparison = report.comparison.unwrap();
        let difference = comparison.wer_difference.unwrap();
        assert!((difference.difference - (-0.2)).abs() < 1e-12);
        assert_eq!(difference.bootstrap.probability_system2_better, 1.0);
        assert!(difference
            .bootstrap
            .difference_interval
            .contains(difference.difference));
    }
}
