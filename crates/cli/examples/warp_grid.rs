//! The grid behind the test-time warp search (DEVELOPERS.md, "Test-time warp search").
//!
//! For every utterance of a manifest: the model's front end at each warp factor of a list
//! (per-utterance CMVN, as the shipped model), the network's log-posteriors, and greedy
//! hypotheses written as `id<TAB>text` files for `isogloss score`:
//! - `warp-F.tsv`: every utterance through factor F;
//! - `pick.tsv`: per utterance, the most confident factor (`warp_search::most_confident`, what
//!   `[inference] warp_factors` does);
//! - `pick-speaker.tsv`: per speaker, the factor with the highest frame-weighted confidence
//!   over all of the speaker's utterances (needs speaker labels; `transcribe` has none);
//! - `mean-log-posterior.tsv`: the log-posteriors of all factors averaged frame by frame;
//!
//! and `confidence.tsv` (`id`, factor, frames, confidence) for other selection rules.
//!
//! Run: `cargo run --release -p isogloss --example warp_grid -- MODEL_DIR MANIFEST OUT_DIR
//! 0.9,1.0,1.1` (the model's own `[inference]` table is ignored: each factor is applied
//! here).

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use isogloss_acoustic::warp_search::{confidence, most_confident};
use isogloss_acoustic::AcousticModel;
use isogloss_corpus::Manifest;
use isogloss_features::{Cmvn, FeatureExtractor, VtlpWarp};
use ndarray::Array2;
use rayon::prelude::*;

/// Greedy text of log-posteriors: units joined, word boundaries as spaces.
fn greedy_text(model: &AcousticModel, posteriors: &Array2<f32>) -> String {
    let units = isogloss_acoustic::greedy_decode(posteriors, model.units());
    model.inventory().to_text(&units)
}

/// Chooses the posteriors of utterance `i` from those of every factor.
type Pick<'a> = &'a dyn Fn(usize, &[Array2<f32>]) -> Array2<f32>;

fn write_hypotheses(path: &Path, rows: &[(String, String)]) -> anyhow::Result<()> {
    let mut file = std::fs::File::create(path).with_context(|| path.display().to_string())?;
    writeln!(file, "id\ttext")?;
    for (id, text) in rows {
        writeln!(file, "{id}\t{text}")?;
    }
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let [_, model_dir, manifest_path, out, factors] = args.as_slice() else {
        bail!("usage: warp_grid MODEL_DIR MANIFEST OUT_DIR F1,F2,...");
    };
    let model = AcousticModel::load(Path::new(model_dir))?;
    let manifest = Manifest::read(Path::new(manifest_path))?;
    let out = PathBuf::from(out);
    std::fs::create_dir_all(&out)?;
    let factors: Vec<f64> = factors
        .split(',')
        .map(|s| s.parse().with_context(|| format!("factor {s:?}")))
        .collect::<anyhow::Result<_>>()?;
    let config = model.feature_config().clone();
    let extractor = FeatureExtractor::new(&config)?;
    let warps: Vec<Option<VtlpWarp>> = factors
        .iter()
        .map(|&f| {
            (f != 1.0)
                .then(|| VtlpWarp::new(f, 4800.0, config.sample_rate))
                .transpose()
        })
        .collect::<Result<_, _>>()?;
    // Per utterance, the log-posteriors through each factor.
    let results: Vec<Vec<Array2<f32>>> = manifest
        .utterances
        .par_iter()
        .map(|u| -> anyhow::Result<Vec<Array2<f32>>> {
            let samples = isogloss_audio::read_segments(&u.audio, &[u.segment()])?.remove(0);
            warps
                .iter()
                .map(|warp| {
                    let mut features = match warp {
                        None => extractor.extract(&samples),
                        Some(warp) => extractor.extract_warped(&samples, warp)?,
                    };
                    Cmvn::from_features(&features, config.unit_variance, &u.id)?
                        .apply(&mut features, &u.id)?;
                    Ok(model.log_posteriors(&features)?)
                })
                .collect()
        })
        .collect::<anyhow::Result<_>>()?;
    let ids: Vec<String> = manifest.utterances.iter().map(|u| u.id.clone()).collect();
    let rows = |pick: Pick<'_>| -> Vec<(String, String)> {
        ids.iter()
            .zip(&results)
            .enumerate()
            .map(|(i, (id, p))| (id.clone(), greedy_text(&model, &pick(i, p))))
            .collect()
    };
    for (k, f) in factors.iter().enumerate() {
        write_hypotheses(
            &out.join(format!("warp-{f}.tsv")),
            &rows(&|_, p| p[k].clone()),
        )?;
    }
    write_hypotheses(
        &out.join("pick.tsv"),
        &rows(&|_, p| p[most_confident(p).unwrap_or(0)].clone()),
    )?;
    let mut by_speaker: BTreeMap<&str, Vec<f64>> = BTreeMap::new();
    for (u, p) in manifest.utterances.iter().zip(&results) {
        let sums = by_speaker
            .entry(u.speaker.as_str())
            .or_insert_with(|| vec![0.0; factors.len()]);
        for (sum, q) in sums.iter_mut().zip(p) {
            *sum += confidence(q) * q.nrows() as f64;
        }
    }
    write_hypotheses(
        &out.join("pick-speaker.tsv"),
        &rows(&|i, p| {
            let sums = &by_speaker[manifest.utterances[i].speaker.as_str()];
            let best = (0..sums.len())
                .max_by(|&a, &b| sums[a].total_cmp(&sums[b]))
                .unwrap_or(0);
            p[best].clone()
        }),
    )?;
    write_hypotheses(
        &out.join("mean-log-posterior.tsv"),
        &rows(&|_, p| {
            let mut mean = p[0].clone();
            for q in &p[1..] {
                mean += q;
            }
            mean / p.len() as f32
        }),
    )?;
    let mut file = std::fs::File::create(out.join("confidence.tsv"))?;
    writeln!(file, "id\tfactor\tframes\tconfidence")?;
    for (id, p) in ids.iter().zip(&results) {
        for (f, q) in factors.iter().zip(p) {
            writeln!(file, "{id}\t{f}\t{}\t{}", q.nrows(), confidence(q))?;
        }
    }
    eprintln!(
        "{} utterances × {} factors into {}",
        ids.len(),
        factors.len(),
        out.display()
    );
    Ok(())
}
