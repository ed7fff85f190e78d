//! Selection rules of the warp search compared on one manifest (DEVELOPERS.md, "Test-time warp
//! search"): decode every candidate with the LM and lexicon and keep the one whose best
//! hypothesis scores highest (what `[inference] choose = "hypothesis"`, the default, does), or
//! keep the candidate whose posteriors are most confident (`choose = "posteriors"`).
//!
//! For every utterance of a manifest, the shipped candidates (warps 1.0, 0.9, 1.1, per-utterance
//! CMVN) are each decoded by the prefix beam search at the decoder defaults, and four files of
//! `id<TAB>text` are written for `isogloss score`: `plain.tsv` (factor 1.0), `confidence.tsv`
//! (`choose = "posteriors"`), `objective.tsv` (the highest search objective: acoustic + LM
//! weight × LM + word bonus × words) and `acoustic.tsv` (the highest acoustic score of the best
//! hypothesis, ln P(units | posteriors): `choose = "hypothesis"`).
//!
//! Run: `cargo run --release -p isogloss --example warp_pick_by_decoder -- MODEL_DIR MANIFEST OUT_DIR
//! LM.arpa LEXICON.tsv` with MODEL_DIR a model whose own `[inference]` table is ignored.

use std::io::Write;
use std::path::Path;

use anyhow::{bail, Context};
use isogloss_acoustic::warp_search::{confidence, Inference};
use isogloss_acoustic::AcousticModel;
use isogloss_corpus::Manifest;
use isogloss_decoder::{Decoder, PrefixBeamSearch, SearchGraph, SearchOptions};
use isogloss_features::{Cmvn, FeatureExtractor};
use rayon::prelude::*;

/// How a selection rule ranks a candidate (higher wins).
type Rule = fn(&Decoded) -> f64;

/// One candidate's decoding: text, search objective, acoustic score, posterior confidence.
struct Decoded {
    text: String,
    objective: f32,
    acoustic: f32,
    confidence: f64,
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let [_, model_dir, manifest_path, out, lm_path, lexicon_path] = args.as_slice() else {
        bail!("usage: warp_pick_by_decoder MODEL_DIR MANIFEST OUT_DIR LM.arpa LEXICON.tsv");
    };
    let model = AcousticModel::load(Path::new(model_dir))?;
    let manifest = Manifest::read(Path::new(manifest_path))?;
    let out = Path::new(out);
    std::fs::create_dir_all(out)?;
    let lm = isogloss_lm::ArpaModel::read(Path::new(lm_path))?;
    let lexicon = isogloss_lexicon::Lexicon::read(Path::new(lexicon_path))?;
    let (graph, _) = SearchGraph::with_lexicon(model.units().to_vec(), &lexicon.entries)?;
    let options = SearchOptions {
        beam: 16,
        lm_weight: isogloss_decoder::DEFAULT_LM_WEIGHT,
        word_bonus: isogloss_decoder::DEFAULT_WORD_BONUS,
        unit_margin: Some(8.0),
        skip_blank_above: Some(0.999),
        lookahead: true,
        ..SearchOptions::default()
    };
    let search = Inference {
        warp_factors: vec![1.0, 0.9, 1.1],
        warp_boundary_hz: 4800.0,
        speed_factors: Vec::new(),
        choose: Default::default(),
        matmul_precision: Default::default(),
    };
    let frontends = search.frontends(16000)?;
    let config = model.feature_config().clone();
    let extractor = FeatureExtractor::new(&config)?;
    let rows: Vec<(String, Vec<Decoded>)> = manifest
        .utterances
        .par_iter()
        .map(|u| -> anyhow::Result<(String, Vec<Decoded>)> {
            let samples = isogloss_audio::read_segments(&u.audio, &[u.segment()])?.remove(0);
            let mut decoder = PrefixBeamSearch::new(&graph, &lm, options.clone());
            let mut decoded = Vec::new();
            for frontend in &frontends {
                let mut features = frontend.features(&extractor, &samples)?;
                Cmvn::from_features(&features, config.unit_variance, &u.id)?
                    .apply(&mut features, &u.id)?;
                let posteriors = model.log_posteriors(&features)?;
                let transcript = decoder.decode(posteriors.view())?;
                decoded.push(Decoded {
                    text: transcript.text(),
                    objective: transcript.score,
                    acoustic: transcript.acoustic_score,
                    confidence: confidence(&posteriors),
                });
            }
            Ok((u.id.clone(), decoded))
        })
        .collect::<anyhow::Result<_>>()?;
    let rules: [(&str, Rule); 4] = [
        ("plain", |_| 0.0),
        ("confidence", |d| d.confidence),
        ("objective", |d| f64::from(d.objective)),
        ("acoustic", |d| f64::from(d.acoustic)),
    ];
    for (name, key) in rules {
        let path = out.join(format!("{name}.tsv"));
        let mut file = std::fs::File::create(&path).with_context(|| path.display().to_string())?;
        writeln!(file, "id\ttext")?;
        for (id, decoded) in &rows {
            // The first candidate (1.0) wins ties, as in the search.
            let mut best = 0;
            for (i, d) in decoded.iter().enumerate() {
                if key(d) > key(&decoded[best]) {
                    best = i;
                }
            }
            writeln!(file, "{id}\t{}", decoded[best].text)?;
        }
    }
    eprintln!("{} utterances into {}", rows.len(), out.display());
    Ok(())
}
