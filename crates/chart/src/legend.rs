//! The legend: a glyph and its meaning per entry, flowing onto further lines when one is full.

use crate::bars::Mark;
use crate::svg::{text_width, Anchor, Color, Svg};

/// Side of a significance triangle, px.
pub(crate) const MARK_SIZE: f64 = 8.0;
const TEXT_SIZE: f64 = 13.0;
const LINE: f64 = 18.0;
const MARGIN: f64 = 16.0;
const INK: Color = Color(34, 34, 34);

impl Mark {
    pub(crate) fn color(self) -> Color {
        match self {
            Mark::Lower => Color(27, 120, 55),
            Mark::Higher => Color(190, 30, 45),
        }
    }
}

/// A legend glyph.
pub(crate) enum Glyph {
    /// A bar's colour.
    Swatch(Color),
    /// An interval whisker.
    Whisker,
    /// A significance triangle.
    Mark(Mark),
    /// A line with a point marker; dashed or solid.
    Line(Color, bool),
}

/// A triangle of side [`MARK_SIZE`] whose left edge is at `x`, centred on `y`.
pub(crate) fn triangle(mark: Mark, (x, y): (f64, f64)) -> Vec<(f64, f64)> {
    let half = MARK_SIZE / 2.0;
    match mark {
        Mark::Lower => vec![
            (x, y - half),
            (x + MARK_SIZE, y - half),
            (x + half, y + half),
        ],
        Mark::Higher => vec![
            (x, y + half),
            (x + MARK_SIZE, y + half),
            (x + half, y - half),
        ],
    }
}

/// Draws `entries` from `y` on within `width`; returns the `y` below the legend.
pub(crate) fn legend(svg: &mut Svg, entries: &[(Glyph, &str)], y: f64, width: f64) -> f64 {
    let glyph_width = 24.0;
    let mut x = MARGIN;
    let mut y = y + LINE - 4.0;
    for (glyph, text) in entries {
        let entry_width = glyph_width + text_width(text, TEXT_SIZE) + 18.0;
        if x > MARGIN && x + entry_width > width - MARGIN {
            x = MARGIN;
            y += LINE + 2.0;
        }
        let middle = y - 4.5;
        match glyph {
            Glyph::Swatch(color) => svg.rect(
                "legend-swatch",
                None,
                (x, middle - 5.0),
                (16.0, 10.0),
                *color,
                None,
            ),
            Glyph::Whisker => {
                svg.line(
                    "legend-whisker",
                    None,
                    (x, middle),
                    (x + 16.0, middle),
                    INK,
                    1.5,
                    None,
                );
                for cap in [x, x + 16.0] {
                    svg.line(
                        "legend-whisker",
                        None,
                        (cap, middle - 6.0),
                        (cap, middle + 6.0),
                        INK,
                        1.5,
                        None,
                    );
                }
            }
            Glyph::Mark(mark) => svg.polygon(
                "legend-mark",
                None,
                &triangle(*mark, (x + 4.0, middle)),
                mark.color(),
            ),
            Glyph::Line(color, dashed) => {
                svg.line(
                    "legend-line",
                    None,
                    (x, middle),
                    (x + 18.0, middle),
                    *color,
                    2.0,
                    dashed.then_some("5 3"),
                );
                svg.circle("legend-point", "", (x + 9.0, middle), 3.0, *color);
            }
        }
        svg.text(
            "legend",
            (x + glyph_width, y),
            TEXT_SIZE,
            Anchor::Start,
            INK,
            "normal",
            text,
        );
        x += entry_width;
    }
    y + 6.0
}
