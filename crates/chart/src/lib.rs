//! The charts of isogloss's reports, as SVG files: error rates with their interval whiskers
//! (per dialect, per speaker, per sweep cell) and the training curve of a model.
//!
//! Key design decision: the SVG is written by hand, one element a line, instead of through a
//! plotting library. The charts need few shapes (rectangles, lines, triangles, text) but
//! exact control over them: every bar that has an interval gets its whisker, a triangle marks
//! a significant difference, the legend says in the caller's words what the whiskers are (the
//! configured confidence level, not a fixed 95 %), and no row is laid out without a bar. Writing
//! the elements ourselves makes that a few hundred lines with no dependency, and makes every
//! element findable: bars, whiskers, marks and ticks carry a `class`, each row is a `<g
//! class="row" data-label="…">`, so tests read a chart's geometry back and check it against the
//! figures it was drawn from.
//!
//! Charts are plain data ([`BarChart`], [`TrainingCurve`]) turned into a `String` by `to_svg`;
//! writing the file is the caller's business. Values are given in the unit of the axis (% for
//! error rates).
//!
//! ```
//! use isogloss_chart::{Bar, BarChart, Color, Glossary, Interval, Row, Section, Series};
//!
//! let chart = BarChart {
//!     title: "WER per dialect".into(),
//!     notes: vec![],
//!     axis: "WER, %".into(),
//!     series: vec![Series { name: "WER".into(), color: Color(74, 120, 181) }],
//!     glossary: Glossary {
//!         whisker: "95 % bootstrap interval".into(),
//!         lower: "lower than the baseline".into(),
//!         higher: "higher than the baseline".into(),
//!     },
//!     sections: vec![Section {
//!         heading: None,
//!         rows: vec![Row {
//!             label: "fells".into(),
//!             bars: vec![Some(Bar {
//!                 value: 19.6,
//!                 interval: Some(Interval { low: 13.0, high: 25.4 }),
//!                 mark: None,
//!             })],
//!         }],
//!     }],
//! };
//! let svg = chart.to_svg();
//! assert_eq!(svg.matches("class=\"whisker\"").count(), 1);
//! assert!(svg.contains("95 % bootstrap interval"));
//! ```
#![deny(missing_docs)]

pub mod bars;
pub mod curve;
mod legend;
mod scale;
mod svg;

pub use bars::{Bar, BarChart, Glossary, Interval, Mark, Row, Section, Series};
pub use curve::{EpochPoint, TrainingCurve};
pub use svg::Color;
