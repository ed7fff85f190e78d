//! Best-path (greedy) decoding, so that a model can be judged before the beam search exists.

use ndarray::Array2;

/// Best path: the most probable unit per frame, repeats merged, blanks (index 0) dropped.
pub fn greedy_path(log_posteriors: &[Vec<f32>]) -> Vec<u32> {
    let mut path = Vec::new();
    let mut previous = None;
    for row in log_posteriors {
        let best = row
            .iter()
            .enumerate()
            .fold((0usize, f32::NEG_INFINITY), |acc, (i, &v)| {
                if v > acc.1 {
                    (i, v)
                } else {
                    acc
                }
            })
            .0 as u32;
        if Some(best) != previous && best != 0 {
            path.push(best);
        }
        previous = Some(best);
    }
    path
}

/// Greedy (best-path) decoding of `[frames, units]` log-posteriors into unit names.
pub fn greedy_decode(log_posteriors: &Array2<f32>, units: &[String]) -> Vec<String> {
    let rows: Vec<Vec<f32>> = log_posteriors
        .rows()
        .into_iter()
        .map(|r| r.to_vec())
        .collect();
    greedy_path(&rows)
        .into_iter()
        .filter_map(|i| units.get(i as usize).cloned())
        .collect()
}
