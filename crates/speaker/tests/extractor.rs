//! The extractor end to end on synthetic speakers: training, the online window against its
//! definition, the extraction modes, bad input and files on disk.
//!
//! The data are invented (test data only): frames of eight "sound classes" whose means every
//! speaker shifts by T_true·w_speaker, with w_speaker ~ N(0, I) — the model the extractor assumes.

use isogloss_speaker::{
    ExtractionMode, ExtractorConfig, FeatureLayout, IvectorExtractor, SpeakerError, TrainingEvent,
    TrainingStage, UbmConfig, UbmStep, Utterance,
};
use ndarray::{s, Array1, Array2, ShapeBuilder};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const DIMS: usize = 4;
const CLASSES: usize = 8;
const LAYOUT: FeatureLayout = FeatureLayout {
    dims: DIMS,
    frame_shift_seconds: 0.01,
};

struct Corpus {
    /// (id, speaker, features)
    train: Vec<(String, String, Array2<f32>)>,
    held_out: Vec<(String, String, Array2<f32>)>,
}

fn normal(rng: &mut ChaCha8Rng) -> f64 {
    let u: f64 = rng.random_range(f64::MIN_POSITIVE..1.0);
    let v: f64 = rng.random_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
}

fn corpus(speakers: usize, seed: u64) -> Corpus {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let class_means = Array2::from_shape_fn((CLASSES, DIMS), |_| 3.0 * normal(&mut rng));
    let t_true = Array2::from_shape_fn((CLASSES * DIMS, 3), |_| 0.6 * normal(&mut rng));
    let utterance = |rng: &mut ChaCha8Rng, shift: &Array1<f64>| {
        let frames = rng.random_range(150..300);
        let mut out = Array2::<f32>::zeros((frames, DIMS));
        let mut class = 0;
        for t in 0..frames {
            if t % 9 == 0 {
                class = rng.random_range(0..CLASSES);
            }
            for d in 0..DIMS {
                let mean = class_means[(class, d)] + shift[class * DIMS + d];
                out[(t, d)] = (mean + 0.5 * normal(rng)) as f32;
            }
        }
        out
    };
    let mut train = Vec::new();
    let mut held_out = Vec::new();
    for k in 0..speakers {
        let w = Array1::from_iter((0..3).map(|_| normal(&mut rng)));
        let shift = t_true.dot(&w);
        let speaker = format!("spk{k}");
        for u in 0..6 {
            let features = utterance(&mut rng, &shift);
            let id = format!("{speaker}-utt{u}");
            if u < 4 {
                train.push((id, speaker.clone(), features));
            } else {
                held_out.push((id, speaker.clone(), features));
            }
        }
    }
    Corpus { train, held_out }
}

fn views(items: &[(String, String, Array2<f32>)]) -> Vec<Utterance<'_>> {
    items
        .iter()
        .map(|(id, speaker, features)| Utterance {
            id,
            speaker,
            features: features.view(),
        })
        .collect()
}

fn small_config() -> ExtractorConfig {
    ExtractorConfig {
        dimension: 4,
        iterations: 6,
        window_seconds: 0.5,
        period_frames: 7,
        ubm: UbmConfig {
            gaussians: 16,
            iterations: 6,
            ..UbmConfig::default()
        },
        ..ExtractorConfig::default()
    }
}

fn cosine(a: &Array1<f32>, b: &Array1<f32>) -> f32 {
    a.dot(b) / (a.dot(a).sqrt() * b.dot(b).sqrt())
}

#[test]
fn training_reports_rising_likelihoods_and_the_vectors_tell_speakers_apart() {
    let corpus = corpus(8, 1);
    let train = views(&corpus.train);
    let config = small_config();
    let mut steps = Vec::new();
    let (extractor, report) = IvectorExtractor::train(&config, LAYOUT, &train, &mut |event| {
        if let TrainingEvent::Step {
            step,
            steps: total,
            stage,
        } = event
        {
            steps.push((*step, *total, stage.clone()));
        }
    })
    .unwrap();
    assert_eq!(report.utterances, 32);
    assert_eq!(report.speakers, 8);
    assert!(report.skipped.is_empty());
    let total = isogloss_speaker::training_steps(&config);
    assert_eq!(steps.len(), total);
    assert!(steps
        .iter()
        .enumerate()
        .all(|(i, (step, of, _))| *step == i + 1 && *of == total));

    // UBM: within the final stage (16 Gaussians) the log-likelihood never goes down.
    let final_stage: Vec<f64> = steps
        .iter()
        .filter_map(|(_, _, stage)| match stage {
            TrainingStage::Ubm(UbmStep::Em {
                gaussians: 16,
                log_likelihood,
            }) => Some(*log_likelihood),
            _ => None,
        })
        .collect();
    assert!(final_stage.len() >= config.ubm.iterations);
    for pair in final_stage.windows(2) {
        assert!(pair[1] >= pair[0] - 1e-9, "{final_stage:?}");
    }
    // T: the log-likelihood of the statistics rises every iteration.
    let t_values = &report.total_variability_log_likelihoods;
    assert_eq!(t_values.len(), config.iterations + 1);
    for pair in t_values.windows(2) {
        assert!(pair[1] > pair[0], "{t_values:?}");
    }

    // Speaker i-vectors from the training utterances; each held-out utterance's i-vector is
    // nearest (by cosine) to its own speaker's.
    let speakers: Vec<(String, Array1<f32>)> = (0..8)
        .map(|k| {
            let name = format!("spk{k}");
            let own: Vec<Utterance> = train
                .iter()
                .filter(|u| u.speaker == name)
                .copied()
                .collect();
            let vector = extractor.extract_speaker(&name, &own).unwrap();
            (name, vector)
        })
        .collect();
    let mut correct = 0;
    for (id, speaker, features) in &corpus.held_out {
        let vector = extractor.extract(id, features.view()).unwrap();
        let best = speakers
            .iter()
            .max_by(|a, b| cosine(&vector, &a.1).total_cmp(&cosine(&vector, &b.1)))
            .unwrap();
        correct += usize::from(&best.0 == speaker);
    }
    println!("held-out utterances nearest to their own speaker: {correct} of 16");
    // 8 speakers: chance is 2 of 16.
    assert!(correct >= 14, "{correct} of 16");
}

fn trained(config: &ExtractorConfig) -> IvectorExtractor {
    let corpus = corpus(6, 2);
    IvectorExtractor::train(config, LAYOUT, &views(&corpus.train), &mut |_| {})
        .unwrap()
        .0
}

fn stream(frames: usize, seed: u64) -> Array2<f32> {
    let corpus = corpus(3, seed);
    let all: Vec<_> = corpus.train.iter().chain(&corpus.held_out).collect();
    let mut out = Array2::<f32>::zeros((frames, DIMS));
    let mut t = 0;
    for (_, _, features) in all.iter().cycle() {
        for row in features.rows() {
            if t == frames {
                return out;
            }
            out.row_mut(t).assign(&row);
            t += 1;
        }
    }
    out
}

#[test]
fn online_vectors_follow_their_definition_whatever_the_pieces() {
    for (top_gaussians, frame_stride) in [(0, 1), (3, 1), (0, 3)] {
        let config = ExtractorConfig {
            top_gaussians,
            frame_stride,
            ..small_config()
        };
        let extractor = trained(&config);
        assert_eq!(extractor.window_frames(), 50);
        let frames = stream(700, 3);
        let whole = extractor.online_ivectors("stream", frames.view()).unwrap();
        // The definition: frame t gets the i-vector of the frames g with
        // max(0, u − W + 1) ≤ g ≤ u, g a multiple of s, u = K⌊t/K⌋, computed from scratch.
        for t in 0..700usize {
            let u = 7 * (t / 7);
            let on_grid: Vec<usize> = ((u + 1).saturating_sub(50)..=u)
                .filter(|g| g % frame_stride == 0)
                .collect();
            let window = frames.select(ndarray::Axis(0), &on_grid);
            let stats = extractor.ubm().statistics(window.view(), top_gaussians);
            let expected = extractor.ivector_from_statistics(&stats);
            for (a, b) in whole.row(t).iter().zip(&expected) {
                assert!(
                    (a - b).abs() <= 1e-5 * b.abs().max(1.0),
                    "top {top_gaussians}, stride {frame_stride}, frame {t}: {a} vs {b}"
                );
            }
        }
        // Fed in uneven pieces, the stream gives the same vectors.
        let mut online = extractor.online("stream");
        let mut pieces = Vec::new();
        for (start, end) in [(0, 1), (1, 14), (14, 14), (14, 530), (530, 700)] {
            pieces.push(online.push(frames.slice(s![start..end, ..])).unwrap());
        }
        assert_eq!(online.frames_seen(), 700);
        let views: Vec<_> = pieces.iter().map(|p| p.view()).collect();
        let joined = ndarray::concatenate(ndarray::Axis(0), &views).unwrap();
        for (a, b) in joined.iter().zip(whole.iter()) {
            assert!((a - b).abs() <= 1e-6 * b.abs().max(1.0));
        }
        assert_eq!(online.current(), &whole.row(699).to_owned());
    }
}

#[test]
fn frame_vectors_in_each_mode_equal_the_single_extractions() {
    let base = trained(&small_config());
    let corpus = corpus(2, 4);
    let utterances = views(&corpus.train);
    for mode in [
        ExtractionMode::Online,
        ExtractionMode::Utterance,
        ExtractionMode::Speaker,
    ] {
        let extractor = IvectorExtractor::from_parts(
            ExtractorConfig {
                mode,
                ..base.config().clone()
            },
            base.layout(),
            base.ubm().clone(),
            base.total_variability().clone(),
            base.postprocessing().clone(),
        )
        .unwrap();
        let results = extractor.frame_ivectors(&utterances);
        for (u, result) in utterances.iter().zip(results) {
            let matrix = result.unwrap();
            assert_eq!(matrix.nrows(), u.features.nrows());
            let expected = match mode {
                ExtractionMode::Online => extractor.online_ivectors(u.id, u.features).unwrap(),
                ExtractionMode::Utterance => {
                    let v = extractor.extract(u.id, u.features).unwrap();
                    v.broadcast(matrix.dim()).unwrap().to_owned()
                }
                ExtractionMode::Speaker => {
                    let own: Vec<Utterance> = utterances
                        .iter()
                        .filter(|o| o.speaker == u.speaker)
                        .copied()
                        .collect();
                    let v = extractor.extract_speaker(u.speaker, &own).unwrap();
                    v.broadcast(matrix.dim()).unwrap().to_owned()
                }
            };
            for (a, b) in matrix.iter().zip(expected.iter()) {
                assert!(
                    (a - b).abs() <= 1e-6 * b.abs().max(1.0),
                    "{mode:?} {}",
                    u.id
                );
            }
        }
    }
}

#[test]
fn bad_input_gets_errors_naming_the_item_and_batches_carry_on() {
    let extractor = trained(&small_config());
    let good = stream(120, 5);
    let mut with_nan = good.clone();
    with_nan[(17, 2)] = f32::NAN;
    let wrong_dims = Array2::<f32>::zeros((50, 39));
    let empty = Array2::<f32>::zeros((0, DIMS));
    let short = good.slice(s![..4, ..]).to_owned();

    let message = |error: SpeakerError| error.to_string();
    assert_eq!(
        message(extractor.extract("utt-nan", with_nan.view()).unwrap_err()),
        "utt-nan: feature value NaN at frame 17, dimension 2 is not a finite number"
    );
    assert_eq!(
        message(
            extractor
                .extract("utt-mfcc", wrong_dims.view())
                .unwrap_err()
        ),
        "utt-mfcc: 39-dimensional features, but the i-vector extractor takes 4"
    );
    assert_eq!(
        message(extractor.extract("utt-empty", empty.view()).unwrap_err()),
        "utt-empty: no feature frames"
    );
    assert_eq!(
        message(extractor.extract("utt-short", short.view()).unwrap_err()),
        "utt-short: 4 feature frames, at least 10 needed (setting `min_frames`)"
    );
    assert_eq!(
        message(
            extractor
                .online_ivectors("utt-empty", empty.view())
                .unwrap_err()
        ),
        "utt-empty: no feature frames"
    );
    // A stream names the frame's index in the stream, not in the piece.
    let mut online = extractor.online("interview.ogg");
    online.push(good.view()).unwrap();
    assert_eq!(
        message(online.push(with_nan.view()).unwrap_err()),
        "interview.ogg: feature value NaN at frame 137, dimension 2 is not a finite number"
    );
    assert_eq!(online.frames_seen(), 120);
    let silent = [Utterance {
        id: "utt-empty",
        speaker: "quiet",
        features: empty.view(),
    }];
    assert_eq!(
        message(extractor.extract_speaker("quiet", &silent).unwrap_err()),
        "speaker quiet: no usable feature frames (1 utterances, none usable)"
    );
    assert_eq!(
        message(
            extractor
                .check_front_end("models/x/model.toml", 40, 0.01)
                .unwrap_err()
        ),
        "models/x/model.toml: 40-dimensional features, but the i-vector extractor takes 4"
    );
    assert!(message(
        extractor
            .check_front_end("models/x/model.toml", 4, 0.03)
            .unwrap_err()
    )
    .contains("every 0.03 s"));

    // A batch: each bad utterance gets its error, the good ones their vectors.
    let batch = [
        Utterance {
            id: "a-good",
            speaker: "a",
            features: good.view(),
        },
        Utterance {
            id: "a-nan",
            speaker: "a",
            features: with_nan.view(),
        },
        Utterance {
            id: "b-empty",
            speaker: "b",
            features: empty.view(),
        },
        Utterance {
            id: "c-short",
            speaker: "c",
            features: short.view(),
        },
    ];
    for mode in [
        ExtractionMode::Online,
        ExtractionMode::Utterance,
        ExtractionMode::Speaker,
    ] {
        let extractor = IvectorExtractor::from_parts(
            ExtractorConfig {
                mode,
                ..extractor.config().clone()
            },
            extractor.layout(),
            extractor.ubm().clone(),
            extractor.total_variability().clone(),
            extractor.postprocessing().clone(),
        )
        .unwrap();
        let results = extractor.frame_ivectors(&batch);
        assert_eq!(results[0].as_ref().unwrap().nrows(), 120, "{mode:?}");
        assert_eq!(
            results[1].as_ref().err().map(|e| e.to_string()).unwrap(),
            "a-nan: feature value NaN at frame 17, dimension 2 is not a finite number"
        );
        assert_eq!(
            results[2].as_ref().err().map(|e| e.to_string()).unwrap(),
            "b-empty: no feature frames"
        );
        let short_result = results[3]
            .as_ref()
            .map(|m| m.nrows())
            .map_err(|e| e.to_string());
        match mode {
            // The online stream takes any number of frames.
            ExtractionMode::Online => assert_eq!(short_result, Ok(4)),
            ExtractionMode::Utterance => assert_eq!(
                short_result,
                Err("c-short: 4 feature frames, at least 10 needed (setting `min_frames`)".into())
            ),
            ExtractionMode::Speaker => assert_eq!(
                short_result,
                Err(
                    "speaker c: 4 feature frames, at least 10 needed (setting `min_frames`)".into()
                )
            ),
        }
    }
}

#[test]
fn training_leaves_out_bad_utterances_and_speakers_and_says_why() {
    let corpus = corpus(4, 6);
    let mut utterances = views(&corpus.train);
    let mut with_nan = corpus.train[0].2.clone();
    with_nan[(3, 1)] = f32::INFINITY;
    let empty = Array2::<f32>::zeros((0, DIMS));
    let wrong = Array2::<f32>::zeros((30, 13));
    utterances.push(Utterance {
        id: "x-inf",
        speaker: "spk0",
        features: with_nan.view(),
    });
    utterances.push(Utterance {
        id: "ghost-1",
        speaker: "ghost",
        features: empty.view(),
    });
    utterances.push(Utterance {
        id: "ghost-2",
        speaker: "ghost",
        features: wrong.view(),
    });
    let mut reported = Vec::new();
    let (_, report) = IvectorExtractor::train(&small_config(), LAYOUT, &utterances, &mut |event| {
        if let TrainingEvent::Skipped(error) = event {
            reported.push(error.to_string());
        }
    })
    .unwrap();
    let expected = [
        "x-inf: feature value inf at frame 3, dimension 1 is not a finite number",
        "ghost-1: no feature frames",
        "ghost-2: 13-dimensional features, but the i-vector extractor takes 4",
        "speaker ghost: no usable feature frames (2 utterances, none usable)",
    ];
    assert_eq!(reported, expected);
    let listed: Vec<String> = report.skipped.iter().map(|e| e.to_string()).collect();
    assert_eq!(listed, expected);
    assert_eq!((report.utterances, report.speakers), (16, 4));

    let nothing = [Utterance {
        id: "ghost-1",
        speaker: "ghost",
        features: empty.view(),
    }];
    let error = IvectorExtractor::train(&small_config(), LAYOUT, &nothing, &mut |_| {})
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("none of the 1 training utterances is usable"),
        "{error}"
    );
    let lda = ExtractorConfig {
        lda_dimension: 4,
        ..small_config()
    };
    let error = IvectorExtractor::train(&lda, LAYOUT, &views(&corpus.train), &mut |_| {})
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("at least 5 training speakers, found 4"),
        "{error}"
    );
}

#[test]
fn saved_extractors_load_identically_and_bad_files_are_named() {
    let config = ExtractorConfig {
        lda_dimension: 3,
        length_normalize: true,
        ..small_config()
    };
    let extractor = trained(&config);
    assert_eq!(extractor.output_dimension(), 3);
    let dir = tempfile::tempdir().unwrap();
    extractor.save(dir.path()).unwrap();
    let loaded = IvectorExtractor::load(dir.path()).unwrap();
    assert_eq!(loaded, extractor);
    let frames = stream(200, 7);
    assert_eq!(
        loaded.online_ivectors("s", frames.view()).unwrap(),
        extractor.online_ivectors("s", frames.view()).unwrap()
    );
    // No temporary files are left behind.
    let mut names: Vec<String> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(names, ["ivector.safetensors", "ivector.toml"]);

    // A description whose dimensions disagree with the tensors.
    let description = dir.path().join("ivector.toml");
    let text = std::fs::read_to_string(&description).unwrap();
    std::fs::write(
        &description,
        text.replace("feature_dims = 4", "feature_dims = 39"),
    )
    .unwrap();
    let error = IvectorExtractor::load(dir.path()).unwrap_err().to_string();
    assert!(
        error.contains("ivector.safetensors")
            && error.contains("`ubm.means` has shape [16, 4]")
            && error.contains("[16, 39]"),
        "{error}"
    );
    std::fs::write(&description, text.replace("format = 1", "format = 7")).unwrap();
    let error = IvectorExtractor::load(dir.path()).unwrap_err().to_string();
    assert!(
        error.contains("ivector.toml") && error.contains("format 7"),
        "{error}"
    );
    std::fs::write(
        &description,
        text.replace("dimension = 4\n", "dimension = 0\n"),
    )
    .unwrap();
    let error = IvectorExtractor::load(dir.path()).unwrap_err().to_string();
    assert!(
        error.contains("ivector.toml") && error.contains("`dimension`"),
        "{error}"
    );
    std::fs::write(&description, &text).unwrap();
    std::fs::write(dir.path().join("ivector.safetensors"), "not tensors").unwrap();
    let error = IvectorExtractor::load(dir.path()).unwrap_err().to_string();
    assert!(
        error.contains("ivector.safetensors") && error.contains("not a valid safetensors"),
        "{error}"
    );
    let missing = tempfile::tempdir().unwrap();
    let error = IvectorExtractor::load(missing.path())
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("ivector.toml") && error.contains("reading failed"),
        "{error}"
    );
}

#[test]
fn column_major_features_give_the_same_vectors() {
    let extractor = trained(&ExtractorConfig {
        top_gaussians: 5,
        ..small_config()
    });
    let frames = stream(300, 8);
    let column_major =
        Array2::from_shape_vec((300, DIMS).f(), frames.t().iter().copied().collect()).unwrap();
    assert_eq!(column_major, frames);
    assert_eq!(
        extractor.online_ivectors("f", column_major.view()).unwrap(),
        extractor.online_ivectors("c", frames.view()).unwrap()
    );
    assert_eq!(
        extractor.extract("f", column_major.view()).unwrap(),
        extractor.extract("c", frames.view()).unwrap()
    );
}
