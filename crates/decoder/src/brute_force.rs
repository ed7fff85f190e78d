//! The slow, obvious definition the search is checked against.
//!
//! What the enumeration computes, for posteriors `y[t][u]` over `T` frames:
//! 1. every alignment (one unit per frame, `U^T` of them) has probability `Π_t y[t][a_t]`;
//!    collapsing repeats and dropping blanks maps it to a label sequence `L`, and
//!    `P(L) = Σ` over the alignments that collapse to `L` (the CTC definition, Graves et al. 2006);
//! 2. every way to read `L` as words under the word rule (lexicon spellings, homophones,
//!    segmentations; or spelling at the boundary unit; or one word per unit) gives a word
//!    sequence `W`, scored `ln P(L) + λ·(Σ_i ln P_LM(w_i | w_<i) + ln P_LM(</s> | W)) + β·|W|`;
//! 3. the answer is the maximum over all `(L, W)`, with every `W` that attains it.
//!
//! Nothing here shares code with the search: no trie, no arena, no log-add helper.

use std::collections::HashMap;

use ndarray::Array2;

use crate::lm::LanguageModel;

/// How the enumeration cuts labels into words (mirrors the four word rules, written from their
/// definitions).
pub(crate) struct Rules<'a> {
    pub units: &'a [String],
    pub boundary: Option<u32>,
    /// `(word, unit ids)`; `None` without a lexicon.
    pub lexicon: Option<&'a [(String, Vec<u32>)]>,
}

/// `P(L)` for every label sequence with non-zero probability, by enumerating all alignments.
pub(crate) fn label_probabilities(log_posteriors: &Array2<f32>) -> HashMap<Vec<u32>, f64> {
    let (frames, units) = log_posteriors.dim();
    let mut out: HashMap<Vec<u32>, f64> = HashMap::new();
    let mut alignment = vec![0usize; frames];
    loop {
        let mut p = 1.0f64;
        let mut labels = Vec::new();
        let mut previous = 0usize;
        for (t, &u) in alignment.iter().enumerate() {
            p *= (log_posteriors[[t, u]] as f64).exp();
            if u != 0 && u != previous {
                labels.push(u as u32);
            }
            previous = u;
        }
        *out.entry(labels).or_insert(0.0) += p;
        // next alignment, counting in base `units`
        let mut t = 0;
        loop {
            if t == frames {
                return out;
            }
            alignment[t] += 1;
            if alignment[t] < units {
                break;
            }
            alignment[t] = 0;
            t += 1;
        }
    }
}

/// Every word sequence the labels can be read as.
pub(crate) fn readings(rules: &Rules, labels: &[u32]) -> Vec<Vec<String>> {
    let spell = |units: &[u32]| -> String {
        units
            .iter()
            .map(|&u| rules.units[u as usize].as_str())
            .collect()
    };
    let homophones = |units: &[u32]| -> Vec<String> {
        let mut words: Vec<String> = rules
            .lexicon
            .unwrap_or(&[])
            .iter()
            .filter(|(_, spelling)| spelling.as_slice() == units)
            .map(|(w, _)| w.clone())
            .collect();
        words.sort();
        words.dedup();
        words
    };
    match (rules.lexicon, rules.boundary) {
        (None, None) => vec![labels.iter().map(|&u| spell(&[u])).collect()],
        (None, Some(b)) => vec![labels
            .split(|&u| u == b)
            .filter(|chunk| !chunk.is_empty())
            .map(spell)
            .collect()],
        (Some(_), Some(b)) => {
            let mut out: Vec<Vec<String>> = vec![Vec::new()];
            for chunk in labels.split(|&u| u == b).filter(|c| !c.is_empty()) {
                let words = homophones(chunk);
                out = out
                    .iter()
                    .flat_map(|prefix| {
                        words.iter().map(move |w| {
                            let mut p = prefix.clone();
                            p.push(w.clone());
                            p
                        })
                    })
                    .collect();
            }
            out
        }
        (Some(_), None) => {
            // all segmentations into lexicon spellings
            if labels.is_empty() {
                return vec![Vec::new()];
            }
            let mut out = Vec::new();
            for cut in 1..=labels.len() {
                for word in homophones(&labels[..cut]) {
                    for rest in readings(rules, &labels[cut..]) {
                        let mut seq = vec![word.clone()];
                        seq.extend(rest);
                        out.push(seq);
                    }
                }
            }
            out
        }
    }
}

/// `λ·ln P_LM(W </s>) + β·|W|`, unknown words as the search treats them.
pub(crate) fn language_score<L: LanguageModel>(
    lm: &L,
    words: &[String],
    weight: f64,
    bonus: f64,
    unknown_word_score: f64,
) -> f64 {
    let mut state = lm.start_state();
    let mut total = 0.0f64;
    for w in words {
        match lm.lookup(w).or_else(|| lm.unknown()) {
            Some(word) => {
                let (p, next) = lm.score(&state, word);
                total += p as f64;
                state = next;
            }
            None => total += unknown_word_score,
        }
    }
    total += lm.end_score(&state) as f64;
    weight * total + bonus * words.len() as f64
}

/// All `(words, labels, score)` triples, best first.
pub(crate) fn enumerate<L: LanguageModel>(
    log_posteriors: &Array2<f32>,
    rules: &Rules,
    lm: &L,
    weight: f64,
    bonus: f64,
) -> Vec<(Vec<String>, Vec<u32>, f64)> {
    let mut out = Vec::new();
    for (labels, p) in label_probabilities(log_posteriors) {
        for words in readings(rules, &labels) {
            let score = p.ln() + language_score(lm, &words, weight, bonus, -20.0);
            out.push((words, labels.clone(), score));
        }
    }
    out.sort_by(|a, b| b.2.total_cmp(&a.2));
    out
}

#[cfg(test)]
mod tests {
    use std::collections::{BTreeSet, HashMap};

    use ndarray::Array2;
    use proptest::prelude::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::{
        BigramModel, Decoder, NoLanguageModel, PrefixBeamSearch, SearchGraph, SearchOptions,
    };

    /// A random tiny decoding problem.
    struct Case {
        units: Vec<String>,
        lexicon: Option<Vec<(String, Vec<String>)>>,
        posteriors: Array2<f32>,
        lm: BigramModel,
    }

    fn softmax_rows(logits: Array2<f32>) -> Array2<f32> {
        let mut out = logits;
        for mut row in out.rows_mut() {
            let max = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
            let sum: f32 = row.iter().map(|x| (x - max).exp()).sum();
            row.mapv_inplace(|x| x - max - sum.ln());
        }
        out
    }

    fn random_posteriors(rng: &mut ChaCha8Rng, frames: usize, units: usize) -> Array2<f32> {
        let logits = Array2::from_shape_fn((frames, units), |_| rng.random_range(-3.0..3.0f32));
        softmax_rows(logits)
    }

    fn random_case(seed: u64, lexicon: bool, boundary: bool, max_frames: usize) -> Case {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let unit_count = rng.random_range(3..=4usize);
        let mut units = vec!["<ctc-blank>".to_string()];
        let symbols = unit_count - 1 - boundary as usize;
        for s in ["a", "b", "c"].iter().take(symbols) {
            units.push(s.to_string());
        }
        if boundary {
            units.push(crate::BOUNDARY_UNIT.to_string());
        }
        let symbol_names: Vec<String> = units[1..=symbols].to_vec();
        let random_spelling = |rng: &mut ChaCha8Rng| -> Vec<String> {
            let len = rng.random_range(1..=3usize);
            (0..len)
                .map(|_| symbol_names[rng.random_range(0..symbol_names.len())].clone())
                .collect()
        };
        let lexicon = lexicon.then(|| {
            let mut entries: Vec<(String, Vec<String>)> = Vec::new();
            for w in 0..rng.random_range(2..=4usize) {
                entries.push((format!("w{w}"), random_spelling(&mut rng)));
            }
            if rng.random_bool(0.4) {
                // a homophone of the first word
                let spelling = entries[0].1.clone();
                entries.push(("h0".to_string(), spelling));
            }
            if rng.random_bool(0.4) {
                // a second pronunciation of the second word
                entries.push(("w1".to_string(), random_spelling(&mut rng)));
            }
            entries
        });
        // LM vocabulary: the lexicon's words (or short spellings), one of them left out so
        // that the unknown-word path is exercised, sometimes with <unk>.
        let mut vocabulary: BTreeSet<String> = match &lexicon {
            Some(entries) => entries.iter().map(|(w, _)| w.clone()).collect(),
            None => {
                let mut v = BTreeSet::new();
                for a in &symbol_names {
                    v.insert(a.clone());
                    for b in &symbol_names {
                        v.insert(format!("{a}{b}"));
                    }
                }
                v
            }
        };
        if let Some(first) = vocabulary.iter().next().cloned() {
            vocabulary.remove(&first);
        }
        if rng.random_bool(0.5) {
            vocabulary.insert("<unk>".to_string());
        }
        let words: Vec<String> = vocabulary.into_iter().collect();
        let n = words.len();
        let table = (0..=n)
            .map(|_| (0..n).map(|_| rng.random_range(-4.0..-0.1f32)).collect())
            .collect();
        let end = (0..=n).map(|_| rng.random_range(-4.0..-0.1f32)).collect();
        let lm = BigramModel::new(words, table, end).unwrap();
        let frames = rng.random_range(1..=max_frames);
        let posteriors = random_posteriors(&mut rng, frames, units.len());
        Case {
            units,
            lexicon,
            posteriors,
            lm,
        }
    }

    fn graph_of(case: &Case) -> SearchGraph {
        match &case.lexicon {
            Some(entries) => {
                SearchGraph::with_lexicon(case.units.clone(), entries)
                    .unwrap()
                    .0
            }
            None => SearchGraph::lexicon_free(case.units.clone()).unwrap(),
        }
    }

    fn lexicon_ids(case: &Case) -> Option<Vec<(String, Vec<u32>)>> {
        case.lexicon.as_ref().map(|entries| {
            entries
                .iter()
                .map(|(w, spelling)| {
                    let ids = spelling
                        .iter()
                        .map(|u| case.units.iter().position(|x| x == u).unwrap() as u32)
                        .collect();
                    (w.clone(), ids)
                })
                .collect()
        })
    }

    fn check_against_enumeration<L: LanguageModel>(case: &Case, lm: &L, weight: f32, bonus: f32) {
        let graph = graph_of(case);
        let ids = lexicon_ids(case);
        let rules = Rules {
            units: &case.units,
            boundary: graph.boundary(),
            lexicon: ids.as_deref(),
        };
        let all = enumerate(&case.posteriors, &rules, lm, weight as f64, bonus as f64);
        let best = all[0].2;
        let mut search = PrefixBeamSearch::new(&graph, lm, SearchOptions::exact(weight, bonus));
        let found = search.decode(case.posteriors.view()).unwrap();
        let words: Vec<String> = found.words.iter().map(|w| w.text.clone()).collect();
        let tolerance = 1e-3 * best.abs().max(1.0);
        assert!(
            (found.score as f64 - best).abs() < tolerance,
            "search score {} vs enumeration {} ({:?} vs {:?})",
            found.score,
            best,
            words,
            all[0].0
        );
        // the search's own reading must be one of the optima
        let own = all
            .iter()
            .find(|(w, l, _)| *w == words && *l == found.units)
            .unwrap_or_else(|| panic!("{words:?} {:?} is not a reading", found.units));
        assert!((own.2 - best).abs() < tolerance, "{own:?} vs best {best}");
        // word frames are ordered and inside the utterance
        let mut previous_end = 0;
        for w in &found.words {
            assert!(w.start_frame >= previous_end && w.end_frame > w.start_frame);
            assert!(w.end_frame as usize <= case.posteriors.nrows());
            assert!(w.confidence > 0.0 && w.confidence <= 1.0);
            previous_end = w.end_frame;
        }
    }

    #[test]
    fn exact_search_equals_enumeration_in_every_word_rule() {
        for seed in 0..60u64 {
            for (lexicon, boundary) in [(true, true), (true, false), (false, true), (false, false)]
            {
                let case = random_case(seed, lexicon, boundary, 6);
                // no LM, no bonus: pure CTC prefix search objective
                check_against_enumeration(&case, &NoLanguageModel, 0.0, 0.0);
                // no LM, word bonus only
                check_against_enumeration(&case, &NoLanguageModel, 0.0, 1.3);
                // LM with weight and bonus
                check_against_enumeration(&case, &case.lm, 0.8, 0.5);
                check_against_enumeration(&case, &case.lm, 2.0, -0.5);
            }
        }
    }

    /// A trigram Kneser-Ney model estimated from random sentences over the case's vocabulary
    /// (some lexicon words left out so that `<unk>` is used).
    fn arpa_for(case: &Case, seed: u64) -> isogloss_lm::ArpaModel {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let words = case.lm.words().to_vec();
        let sentences: Vec<Vec<String>> = (0..30)
            .map(|_| {
                (0..rng.random_range(1..5))
                    .map(|_| words[rng.random_range(0..words.len())].clone())
                    .collect()
            })
            .collect();
        let counts = isogloss_lm::NgramCounts::from_sentences(sentences, 3).unwrap();
        isogloss_lm::estimate(&counts, isogloss_lm::Smoothing::ModifiedKneserNey)
            .unwrap()
            .model
    }

    #[test]
    fn exact_search_equals_enumeration_with_an_estimated_trigram_model() {
        for seed in 0..25u64 {
            for (lexicon, boundary) in [(true, true), (true, false), (false, true)] {
                let case = random_case(seed, lexicon, boundary, 6);
                let arpa = arpa_for(&case, seed);
                check_against_enumeration(&case, &arpa, 1.0, 0.3);
            }
        }
    }

    #[test]
    fn label_probabilities_match_torch_ctc_loss() {
        // Fixture from scripts/reference/ctc_decoder_reference.py: torch.nn.functional.ctc_loss values.
        let fixture: serde_json::Value = serde_json::from_str(include_str!(
            "../../../tests/fixtures/decoder/ctc_torch.json"
        ))
        .unwrap();
        for case in fixture["cases"].as_array().unwrap() {
            let rows: Vec<Vec<f32>> =
                serde_json::from_value(case["log_posteriors"].clone()).unwrap();
            let (frames, units) = (rows.len(), rows[0].len());
            let posteriors = Array2::from_shape_vec((frames, units), rows.concat()).unwrap();
            let names: Vec<String> = (0..units)
                .map(|u| {
                    if u == 0 {
                        "<ctc-blank>".into()
                    } else {
                        format!("u{u}")
                    }
                })
                .collect();
            let graph = SearchGraph::lexicon_free(names).unwrap();
            let all =
                PrefixBeamSearch::new(&graph, &NoLanguageModel, SearchOptions::exact(0.0, 0.0))
                    .decode_nbest(posteriors.view(), usize::MAX)
                    .unwrap();
            let ours: HashMap<Vec<u32>, f32> = all
                .into_iter()
                .map(|t| (t.units, t.acoustic_score))
                .collect();
            let enumerated = label_probabilities(&posteriors);
            for sequence in case["sequences"].as_array().unwrap() {
                let labels: Vec<u32> = serde_json::from_value(sequence["labels"].clone()).unwrap();
                let torch = sequence["log_probability"].as_f64().unwrap();
                // torch.nn.functional.ctc_loss (negated), see the fixture script
                assert!(
                    (ours[&labels] as f64 - torch).abs() < 1e-4,
                    "{labels:?}: {} vs torch {torch}",
                    ours[&labels]
                );
                assert!(
                    (enumerated[&labels].ln() - torch).abs() < 1e-5,
                    "{labels:?}: enumeration vs torch"
                );
            }
        }
    }

    /// The textbook prefix beam search over label strings (hash map, no words).
    fn plain_prefix_search(posteriors: &Array2<f32>, beam: usize) -> (Vec<u32>, f64) {
        let mut hyps: HashMap<Vec<u32>, (f64, f64)> = HashMap::new();
        hyps.insert(Vec::new(), (1.0, 0.0));
        for row in posteriors.rows() {
            let y: Vec<f64> = row.iter().map(|&v| (v as f64).exp()).collect();
            let mut next: HashMap<Vec<u32>, (f64, f64)> = HashMap::new();
            for (prefix, &(pb, pnb)) in &hyps {
                next.entry(prefix.clone()).or_insert((0.0, 0.0)).0 += (pb + pnb) * y[0];
                if let Some(&last) = prefix.last() {
                    next.entry(prefix.clone()).or_insert((0.0, 0.0)).1 += pnb * y[last as usize];
                }
                for c in 1..y.len() as u32 {
                    let mut longer = prefix.clone();
                    longer.push(c);
                    let from = if prefix.last() == Some(&c) {
                        pb
                    } else {
                        pb + pnb
                    };
                    next.entry(longer).or_insert((0.0, 0.0)).1 += from * y[c as usize];
                }
            }
            let mut ranked: Vec<(Vec<u32>, (f64, f64))> = next.into_iter().collect();
            ranked.sort_by(|a, b| (b.1 .0 + b.1 .1).total_cmp(&(a.1 .0 + a.1 .1)));
            ranked.truncate(beam);
            hyps = ranked.into_iter().collect();
        }
        let best = hyps
            .into_iter()
            .max_by(|a, b| (a.1 .0 + a.1 .1).total_cmp(&(b.1 .0 + b.1 .1)))
            .unwrap();
        (best.0, (best.1 .0 + best.1 .1).ln())
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(64))]

        #[test]
        fn lm_weight_zero_without_lexicon_is_plain_prefix_search(
            seed in any::<u64>(), beam in 1usize..6, boundary in any::<bool>()
        ) {
            let mut case = random_case(seed, false, boundary, 12);
            let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 1);
            case.posteriors = random_posteriors(&mut rng, case.posteriors.nrows() + 4, case.units.len());
            let graph = graph_of(&case);
            let options = SearchOptions { beam, ..SearchOptions::exact(0.0, 0.0) };
            let found = PrefixBeamSearch::new(&graph, &case.lm, options)
                .decode(case.posteriors.view())
                .unwrap();
            let (labels, score) = plain_prefix_search(&case.posteriors, beam);
            prop_assert_eq!(&found.units, &labels);
            prop_assert!((found.score as f64 - score).abs() < 1e-3);
        }

        #[test]
        fn with_a_lexicon_no_hypothesis_leaves_it(
            seed in any::<u64>(), beam in 1usize..12, boundary in any::<bool>(), weight in 0.0f32..2.0
        ) {
            let mut case = random_case(seed, true, boundary, 6);
            let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 2);
            case.posteriors = random_posteriors(&mut rng, 30, case.units.len());
            let graph = graph_of(&case);
            let lexicon = case.lexicon.clone().unwrap();
            let known: BTreeSet<&String> = lexicon.iter().map(|(w, _)| w).collect();
            let options = SearchOptions { beam, lm_weight: weight, ..SearchOptions::default() };
            let hyps = PrefixBeamSearch::new(&graph, &case.lm, options)
                .decode_nbest(case.posteriors.view(), usize::MAX)
                .unwrap();
            for hyp in &hyps {
                for w in &hyp.words {
                    prop_assert!(known.contains(&w.text), "{} is not in the lexicon", w.text);
                }
                // and the units spell the words (one of each word's spellings, boundaries between)
                let spelled: Vec<u32> = hyp.units.iter().copied().filter(|&u| Some(u) != graph.boundary()).collect();
                let ids = lexicon_ids(&case).unwrap();
                let rules = Rules { units: &case.units, boundary: graph.boundary(), lexicon: Some(&ids) };
                let words: Vec<String> = hyp.words.iter().map(|w| w.text.clone()).collect();
                prop_assert!(readings(&rules, &hyp.units).contains(&words), "{:?} {:?}", words, spelled);
            }
        }

        #[test]
        fn a_higher_word_bonus_never_yields_fewer_words(
            seed in any::<u64>(), lexicon in any::<bool>(), boundary in any::<bool>(),
            low in -3.0f32..3.0, raise in 0.0f32..3.0
        ) {
            let case = random_case(seed, lexicon, boundary, 6);
            let graph = graph_of(&case);
            let count = |bonus: f32| {
                PrefixBeamSearch::new(&graph, &case.lm, SearchOptions::exact(0.7, bonus))
                    .decode(case.posteriors.view())
                    .unwrap()
                    .words
                    .len()
            };
            prop_assert!(count(low + raise) >= count(low));
        }
    }
}
