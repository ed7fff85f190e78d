//! The sweep's results as a Markdown table, a CSV file and an SVG chart, in our own layout.

use std::fmt::Write as _;
use std::path::Path;

use plotters::prelude::*;

use crate::run::{CellResult, SweepResults};
use crate::SweepError;

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
            "{:+.1} points, P(better) {:.2}",
            100.0 * d.difference,
            d.bootstrap.probability_system2_better
        ),
    }
}

/// A confidence level as a percentage without needless decimals (0.95 → "95", 0.975 → "97.5").
fn level_percent(level: f64) -> String {
    let text = format!("{:.1}", 100.0 * level);
    text.trim_end_matches(".0").to_string()
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
        results.cells.len()
    );
    let _ = writeln!(text, "WER and flexible WER in %, {}% bootstrap interval in brackets; the last column compares plain WER with the baseline cell (paired bootstrap: the probability that the cell is better).\n", level_percent(results.confidence));
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

/// The results as CSV: one row per cell and group (`group` empty for the overall figures).
pub fn csv(results: &SweepResults) -> String {
    let mut text = String::from("model,column,lm,lexicon,beam,lm_weight,word_bonus,tuned,group,perplexity,oov_rate,coverage,type_coverage,ref_words,wer,wer_low,wer_high,flexible_wer,flexible_wer_low,flexible_wer_high,search_rtf,difference_to_baseline,probability_better_than_baseline\n");
    let number = |v: Option<f64>| v.map_or_else(String::new, |v| format!("{v:.6}"));
    for cell in &results.cells {
        let rows = std::iter::once((String::new(), &cell.overall))
            .chain(cell.groups.iter().map(|(g, s)| (g.clone(), s)));
        for (group, summary) in rows {
            let quote = |s: &str| {
                if s.contains([',', '"', '\n']) {
                    format!("\"{}\"", s.replace('"', "\"\""))
                } else {
                    s.to_string()
                }
            };
            let _ = writeln!(
                text,
                "{},{},{},{},{},{},{},{},{},{:.6},{:.6},{:.6},{:.6},{},{},{},{},{},{},{},{:.6},{},{}",
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
    text
}

/// A bar chart of WER and flexible WER per cell, as SVG.
pub fn chart(results: &SweepResults, path: &Path) -> Result<(), SweepError> {
    let rows: Vec<(String, Option<f64>, Option<f64>)> = results
        .cells
        .iter()
        .map(|c| (c.label(), c.overall.wer, c.overall.flexible_wer))
        .collect();
    error_rate_bars(
        &rows,
        "WER (dark) and flexible WER (light) per cell, %",
        path,
    )
}

/// A horizontal bar chart, as SVG: one row per `(label, WER, flexible WER)`, two bars a row
/// (plain WER dark above, flexible WER light below); a missing rate draws no bar.
pub fn error_rate_bars(
    rows: &[(String, Option<f64>, Option<f64>)],
    caption: &str,
    path: &Path,
) -> Result<(), SweepError> {
    let plot_error = |e: String| SweepError::Build(format!("{}: {e}", path.display()));
    let height = 120 + 28 * rows.len().max(1) as u32;
    let label_width = rows
        .iter()
        .map(|r| r.0.chars().count())
        .max()
        .unwrap_or(0)
        .clamp(8, 60) as u32
        * 7
        + 20;
    let backend = SVGBackend::new(path, (900, height));
    let root = backend.into_drawing_area();
    root.fill(&WHITE).map_err(|e| plot_error(e.to_string()))?;
    let highest = rows
        .iter()
        .flat_map(|r| [r.1, r.2])
        .flatten()
        .fold(0.0f64, f64::max);
    let top = (100.0 * highest * 1.1).max(1.0);
    let mut chart = ChartBuilder::on(&root)
        .caption(caption, ("sans-serif", 18))
        .margin(10)
        .x_label_area_size(30)
        .y_label_area_size(label_width)
        .build_cartesian_2d(0.0..top, (0..rows.len().max(1)).into_segmented())
        .map_err(|e| plot_error(e.to_string()))?;
    chart
        .configure_mesh()
        .disable_y_mesh()
        .y_labels(rows.len().max(1))
        .y_label_formatter(&|v| match v {
            SegmentValue::CenterOf(i) => rows.get(*i).map(|r| r.0.clone()).unwrap_or_default(),
            _ => String::new(),
        })
        .x_desc("%")
        .draw()
        .map_err(|e| plot_error(e.to_string()))?;
    // Each row holds two half-height bars: plain WER above, flexible WER below.
    let bar = |i: usize,
               value: f64,
               upper: bool,
               color: RGBColor|
     -> Rectangle<(f64, SegmentValue<usize>)> {
        let (top_margin, bottom_margin) = if upper { (3, 14) } else { (14, 3) };
        let mut rectangle = Rectangle::new(
            [
                (0.0, SegmentValue::Exact(i)),
                (value, SegmentValue::Exact(i + 1)),
            ],
            color.filled(),
        );
        rectangle.set_margin(top_margin, bottom_margin, 0, 0);
        rectangle
    };
    chart
        .draw_series(
            rows.iter()
                .enumerate()
                .filter_map(|(i, r)| r.1.map(|w| bar(i, 100.0 * w, true, RGBColor(40, 70, 140)))),
        )
        .map_err(|e| plot_error(e.to_string()))?;
    chart
        .draw_series(rows.iter().enumerate().filter_map(|(i, r)| {
            r.2.map(|w| bar(i, 100.0 * w, false, RGBColor(140, 170, 220)))
        }))
        .map_err(|e| plot_error(e.to_string()))?;
    root.present().map_err(|e| plot_error(e.to_string()))?;
    Ok(())
}

/// A training curve, as SVG: train and dev loss per epoch (left axis) and the dev unit error
/// rate in % (right axis).
/// `epochs` holds `(epoch, train loss, dev loss, dev unit error rate)`.
pub fn training_curve(epochs: &[(usize, f64, f64, f64)], path: &Path) -> Result<(), SweepError> {
    let plot_error = |e: String| SweepError::Build(format!("{}: {e}", path.display()));
    let backend = SVGBackend::new(path, (800, 420));
    let root = backend.into_drawing_area();
    root.fill(&WHITE).map_err(|e| plot_error(e.to_string()))?;
    let last = epochs.iter().map(|e| e.0).max().unwrap_or(1).max(2);
    let highest_loss = epochs
        .iter()
        .flat_map(|e| [e.1, e.2])
        .filter(|v| v.is_finite())
        .fold(0.0f64, f64::max)
        .max(1e-6)
        * 1.1;
    let mut chart = ChartBuilder::on(&root)
        .caption("Training curve", ("sans-serif", 18))
        .margin(10)
        .x_label_area_size(35)
        .y_label_area_size(50)
        .right_y_label_area_size(50)
        .build_cartesian_2d(1usize..last, 0.0..highest_loss)
        .map_err(|e| plot_error(e.to_string()))?
        .set_secondary_coord(1usize..last, 0.0..100.0);
    chart
        .configure_mesh()
        .x_desc("epoch")
        .y_desc("CTC loss per frame")
        .draw()
        .map_err(|e| plot_error(e.to_string()))?;
    chart
        .configure_secondary_axes()
        .y_desc("dev unit error rate, %")
        .draw()
        .map_err(|e| plot_error(e.to_string()))?;
    let train_color = RGBColor(40, 70, 140);
    let dev_color = RGBColor(200, 90, 40);
    let error_color = RGBColor(60, 140, 60);
    chart
        .draw_series(LineSeries::new(
            epochs.iter().map(|e| (e.0, e.1)),
            train_color.stroke_width(2),
        ))
        .map_err(|e| plot_error(e.to_string()))?
        .label("train loss")
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], train_color));
    chart
        .draw_series(LineSeries::new(
            epochs.iter().map(|e| (e.0, e.2)),
            dev_color.stroke_width(2),
        ))
        .map_err(|e| plot_error(e.to_string()))?
        .label("dev loss")
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], dev_color));
    chart
        .draw_secondary_series(LineSeries::new(
            epochs.iter().map(|e| (e.0, 100.0 * e.3)),
            error_color.stroke_width(2),
        ))
        .map_err(|e| plot_error(e.to_string()))?
        .label("dev unit error rate (right axis)")
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], error_color));
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.8))
        .border_style(BLACK)
        .draw()
        .map_err(|e| plot_error(e.to_string()))?;
    root.present().map_err(|e| plot_error(e.to_string()))?;
    Ok(())
}
