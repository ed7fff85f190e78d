//! Bootstrap intervals against an outside reference: `scipy.stats.bootstrap` with the percentile
//! method, on 150 generated utterances (fixture made by `scripts/reference/bootstrap_reference.py`).
//!
//! isogloss and scipy draw different resamples, so the bounds agree only up to Monte-Carlo
//! error. The script derives, for each bound, the standard deviation of the difference between
//! an isogloss interval of `isogloss_resamples` resamples and scipy's of `reference_resamples`
//! (asymptotic variance of a sample quantile, checked against the measured spread of repeated
//! scipy runs; the larger of the two), and records 4 standard deviations as the tolerance. The
//! fixture's contrasts (the 90 % interval, the unpaired difference) show that the tolerances
//! are tight enough to tell a wrong level or a lost pairing apart.

use isogloss_score::bootstrap::{interval, paired, UtteranceErrors};
use isogloss_score::{BootstrapOptions, Interval};
use serde_json::Value;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../tests/fixtures/score/scipy_bootstrap.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn systems(fixture: &Value) -> (Vec<UtteranceErrors>, Vec<UtteranceErrors>) {
    let field = |u: &Value, key: &str| u[key].as_u64().unwrap();
    fixture["utterances"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| {
            (
                UtteranceErrors {
                    errors: field(u, "errors1"),
                    ref_words: field(u, "ref_words"),
                },
                UtteranceErrors {
                    errors: field(u, "errors2"),
                    ref_words: field(u, "ref_words"),
                },
            )
        })
        .unzip()
}

fn options(fixture: &Value, confidence: f64) -> BootstrapOptions {
    BootstrapOptions {
        resamples: fixture["isogloss_resamples"].as_u64().unwrap() as usize,
        seed: 1,
        confidence,
    }
}

/// Largest distance of our bounds from the reference bounds, in units of each bound's
/// tolerance (≤ 1 passes).
fn distance(ours: &Interval, reference: &Value) -> f64 {
    let tolerance = |side: usize| reference["tolerance"][side].as_f64().unwrap();
    let low = (ours.low - reference["low"].as_f64().unwrap()).abs() / tolerance(0);
    let high = (ours.high - reference["high"].as_f64().unwrap()).abs() / tolerance(1);
    low.max(high)
}

#[test]
fn error_rate_interval_matches_scipy_percentile_bootstrap() {
    let fixture = fixture();
    let (system1, _) = systems(&fixture);
    assert_eq!(system1.len(), 150);
    let reference = &fixture["rate"]["interval"];
    let ours = interval(&system1, &options(&fixture, 0.95)).unwrap();
    // scipy.stats.bootstrap(method='percentile', paired=True), 95 %, within 4 Monte-Carlo sd.
    assert!(
        distance(&ours, reference) <= 1.0,
        "{ours:?} vs scipy {reference}"
    );
    // Contrast: scipy's 90 % interval is out of reach, so a wrong level would be caught.
    assert!(distance(&ours, &fixture["rate"]["interval_90"]) > 3.0);
    let ours_90 = interval(&system1, &options(&fixture, 0.90)).unwrap();
    // scipy.stats.bootstrap(method='percentile'), 90 %, within 4 Monte-Carlo sd.
    assert!(distance(&ours_90, &fixture["rate"]["interval_90"]) <= 1.0);
}

#[test]
fn paired_difference_matches_scipy_percentile_bootstrap() {
    let fixture = fixture();
    let (system1, system2) = systems(&fixture);
    let expected = &fixture["paired"];
    let ours = paired(&system1, &system2, &options(&fixture, 0.95)).unwrap();
    assert_eq!(
        ours.valid_resamples,
        fixture["isogloss_resamples"].as_u64().unwrap() as usize
    );
    // scipy.stats.bootstrap(method='percentile', paired=True) of rate(2) − rate(1), 95 %,
    // within 4 Monte-Carlo sd.
    assert!(
        distance(&ours.difference_interval, &expected["interval"]) <= 1.0,
        "{:?} vs scipy {}",
        ours.difference_interval,
        expected["interval"]
    );
    // Contrast: resampling the systems independently (scipy, paired=False) gives a far wider
    // interval, so an implementation that lost the pairing would be caught.
    assert!(distance(&ours.difference_interval, &expected["unpaired_interval"]) > 3.0);
    let probability = expected["probability_system2_better"].as_f64().unwrap();
    let tolerance = expected["probability_tolerance"].as_f64().unwrap();
    // Share of scipy's resamples with rate(2) < rate(1), within 4 binomial sd.
    assert!(
        (ours.probability_system2_better - probability).abs() <= tolerance,
        "{} vs scipy {probability} ± {tolerance}",
        ours.probability_system2_better
    );
    assert!(probability > 0.8 && probability < 0.95);
}
