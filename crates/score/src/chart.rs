//! Error rates as charts: every [`Summary`] becomes a row of two bars (WER, flexible WER) with
//! their bootstrap intervals as whiskers, and a paired comparison becomes a significance mark.
//!
//! The demo's per-dialect chart, `isogloss score --chart` (overall, then one section per
//! grouping column: per dialect, per speaker) and the sweep's chart per cell are all built from
//! these pieces, so the three look and read alike.

use isogloss_chart::{
    Bar, BarChart, Color, Glossary, Interval as Whisker, Mark, Row, Section, Series,
};

use crate::bootstrap::Interval;
use crate::report::{PairedDifference, ScoreReport, Summary};

/// A confidence level as a percentage without needless decimals (0.95 → "95", 0.975 → "97.5").
pub fn level_percent(level: f64) -> String {
    let text = format!("{:.1}", 100.0 * level);
    text.trim_end_matches(".0").to_string()
}

/// The two series of every error-rate chart: plain WER (darker) and flexible WER (lighter).
pub fn error_rate_series() -> Vec<Series> {
    vec![
        Series {
            name: "WER".into(),
            color: Color(70, 115, 180),
        },
        Series {
            name: "flexible WER".into(),
            color: Color(170, 200, 235),
        },
    ]
}

/// What the whiskers and marks of an error-rate chart are, at confidence `level`, compared
/// with `reference` (e.g. "the baseline cell").
pub fn glossary(level: f64, reference: &str) -> Glossary {
    let level = level_percent(level);
    Glossary {
        whisker: format!("{level} % bootstrap interval over utterances"),
        lower: format!("significantly lower than {reference}"),
        higher: format!("significantly higher than {reference}"),
    }
}

/// The note under a chart with marks: which test decides a mark.
pub fn significance_note(level: f64, reference: &str) -> String {
    format!(
        "A triangle marks a rate that differs from {reference} by the paired bootstrap over utterances: the {} % interval of the difference excludes 0.",
        level_percent(level)
    )
}

/// The mark of a paired difference (second − first): lower or higher when its interval
/// excludes 0, none otherwise.
pub fn mark(difference: Option<&PairedDifference>) -> Option<Mark> {
    let interval = difference?.bootstrap.difference_interval;
    if interval.high < 0.0 {
        Some(Mark::Lower)
    } else if interval.low > 0.0 {
        Some(Mark::Higher)
    } else {
        None
    }
}

fn percent_bar(rate: Option<f64>, interval: Option<Interval>, mark: Option<Mark>) -> Option<Bar> {
    rate.map(|rate| Bar {
        value: 100.0 * rate,
        interval: interval.map(|i| Whisker {
            low: 100.0 * i.low,
            high: 100.0 * i.high,
        }),
        mark,
    })
}

/// One row: WER and flexible WER of `summary` in %, with their intervals, and the marks of the
/// paired differences to the reference row (plain, flexible) when given.
pub fn summary_row(
    label: &str,
    summary: &Summary,
    versus: Option<&PairedDifference>,
    flexible_versus: Option<&PairedDifference>,
) -> Row {
    Row {
        label: label.to_string(),
        bars: vec![
            percent_bar(summary.wer, summary.wer_interval, mark(versus)),
            percent_bar(
                summary.flexible_wer,
                summary.flexible_wer_interval,
                mark(flexible_versus),
            ),
        ],
    }
}

/// The chart of a scoring report: the system overall (and the compared system, marked where it
/// differs significantly), then one section per grouping column.
pub fn report_chart(report: &ScoreReport) -> BarChart {
    let level = report.options.bootstrap.confidence;
    let file_name = |path: &std::path::Path| {
        path.file_name().map_or_else(
            || path.display().to_string(),
            |n| n.to_string_lossy().into_owned(),
        )
    };
    let mut overall = vec![summary_row(
        &format!("all: {}", file_name(&report.hypotheses)),
        &report.overall,
        None,
        None,
    )];
    let mut notes = vec![format!(
        "Reference {}, column {}: {} utterances, {} words.",
        report.reference.display(),
        report.column,
        report.overall.utterances,
        report.overall.ref_words
    )];
    if let Some(comparison) = &report.comparison {
        overall.push(summary_row(
            &format!("all: {}", file_name(&comparison.hypotheses)),
            &comparison.overall,
            comparison.wer_difference.as_ref(),
            comparison.flexible_wer_difference.as_ref(),
        ));
        notes.push(significance_note(level, "the first system"));
    }
    let mut sections = vec![Section {
        heading: Some("Overall".into()),
        rows: overall,
    }];
    let mut columns: Vec<&str> = report.groups.iter().map(|g| g.column.as_str()).collect();
    columns.dedup();
    for column in columns {
        sections.push(Section {
            heading: Some(format!("By {column}: {}", file_name(&report.hypotheses))),
            rows: report
                .groups
                .iter()
                .filter(|g| g.column == column)
                .map(|g| summary_row(&g.value, &g.summary, None, None))
                .collect(),
        });
    }
    BarChart {
        title: "WER and flexible WER".into(),
        notes,
        axis: "error rate, %".into(),
        series: error_rate_series(),
        glossary: glossary(level, "the first system"),
        sections,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bootstrap::PairedBootstrap;

    fn difference(low: f64, high: f64) -> PairedDifference {
        PairedDifference {
            difference: (low + high) / 2.0,
            bootstrap: PairedBootstrap {
                probability_system2_better: 0.5,
                difference_interval: Interval { low, high },
                valid_resamples: 1000,
            },
        }
    }

    #[test]
    fn a_mark_needs_an_interval_that_excludes_zero() {
        assert_eq!(mark(Some(&difference(-0.05, -0.01))), Some(Mark::Lower));
        assert_eq!(mark(Some(&difference(0.01, 0.05))), Some(Mark::Higher));
        assert_eq!(mark(Some(&difference(-0.01, 0.05))), None);
        assert_eq!(mark(Some(&difference(0.0, 0.05))), None);
        assert_eq!(mark(None), None);
    }

    #[test]
    fn levels_are_written_as_given() {
        assert_eq!(level_percent(0.95), "95");
        assert_eq!(level_percent(0.975), "97.5");
        assert_eq!(
            glossary(0.9, "x").whisker,
            "90 % bootstrap interval over utterances"
        );
    }
}
