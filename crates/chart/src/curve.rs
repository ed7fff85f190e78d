//! The training curve: train and dev loss (left axis) and the dev unit error rate (right axis)
//! per epoch, with the epoch whose model the model directory holds.

use crate::legend::{legend, Glyph};
use crate::scale::{Axis, Linear};
use crate::svg::{wrap, Anchor, Color, Svg};

/// One epoch's figures.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EpochPoint {
    /// 1-based epoch number.
    pub epoch: usize,
    /// Mean per-frame loss over the training batches.
    pub train_loss: f64,
    /// Per-frame loss on the dev set.
    pub dev_loss: f64,
    /// Dev unit error rate, in %.
    pub dev_unit_error_percent: f64,
}

/// A training curve, drawn by [`TrainingCurve::to_svg`].
#[derive(Debug, Clone, PartialEq)]
pub struct TrainingCurve {
    /// First line of the caption.
    pub title: String,
    /// Further caption lines.
    pub notes: Vec<String>,
    /// The epochs in order; a non-finite figure leaves a gap in its line.
    pub epochs: Vec<EpochPoint>,
    /// The epoch whose model was kept (marked by a dashed vertical line).
    pub kept: Option<usize>,
}

const WIDTH: f64 = 900.0;
const MARGIN: f64 = 16.0;
const TITLE_SIZE: f64 = 17.0;
const TEXT_SIZE: f64 = 13.0;
const SMALL_SIZE: f64 = 12.0;
const LINE: f64 = 18.0;
const PLOT_LEFT: f64 = 80.0;
const PLOT_RIGHT: f64 = WIDTH - 80.0;
const PLOT_HEIGHT: f64 = 300.0;

const INK: Color = Color(34, 34, 34);
const GREY: Color = Color(110, 110, 110);
const GRID: Color = Color(217, 217, 217);
const TRAIN: Color = Color(49, 95, 160);
const DEV: Color = Color(214, 110, 30);
const ERROR: Color = Color(46, 135, 70);

/// Reads one figure of an epoch.
type Figure = fn(&EpochPoint) -> f64;

/// The epoch ticks: the first epoch, then every multiple of a round step.
fn epoch_ticks(first: usize, last: usize) -> Vec<usize> {
    let span = last.saturating_sub(first).max(1);
    let step = [1, 2, 5, 10, 20, 25, 50, 100, 200, 250, 500, 1000]
        .into_iter()
        .find(|&s| span / s <= 10)
        .unwrap_or(span.div_ceil(10));
    let mut ticks = vec![first];
    ticks.extend((first + 1..=last).filter(|e| e % step == 0));
    ticks
}

impl TrainingCurve {
    /// The chart as an SVG document.
    pub fn to_svg(&self) -> String {
        let mut svg = Svg::default();
        let mut y = MARGIN + TITLE_SIZE;
        let text_width = WIDTH - 2.0 * MARGIN;
        for line in wrap(&self.title, TITLE_SIZE, text_width) {
            svg.text(
                "title",
                (MARGIN, y),
                TITLE_SIZE,
                Anchor::Start,
                INK,
                "bold",
                &line,
            );
            y += TITLE_SIZE + 5.0;
        }
        y += 2.0;
        for note in &self.notes {
            for line in wrap(note, TEXT_SIZE, text_width) {
                svg.text(
                    "note",
                    (MARGIN, y),
                    TEXT_SIZE,
                    Anchor::Start,
                    GREY,
                    "normal",
                    &line,
                );
                y += LINE;
            }
        }
        let entries = [
            (Glyph::Line(TRAIN, false), "train loss (left axis)"),
            (Glyph::Line(DEV, false), "dev loss (left axis)"),
            (
                Glyph::Line(ERROR, true),
                "dev unit error rate, % (right axis)",
            ),
        ];
        y = legend(&mut svg, &entries, y + 4.0, WIDTH);
        let plot_top = y + 14.0;
        let plot_bottom = plot_top + PLOT_HEIGHT;

        let first = self.epochs.iter().map(|e| e.epoch).min().unwrap_or(1);
        let last = self.epochs.iter().map(|e| e.epoch).max().unwrap_or(1);
        // One epoch alone still gets an axis of some width, centred on it.
        let (low, high) = if last > first {
            (first as f64, last as f64)
        } else {
            (first as f64 - 1.0, first as f64 + 1.0)
        };
        let x = Linear {
            from: (low, high),
            to: (PLOT_LEFT, PLOT_RIGHT),
        };
        let finite_max = |values: &mut dyn Iterator<Item = f64>| {
            values.filter(|v| v.is_finite()).fold(0.0f64, f64::max)
        };
        let loss_axis = Axis::from_zero(
            finite_max(&mut self.epochs.iter().flat_map(|e| [e.train_loss, e.dev_loss])),
            6,
        );
        let error_axis = Axis::from_zero(
            finite_max(&mut self.epochs.iter().map(|e| e.dev_unit_error_percent)).min(100.0),
            6,
        );
        let loss_y = Linear {
            from: (0.0, loss_axis.top),
            to: (plot_bottom, plot_top),
        };
        let error_y = Linear {
            from: (0.0, error_axis.top),
            to: (plot_bottom, plot_top),
        };

        for tick in loss_axis.ticks() {
            let ty = loss_y.map(tick);
            svg.line(
                "grid",
                None,
                (PLOT_LEFT, ty),
                (PLOT_RIGHT, ty),
                GRID,
                1.0,
                None,
            );
            svg.text(
                "tick-left",
                (PLOT_LEFT - 6.0, ty + 4.0),
                SMALL_SIZE,
                Anchor::End,
                GREY,
                "normal",
                &loss_axis.label(tick),
            );
        }
        for tick in error_axis.ticks() {
            let ty = error_y.map(tick);
            svg.text(
                "tick-right",
                (PLOT_RIGHT + 6.0, ty + 4.0),
                SMALL_SIZE,
                Anchor::Start,
                ERROR,
                "normal",
                &error_axis.label(tick),
            );
        }
        let ticks = if last > first {
            epoch_ticks(first, last)
        } else {
            (first.saturating_sub(1).max(1)..=first + 1).collect()
        };
        for tick in ticks {
            let tx = x.map(tick as f64);
            svg.line(
                "tick-mark",
                None,
                (tx, plot_bottom),
                (tx, plot_bottom + 4.0),
                INK,
                1.0,
                None,
            );
            svg.text(
                "tick-bottom",
                (tx, plot_bottom + 18.0),
                SMALL_SIZE,
                Anchor::Middle,
                GREY,
                "normal",
                &tick.to_string(),
            );
        }
        svg.line(
            "axis",
            None,
            (PLOT_LEFT, plot_bottom),
            (PLOT_RIGHT, plot_bottom),
            INK,
            1.0,
            None,
        );
        svg.line(
            "axis",
            None,
            (PLOT_LEFT, plot_top),
            (PLOT_LEFT, plot_bottom),
            INK,
            1.0,
            None,
        );
        svg.line(
            "axis",
            None,
            (PLOT_RIGHT, plot_top),
            (PLOT_RIGHT, plot_bottom),
            INK,
            1.0,
            None,
        );
        svg.text(
            "axis-title",
            ((PLOT_LEFT + PLOT_RIGHT) / 2.0, plot_bottom + 40.0),
            TEXT_SIZE,
            Anchor::Middle,
            INK,
            "normal",
            "epoch",
        );
        svg.vertical_text(
            "axis-title",
            (MARGIN + 10.0, (plot_top + plot_bottom) / 2.0),
            TEXT_SIZE,
            INK,
            "loss per frame",
        );
        svg.vertical_text(
            "axis-title",
            (WIDTH - MARGIN - 4.0, (plot_top + plot_bottom) / 2.0),
            TEXT_SIZE,
            ERROR,
            "dev unit error rate, %",
        );

        if let Some(kept) = self.kept {
            let kx = x.map(kept as f64);
            svg.line(
                "kept",
                None,
                (kx, plot_top),
                (kx, plot_bottom),
                GREY,
                1.0,
                Some("4 4"),
            );
            let (anchor, dx) = if kx > (PLOT_LEFT + PLOT_RIGHT) / 2.0 {
                (Anchor::End, -4.0)
            } else {
                (Anchor::Start, 4.0)
            };
            svg.text(
                "kept-label",
                (kx + dx, plot_top - 4.0),
                SMALL_SIZE,
                anchor,
                GREY,
                "normal",
                &format!("kept: epoch {kept}"),
            );
        }

        let lines: [(&str, Color, bool, &Linear, Figure); 3] = [
            ("train loss", TRAIN, false, &loss_y, |e| e.train_loss),
            ("dev loss", DEV, false, &loss_y, |e| e.dev_loss),
            ("dev unit error rate", ERROR, true, &error_y, |e| {
                e.dev_unit_error_percent
            }),
        ];
        for (name, color, dashed, scale, value) in lines {
            // A non-finite value ends one stretch of line and the next finite one starts another.
            let mut stretches: Vec<Vec<(f64, f64)>> = vec![Vec::new()];
            for epoch in &self.epochs {
                let v = value(epoch);
                if v.is_finite() {
                    let point = (x.map(epoch.epoch as f64), scale.map(v));
                    if let Some(stretch) = stretches.last_mut() {
                        stretch.push(point);
                    }
                    svg.circle("point", name, point, 3.0, color);
                } else if stretches.last().is_some_and(|s| !s.is_empty()) {
                    stretches.push(Vec::new());
                }
            }
            for stretch in stretches.iter().filter(|s| s.len() > 1) {
                svg.polyline("curve", name, stretch, color, 2.0, dashed.then_some("6 4"));
            }
        }
        svg.finish(WIDTH, plot_bottom + 40.0 + MARGIN, &self.title)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn epoch_ticks_start_at_the_first_epoch_and_stay_round() {
        assert_eq!(epoch_ticks(1, 5), [1, 2, 3, 4, 5]);
        assert_eq!(epoch_ticks(1, 20), [1, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20]);
        assert_eq!(epoch_ticks(1, 1), [1]);
        assert_eq!(epoch_ticks(1, 60)[..3], [1, 10, 20]);
    }
}
