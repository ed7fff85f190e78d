//! Smoothing: turning counts into an interpolated model, then into back-off (ARPA) form.
//!
//! All four methods share one shape (the interpolated form of Chen & Goodman 1998; common practice):
//!
//! ```text
//! P(w | h) = d(c(h w)) / den(h) + γ(h) · P(w | h')        h' = h without its first word
//! γ(h)     = (den(h) − Σ_{w kept} d(c(h w))) / den(h)      so that Σ_w P(w | h) = 1
//! P(w)     = d(c(w)) / den(ε) + γ(ε) / |V|                the uniform base distribution
//! ```
//!
//! | method | count c | discounted count d(c) | den(h) |
//! |---|---|---|---|
//! | modified Kneser-Ney | KN counts¹ | c − D1, D2 or D3+ (c = 1, 2, ≥ 3) | Σ c |
//! | Kneser-Ney | KN counts¹ | c − D | Σ c |
//! | Witten-Bell | raw | c | Σ c + N1+(h ·) |
//! | additive (add-k) | raw | c | Σ c + k·|V| |
//!
//! ¹ raw counts at the highest order and for n-grams beginning with `<s>`, continuation counts
//! otherwise. Discounts per order come from the count-of-counts n1…n4 of the counts of that order:
//! Y = n1 / (n1 + 2 n2), D1 = 1 − 2Y n2/n1, D2 = 2 − 3Y n3/n2, D3+ = 3 − 4Y n4/n3 (modified),
//! D = Y (single discount).
//!
//! **Degenerate count-of-counts** (tiny corpora): when some n1…n4 needed is zero, or a discount
//! falls outside (0, its count class) — D1 ∉ (0, 1), D2 ∉ (0, 2), D3+ ∉ (0, 3), D ∉ (0, 1) —
//! that order uses the single discount Y when Y ∈ (0, 1), else 0.5, for every count class, and a
//! warning naming the order and the count-of-counts is returned with the model.
//!
//! Additive smoothing here interpolates with the lower order (a Dirichlet prior centred on the
//! lower-order distribution, so that the result has an exact back-off form): at the unigram level
//! it is exactly Lidstone's (c + k) / (N + k|V|); at higher orders it differs from Lidstone's
//! estimate with a uniform prior.
//!
//! **Cut-offs** remove n-grams of order n ≥ 2 seen fewer than `cutoffs[n-1]` times (raw count),
//! except prefixes and suffixes of kept longer n-grams (the ARPA form needs them). Their
//! probability mass goes to γ(h); discounts and den(h) are computed before cutting.
//!
//! In back-off form, a kept n-gram stores its interpolated probability and every context h stores
//! bo(h) = γ(h): for a word not kept after h the interpolated formula reduces to γ(h)·P(w | h').

use crate::counts::{NgramCounts, START_ID};
use crate::error::LmError;
use crate::model::{AddError, ArpaModel, ModelBuilder};

/// How to smooth counts.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Smoothing {
    /// Interpolated modified Kneser-Ney with D1, D2, D3+ per order (the default).
    #[default]
    ModifiedKneserNey,
    /// Interpolated Kneser-Ney with one discount per order.
    KneserNey,
    /// Interpolated Witten-Bell.
    WittenBell,
    /// Additive smoothing with k added to every count (interpolated with the lower order).
    Additive {
        /// The pseudo-count, > 0.
        k: f64,
    },
}

impl Smoothing {
    /// The names of the methods, as the command line and the sweep file spell them.
    pub const NAMES: [&'static str; 4] =
        ["modified-kneser-ney", "kneser-ney", "witten-bell", "add-k"];

    /// The method's name: `modified-kneser-ney`, `kneser-ney`, `witten-bell` or `add-k`.
    pub fn name(&self) -> &'static str {
        match self {
            Smoothing::ModifiedKneserNey => Self::NAMES[0],
            Smoothing::KneserNey => Self::NAMES[1],
            Smoothing::WittenBell => Self::NAMES[2],
            Smoothing::Additive { .. } => Self::NAMES[3],
        }
    }

    /// The method of a name from [`Smoothing::NAMES`]; `add-k` takes the pseudo-count `k`.
    /// `None` for any other name.
    pub fn from_name(name: &str, k: f64) -> Option<Smoothing> {
        match name {
            "modified-kneser-ney" => Some(Smoothing::ModifiedKneserNey),
            "kneser-ney" => Some(Smoothing::KneserNey),
            "witten-bell" => Some(Smoothing::WittenBell),
            "add-k" => Some(Smoothing::Additive { k }),
            _ => None,
        }
    }
}

impl std::fmt::Display for Smoothing {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Smoothing::Additive { k } => write!(f, "add-k (k = {k})"),
            other => f.write_str(other.name()),
        }
    }
}

/// Options of [`estimate_with`].
#[derive(Clone, Debug, Default)]
pub struct EstimateOptions {
    /// The smoothing method.
    pub smoothing: Smoothing,
    /// Minimum raw count per order, unigrams first (missing entries and unigrams: keep all).
    pub cutoffs: Vec<u32>,
    /// Also return the interpolated form ([`Estimate::interpolated`]), for checks; costs memory.
    pub keep_interpolated: bool,
}

/// The discounts of one order (all zero for Witten-Bell and additive smoothing).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Discounts {
    /// Subtracted from counts of 1.
    pub d1: f64,
    /// Subtracted from counts of 2.
    pub d2: f64,
    /// Subtracted from counts of 3 and more.
    pub d3_plus: f64,
}

impl Discounts {
    fn of(&self, count: u64) -> f64 {
        match count {
            0 => 0.0,
            1 => self.d1,
            2 => self.d2,
            _ => self.d3_plus,
        }
    }
}

/// A smoothed model: the back-off form, the discounts used and any warnings.
#[derive(Clone, Debug)]
pub struct Estimate {
    /// The model in back-off form.
    pub model: ArpaModel,
    /// Discounts per order, unigrams first.
    pub discounts: Vec<Discounts>,
    /// Problems the caller should show the user (for example degenerate count-of-counts).
    pub warnings: Vec<String>,
    /// The interpolated form, when [`EstimateOptions::keep_interpolated`] asked for it.
    pub interpolated: Option<InterpolatedModel>,
}

/// The model in its interpolated form: per order, the discounted term of every kept n-gram and
/// γ of every context. [`InterpolatedModel::log10_probability`] evaluates the recursion directly
/// (binary search; for checks and small models).
#[derive(Clone, Debug)]
pub struct InterpolatedModel {
    bits: u32,
    vocabulary_size: usize,
    /// Unigram discounted terms, by word.
    unigram_term: Vec<f64>,
    unigram_gamma: f64,
    /// Per order n ≥ 2: kept keys, ascending, and their discounted terms.
    keys: Vec<Vec<u128>>,
    terms: Vec<Vec<f64>>,
    /// Per order n ≥ 2: contexts (packed (n−1)-grams), ascending, and their γ.
    contexts: Vec<Vec<u128>>,
    gammas: Vec<Vec<f64>>,
    index: std::collections::HashMap<String, u32>,
}

impl InterpolatedModel {
    /// `log10 P(word | context)` by the interpolation recursion; unknown words are `<unk>`.
    pub fn log10_probability(&self, context: &[&str], word: &str) -> f64 {
        let id = |word: &str| {
            self.index
                .get(word)
                .copied()
                .unwrap_or(crate::counts::UNKNOWN_ID)
        };
        let word = id(word);
        let context: Vec<u32> = context.iter().map(|word| id(word)).collect();
        let mut probability =
            self.unigram_term[word as usize] + self.unigram_gamma / self.vocabulary_size as f64;
        for n in 2..=self.keys.len() + 1 {
            if context.len() < n - 1 {
                break;
            }
            let history = &context[context.len() - (n - 1)..];
            let history_key = history
                .iter()
                .fold(0u128, |key, &word| (key << self.bits) | u128::from(word));
            let Ok(position) = self.contexts[n - 2].binary_search(&history_key) else {
                break;
            };
            let key = (history_key << self.bits) | u128::from(word);
            let term = self.keys[n - 2]
                .binary_search(&key)
                .map_or(0.0, |index| self.terms[n - 2][index]);
            probability = term + self.gammas[n - 2][position] * probability;
        }
        probability.log10()
    }
}

/// Smooths `counts` with default options (no cut-offs).
pub fn estimate(counts: &NgramCounts, smoothing: Smoothing) -> Result<Estimate, LmError> {
    estimate_with(
        counts,
        &EstimateOptions {
            smoothing,
            ..EstimateOptions::default()
        },
    )
}

fn discounts_for(
    smoothing: Smoothing,
    n: usize,
    counts: impl Iterator<Item = u64>,
    warnings: &mut Vec<String>,
) -> Discounts {
    let mut count_of_counts = [0u64; 5];
    for count in counts {
        if (1..=4).contains(&count) {
            count_of_counts[count as usize] += 1;
        }
    }
    let [_, n1, n2, n3, n4] = count_of_counts.map(|value| value as f64);
    let single = n1 / (n1 + 2.0 * n2);
    let fallback = |reason: &str, warnings: &mut Vec<String>| {
        let d = if single > 0.0 && single < 1.0 {
            single
        } else {
            0.5
        };
        warnings.push(format!(
            "order {n}: count-of-counts n1={n1} n2={n2} n3={n3} n4={n4} give {reason}; \
             using the single discount {d:.4} for every count"
        ));
        Discounts {
            d1: d,
            d2: d,
            d3_plus: d,
        }
    };
    match smoothing {
        Smoothing::ModifiedKneserNey => {
            if n1 == 0.0 || n2 == 0.0 || n3 == 0.0 || n4 == 0.0 {
                return fallback(
                    "no modified discounts (a count-of-counts is zero)",
                    warnings,
                );
            }
            let d1 = 1.0 - 2.0 * single * n2 / n1;
            let d2 = 2.0 - 3.0 * single * n3 / n2;
            let d3_plus = 3.0 - 4.0 * single * n4 / n3;
            if !(d1 > 0.0 && d1 < 1.0 && d2 > 0.0 && d2 < 2.0 && d3_plus > 0.0 && d3_plus < 3.0) {
                return fallback(
                    &format!("discounts D1={d1:.4} D2={d2:.4} D3+={d3_plus:.4} out of range"),
                    warnings,
                );
            }
            Discounts { d1, d2, d3_plus }
        }
        Smoothing::KneserNey => {
            if !(single > 0.0 && single < 1.0) {
                let d = 0.5;
                warnings.push(format!(
                    "order {n}: count-of-counts n1={n1} n2={n2} give no discount in (0, 1); using {d}"
                ));
                return Discounts {
                    d1: d,
                    d2: d,
                    d3_plus: d,
                };
            }
            Discounts {
                d1: single,
                d2: single,
                d3_plus: single,
            }
        }
        Smoothing::WittenBell | Smoothing::Additive { .. } => Discounts {
            d1: 0.0,
            d2: 0.0,
            d3_plus: 0.0,
        },
    }
}

/// One order of a smoothed model, handed to a consumer in ascending order.
struct SmoothedLevel<'a> {
    n: usize,
    /// Whether each entry survives the cut-offs (unigrams: all).
    kept: &'a [bool],
    /// Interpolated P (linear) of each kept entry.
    probabilities: &'a [f64],
    /// γ of each entry as a context (1 when it is none).
    backoffs: &'a [f64],
}

/// The smoothing computation, shared by [`estimate_with`] (builds a model) and
/// [`write_estimated_arpa`] (streams ARPA text without building one). It holds at most two
/// orders of probabilities at a time.
struct Smoother<'a> {
    counts: &'a NgramCounts,
    smoothing: Smoothing,
    kneser_ney: bool,
    vocabulary_size: usize,
    /// `kept[n-2]`: survivors of order n ≥ 2.
    kept: Vec<Vec<bool>>,
    discounts: Vec<Discounts>,
    warnings: Vec<String>,
}

impl<'a> Smoother<'a> {
    fn new(counts: &'a NgramCounts, options: &EstimateOptions) -> Result<Self, LmError> {
        let smoothing = options.smoothing;
        if let Smoothing::Additive { k } = smoothing {
            if !(k > 0.0 && k.is_finite()) {
                return Err(LmError::Invalid(format!(
                    "add-k smoothing: expected k > 0, found {k}"
                )));
            }
        }
        let kneser_ney = matches!(
            smoothing,
            Smoothing::ModifiedKneserNey | Smoothing::KneserNey
        );
        let order = counts.order();
        // Which n-grams survive the cut-offs; prefixes and suffixes of kept n-grams stay.
        let mut kept: Vec<Vec<bool>> = counts
            .levels
            .iter()
            .enumerate()
            .map(|(position, level)| {
                let cutoff = options.cutoffs.get(position + 1).copied().unwrap_or(1);
                level.raw.iter().map(|&raw| raw >= cutoff).collect()
            })
            .collect();
        for n in (3..=order).rev() {
            let (lower, upper) = kept.split_at_mut(n - 2);
            let level = &counts.levels[n - 2];
            for (index, &keep) in upper[0].iter().enumerate() {
                if keep {
                    lower[n - 3][level.prefix[index] as usize] = true;
                    lower[n - 3][level.suffix[index] as usize] = true;
                }
            }
        }
        let mut warnings = Vec::new();
        let unigram_counts = if kneser_ney {
            &counts.unigram_kneser_ney
        } else {
            &counts.unigram_raw
        };
        let mut discounts = vec![discounts_for(
            smoothing,
            1,
            (0..counts.words.len())
                .filter(|&word| word as u32 != START_ID)
                .map(|word| unigram_counts[word]),
            &mut warnings,
        )];
        for (position, level) in counts.levels.iter().enumerate() {
            let level_counts = if kneser_ney {
                &level.kneser_ney
            } else {
                &level.raw
            };
            discounts.push(discounts_for(
                smoothing,
                position + 2,
                level_counts.iter().map(|&count| u64::from(count)),
                &mut warnings,
            ));
        }
        Ok(Smoother {
            counts,
            smoothing,
            kneser_ney,
            vocabulary_size: counts.words.len() - 1, // every word but `<s>` can be predicted
            kept,
            discounts,
            warnings,
        })
    }

    /// Number of n-grams per order in the smoothed model.
    fn kept_counts(&self) -> Vec<usize> {
        std::iter::once(self.counts.words.len())
            .chain(
                self.kept
                    .iter()
                    .map(|flags| flags.iter().filter(|&&keep| keep).count()),
            )
            .collect()
    }

    fn denominator(&self, total: f64, distinct: usize) -> f64 {
        match self.smoothing {
            Smoothing::WittenBell => total + distinct as f64,
            Smoothing::Additive { k } => total + k * self.vocabulary_size as f64,
            _ => total,
        }
    }

    fn level_counts(&self, n: usize) -> &'a [u32] {
        let level = &self.counts.levels[n - 2];
        if self.kneser_ney {
            &level.kneser_ney
        } else {
            &level.raw
        }
    }

    /// Calls `group(context key, range)` for every context of order n ≥ 2.
    fn for_each_context(&self, n: usize, mut group: impl FnMut(u128, std::ops::Range<usize>)) {
        let keys = &self.counts.levels[n - 2].keys;
        let bits = self.counts.bits();
        let mut begin = 0;
        while begin < keys.len() {
            let context = keys[begin] >> bits;
            let mut end = begin + 1;
            while end < keys.len() && keys[end] >> bits == context {
                end += 1;
            }
            group(context, begin..end);
            begin = end;
        }
    }

    /// (den(h), Σ kept discounted counts) of one context group of order n.
    fn group_sums(&self, n: usize, group: std::ops::Range<usize>) -> (f64, f64) {
        let counts = self.level_counts(n);
        let discounts = self.discounts[n - 1];
        let kept = &self.kept[n - 2];
        let mut total = 0.0;
        let mut kept_mass = 0.0;
        for index in group.clone() {
            let count = u64::from(counts[index]);
            total += count as f64;
            if kept[index] {
                kept_mass += (count as f64 - discounts.of(count)).max(0.0);
            }
        }
        (self.denominator(total, group.len()), kept_mass)
    }

    /// γ of every entry of order n − 1 as a context, from the groups of order n.
    fn gammas_of_contexts(&self, n: usize) -> Vec<f64> {
        let lower_len = if n == 2 {
            self.counts.words.len()
        } else {
            self.counts.levels[n - 3].keys.len()
        };
        let mut gammas = vec![1.0; lower_len];
        let prefix = &self.counts.levels[n - 2].prefix;
        self.for_each_context(n, |_, group| {
            let first = group.start;
            let (denominator, kept_mass) = self.group_sums(n, group);
            gammas[prefix[first] as usize] = (denominator - kept_mass) / denominator;
        });
        gammas
    }

    fn run(
        &self,
        mut interpolated: Option<&mut InterpolatedModel>,
        visit: &mut dyn FnMut(SmoothedLevel<'_>) -> Result<(), LmError>,
    ) -> Result<(), LmError> {
        let counts = self.counts;
        let order = counts.order();
        let bits = counts.bits();
        let words = &counts.words;
        // Unigrams.
        let unigram_counts = if self.kneser_ney {
            &counts.unigram_kneser_ney
        } else {
            &counts.unigram_raw
        };
        let predicted = || (0..words.len()).filter(|&word| word as u32 != START_ID);
        let discounts = self.discounts[0];
        let total: f64 = predicted().map(|word| unigram_counts[word] as f64).sum();
        let seen = predicted().filter(|&word| unigram_counts[word] > 0).count();
        let denominator = self.denominator(total, seen);
        let mut unigram_term = vec![0.0; words.len()];
        let mut kept_mass = 0.0;
        for word in predicted() {
            let count = unigram_counts[word];
            let discounted = (count as f64 - discounts.of(count)).max(0.0);
            unigram_term[word] = discounted / denominator;
            kept_mass += discounted;
        }
        let unigram_gamma = (denominator - kept_mass) / denominator;
        let uniform = unigram_gamma / self.vocabulary_size as f64;
        let mut lower_probabilities: Vec<f64> = (0..words.len())
            .map(|word| {
                if word as u32 == START_ID {
                    0.0
                } else {
                    unigram_term[word] + uniform
                }
            })
            .collect();
        let mut lower_backoffs = if order > 1 {
            self.gammas_of_contexts(2)
        } else {
            vec![1.0; words.len()]
        };
        visit(SmoothedLevel {
            n: 1,
            kept: &vec![true; words.len()],
            probabilities: &lower_probabilities,
            backoffs: &lower_backoffs,
        })?;
        if let Some(model) = interpolated.as_deref_mut() {
            model.unigram_term = unigram_term;
            model.unigram_gamma = unigram_gamma;
        }
        for n in 2..=order {
            let level = &counts.levels[n - 2];
            let level_counts = self.level_counts(n);
            let discounts = self.discounts[n - 1];
            let kept = &self.kept[n - 2];
            let mut probabilities = vec![0.0; level.keys.len()];
            let mut kept_keys = Vec::new();
            let mut kept_terms = Vec::new();
            let mut contexts = Vec::new();
            let mut gammas = Vec::new();
            let keep_interpolated = interpolated.is_some();
            self.for_each_context(n, |context, group| {
                let gamma = lower_backoffs[level.prefix[group.start] as usize];
                let (denominator, _) = self.group_sums(n, group.clone());
                if keep_interpolated {
                    contexts.push(context);
                    gammas.push(gamma);
                }
                for index in group {
                    if !kept[index] {
                        continue;
                    }
                    let count = u64::from(level_counts[index]);
                    let term = (count as f64 - discounts.of(count)).max(0.0) / denominator;
                    probabilities[index] =
                        term + gamma * lower_probabilities[level.suffix[index] as usize];
                    if keep_interpolated {
                        kept_keys.push(level.keys[index]);
                        kept_terms.push(term);
                    }
                }
            });
            let backoffs = if n < order {
                self.gammas_of_contexts(n + 1)
            } else {
                vec![1.0; level.keys.len()]
            };
            visit(SmoothedLevel {
                n,
                kept,
                probabilities: &probabilities,
                backoffs: &backoffs,
            })?;
            if let Some(model) = interpolated.as_deref_mut() {
                model.keys.push(kept_keys);
                model.terms.push(kept_terms);
                model.contexts.push(contexts);
                model.gammas.push(gammas);
            }
            let _ = bits;
            lower_probabilities = probabilities;
            lower_backoffs = backoffs;
        }
        Ok(())
    }
}

/// Smooths `counts` into a back-off model (see the module documentation for the formulas).
pub fn estimate_with(counts: &NgramCounts, options: &EstimateOptions) -> Result<Estimate, LmError> {
    let smoother = Smoother::new(counts, options)?;
    let words = counts.words();
    let bits = counts.bits();
    let mut builder = ModelBuilder::new(&smoother.kept_counts());
    let too_many = |problem: AddError| LmError::Invalid(problem.describe("(estimated model)"));
    // previous_index[i]: index in the model of entry i of the order below.
    let mut previous_index: Vec<u32> = Vec::new();
    let mut interpolated = options.keep_interpolated.then(|| InterpolatedModel {
        bits,
        vocabulary_size: smoother.vocabulary_size,
        unigram_term: Vec::new(),
        unigram_gamma: 0.0,
        keys: Vec::new(),
        terms: Vec::new(),
        contexts: Vec::new(),
        gammas: Vec::new(),
        index: words
            .iter()
            .enumerate()
            .map(|(id, word)| (word.clone(), id as u32))
            .collect(),
    });
    smoother.run(interpolated.as_mut(), &mut |level| {
        if level.n == 1 {
            for (word, text) in words.iter().enumerate() {
                let log10_prob = if word as u32 == START_ID {
                    -99.0
                } else {
                    level.probabilities[word].log10()
                };
                builder
                    .add_unigram(text, log10_prob, level.backoffs[word].log10())
                    .map_err(too_many)?;
            }
            previous_index = (0..words.len() as u32).collect();
            return Ok(());
        }
        let entries = &counts.levels[level.n - 2];
        let mut new_index = vec![u32::MAX; level.kept.len()];
        let mut next = 0u32;
        for (index, &keep) in level.kept.iter().enumerate() {
            if !keep {
                continue;
            }
            builder
                .add_linked(
                    level.n,
                    previous_index[entries.prefix[index] as usize],
                    (entries.keys[index] & ((1u128 << bits) - 1)) as u32,
                    previous_index[entries.suffix[index] as usize],
                    level.probabilities[index].log10(),
                    level.backoffs[index].log10(),
                )
                .map_err(too_many)?;
            new_index[index] = next;
            next += 1;
        }
        previous_index = new_index;
        Ok(())
    })?;
    Ok(Estimate {
        model: builder.finish(),
        discounts: smoother.discounts.clone(),
        warnings: smoother.warnings.clone(),
        interpolated,
    })
}

/// What [`write_estimated_arpa`] reports.
#[derive(Clone, Debug)]
pub struct EstimateSummary {
    /// Number of n-grams written per order, unigrams first.
    pub ngram_counts: Vec<usize>,
    /// Discounts per order, unigrams first.
    pub discounts: Vec<Discounts>,
    /// Problems the caller should show the user.
    pub warnings: Vec<String>,
}

/// Smooths `counts` and streams the model as ARPA text to `path` (`.gz` compresses) without
/// building the query structure: the memory-lean path for large corpora. The result is the same
/// model [`estimate_with`] builds.
pub fn write_estimated_arpa(
    counts: &NgramCounts,
    options: &EstimateOptions,
    path: &std::path::Path,
) -> Result<EstimateSummary, LmError> {
    let smoother = Smoother::new(counts, options)?;
    let ngram_counts = smoother.kept_counts();
    let order = counts.order();
    let bits = counts.bits();
    let mask = (1u128 << bits) - 1;
    let words = counts.words();
    crate::arpa::write_atomically(path, |writer| {
        let mut line = Vec::with_capacity(256);
        crate::arpa::write_header(writer, &ngram_counts)?;
        let mut ngram = Vec::with_capacity(order);
        let mut failure = None;
        let result = smoother.run(None, &mut |level| {
            let written = (|| -> std::io::Result<()> {
                writeln!(writer, "\n\\{}-grams:", level.n)?;
                for (index, &keep) in level.kept.iter().enumerate() {
                    if !keep {
                        continue;
                    }
                    ngram.clear();
                    if level.n == 1 {
                        ngram.push(index as u32);
                    } else {
                        let mut key = counts.levels[level.n - 2].keys[index];
                        for _ in 0..level.n {
                            ngram.push((key & mask) as u32);
                            key >>= bits;
                        }
                        ngram.reverse();
                    }
                    let log10_prob = if level.n == 1 && index as u32 == START_ID {
                        -99.0
                    } else {
                        level.probabilities[index].log10()
                    };
                    line.clear();
                    let backoff = (level.n < order).then(|| level.backoffs[index].log10());
                    crate::arpa::push_entry(
                        &mut line,
                        log10_prob,
                        ngram.iter().map(|&word| words[word as usize].as_str()),
                        backoff,
                    );
                    writer.write_all(&line)?;
                }
                Ok(())
            })();
            written.map_err(|error| {
                let message = error.to_string();
                failure = Some(error);
                LmError::Invalid(message)
            })
        });
        if let Some(error) = failure {
            return Err(error);
        }
        result.map_err(|error| std::io::Error::other(error.to_string()))?;
        writeln!(writer, "\n\\end\\")
    })?;
    Ok(EstimateSummary {
        ngram_counts,
        discounts: smoother.discounts,
        warnings: smoother.warnings,
    })
}
