//! The sweep's results as a Markdown table, a CSV file and an SVG chart, in our own layout.

use std::fmt::Write as _;

use isogloss_chart::{BarChart, Section};
use isogloss_score::chart::{
    error_rate_series, glossary, level_percent, significance_note, summary_row,
};

use crate::run::{CellResult, FailedCell, SweepResults};

fn percent(rate: Option<f64>) -> String {
    rate.map_or_else(|| "–".to_string(), |r| format!("{:.1}", 100.0 * r))
}

fn interval(summary: &isogloss_score::Summary, flexible: bool) -> String {
    let interval = if flexible {
        summary.flexible_wer_interval
    } else {
        summary.wer_interval
    };
    interval.map_or_else(String::new, |i| {
        format!(" [{:.1}, {:.1}]", 100.0 * i.low, 100.0 * i.high)
    })
}

fn versus(cell: &CellResult) -> String {
    match &cell.versus_baseline {
        None => "baseline".to_string(),
        Some(d) => format!(
            "{:+.1} points [{:+.1}, {:+.1}], P(better) {:.2}",
            100.0 * d.difference,
            100.0 * d.bootstrap.difference_interval.low,
            100.0 * d.bootstrap.difference_interval.high,
            d.bootstrap.probability_system2_better
        ),
    }
}

/// The results as a Markdown document: one row per cell, then per-group figures.
pub fn markdown(results: &SweepResults) -> String {
    let mut text = String::new();
    let _ = writeln!(text, "# Sweep results\n");
    let _ = writeln!(
        text,
        "Test audio {:.1} min; acoustic passes this run: {} utterances in {:.1} s; cells decoded this run: {} of {}.\n",
        results.audio_seconds / 60.0,
        results.acoustic_runs,
        results.acoustic_seconds,
        results.cells_decoded,
        results.cells.len() + results.failed.len()
    );
    if !results.failed.is_empty() {
        let _ = writeln!(
            text,
            "**{} cell(s) failed** and have no figures: their rows say why.\n",
            results.failed.len()
        );
    }
    let _ = writeln!(text, "WER and flexible WER in %, {}% bootstrap interval in brackets; the last column compares plain WER with the baseline cell (paired bootstrap: the difference cell − baseline in points with its {}% interval, and the probability that the cell is better).\n", level_percent(results.confidence), level_percent(results.confidence));
    let _ = writeln!(text, "| model | column | LM | lexicon | beam | LM weight | word bonus | perplexity | OOV % | coverage % | WER | flexible WER | search RTF | against baseline |");
    let _ = writeln!(
        text,
        "|---|---|---|---|---:|---:|---:|---:|---:|---:|---|---|---:|---|"
    );
    for cell in &results.cells {
        let _ = writeln!(
            text,
            "| {} | {} | {} | {} | {} | {}{} | {} | {:.1} | {:.1} | {:.1} | {}{} | {}{} | {:.4} | {} |",
            cell.model,
            cell.column,
            cell.lm,
            cell.lexicon,
            cell.beam,
            cell.lm_weight,
            if cell.tuned { " (dev)" } else { "" },
            cell.word_bonus,
            cell.perplexity,
            100.0 * cell.oov_rate,
            100.0 * cell.coverage,
            percent(cell.overall.wer),
            interval(&cell.overall, false),
            percent(cell.overall.flexible_wer),
            interval(&cell.overall, true),
            cell.search_rtf,
            versus(cell)
        );
    }
    for failed in &results.failed {
        let setting = |v: Option<f32>| v.map_or_else(|| "(dev)".to_string(), |v| v.to_string());
        let _ = writeln!(
            text,
            "| {} | {} | {} | {} | {} | {} | {} | – | – | – | failed | failed | – | {} |",
            failed.model,
            failed.column,
            failed.lm,
            failed.lexicon,
            failed.beam,
            setting(failed.lm_weight),
            setting(failed.word_bonus),
            table_text(&failed.reason)
        );
    }
    if let Some(first) = results.cells.first() {
        let groups: Vec<&str> = first.groups.iter().map(|(g, _)| g.as_str()).collect();
        if !groups.is_empty() {
            let _ = writeln!(text, "\n## WER / flexible WER per group (%)\n");
            let _ = writeln!(text, "| cell | {} |", groups.join(" | "));
            let _ = writeln!(text, "|---|{}", "---|".repeat(groups.len()));
            for cell in &results.cells {
                let figures: Vec<String> = cell
                    .groups
                    .iter()
                    .map(|(_, s)| format!("{} / {}", percent(s.wer), percent(s.flexible_wer)))
                    .collect();
                let _ = writeln!(text, "| {} | {} |", cell.label(), figures.join(" | "));
            }
        }
    }
    if !results.skipped.is_empty() {
        let _ = writeln!(text, "\n## Left out\n");
        for reason in &results.skipped {
            let _ = writeln!(text, "- {reason}");
        }
    }
    text
}

/// A failure reason as one Markdown table cell: on one line, `|` escaped.
fn table_text(reason: &str) -> String {
    reason.replace('\n', " ").replace('|', "\\|")
}

/// A CSV field, quoted when it holds a comma, a quote or a line break.
fn quote(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// The results as CSV: one row per cell and group (`group` empty for the overall figures),
/// then one row per failed cell, its figures empty and `failure` holding the reason.
pub fn csv(results: &SweepResults) -> String {
    let mut text = String::from("model,column,lm,lexicon,beam,lm_weight,word_bonus,tuned,group,perplexity,oov_rate,coverage,type_coverage,ref_words,wer,wer_low,wer_high,flexible_wer,flexible_wer_low,flexible_wer_high,search_rtf,difference_to_baseline,probability_better_than_baseline,failure\n");
    let number = |v: Option<f64>| v.map_or_else(String::new, |v| format!("{v:.6}"));
    for cell in &results.cells {
        let rows = std::iter::once((String::new(), &cell.overall))
            .chain(cell.groups.iter().map(|(g, s)| (g.clone(), s)));
        for (group, summary) in rows {
            let _ = writeln!(
                text,
                "{},{},{},{},{},{},{},{},{},{:.6},{:.6},{:.6},{:.6},{},{},{},{},{},{},{},{:.6},{},{},",
                quote(&cell.model),
                quote(&cell.column),
                quote(&cell.lm),
                quote(&cell.lexicon),
                cell.beam,
                cell.lm_weight,
                cell.word_bonus,
                cell.tuned,
                quote(&group),
                cell.perplexity,
                cell.oov_rate,
                cell.coverage,
                cell.type_coverage,
                summary.ref_words,
                number(summary.wer),
                number(summary.wer_interval.map(|i| i.low)),
                number(summary.wer_interval.map(|i| i.high)),
                number(summary.flexible_wer),
                number(summary.flexible_wer_interval.map(|i| i.low)),
                number(summary.flexible_wer_interval.map(|i| i.high)),
                cell.search_rtf,
                if group.is_empty() { number(cell.versus_baseline.map(|d| d.difference)) } else { String::new() },
                if group.is_empty() {
                    number(cell.versus_baseline.map(|d| d.bootstrap.probability_system2_better))
                } else {
                    String::new()
                },
            );
        }
    }
    for failed in &results.failed {
        let setting = |v: Option<f32>| v.map_or_else(String::new, |v| v.to_string());
        let _ = writeln!(
            text,
            "{},{},{},{},{},{},{},{},{}{}",
            quote(&failed.model),
            quote(&failed.column),
            quote(&failed.lm),
            quote(&failed.lexicon),
            failed.beam,
            setting(failed.lm_weight),
            setting(failed.word_bonus),
            failed.lm_weight.is_none(),
            ",".repeat(15),
            quote(&failed.reason)
        );
    }
    text
}

/// The values of the cell axes, by name, in the order they label a chart row.
fn axis_values(cell: &CellResult) -> [(&'static str, String); 7] {
    [
        ("model", cell.model.clone()),
        ("column", cell.column.clone()),
        ("lexicon", format!("{} lexicon", cell.lexicon)),
        ("lm", cell.lm.clone()),
        ("beam", format!("beam {}", cell.beam)),
        (
            "lm weight",
            format!(
                "LM weight {}{}",
                cell.lm_weight,
                if cell.tuned { " (dev)" } else { "" }
            ),
        ),
        ("word bonus", format!("word bonus {}", cell.word_bonus)),
    ]
}

/// The sweep's chart, as SVG: WER and flexible WER of every cell with their bootstrap
/// intervals, a triangle where a cell differs significantly from the baseline (the paired
/// bootstrap of the report). Rows name only the axes that vary; cells that share their model,
/// writing and lexicon are grouped under one heading, and what every cell shares is said in a
/// note.
pub fn chart(results: &SweepResults) -> String {
    let values: Vec<[(&str, String); 7]> = results.cells.iter().map(axis_values).collect();
    let varies = |axis: usize| values.iter().any(|v| v[axis].1 != values[0][axis].1);
    let section_axes: Vec<usize> = (0..3).filter(|&a| varies(a)).collect();
    let row_axes: Vec<usize> = (3..7).filter(|&a| varies(a)).collect();
    let join = |v: &[(&str, String); 7], axes: &[usize]| {
        axes.iter()
            .map(|&a| v[a].1.as_str())
            .collect::<Vec<_>>()
            .join(" · ")
    };
    let mut sections: Vec<Section> = Vec::new();
    for (index, (cell, v)) in results.cells.iter().zip(&values).enumerate() {
        let (heading, mut label) = if row_axes.is_empty() {
            (None, join(v, &section_axes))
        } else {
            let heading = (!section_axes.is_empty()).then(|| join(v, &section_axes));
            (heading, join(v, &row_axes))
        };
        if label.is_empty() {
            label = cell.lm.clone();
        }
        if results.baseline == Some(index) {
            label.push_str(" (baseline)");
        }
        let row = summary_row(
            &label,
            &cell.overall,
            cell.versus_baseline.as_ref(),
            cell.flexible_versus_baseline.as_ref(),
        );
        match sections.last_mut() {
            Some(last) if last.heading == heading => last.rows.push(row),
            _ => sections.push(Section {
                heading,
                rows: vec![row],
            }),
        }
    }
    let mut notes = Vec::new();
    if let Some(first) = values.first() {
        let shared: Vec<String> = (0..7)
            .filter(|&a| !varies(a))
            .map(|a| match first[a].0 {
                "model" => format!("model {}", first[a].1),
                "column" => format!("{} writing", first[a].1),
                "lm" => format!("LM {}", first[a].1),
                _ => first[a].1.clone(),
            })
            .collect();
        if !shared.is_empty() {
            notes.push(format!("Every cell: {}.", shared.join(", ")));
        }
    }
    if let Some(cell) = results.cells.first() {
        notes.push(format!(
            "Test set: {} utterances, {} reference words, {:.1} min of audio.",
            cell.overall.utterances,
            cell.overall.ref_words,
            results.audio_seconds / 60.0
        ));
    }
    if results.baseline.is_some() {
        notes.push(significance_note(results.confidence, "the baseline"));
    }
    if !results.failed.is_empty() {
        let labels: Vec<String> = results.failed.iter().map(FailedCell::label).collect();
        notes.push(format!(
            "Failed, so not drawn ({}; reasons in results.md): {}.",
            results.failed.len(),
            labels.join("; ")
        ));
    }
    BarChart {
        title: "Sweep: WER and flexible WER per cell".into(),
        notes,
        axis: "error rate, %".into(),
        series: error_rate_series(),
        glossary: glossary(results.confidence, "the baseline"),
        sections,
    }
    .to_svg()
}
