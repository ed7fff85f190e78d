//! Reads a chart's figures back from its SVG geometry, for tests.
//!
//! Nothing here knows how the chart was laid out: the value axis is recovered from the tick
//! labels (their text is the value, their `x` or `y` the position), and every bar, whisker and
//! point is converted back through it. A chart that puts a whisker where its interval is not
//! reads back the wrong interval. Shared by the chart crate's tests and the end-to-end tests
//! (`#[path]` include), so there is one reader.

#![allow(dead_code)]

use std::collections::BTreeMap;

/// The attributes and text of one element line (`<name a="…" …>text</name>` or `<name …/>`).
#[derive(Debug, Clone)]
pub struct Element {
    pub name: String,
    pub attributes: BTreeMap<String, String>,
    pub text: String,
}

impl Element {
    pub fn class(&self) -> &str {
        self.attributes.get("class").map_or("", String::as_str)
    }

    pub fn number(&self, name: &str) -> f64 {
        self.attributes
            .get(name)
            .unwrap_or_else(|| panic!("<{}> has no {name}", self.name))
            .parse()
            .unwrap_or_else(|_| panic!("<{}> {name} is not a number", self.name))
    }
}

fn unescape(text: &str) -> String {
    text.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&#39;", "'")
        .replace("&amp;", "&")
}

/// Every element that opens on a line, in order.
pub fn elements(svg: &str) -> Vec<Element> {
    let mut found = Vec::new();
    for line in svg.lines() {
        let line = line.trim();
        let Some(rest) = line.strip_prefix('<') else {
            continue;
        };
        if rest.starts_with('/') {
            continue;
        }
        let name_end = rest.find([' ', '>', '/']).unwrap_or(rest.len());
        let name = rest[..name_end].to_string();
        let mut attributes = BTreeMap::new();
        let mut remainder = &rest[name_end..];
        loop {
            remainder = remainder.trim_start();
            let Some(eq) = remainder.find("=\"") else {
                break;
            };
            if remainder.starts_with('>') || remainder.starts_with("/>") {
                break;
            }
            let key = remainder[..eq].to_string();
            let value_start = eq + 2;
            let value_end = value_start + remainder[value_start..].find('"').unwrap();
            attributes.insert(key, unescape(&remainder[value_start..value_end]));
            remainder = &remainder[value_end + 1..];
        }
        let text = remainder
            .strip_prefix('>')
            .and_then(|r| r.split('<').next())
            .map(unescape)
            .unwrap_or_default();
        found.push(Element {
            name,
            attributes,
            text,
        });
    }
    found
}

/// Value = (pixel − origin) / scale, fitted through the first and last tick of a class.
#[derive(Debug, Clone, Copy)]
pub struct AxisMap {
    pub origin: f64,
    pub scale: f64,
}

impl AxisMap {
    pub fn value(&self, pixel: f64) -> f64 {
        (pixel - self.origin) / self.scale
    }

    /// From the ticks of `class`, reading their position from attribute `position`.
    pub fn from_ticks(elements: &[Element], class: &str, position: &str) -> AxisMap {
        let ticks: Vec<(f64, f64)> = elements
            .iter()
            .filter(|e| e.class() == class)
            .map(|e| {
                (
                    e.number(position),
                    e.text.parse::<f64>().expect("a tick label is a number"),
                )
            })
            .collect();
        assert!(ticks.len() >= 2, "fewer than two `{class}` ticks");
        // Through the two ticks farthest apart, so that rounding of the pixels (to 0.01) moves
        // the fitted scale least.
        let (p0, v0) = ticks[0];
        let (p1, v1) = ticks
            .iter()
            .copied()
            .max_by(|a, b| (a.1 - v0).abs().total_cmp(&(b.1 - v0).abs()))
            .unwrap();
        assert!(v1 != v0, "all `{class}` ticks have the same value");
        let scale = (p1 - p0) / (v1 - v0);
        // Every tick lies on the fitted line (to the 0.01 px the coordinates are written with).
        for &(p, v) in &ticks {
            let expected = p0 + (v - v0) * scale;
            assert!(
                (p - expected).abs() < 0.02,
                "tick {v} at {p} is off the axis (expected {expected})"
            );
        }
        AxisMap {
            origin: p0 - v0 * scale,
            scale,
        }
    }
}

/// One bar read back.
#[derive(Debug, Clone, PartialEq)]
pub struct ReadBar {
    pub series: String,
    pub value: f64,
    /// The whisker's ends, when drawn.
    pub interval: Option<(f64, f64)>,
    /// `"lower"` or `"higher"` when a significance mark is drawn.
    pub mark: Option<String>,
}

/// One row read back.
#[derive(Debug, Clone, PartialEq)]
pub struct ReadRow {
    pub label: String,
    pub bars: Vec<ReadBar>,
    /// The row says it has no value instead of drawing a bar.
    pub no_value: bool,
}

/// The rows of a bar chart, top to bottom, with values in the axis unit.
pub fn bar_rows(svg: &str) -> Vec<ReadRow> {
    let elements = elements(svg);
    let axis = AxisMap::from_ticks(&elements, "tick", "x");
    let mut rows = Vec::new();
    let mut current: Option<ReadRow> = None;
    for element in &elements {
        let series = element
            .attributes
            .get("data-series")
            .cloned()
            .unwrap_or_default();
        match (element.name.as_str(), element.class()) {
            ("g", "row") => {
                rows.extend(current.take());
                current = Some(ReadRow {
                    label: element.attributes["data-label"].clone(),
                    bars: Vec::new(),
                    no_value: false,
                });
            }
            ("rect", "bar") => {
                let row = current.as_mut().expect("a bar outside a row");
                let left = axis.value(element.number("x"));
                assert!(left.abs() < 1e-3, "a bar does not start at 0 but at {left}");
                row.bars.push(ReadBar {
                    series,
                    value: element.number("width") / axis.scale,
                    interval: None,
                    mark: None,
                });
            }
            ("line", "whisker") => {
                let bar = current
                    .as_mut()
                    .and_then(|r| r.bars.last_mut())
                    .expect("a whisker without a bar");
                assert_eq!(
                    bar.series, series,
                    "a whisker after a bar of another series"
                );
                assert_eq!(
                    element.number("y1"),
                    element.number("y2"),
                    "a whisker is not level"
                );
                bar.interval = Some((
                    axis.value(element.number("x1")),
                    axis.value(element.number("x2")),
                ));
            }
            ("polygon", class) if class.starts_with("mark-") => {
                let bar = current
                    .as_mut()
                    .and_then(|r| r.bars.last_mut())
                    .expect("a mark without a bar");
                assert_eq!(bar.series, series, "a mark after a bar of another series");
                bar.mark = Some(class.trim_start_matches("mark-").to_string());
            }
            ("text", "no-value") => {
                current.as_mut().expect("a note outside a row").no_value = true;
            }
            _ => {}
        }
    }
    rows.extend(current);
    rows
}

/// The points of every series of a training curve: `series → [(epoch, value)]`, the loss
/// series on the left axis, the error rate on the right one.
pub fn curve_points(svg: &str) -> BTreeMap<String, Vec<(f64, f64)>> {
    let elements = elements(svg);
    let epochs = AxisMap::from_ticks(&elements, "tick-bottom", "x");
    let left = AxisMap::from_ticks(&elements, "tick-left", "y");
    let right = AxisMap::from_ticks(&elements, "tick-right", "y");
    let mut series: BTreeMap<String, Vec<(f64, f64)>> = BTreeMap::new();
    for element in elements.iter().filter(|e| e.class() == "point") {
        let name = element.attributes["data-series"].clone();
        // Tick labels sit 4 px below their grid line (the text baseline).
        let y = element.number("cy") + 4.0;
        let value = if name.contains("error") {
            right.value(y)
        } else {
            left.value(y)
        };
        series
            .entry(name)
            .or_default()
            .push((epochs.value(element.number("cx")), value));
    }
    series
}
