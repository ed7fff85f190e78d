//! A few SVG elements written as text, one element a line, attributes in a fixed order.
//!
//! One element a line keeps the files diffable and lets a test (or a curious user with `grep`)
//! find every bar, whisker and tick of a chart without an XML parser.

use std::fmt::Write as _;

/// The fonts asked for, in order: common sans-serif faces of the three desktop systems, then
/// the generic family.
const FONT_FAMILY: &str = "Helvetica, Arial, 'DejaVu Sans', sans-serif";

/// An RGB colour.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Color(pub u8, pub u8, pub u8);

impl Color {
    /// `#rrggbb`.
    pub fn hex(self) -> String {
        format!("#{:02x}{:02x}{:02x}", self.0, self.1, self.2)
    }
}

/// Text with `&`, `<`, `>`, `"` and `'` escaped for an attribute or a text node.
pub(crate) fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// A coordinate with at most two decimals and no trailing zeros.
pub(crate) fn number(value: f64) -> String {
    let text = format!("{value:.2}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".to_string()
    } else {
        text.to_string()
    }
}

/// Estimated width of `text` at `size` px. Sans-serif faces average about 0.55 em a character
/// (DejaVu Sans, the widest of the faces asked for, about 0.6); the estimate uses 0.6 so that
/// labels never overrun the space laid out for them.
pub(crate) fn text_width(text: &str, size: f64) -> f64 {
    0.6 * size * text.chars().count() as f64
}

/// Words of `text` broken into lines no wider than `width` at `size` px.
pub(crate) fn wrap(text: &str, size: f64, width: f64) -> Vec<String> {
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        let candidate = if line.is_empty() {
            word.to_string()
        } else {
            format!("{line} {word}")
        };
        if !line.is_empty() && text_width(&candidate, size) > width {
            lines.push(std::mem::replace(&mut line, word.to_string()));
        } else {
            line = candidate;
        }
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

/// Where a text's `x` is: its start, middle or end.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Anchor {
    Start,
    Middle,
    End,
}

impl Anchor {
    fn name(self) -> &'static str {
        match self {
            Anchor::Start => "start",
            Anchor::Middle => "middle",
            Anchor::End => "end",
        }
    }
}

/// The body of an SVG document under construction.
#[derive(Default)]
pub(crate) struct Svg {
    body: String,
}

impl Svg {
    pub(crate) fn open_group(&mut self, class: &str, label: Option<&str>) {
        match label {
            Some(label) => {
                let _ = writeln!(
                    self.body,
                    "<g class=\"{class}\" data-label=\"{}\">",
                    escape(label)
                );
            }
            None => {
                let _ = writeln!(self.body, "<g class=\"{class}\">");
            }
        }
    }

    pub(crate) fn close_group(&mut self) {
        self.body.push_str("</g>\n");
    }

    /// A filled rectangle; `series` and `tooltip` are written when given.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn rect(
        &mut self,
        class: &str,
        series: Option<&str>,
        (x, y): (f64, f64),
        (width, height): (f64, f64),
        fill: Color,
        tooltip: Option<&str>,
    ) {
        let series = series
            .map(|s| format!(" data-series=\"{}\"", escape(s)))
            .unwrap_or_default();
        let _ = write!(
            self.body,
            "<rect class=\"{class}\"{series} x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\" fill=\"{}\"",
            number(x),
            number(y),
            number(width.max(0.0)),
            number(height.max(0.0)),
            fill.hex()
        );
        match tooltip {
            Some(tooltip) => {
                let _ = writeln!(self.body, "><title>{}</title></rect>", escape(tooltip));
            }
            None => self.body.push_str("/>\n"),
        }
    }

    /// A straight line; `dash` is an SVG dash pattern such as `"6 4"`.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn line(
        &mut self,
        class: &str,
        series: Option<&str>,
        (x1, y1): (f64, f64),
        (x2, y2): (f64, f64),
        stroke: Color,
        width: f64,
        dash: Option<&str>,
    ) {
        let series = series
            .map(|s| format!(" data-series=\"{}\"", escape(s)))
            .unwrap_or_default();
        let dash = dash
            .map(|d| format!(" stroke-dasharray=\"{d}\""))
            .unwrap_or_default();
        let _ = writeln!(
            self.body,
            "<line class=\"{class}\"{series} x1=\"{}\" y1=\"{}\" x2=\"{}\" y2=\"{}\" stroke=\"{}\" stroke-width=\"{}\"{dash}/>",
            number(x1),
            number(y1),
            number(x2),
            number(y2),
            stroke.hex(),
            number(width)
        );
    }

    /// An open line through `points`.
    pub(crate) fn polyline(
        &mut self,
        class: &str,
        series: &str,
        points: &[(f64, f64)],
        stroke: Color,
        width: f64,
        dash: Option<&str>,
    ) {
        let dash = dash
            .map(|d| format!(" stroke-dasharray=\"{d}\""))
            .unwrap_or_default();
        let _ = writeln!(
            self.body,
            "<polyline class=\"{class}\" data-series=\"{}\" points=\"{}\" fill=\"none\" stroke=\"{}\" stroke-width=\"{}\" stroke-linejoin=\"round\"{dash}/>",
            escape(series),
            points_text(points),
            stroke.hex(),
            number(width)
        );
    }

    /// A closed filled shape.
    pub(crate) fn polygon(
        &mut self,
        class: &str,
        series: Option<&str>,
        points: &[(f64, f64)],
        fill: Color,
    ) {
        let series = series
            .map(|s| format!(" data-series=\"{}\"", escape(s)))
            .unwrap_or_default();
        let _ = writeln!(
            self.body,
            "<polygon class=\"{class}\"{series} points=\"{}\" fill=\"{}\"/>",
            points_text(points),
            fill.hex()
        );
    }

    /// A filled circle.
    pub(crate) fn circle(
        &mut self,
        class: &str,
        series: &str,
        (x, y): (f64, f64),
        r: f64,
        fill: Color,
    ) {
        let _ = writeln!(
            self.body,
            "<circle class=\"{class}\" data-series=\"{}\" cx=\"{}\" cy=\"{}\" r=\"{}\" fill=\"{}\"/>",
            escape(series),
            number(x),
            number(y),
            number(r),
            fill.hex()
        );
    }

    /// A line of text; `weight` is `"bold"` or `"normal"`.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn text(
        &mut self,
        class: &str,
        (x, y): (f64, f64),
        size: f64,
        anchor: Anchor,
        fill: Color,
        weight: &str,
        text: &str,
    ) {
        let _ = writeln!(
            self.body,
            "<text class=\"{class}\" x=\"{}\" y=\"{}\" font-size=\"{}\" text-anchor=\"{}\" fill=\"{}\" font-weight=\"{weight}\">{}</text>",
            number(x),
            number(y),
            number(size),
            anchor.name(),
            fill.hex(),
            escape(text)
        );
    }

    /// A line of text turned a quarter counter-clockwise about its position (a vertical axis
    /// title).
    pub(crate) fn vertical_text(
        &mut self,
        class: &str,
        (x, y): (f64, f64),
        size: f64,
        fill: Color,
        text: &str,
    ) {
        let _ = writeln!(
            self.body,
            "<text class=\"{class}\" x=\"{}\" y=\"{}\" font-size=\"{}\" text-anchor=\"middle\" fill=\"{}\" transform=\"rotate(-90 {} {})\">{}</text>",
            number(x),
            number(y),
            number(size),
            fill.hex(),
            number(x),
            number(y),
            escape(text)
        );
    }

    /// The finished document, `width` × `height` px on a white ground, with `title` as its
    /// accessible name.
    pub(crate) fn finish(self, width: f64, height: f64, title: &str) -> String {
        let mut out = String::new();
        let _ = writeln!(
            out,
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\" font-family=\"{FONT_FAMILY}\">",
            w = number(width.ceil()),
            h = number(height.ceil())
        );
        let _ = writeln!(out, "<title>{}</title>", escape(title));
        let _ = writeln!(
            out,
            "<rect x=\"0\" y=\"0\" width=\"{}\" height=\"{}\" fill=\"#ffffff\"/>",
            number(width.ceil()),
            number(height.ceil())
        );
        out.push_str(&self.body);
        out.push_str("</svg>\n");
        out
    }
}

fn points_text(points: &[(f64, f64)]) -> String {
    points
        .iter()
        .map(|&(x, y)| format!("{},{}", number(x), number(y)))
        .collect::<Vec<_>>()
        .join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_are_short_and_exact_to_two_decimals() {
        assert_eq!(number(12.0), "12");
        assert_eq!(number(12.5), "12.5");
        assert_eq!(number(12.3456), "12.35");
        assert_eq!(number(-0.001), "0");
    }

    #[test]
    fn text_is_escaped() {
        assert_eq!(escape("a<b & \"c\"'"), "a&lt;b &amp; &quot;c&quot;&#39;");
    }

    #[test]
    fn wrapping_keeps_every_word_and_the_width() {
        let text = "one two three four five six seven eight nine ten";
        let lines = wrap(text, 10.0, 60.0);
        assert_eq!(lines.join(" "), text);
        assert!(lines.iter().all(|l| text_width(l, 10.0) <= 60.0));
        // A word longer than the width gets a line of its own rather than being cut.
        assert_eq!(
            wrap("a extraordinarily b", 10.0, 30.0),
            ["a", "extraordinarily", "b"]
        );
    }
}
