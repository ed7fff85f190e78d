//! Calibration and rank correlation against outside references: scikit-learn's logistic
//! regression (the temperature), `calibration_curve` (reliability table, ECE) and
//! `scipy.stats.spearmanr`, computed by `scripts/reference/confidence_reference.py`.

use isogloss_confidence::{rank_correlation, reliability, Calibration, WordOutcome};
use serde_json::Value;

fn fixture() -> Value {
    let text = include_str!("../../../tests/fixtures/confidence/sklearn_scipy_reference.json");
    serde_json::from_str(text).unwrap()
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn words(f: &Value) -> Vec<WordOutcome> {
    numbers(&f["certainty"])
        .into_iter()
        .zip(f["correct"].as_array().unwrap())
        .map(|(c, y)| WordOutcome {
            certainty: c as f32,
            correct: y.as_bool().unwrap(),
        })
        .collect()
}

fn check_table(words: &[WordOutcome], t: &Calibration, expected: &Value, tolerance: f64) {
    let table = reliability(words, t, 10);
    let counts: Vec<usize> = table.bins.iter().map(|b| b.words).collect();
    let expected_counts: Vec<usize> = numbers(&expected["counts"])
        .into_iter()
        .map(|c| c as usize)
        .collect();
    // bin counts as sklearn's calibration_curve bins them (searchsorted on the inner edges)
    assert_eq!(counts, expected_counts);
    let nonempty: Vec<_> = table.bins.iter().filter(|b| b.words > 0).collect();
    for ((bin, accuracy), confidence) in nonempty
        .iter()
        .zip(numbers(&expected["accuracy"]))
        .zip(numbers(&expected["mean_confidence"]))
    {
        // sklearn calibration_curve: prob_true and prob_pred per non-empty bin
        assert!(
            (bin.accuracy - accuracy).abs() < tolerance,
            "{bin:?} vs {accuracy}"
        );
        assert!(
            (bin.mean_confidence - confidence).abs() < tolerance,
            "{bin:?} vs {confidence}"
        );
    }
    let ece = expected["ece"].as_f64().unwrap();
    // ECE from sklearn calibration_curve's table, weighted by the bin counts
    assert!(
        (table.ece - ece).abs() < tolerance,
        "{} vs {ece}",
        table.ece
    );
}

#[test]
fn the_temperature_is_sklearns_logistic_regression_without_intercept() {
    let f = fixture();
    let words = words(&f);
    let fitted = Calibration::fit_temperature(&words).unwrap();
    let expected = f["temperature"].as_f64().unwrap();
    // sklearn LogisticRegression(fit_intercept=False, C=inf) on logit(c): coefficient 1/T,
    // cross-checked in the script with scipy minimize_scalar to 1e-6
    assert!(
        (fitted.temperature() - expected).abs() < 1e-6 * expected,
        "{} vs {expected}",
        fitted.temperature()
    );
}

#[test]
fn temperature_and_shift_are_sklearns_logistic_regression_with_intercept() {
    let f = fixture();
    let fitted = Calibration::fit(&words(&f)).unwrap();
    let (t, shift) = (
        f["platt"]["temperature"].as_f64().unwrap(),
        f["platt"]["shift"].as_f64().unwrap(),
    );
    // sklearn LogisticRegression(fit_intercept=True, C=inf) on logit(c): coefficient 1/T and
    // intercept = shift
    assert!(
        (fitted.temperature() - t).abs() < 1e-6 * t,
        "{fitted:?} vs {t}"
    );
    assert!(
        (fitted.shift() - shift).abs() < 1e-6,
        "{fitted:?} vs {shift}"
    );
}

#[test]
fn reliability_and_ece_are_sklearns_calibration_curve() {
    let f = fixture();
    let words = words(&f);
    check_table(&words, &Calibration::IDENTITY, &f["raw"], 1e-12);
    let t = Calibration::new(f["temperature"].as_f64().unwrap(), 0.0).unwrap();
    check_table(&words, &t, &f["calibrated"], 1e-9);
    let platt = Calibration::new(
        f["platt"]["temperature"].as_f64().unwrap(),
        f["platt"]["shift"].as_f64().unwrap(),
    )
    .unwrap();
    check_table(&words, &platt, &f["platt"], 1e-9);
}

#[test]
fn rank_correlation_is_scipys_spearmanr_with_ties() {
    let f = fixture();
    let s = &f["spearman"];
    let rho = rank_correlation(&numbers(&s["x"]), &numbers(&s["y"])).unwrap();
    // scipy.stats.spearmanr (average ranks for ties)
    assert!((rho - s["rho"].as_f64().unwrap()).abs() < 1e-12, "{rho}");
}
