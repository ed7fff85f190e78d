//! Minimum-cost alignment of a reference and a hypothesis (Levenshtein distance with a
//! backtrace), and the error counts read off it.
//!
//! One dynamic programme serves both error rates: it asks a comparison function whether two
//! items are equal, permissible variants of each other, or different. Plain WER treats variants
//! as different; flexible WER lets a variant substitution cost 0. Because the variant cost is
//! never above the plain cost, the flexible distance can never exceed the plain one.
//!
//! This module knows nothing of spelling variants: [`crate::variants`] builds on it (its
//! [`crate::variants::align`] aligns words with a variant map), never the other way round.

use std::ops::{Add, AddAssign};

/// How two aligned items compare.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Match {
    /// Identical: costs 0.
    Exact,
    /// Permissible spelling variants of each other: costs 0, counted as forgiven.
    Variant,
    /// Different: a substitution, costs 1.
    Different,
}

/// One step of an alignment.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Edit {
    /// Reference and hypothesis item are identical.
    Correct,
    /// The hypothesis item is a permissible variant of the reference item (cost 0).
    Variant,
    /// The hypothesis item replaces the reference item.
    Substitution,
    /// The reference item has no counterpart in the hypothesis.
    Deletion,
    /// The hypothesis item has no counterpart in the reference.
    Insertion,
}

/// One aligned pair: positions into the reference and hypothesis sequences (absent for
/// insertions and deletions respectively).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct AlignedPair {
    /// What happened at this step.
    pub edit: Edit,
    /// Index into the reference, `None` for an insertion.
    pub reference: Option<usize>,
    /// Index into the hypothesis, `None` for a deletion.
    pub hypothesis: Option<usize>,
}

/// A minimum-cost alignment, in reading order.
#[derive(Debug, Clone, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub struct Alignment {
    /// The steps from the first to the last item.
    pub steps: Vec<AlignedPair>,
}

impl Alignment {
    /// The error counts of this alignment.
    pub fn counts(&self) -> ErrorCounts {
        let mut counts = ErrorCounts::default();
        for step in &self.steps {
            match step.edit {
                Edit::Correct => counts.correct += 1,
                Edit::Variant => counts.forgiven += 1,
                Edit::Substitution => counts.substitutions += 1,
                Edit::Deletion => counts.deletions += 1,
                Edit::Insertion => counts.insertions += 1,
            }
        }
        counts.ref_words =
            counts.correct + counts.forgiven + counts.substitutions + counts.deletions;
        counts
    }

    /// The alignment cost: substitutions + deletions + insertions (the edit distance).
    pub fn cost(&self) -> u64 {
        self.counts().errors()
    }
}

/// Error counts of one utterance or a sum over many. `ref_words` is the number of reference
/// tokens, the denominator of the error rate.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub struct ErrorCounts {
    /// Reference tokens.
    pub ref_words: u64,
    /// Reference tokens matched exactly.
    pub correct: u64,
    /// Reference tokens matched by a permissible variant (always 0 for plain WER).
    pub forgiven: u64,
    /// Substitutions.
    pub substitutions: u64,
    /// Deletions.
    pub deletions: u64,
    /// Insertions.
    pub insertions: u64,
}

impl ErrorCounts {
    /// Substitutions + deletions + insertions.
    pub fn errors(&self) -> u64 {
        self.substitutions + self.deletions + self.insertions
    }

    /// Hypothesis tokens.
    pub fn hyp_words(&self) -> u64 {
        self.correct + self.forgiven + self.substitutions + self.insertions
    }

    /// (S + D + I) / N; `None` when there are no reference words (the rate is undefined).
    pub fn error_rate(&self) -> Option<f64> {
        (self.ref_words > 0).then(|| self.errors() as f64 / self.ref_words as f64)
    }
}

impl AddAssign for ErrorCounts {
    fn add_assign(&mut self, other: ErrorCounts) {
        self.ref_words += other.ref_words;
        self.correct += other.correct;
        self.forgiven += other.forgiven;
        self.substitutions += other.substitutions;
        self.deletions += other.deletions;
        self.insertions += other.insertions;
    }
}

impl Add for ErrorCounts {
    type Output = ErrorCounts;
    fn add(mut self, other: ErrorCounts) -> ErrorCounts {
        self += other;
        self
    }
}

impl std::iter::Sum for ErrorCounts {
    fn sum<I: Iterator<Item = ErrorCounts>>(iter: I) -> ErrorCounts {
        iter.fold(ErrorCounts::default(), Add::add)
    }
}

/// Aligns any two sequences with unit costs for substitution, deletion and insertion and cost 0
/// for `Match::Exact` and `Match::Variant`.
///
/// Ties between alignments of equal cost are broken the same way every time: walking back from
/// the end, a diagonal step (correct, variant or substitution) is preferred over a deletion, and
/// a deletion over an insertion.
pub fn align_by<T>(
    reference: &[T],
    hypothesis: &[T],
    compare: impl Fn(&T, &T) -> Match,
) -> Alignment {
    let rows = reference.len() + 1;
    let cols = hypothesis.len() + 1;
    // cost[i * cols + j]: distance between reference[..i] and hypothesis[..j].
    let mut cost = vec![0u32; rows * cols];
    // The comparison is kept so that the backtrace need not call `compare` again.
    let mut matches = vec![Match::Different; reference.len() * hypothesis.len()];
    for (j, first_row) in cost.iter_mut().take(cols).enumerate() {
        *first_row = j as u32;
    }
    for i in 1..rows {
        cost[i * cols] = i as u32;
        for j in 1..cols {
            let relation = compare(&reference[i - 1], &hypothesis[j - 1]);
            matches[(i - 1) * hypothesis.len() + (j - 1)] = relation;
            let diagonal = cost[(i - 1) * cols + (j - 1)] + u32::from(relation == Match::Different);
            let deletion = cost[(i - 1) * cols + j] + 1;
            let insertion = cost[i * cols + (j - 1)] + 1;
            cost[i * cols + j] = diagonal.min(deletion).min(insertion);
        }
    }

    let mut steps = Vec::with_capacity(rows.max(cols));
    let (mut i, mut j) = (reference.len(), hypothesis.len());
    while i > 0 || j > 0 {
        let here = cost[i * cols + j];
        if i > 0 && j > 0 {
            let relation = matches[(i - 1) * hypothesis.len() + (j - 1)];
            let step_cost = u32::from(relation == Match::Different);
            if cost[(i - 1) * cols + (j - 1)] + step_cost == here {
                let edit = match relation {
                    Match::Exact => Edit::Correct,
                    Match::Variant => Edit::Variant,
                    Match::Different => Edit::Substitution,
                };
                i -= 1;
                j -= 1;
                steps.push(AlignedPair {
                    edit,
                    reference: Some(i),
                    hypothesis: Some(j),
                });
                continue;
            }
        }
        if i > 0 && cost[(i - 1) * cols + j] + 1 == here {
            i -= 1;
            steps.push(AlignedPair {
                edit: Edit::Deletion,
                reference: Some(i),
                hypothesis: None,
            });
        } else {
            j -= 1;
            steps.push(AlignedPair {
                edit: Edit::Insertion,
                reference: None,
                hypothesis: Some(j),
            });
        }
    }
    steps.reverse();
    Alignment { steps }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn exact<T: PartialEq>(a: &T, b: &T) -> Match {
        if a == b {
            Match::Exact
        } else {
            Match::Different
        }
    }

    fn chars(s: &str) -> Vec<char> {
        s.chars().collect()
    }

    #[test]
    fn intention_to_execution_costs_five() {
        // Jurafsky & Martin, Speech and Language Processing, ch. 2 (minimum edit distance):
        // "intention" → "execution" is 5 with unit insertion, deletion and substitution costs.
        let alignment = align_by(&chars("intention"), &chars("execution"), exact);
        assert_eq!(alignment.cost(), 5);
        let counts = alignment.counts();
        assert_eq!(counts.ref_words, 9);
        assert_eq!(counts.hyp_words(), 9);
    }

    #[test]
    fn backtrace_covers_both_sequences_in_order() {
        let reference = chars("kitten");
        let hypothesis = chars("sitting");
        let alignment = align_by(&reference, &hypothesis, exact);
        // Common-practice textbook pair: kitten → sitting has edit distance 3.
        assert_eq!(alignment.cost(), 3);
        let refs: Vec<usize> = alignment.steps.iter().filter_map(|s| s.reference).collect();
        let hyps: Vec<usize> = alignment
            .steps
            .iter()
            .filter_map(|s| s.hypothesis)
            .collect();
        assert_eq!(refs, (0..reference.len()).collect::<Vec<_>>());
        assert_eq!(hyps, (0..hypothesis.len()).collect::<Vec<_>>());
        for step in &alignment.steps {
            if let (Some(r), Some(h)) = (step.reference, step.hypothesis) {
                assert_eq!(reference[r] == hypothesis[h], step.edit == Edit::Correct);
            }
        }
    }

    #[test]
    fn ties_are_broken_the_same_way_every_time() {
        // "a b" → "b a": cost 2 either as two substitutions or as deletion + insertion; the
        // diagonal preference picks the substitutions.
        let reference = ["a", "b"];
        let hypothesis = ["b", "a"];
        let alignment = align_by(&reference, &hypothesis, exact);
        let edits: Vec<Edit> = alignment.steps.iter().map(|s| s.edit).collect();
        assert_eq!(edits, [Edit::Substitution, Edit::Substitution]);
        assert_eq!(alignment, align_by(&reference, &hypothesis, exact));
    }

    #[test]
    fn empty_sides_are_all_insertions_or_deletions() {
        let words = ["x", "y", "z"];
        let none: [&str; 0] = [];
        let deleted = align_by(&words, &none, exact).counts();
        assert_eq!((deleted.deletions, deleted.ref_words), (3, 3));
        let inserted = align_by(&none, &words, exact).counts();
        assert_eq!((inserted.insertions, inserted.ref_words), (3, 0));
        assert_eq!(inserted.error_rate(), None);
        assert!(align_by(&none, &none, exact).steps.is_empty());
    }
}
