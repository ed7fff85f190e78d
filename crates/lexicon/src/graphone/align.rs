//! EM alignment of letters and phonemes into graphones (Bisani & Ney 2008, section 3): every way
//! of cutting a word and its pronunciation into pairs of 0–2 letters and 0–2 phonemes (never
//! both empty) is weighted by a unigram graphone model; forward-backward gives expected graphone
//! counts, which re-estimate the model. The final model's best (Viterbi) segmentation of each
//! entry is what the n-gram is trained on.

use std::collections::HashMap;

/// Letters and phonemes as interned ids (0 is reserved for "none" in graphone keys).
pub type SymbolId = u32;

/// A graphone key: up to two letter ids and two phoneme ids, each stored +1 in 16 bits.
pub type GraphoneKey = u64;

/// Packs a graphone into its key; symbols must be below 65535.
pub fn graphone_key(letters: &[SymbolId], phonemes: &[SymbolId]) -> GraphoneKey {
    let part = |s: &[SymbolId], i: usize| s.get(i).map_or(0, |&x| u64::from(x) + 1);
    part(letters, 0) | part(letters, 1) << 16 | part(phonemes, 0) << 32 | part(phonemes, 1) << 48
}

/// The shape limits of a graphone and the weight that keeps EM from preferring big ones.
#[derive(Debug, Clone, Copy)]
pub struct Shape {
    /// Most letters in one graphone.
    pub max_letters: usize,
    /// Most phonemes in one graphone.
    pub max_phonemes: usize,
    /// Factor in `(0, 1]` applied to a graphone's probability for every side (letters or
    /// phonemes) that holds two symbols. A unigram model explains an entry with fewer, bigger
    /// graphones at fewer multiplications, so unpenalised EM drifts to 2×2 graphones, which
    /// fragment the data the n-gram learns from; the factor counteracts that drift.
    pub multi_symbol_penalty: f64,
}

/// One dictionary entry as symbol ids.
pub struct Pair {
    /// Letter ids.
    pub letters: Vec<SymbolId>,
    /// Phoneme ids.
    pub phonemes: Vec<SymbolId>,
}

/// The EM aligner: the graphone inventory met in the lattices, and for every entry its lattice
/// edges (graphone id per start cell and shape) so that iterations need no hashing.
pub struct Aligner {
    shape: Shape,
    /// Graphone id → key.
    pub keys: Vec<GraphoneKey>,
    /// Per entry: graphone id for `(i, j, a, b)` at `((i * (m + 1) + j) * shapes + s)`, where
    /// `s` indexes `(a, b)`; `u32::MAX` where the shape does not fit.
    edges: Vec<Vec<u32>>,
    shapes: Vec<(usize, usize)>,
    /// Per shape: the penalty factor applied to it.
    shape_weights: Vec<f64>,
    /// Current unigram graphone probabilities.
    pub probabilities: Vec<f64>,
}

impl Aligner {
    /// Builds every entry's lattice and a uniform starting model.
    pub fn new(pairs: &[Pair], shape: Shape) -> Aligner {
        let shapes: Vec<(usize, usize)> = (0..=shape.max_letters)
            .flat_map(|a| (0..=shape.max_phonemes).map(move |b| (a, b)))
            .filter(|&(a, b)| a + b > 0)
            .collect();
        let mut ids: HashMap<GraphoneKey, u32> = HashMap::new();
        let mut keys = Vec::new();
        let mut edges = Vec::with_capacity(pairs.len());
        for pair in pairs {
            let (n, m) = (pair.letters.len(), pair.phonemes.len());
            let mut cells = vec![u32::MAX; (n + 1) * (m + 1) * shapes.len()];
            for i in 0..=n {
                for j in 0..=m {
                    for (s, &(a, b)) in shapes.iter().enumerate() {
                        if i + a > n || j + b > m {
                            continue;
                        }
                        let key = graphone_key(&pair.letters[i..i + a], &pair.phonemes[j..j + b]);
                        let id = *ids.entry(key).or_insert_with(|| {
                            keys.push(key);
                            (keys.len() - 1) as u32
                        });
                        cells[(i * (m + 1) + j) * shapes.len() + s] = id;
                    }
                }
            }
            edges.push(cells);
        }
        let uniform = 1.0 / keys.len().max(1) as f64;
        let shape_weights = shapes
            .iter()
            .map(|&(a, b)| {
                shape
                    .multi_symbol_penalty
                    .powi(i32::from(a > 1) + i32::from(b > 1))
            })
            .collect();
        Aligner {
            shape,
            shape_weights,
            probabilities: vec![uniform; keys.len()],
            keys,
            edges,
            shapes,
        }
    }

    /// The shape limits used.
    pub fn shape(&self) -> Shape {
        self.shape
    }

    /// One EM iteration; returns the total log-likelihood (natural log) under the old model.
    /// Entries whose likelihood underflows contribute nothing (and are counted in the second
    /// value).
    pub fn iterate(&mut self, pairs: &[Pair]) -> (f64, usize) {
        let mut counts = vec![0.0f64; self.keys.len()];
        let mut log_likelihood = 0.0;
        let mut underflows = 0;
        let shapes = self.shapes.len();
        for (pair, cells) in pairs.iter().zip(&self.edges) {
            let (n, m) = (pair.letters.len(), pair.phonemes.len());
            let width = m + 1;
            let mut forward = vec![0.0f64; (n + 1) * width];
            forward[0] = 1.0;
            for i in 0..=n {
                for j in 0..=m {
                    let here = forward[i * width + j];
                    if here == 0.0 {
                        continue;
                    }
                    for (s, &(a, b)) in self.shapes.iter().enumerate() {
                        let id = cells[(i * width + j) * shapes + s];
                        if id != u32::MAX {
                            forward[(i + a) * width + j + b] +=
                                here * self.probabilities[id as usize] * self.shape_weights[s];
                        }
                    }
                }
            }
            let total = forward[n * width + m];
            if !(total > 0.0 && total.is_finite()) {
                underflows += 1;
                continue;
            }
            log_likelihood += total.ln();
            let mut backward = vec![0.0f64; (n + 1) * width];
            backward[n * width + m] = 1.0;
            for i in (0..=n).rev() {
                for j in (0..=m).rev() {
                    let mut sum = if i == n && j == m { 1.0 } else { 0.0 };
                    for (s, &(a, b)) in self.shapes.iter().enumerate() {
                        let id = cells[(i * width + j) * shapes + s];
                        if id != u32::MAX {
                            sum += self.probabilities[id as usize]
                                * self.shape_weights[s]
                                * backward[(i + a) * width + j + b];
                        }
                    }
                    backward[i * width + j] = sum;
                }
            }
            for i in 0..=n {
                for j in 0..=m {
                    let here = forward[i * width + j];
                    if here == 0.0 {
                        continue;
                    }
                    for (s, &(a, b)) in self.shapes.iter().enumerate() {
                        let id = cells[(i * width + j) * shapes + s];
                        if id != u32::MAX {
                            counts[id as usize] += here
                                * self.probabilities[id as usize]
                                * self.shape_weights[s]
                                * backward[(i + a) * width + j + b]
                                / total;
                        }
                    }
                }
            }
        }
        let sum: f64 = counts.iter().sum();
        if sum > 0.0 {
            for (p, c) in self.probabilities.iter_mut().zip(&counts) {
                *p = c / sum;
            }
        }
        (log_likelihood, underflows)
    }

    /// The most probable segmentation of every entry under the current model, as graphone ids
    /// in order; `None` for an entry with no path of non-zero probability.
    pub fn viterbi(&self, pairs: &[Pair]) -> Vec<Option<Vec<u32>>> {
        let shapes = self.shapes.len();
        pairs
            .iter()
            .zip(&self.edges)
            .map(|(pair, cells)| {
                let (n, m) = (pair.letters.len(), pair.phonemes.len());
                let width = m + 1;
                let mut best = vec![f64::NEG_INFINITY; (n + 1) * width];
                let mut back: Vec<Option<(usize, u32)>> = vec![None; (n + 1) * width];
                best[0] = 0.0;
                for i in 0..=n {
                    for j in 0..=m {
                        let here = best[i * width + j];
                        if here == f64::NEG_INFINITY {
                            continue;
                        }
                        for (s, &(a, b)) in self.shapes.iter().enumerate() {
                            let id = cells[(i * width + j) * shapes + s];
                            if id == u32::MAX {
                                continue;
                            }
                            let p = self.probabilities[id as usize] * self.shape_weights[s];
                            if p <= 0.0 {
                                continue;
                            }
                            let to = (i + a) * width + j + b;
                            let score = here + p.ln();
                            // Strictly greater: ties keep the first shape tried, deterministically.
                            if score > best[to] {
                                best[to] = score;
                                back[to] = Some((i * width + j, id));
                            }
                        }
                    }
                }
                let mut cell = n * width + m;
                if best[cell] == f64::NEG_INFINITY {
                    return None;
                }
                let mut path = Vec::new();
                while cell != 0 {
                    let (previous, id) = back[cell]?;
                    path.push(id);
                    cell = previous;
                }
                path.reverse();
                Some(path)
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two entries that share letters: EM must learn that `x` is /k s/ as one graphone (1×2)
    /// and `a` /a/, and segment `xa` accordingly, since that explains both entries best.
    #[test]
    fn em_finds_the_consistent_segmentation() {
        // letters: a=0, x=1; phonemes: A=0, K=1, S=2
        let pairs = vec![
            Pair {
                letters: vec![1, 0],
                phonemes: vec![1, 2, 0],
            },
            Pair {
                letters: vec![0, 1],
                phonemes: vec![0, 1, 2],
            },
            Pair {
                letters: vec![1],
                phonemes: vec![1, 2],
            },
            Pair {
                letters: vec![0],
                phonemes: vec![0],
            },
        ];
        let shape = Shape {
            max_letters: 2,
            max_phonemes: 2,
            multi_symbol_penalty: 0.5,
        };
        let mut aligner = Aligner::new(&pairs, shape);
        let mut previous = f64::NEG_INFINITY;
        for _ in 0..20 {
            let (log_likelihood, underflows) = aligner.iterate(&pairs);
            assert_eq!(underflows, 0);
            // EM never lowers the likelihood (Dempster, Laird & Rubin 1977).
            assert!(
                log_likelihood >= previous - 1e-9,
                "{log_likelihood} < {previous}"
            );
            previous = log_likelihood;
        }
        let paths = aligner.viterbi(&pairs);
        let x_ks = graphone_key(&[1], &[1, 2]);
        let a_a = graphone_key(&[0], &[0]);
        let keys = |i: usize| -> Vec<GraphoneKey> {
            paths[i]
                .as_ref()
                .unwrap()
                .iter()
                .map(|&g| aligner.keys[g as usize])
                .collect()
        };
        assert_eq!(keys(0), [x_ks, a_a]);
        assert_eq!(keys(1), [a_a, x_ks]);
    }
}
