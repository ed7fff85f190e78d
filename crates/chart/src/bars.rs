//! Horizontal bars with interval whiskers: error rates per dialect, speaker or sweep cell.
//!
//! Every row has one bar per series (WER, flexible WER, …), drawn from zero to the value; a
//! whisker spans the value's interval; a triangle after the whisker marks a value that differs
//! significantly from a reference row (pointing down: lower, up: higher). Rows come in sections
//! (overall, by dialect, by speaker) with an optional heading. The legend explains every glyph
//! the chart uses, in the caller's words (which confidence level, which test), so a chart read
//! alone says what its whiskers are.

use crate::legend::{legend, triangle, Glyph};
use crate::scale::{Axis, Linear};
use crate::svg::{text_width, wrap, Anchor, Color, Svg};

/// A value's interval, in the axis unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interval {
    /// Lower bound.
    pub low: f64,
    /// Upper bound.
    pub high: f64,
}

/// A significant difference from the reference row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mark {
    /// Significantly lower than the reference (a triangle pointing down).
    Lower,
    /// Significantly higher than the reference (a triangle pointing up).
    Higher,
}

/// One bar: a value ≥ 0 in the axis unit, its interval and mark.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bar {
    /// The value (e.g. WER in %).
    pub value: f64,
    /// Its interval, drawn as a whisker.
    pub interval: Option<Interval>,
    /// Whether it differs significantly from the reference row.
    pub mark: Option<Mark>,
}

/// A named series of bars (one bar in every row).
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    /// Legend name (e.g. "WER").
    pub name: String,
    /// Fill colour.
    pub color: Color,
}

/// One row: a label and one bar per series (`None`: no value for that series).
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    /// Row label (a dialect, a speaker, a sweep cell).
    pub label: String,
    /// One entry per series, in series order.
    pub bars: Vec<Option<Bar>>,
}

/// Rows under an optional heading.
#[derive(Debug, Clone, PartialEq)]
pub struct Section {
    /// Heading drawn above the rows (e.g. "By speaker").
    pub heading: Option<String>,
    /// The rows, top to bottom.
    pub rows: Vec<Row>,
}

/// What the legend says about the glyphs that are not bars.
#[derive(Debug, Clone, PartialEq)]
pub struct Glossary {
    /// What a whisker spans, e.g. "95 % bootstrap interval over utterances".
    pub whisker: String,
    /// What a downward triangle means, e.g. "significantly lower than the baseline".
    pub lower: String,
    /// What an upward triangle means.
    pub higher: String,
}

/// A horizontal bar chart with interval whiskers, drawn by [`BarChart::to_svg`].
#[derive(Debug, Clone, PartialEq)]
pub struct BarChart {
    /// First line of the caption.
    pub title: String,
    /// Further caption lines (wrapped to the chart's width).
    pub notes: Vec<String>,
    /// Title of the value axis, e.g. "error rate, %".
    pub axis: String,
    /// The series, in the order of each row's bars.
    pub series: Vec<Series>,
    /// Legend text of the whiskers and marks; an entry is shown when the chart uses the glyph.
    pub glossary: Glossary,
    /// Sections, top to bottom; sections without rows are left out.
    pub sections: Vec<Section>,
}

/// Sizes in px. The charts are laid out for about 900 px of width, which is how wide a README
/// or a report page shows them; 13 px text stays legible there.
const MARGIN: f64 = 16.0;
const TITLE_SIZE: f64 = 17.0;
const TEXT_SIZE: f64 = 13.0;
const SMALL_SIZE: f64 = 12.0;
const LINE: f64 = 18.0;
const MIN_WIDTH: f64 = 900.0;
const PLOT_WIDTH: f64 = 520.0;
const MAX_LABEL_WIDTH: f64 = 420.0;
const VALUE_ROOM: f64 = 80.0;
const BAR_HEIGHT: f64 = 10.0;
const BAR_GAP: f64 = 2.0;
const ROW_PADDING: f64 = 5.0;
const HEADING_HEIGHT: f64 = 26.0;
const SECTION_GAP: f64 = 8.0;

const INK: Color = Color(34, 34, 34);
const GREY: Color = Color(110, 110, 110);
const GRID: Color = Color(217, 217, 217);
const SHADE: Color = Color(243, 245, 248);

/// A label cut to `width` px at `size`, with an ellipsis when cut.
fn fit(label: &str, size: f64, width: f64) -> String {
    if text_width(label, size) <= width {
        return label.to_string();
    }
    let keep = ((width / (0.6 * size)) as usize).saturating_sub(1);
    let mut cut: String = label.chars().take(keep).collect();
    cut.push('…');
    cut
}

fn usable(value: f64) -> bool {
    value.is_finite() && value >= 0.0
}

impl BarChart {
    fn bars(&self) -> impl Iterator<Item = &Bar> {
        self.sections
            .iter()
            .flat_map(|s| &s.rows)
            .flat_map(|r| r.bars.iter().flatten())
    }

    fn row_height(&self) -> f64 {
        let n = self.series.len().max(1) as f64;
        2.0 * ROW_PADDING + n * BAR_HEIGHT + (n - 1.0) * BAR_GAP
    }

    /// The chart as an SVG document.
    pub fn to_svg(&self) -> String {
        let mut svg = Svg::default();
        let sections: Vec<&Section> = self
            .sections
            .iter()
            .filter(|s| !s.rows.is_empty())
            .collect();
        let rows: usize = sections.iter().map(|s| s.rows.len()).sum();
        let longest = sections
            .iter()
            .flat_map(|s| &s.rows)
            .map(|r| text_width(&r.label, TEXT_SIZE))
            .fold(60.0f64, f64::max);
        let label_width = longest.min(MAX_LABEL_WIDTH);
        let plot_left = MARGIN + label_width + 10.0;
        let plot_right = plot_left + PLOT_WIDTH.max(MIN_WIDTH - plot_left - VALUE_ROOM - MARGIN);
        let width = plot_right + VALUE_ROOM + MARGIN;
        let text_width_available = width - 2.0 * MARGIN;

        let highest = self
            .bars()
            .flat_map(|b| [Some(b.value), b.interval.map(|i| i.high)])
            .flatten()
            .filter(|v| usable(*v))
            .fold(0.0f64, f64::max);
        let axis = Axis::from_zero(highest, 6);
        let x = Linear {
            from: (0.0, axis.top),
            to: (plot_left, plot_right),
        };

        // Caption: title, notes, legend.
        let mut y = MARGIN + TITLE_SIZE;
        for line in wrap(&self.title, TITLE_SIZE, text_width_available) {
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
            for line in wrap(note, TEXT_SIZE, text_width_available) {
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
        let mut entries: Vec<(Glyph, &str)> = self
            .series
            .iter()
            .map(|s| (Glyph::Swatch(s.color), s.name.as_str()))
            .collect();
        if self.bars().any(|b| b.interval.is_some()) {
            entries.push((Glyph::Whisker, &self.glossary.whisker));
        }
        for (mark, text) in [
            (Mark::Lower, &self.glossary.lower),
            (Mark::Higher, &self.glossary.higher),
        ] {
            if self.bars().any(|b| b.mark == Some(mark)) {
                entries.push((Glyph::Mark(mark), text));
            }
        }
        y = legend(&mut svg, &entries, y + 4.0, width);

        // Tick labels above the rows as well when the chart is taller than a screen's glance.
        let row_height = self.row_height();
        let rows_top_labels = rows > 12;
        if rows_top_labels {
            y += LINE;
            for tick in axis.ticks() {
                svg.text(
                    "tick",
                    (x.map(tick), y - 4.0),
                    SMALL_SIZE,
                    Anchor::Middle,
                    GREY,
                    "normal",
                    &axis.label(tick),
                );
            }
        }
        let rows_top = y + 4.0;
        let mut y = rows_top;
        let mut layout = Vec::new();
        for (index, section) in sections.iter().enumerate() {
            if index > 0 {
                y += SECTION_GAP;
            }
            let heading = section.heading.as_ref().map(|h| {
                y += HEADING_HEIGHT;
                (h, y)
            });
            let mut placed = Vec::new();
            for row in &section.rows {
                placed.push((row, y));
                y += row_height;
            }
            layout.push((heading, placed));
        }
        let rows_bottom = y;

        // Shading of every other row, then the grid, so that bars and whiskers lie on top.
        for (_, placed) in &layout {
            for (i, (_, top)) in placed.iter().enumerate() {
                if i % 2 == 1 {
                    svg.rect(
                        "shade",
                        None,
                        (MARGIN, *top),
                        (plot_right - MARGIN, row_height),
                        SHADE,
                        None,
                    );
                }
            }
        }
        for tick in axis.ticks() {
            let color = if tick == 0.0 { INK } else { GRID };
            svg.line(
                "grid",
                None,
                (x.map(tick), rows_top),
                (x.map(tick), rows_bottom),
                color,
                1.0,
                None,
            );
        }

        for (heading, placed) in &layout {
            if let Some((heading, baseline)) = heading {
                svg.text(
                    "heading",
                    (MARGIN, baseline - 8.0),
                    TEXT_SIZE,
                    Anchor::Start,
                    INK,
                    "bold",
                    heading,
                );
            }
            for (row, top) in placed {
                self.row(&mut svg, row, *top, &x, plot_left, label_width);
            }
        }

        // The value axis below the rows.
        let mut y = rows_bottom + LINE;
        for tick in axis.ticks() {
            svg.text(
                "tick",
                (x.map(tick), y),
                SMALL_SIZE,
                Anchor::Middle,
                GREY,
                "normal",
                &axis.label(tick),
            );
        }
        y += LINE;
        svg.text(
            "axis-title",
            ((plot_left + plot_right) / 2.0, y),
            TEXT_SIZE,
            Anchor::Middle,
            INK,
            "normal",
            &self.axis,
        );
        svg.finish(width, y + MARGIN, &self.title)
    }

    /// One row: label, bars, whiskers, marks and the values as text.
    fn row(
        &self,
        svg: &mut Svg,
        row: &Row,
        top: f64,
        x: &Linear,
        plot_left: f64,
        label_width: f64,
    ) {
        let height = self.row_height();
        svg.open_group("row", Some(&row.label));
        let label = fit(&row.label, TEXT_SIZE, label_width);
        svg.text(
            "label",
            (plot_left - 10.0, top + height / 2.0 + 4.5),
            TEXT_SIZE,
            Anchor::End,
            INK,
            "normal",
            &label,
        );
        let mut drawn = 0;
        for (index, (series, bar)) in self.series.iter().zip(&row.bars).enumerate() {
            let Some(bar) = bar.filter(|b| usable(b.value)) else {
                continue;
            };
            drawn += 1;
            let bar_top = top + ROW_PADDING + index as f64 * (BAR_HEIGHT + BAR_GAP);
            let middle = bar_top + BAR_HEIGHT / 2.0;
            let interval = bar
                .interval
                .filter(|i| usable(i.low) && usable(i.high) && i.low <= i.high);
            let mut tooltip = format!("{}: {} {:.1}", row.label, series.name, bar.value);
            if let Some(i) = interval {
                tooltip.push_str(&format!(" [{:.1}, {:.1}]", i.low, i.high));
            }
            svg.rect(
                "bar",
                Some(&series.name),
                (plot_left, bar_top),
                (x.map(bar.value) - plot_left, BAR_HEIGHT),
                series.color,
                Some(&tooltip),
            );
            let mut end = x.map(bar.value);
            if let Some(i) = interval {
                let (low, high) = (x.map(i.low), x.map(i.high));
                svg.line(
                    "whisker",
                    Some(&series.name),
                    (low, middle),
                    (high, middle),
                    INK,
                    1.5,
                    None,
                );
                for cap in [low, high] {
                    svg.line(
                        "whisker-cap",
                        Some(&series.name),
                        (cap, bar_top - 1.0),
                        (cap, bar_top + BAR_HEIGHT + 1.0),
                        INK,
                        1.5,
                        None,
                    );
                }
                end = end.max(high);
            }
            if let Some(mark) = bar.mark {
                let class = match mark {
                    Mark::Lower => "mark-lower",
                    Mark::Higher => "mark-higher",
                };
                svg.polygon(
                    class,
                    Some(&series.name),
                    &triangle(mark, (end + 4.0, middle)),
                    mark.color(),
                );
                end += 4.0 + crate::legend::MARK_SIZE;
            }
            svg.text(
                "value",
                (end + 4.0, middle + 4.0),
                SMALL_SIZE,
                Anchor::Start,
                INK,
                "normal",
                &format!("{:.1}", bar.value),
            );
        }
        if drawn == 0 {
            svg.text(
                "no-value",
                (plot_left + 6.0, top + height / 2.0 + 4.5),
                SMALL_SIZE,
                Anchor::Start,
                GREY,
                "normal",
                "no value (no reference words)",
            );
        }
        svg.close_group();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn long_labels_are_cut_with_an_ellipsis() {
        assert_eq!(fit("short", 13.0, 200.0), "short");
        let cut = fit(&"x".repeat(100), 13.0, 78.0);
        assert_eq!(cut.chars().count(), 10);
        assert!(cut.ends_with('…'));
    }
}
