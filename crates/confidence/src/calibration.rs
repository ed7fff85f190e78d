//! Calibration of word certainties, the reliability table, expected calibration error and the
//! reliability chart.
//!
//! A certainty `c` is mapped to `p = σ(logit(c) / T + shift)`: the log-odds of the certainty
//! divided by a temperature `T` and moved by a shift, both fitted on dev by maximum likelihood
//! of the words' correctness. With the shift fixed at 0 this is temperature scaling (Guo et al.
//! 2017 scale a network's logits the same way; here the certainty's own log-odds play the
//! logits' part, because the certainty is a geometric mean over units, not one softmax); with
//! the shift it is Platt's logistic scaling of the same log-odds. `T > 1` softens over-confident
//! certainties, `T < 1` sharpens timid ones, a positive shift raises all of them. Either way the
//! order of words never changes.
//!
//! The reliability table cuts [0, 1] into equal-width bins; a value on an inner edge belongs to
//! the lower bin (the convention of scikit-learn's `calibration_curve`, against which the
//! tests check it). ECE is the word-weighted mean gap between a bin's accuracy and its mean
//! confidence.

use std::fmt::Write as _;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::outcome::WordOutcome;
use crate::ConfidenceError;

/// Certainties are kept this far from 0 and 1 before taking log-odds (the decoder writes 1.0
/// for a word whose units all fire with certainty).
const CLIP: f64 = 1e-6;

/// The log-odds of a certainty, clipped to [1e-6, 1 − 1e-6].
fn log_odds(certainty: f32) -> f64 {
    let c = (certainty as f64).clamp(CLIP, 1.0 - CLIP);
    (c / (1.0 - c)).ln()
}

fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// `ln(1 + eˣ)` without overflow.
fn softplus(x: f64) -> f64 {
    if x > 0.0 {
        x + (-x).exp().ln_1p()
    } else {
        x.exp().ln_1p()
    }
}

/// A calibration of word certainties: `p = σ(logit(c) / T + shift)`, with `T` finite and
/// positive and `shift` finite. [`Calibration::IDENTITY`] leaves certainties as they are.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Calibration {
    temperature: f64,
    shift: f64,
}

/// What a calibration file holds: the temperature and shift, and for the record the words they
/// were fitted on and the dev ECE before and after.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationRecord {
    /// The fitted temperature `T`.
    pub temperature: f64,
    /// The fitted shift of the log-odds (0 when only a temperature was fitted).
    pub shift: f64,
    /// Dev words it was fitted on.
    pub words: usize,
    /// Dev ECE of the raw certainties (10 bins).
    pub dev_ece_before: f64,
    /// Dev ECE after the calibration (10 bins).
    pub dev_ece_after: f64,
}

impl Calibration {
    /// `T = 1`, no shift: certainties used as they are.
    pub const IDENTITY: Calibration = Calibration {
        temperature: 1.0,
        shift: 0.0,
    };

    /// A calibration from its two numbers; `None` unless `temperature` is finite and positive
    /// and `shift` finite.
    pub fn new(temperature: f64, shift: f64) -> Option<Calibration> {
        (temperature.is_finite() && temperature > 0.0 && shift.is_finite())
            .then_some(Calibration { temperature, shift })
    }

    /// The temperature `T`.
    pub fn temperature(&self) -> f64 {
        self.temperature
    }

    /// The shift added to the scaled log-odds.
    pub fn shift(&self) -> f64 {
        self.shift
    }

    /// Whether this leaves certainties unchanged.
    pub fn is_identity(&self) -> bool {
        *self == Calibration::IDENTITY
    }

    /// `T = 1.02` or `T = 1.02, shift +0.85`.
    pub fn describe(&self) -> String {
        if self.shift == 0.0 {
            format!("T = {:.2}", self.temperature)
        } else {
            format!("T = {:.2}, shift {:+.2}", self.temperature, self.shift)
        }
    }

    /// The calibrated confidence `σ(logit(c) / T + shift)` of a certainty `c`.
    pub fn apply(&self, certainty: f32) -> f64 {
        sigmoid(log_odds(certainty) / self.temperature + self.shift)
    }

    /// Calibration scaling alone: the `T` (shift 0) that maximizes the likelihood of the
    /// words' correctness.
    pub fn fit_temperature(words: &[WordOutcome]) -> Result<Calibration, ConfidenceError> {
        fit(words, false)
    }

    /// Calibration and shift together (logistic regression on the log-odds with an intercept,
    /// Platt's scaling applied to the certainty's log-odds). Needed when the certainty is too
    /// timid in the middle of its range and too bold at the top, which no single temperature
    /// can fix.
    pub fn fit(words: &[WordOutcome]) -> Result<Calibration, ConfidenceError> {
        fit(words, true)
    }

    /// Reads a calibration file written by [`Calibration::write`].
    pub fn read(path: &Path) -> Result<Calibration, ConfidenceError> {
        let problem = |problem: String| ConfidenceError::CalibrationFile {
            path: path.to_path_buf(),
            problem,
        };
        let text = std::fs::read_to_string(path)
            .map_err(|e| problem(format!("cannot read the calibration: {e}")))?;
        let record: CalibrationRecord = toml::from_str(&text).map_err(|e| {
            problem(format!(
                "not a calibration file of `isogloss calibrate`: {e}"
            ))
        })?;
        Calibration::new(record.temperature, record.shift).ok_or_else(|| {
            problem(format!(
                "keys `temperature` and `shift`: expected a positive and a finite number, found {} and {}",
                record.temperature, record.shift
            ))
        })
    }

    /// Writes a calibration file (TOML) holding `record`.
    pub fn write(path: &Path, record: &CalibrationRecord) -> Result<(), ConfidenceError> {
        let text = format!(
            "# Word-certainty calibration written by `isogloss calibrate`:\n# confidence = sigmoid(logit(certainty) / temperature + shift)\n{}",
            toml::to_string(record).expect("a record of numbers serializes")
        );
        std::fs::write(path, text).map_err(|e| ConfidenceError::CalibrationFile {
            path: path.to_path_buf(),
            problem: format!("cannot write: {e}"),
        })
    }
}

/// Maximum likelihood of the words' correctness under `σ(a·logit(c) + b)` (`b` fixed at 0
/// unless `with_shift`): the negative log-likelihood is convex in `(a, b)` (logistic
/// regression), so Newton's method with step halving finds the optimum; `T = 1/a`. Fails when
/// the words are all right or all wrong, or when higher certainty does not mean more often
/// right (the optimum would have `a ≤ 0`). Words that certainty separates perfectly drive `a`
/// up; it stops at 1000.
fn fit(words: &[WordOutcome], with_shift: bool) -> Result<Calibration, ConfidenceError> {
    let right = words.iter().filter(|w| w.correct).count();
    if right == 0 || right == words.len() {
        return Err(ConfidenceError::CannotFit(format!(
            "expected words both right and wrong, found {right} right of {}",
            words.len()
        )));
    }
    let points: Vec<(f64, f64)> = words
        .iter()
        .map(|w| (log_odds(w.certainty), if w.correct { 1.0 } else { 0.0 }))
        .collect();
    let loss = |a: f64, b: f64| -> f64 {
        points
            .iter()
            .map(|&(z, y)| softplus(a * z + b) - y * (a * z + b))
            .sum()
    };
    const MAX_SLOPE: f64 = 1000.0;
    let (mut a, mut b) = (1.0f64, 0.0f64);
    let mut current = loss(a, b);
    for _ in 0..200 {
        let (mut ga, mut gb, mut haa, mut hab, mut hbb) = (0.0, 0.0, 0.0, 0.0, 0.0);
        for &(z, y) in &points {
            let p = sigmoid(a * z + b);
            let w = p * (1.0 - p);
            ga += (p - y) * z;
            gb += p - y;
            haa += w * z * z;
            hab += w * z;
            hbb += w;
        }
        // Newton step: solve H·d = g (2 × 2, or 1 × 1 without the shift)
        let (mut da, mut db) = if with_shift {
            let det = haa * hbb - hab * hab;
            if det > 1e-300 {
                ((hbb * ga - hab * gb) / det, (haa * gb - hab * ga) / det)
            } else {
                (ga, gb)
            }
        } else if haa > 1e-300 {
            (ga / haa, 0.0)
        } else {
            (ga, 0.0)
        };
        let mut moved = false;
        for _ in 0..60 {
            let (na, nb) = ((a - da).clamp(-MAX_SLOPE, MAX_SLOPE), b - db);
            let value = loss(na, nb);
            if value <= current {
                moved = (na - a).abs() + (nb - b).abs() > 1e-13 * (1.0 + a.abs() + b.abs());
                a = na;
                b = nb;
                current = value;
                break;
            }
            da /= 2.0;
            db /= 2.0;
        }
        if !moved || a >= MAX_SLOPE {
            break;
        }
    }
    if a <= 0.0 {
        return Err(ConfidenceError::CannotFit(format!(
            "higher certainty does not go with more words right ({right} right of {})",
            words.len()
        )));
    }
    Ok(Calibration {
        temperature: 1.0 / a,
        shift: b,
    })
}

/// The mean calibrated confidence of a segment's words: the expected share of them that are
/// right. `None` for a segment without words.
pub fn segment_confidence(
    certainties: impl IntoIterator<Item = f32>,
    temperature: &Calibration,
) -> Option<f64> {
    let (mut sum, mut count) = (0.0, 0usize);
    for c in certainties {
        sum += temperature.apply(c);
        count += 1;
    }
    (count > 0).then(|| sum / count as f64)
}

/// One bin of a reliability table.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ReliabilityBin {
    /// Lower edge (exclusive except for the first bin).
    pub lower: f64,
    /// Upper edge (inclusive).
    pub upper: f64,
    /// Words whose confidence falls in the bin.
    pub words: usize,
    /// Their mean confidence (0 when empty).
    pub mean_confidence: f64,
    /// The share of them that are right (0 when empty).
    pub accuracy: f64,
}

/// A reliability table and its expected calibration error.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Reliability {
    /// Equal-width bins over [0, 1], in order.
    pub bins: Vec<ReliabilityBin>,
    /// `Σ_b n_b / N · |accuracy_b − mean_confidence_b|`.
    pub ece: f64,
    /// Words in all bins.
    pub words: usize,
}

/// The bin of a confidence among `bins` equal-width bins; a value on an inner edge `k/bins`
/// goes to the lower bin.
fn bin_of(p: f64, bins: usize) -> usize {
    let above = (p * bins as f64).ceil() as isize - 1;
    above.clamp(0, bins as isize - 1) as usize
}

/// The reliability table of `words` after `temperature`, with `bins` equal-width bins.
pub fn reliability(words: &[WordOutcome], temperature: &Calibration, bins: usize) -> Reliability {
    let bins = bins.max(1);
    let mut sums = vec![(0usize, 0.0f64, 0usize); bins];
    for word in words {
        let p = temperature.apply(word.certainty);
        let b = &mut sums[bin_of(p, bins)];
        b.0 += 1;
        b.1 += p;
        b.2 += word.correct as usize;
    }
    let total = words.len();
    let mut ece = 0.0;
    let bins = sums
        .iter()
        .enumerate()
        .map(|(i, &(n, sum, right))| {
            let (mean_confidence, accuracy) = if n > 0 {
                (sum / n as f64, right as f64 / n as f64)
            } else {
                (0.0, 0.0)
            };
            if total > 0 {
                ece += n as f64 / total as f64 * (accuracy - mean_confidence).abs();
            }
            ReliabilityBin {
                lower: i as f64 / bins as f64,
                upper: (i + 1) as f64 / bins as f64,
                words: n,
                mean_confidence,
                accuracy,
            }
        })
        .collect();
    Reliability {
        bins,
        ece,
        words: total,
    }
}

/// The expected calibration error of `words` after `temperature` over `bins` equal-width bins.
pub fn expected_calibration_error(
    words: &[WordOutcome],
    temperature: &Calibration,
    bins: usize,
) -> f64 {
    reliability(words, temperature, bins).ece
}

/// A reliability chart as a standalone SVG: accuracy against mean confidence per bin for each
/// named table (e.g. before and after the temperature), the diagonal of perfect calibration,
/// and each table's ECE in the legend. Series differ in colour (Okabe–Ito blue and orange,
/// chosen to stay apart for colour-blind readers), marker shape and line dash.
pub fn reliability_svg(title: &str, series: &[(&str, &Reliability)]) -> String {
    const W: f64 = 520.0;
    const H: f64 = 440.0;
    let (left, top, size) = (70.0, 50.0, 320.0);
    let x = |v: f64| left + v * size;
    let y = |v: f64| top + (1.0 - v) * size;
    let styles = [("#0072B2", "", "circle"), ("#E69F00", "6 4", "square")];
    let mut svg = String::new();
    let _ = write!(
        svg,
        r##"<svg xmlns="http://www.w3.org/2000/svg" width="{W}" height="{H}" viewBox="0 0 {W} {H}" font-family="sans-serif" font-size="12">
<rect width="{W}" height="{H}" fill="#ffffff"/>
<text x="{}" y="28" font-size="15" text-anchor="middle">{}</text>
<rect x="{left}" y="{top}" width="{size}" height="{size}" fill="none" stroke="#444"/>
<line x1="{}" y1="{}" x2="{}" y2="{}" stroke="#999" stroke-dasharray="2 3"/>
"##,
        W / 2.0,
        escape(title),
        x(0.0),
        y(0.0),
        x(1.0),
        y(1.0)
    );
    for k in 0..=5 {
        let v = k as f64 / 5.0;
        let _ = write!(
            svg,
            r##"<text x="{}" y="{}" text-anchor="middle">{v:.1}</text><text x="{}" y="{}" text-anchor="end">{v:.1}</text>
<line x1="{}" y1="{}" x2="{}" y2="{}" stroke="#ddd"/><line x1="{}" y1="{}" x2="{}" y2="{}" stroke="#ddd"/>
"##,
            x(v),
            y(0.0) + 18.0,
            x(0.0) - 6.0,
            y(v) + 4.0,
            x(v),
            y(0.0),
            x(v),
            y(1.0),
            x(0.0),
            y(v),
            x(1.0),
            y(v)
        );
    }
    let _ = write!(
        svg,
        r##"<text x="{}" y="{}" text-anchor="middle">mean confidence in bin</text>
<text transform="translate(22 {}) rotate(-90)" text-anchor="middle">share of words right</text>
"##,
        x(0.5),
        y(0.0) + 38.0,
        y(0.5)
    );
    for (i, (name, table)) in series.iter().enumerate() {
        let (colour, dash, marker) = styles[i % styles.len()];
        let points: Vec<(f64, f64, usize)> = table
            .bins
            .iter()
            .filter(|b| b.words > 0)
            .map(|b| (x(b.mean_confidence), y(b.accuracy), b.words))
            .collect();
        let path: Vec<String> = points
            .iter()
            .map(|(px, py, _)| format!("{px:.1},{py:.1}"))
            .collect();
        let _ = writeln!(
            svg,
            r##"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="2" stroke-dasharray="{dash}"/>"##,
            path.join(" ")
        );
        for (px, py, n) in &points {
            let _ = match marker {
                "circle" => writeln!(
                    svg,
                    r##"<circle cx="{px:.1}" cy="{py:.1}" r="4.5" fill="{colour}"><title>{n} words</title></circle>"##
                ),
                _ => writeln!(
                    svg,
                    r##"<rect x="{:.1}" y="{:.1}" width="8" height="8" fill="{colour}"><title>{n} words</title></rect>"##,
                    px - 4.0,
                    py - 4.0
                ),
            };
        }
        let ly = top + 20.0 + 22.0 * i as f64;
        let lx = left + size + 14.0;
        let _ = writeln!(
            svg,
            r##"<line x1="{lx}" y1="{ly}" x2="{}" y2="{ly}" stroke="{colour}" stroke-width="2" stroke-dasharray="{dash}"/><text x="{}" y="{}">{} (ECE {:.3})</text>"##,
            lx + 22.0,
            lx + 28.0,
            ly + 4.0,
            escape(name),
            table.ece
        );
    }
    let words = series.first().map_or(0, |(_, t)| t.words);
    let _ = writeln!(
        svg,
        r##"<text x="{}" y="{}">{words} words, {} bins</text>
</svg>"##,
        left + size + 14.0,
        top + 20.0 + 22.0 * series.len() as f64 + 6.0,
        series.first().map_or(0, |(_, t)| t.bins.len())
    );
    svg
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn outcomes(pairs: &[(f32, bool)]) -> Vec<WordOutcome> {
        pairs
            .iter()
            .map(|&(certainty, correct)| WordOutcome { certainty, correct })
            .collect()
    }

    #[test]
    fn bins_put_edges_below_and_cover_zero_and_one() {
        assert_eq!(bin_of(0.0, 10), 0);
        assert_eq!(bin_of(0.1, 10), 0);
        assert_eq!(bin_of(0.1000001, 10), 1);
        assert_eq!(bin_of(1.0, 10), 9);
    }

    #[test]
    fn ece_by_hand() {
        // confidences 0.25 ×2 (one right), 0.75 ×2 (both right), identity temperature:
        // bin [0.2, 0.3]: |0.5 − 0.25| = 0.25; bin [0.7, 0.8]: |1 − 0.75| = 0.25; ECE 0.25
        let words = outcomes(&[(0.25, true), (0.25, false), (0.75, true), (0.75, true)]);
        let table = reliability(&words, &Calibration::IDENTITY, 10);
        assert!((table.ece - 0.25).abs() < 1e-12);
        assert_eq!(table.bins[2].words, 2);
        assert_eq!(table.bins[7].accuracy, 1.0);
    }

    #[test]
    fn fitting_recovers_the_temperature_that_made_the_labels() {
        // labels drawn (deterministically, by quantiles) from p = σ(logit(c) / 2)
        let mut words = Vec::new();
        for i in 1..200 {
            let c = i as f32 / 200.0;
            let p = Calibration::new(2.0, 0.0).unwrap().apply(c);
            for k in 0..50 {
                words.push(WordOutcome {
                    certainty: c,
                    correct: (k as f64 + 0.5) / 50.0 < p,
                });
            }
        }
        let t = Calibration::fit_temperature(&words).unwrap();
        assert!((t.temperature() - 2.0).abs() < 0.05, "{t:?}");
        let both = Calibration::fit(&words).unwrap();
        assert!(
            (both.temperature() - 2.0).abs() < 0.05 && both.shift().abs() < 0.05,
            "{both:?}"
        );
    }

    #[test]
    fn fitting_refuses_what_carries_no_information() {
        let all_right = outcomes(&[(0.9, true), (0.2, true)]);
        assert!(Calibration::fit(&all_right).is_err());
        let backwards = outcomes(&[
            (0.9, false),
            (0.8, false),
            (0.7, true),
            (0.3, false),
            (0.2, true),
            (0.1, true),
        ]);
        let message = Calibration::fit(&backwards).unwrap_err().to_string();
        assert!(message.contains("does not go with"), "{message}");
    }

    #[test]
    fn calibration_files_round_trip_and_bad_ones_name_the_key() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("calibration.toml");
        let record = CalibrationRecord {
            temperature: 1.7,
            shift: 0.5,
            words: 10,
            dev_ece_before: 0.2,
            dev_ece_after: 0.03,
        };
        Calibration::write(&path, &record).unwrap();
        assert_eq!(
            Calibration::read(&path).unwrap(),
            Calibration::new(1.7, 0.5).unwrap()
        );
        std::fs::write(
            &path,
            "temperature = -1.0\nshift = 0.0\nwords = 1\ndev_ece_before = 0.0\ndev_ece_after = 0.0\n",
        )
        .unwrap();
        let message = Calibration::read(&path).unwrap_err().to_string();
        assert!(
            message.contains("keys `temperature` and `shift`") && message.contains("-1"),
            "{message}"
        );
    }

    #[test]
    fn the_chart_is_svg_with_both_series() {
        let words = outcomes(&[(0.25, true), (0.25, false), (0.75, true)]);
        let a = reliability(&words, &Calibration::IDENTITY, 10);
        let svg = reliability_svg("dev & test", &[("raw", &a), ("calibrated", &a)]);
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        assert!(svg.contains("dev &amp; test") && svg.contains("calibrated (ECE"));
    }
}
