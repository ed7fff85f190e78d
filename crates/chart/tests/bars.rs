//! Bar charts read back from their SVG geometry agree with the figures they were drawn from.

#[path = "support/geometry.rs"]
mod geometry;

use isogloss_chart::{Bar, BarChart, Color, Glossary, Interval, Mark, Row, Section, Series};

fn bar(value: f64, low: f64, high: f64, mark: Option<Mark>) -> Option<Bar> {
    Some(Bar {
        value,
        interval: Some(Interval { low, high }),
        mark,
    })
}

fn chart(sections: Vec<Section>) -> BarChart {
    BarChart {
        title: "WER and flexible WER per dialect".into(),
        notes: vec!["Test split, 1075 words.".into()],
        axis: "error rate, %".into(),
        series: vec![
            Series {
                name: "WER".into(),
                color: Color(74, 120, 181),
            },
            Series {
                name: "flexible WER".into(),
                color: Color(169, 198, 232),
            },
        ],
        glossary: Glossary {
            whisker: "90 % bootstrap interval over utterances".into(),
            lower: "significantly lower than the baseline".into(),
            higher: "significantly higher than the baseline".into(),
        },
        sections,
    }
}

fn dialects() -> Vec<Section> {
    vec![
        Section {
            heading: Some("By dialect".into()),
            rows: vec![
                Row {
                    label: "corran".into(),
                    bars: vec![bar(23.9, 14.6, 34.5, None), bar(19.3, 10.4, 29.7, None)],
                },
                Row {
                    label: "fells & <marsh>".into(),
                    bars: vec![
                        bar(19.6, 13.0, 25.4, Some(Mark::Lower)),
                        bar(11.6, 5.8, 17.6, Some(Mark::Higher)),
                    ],
                },
                Row {
                    label: "larch".into(),
                    // A bar without an interval gets no whisker.
                    bars: vec![
                        Some(Bar {
                            value: 11.6,
                            interval: None,
                            mark: None,
                        }),
                        None,
                    ],
                },
            ],
        },
        Section {
            heading: None,
            rows: vec![Row {
                label: "all".into(),
                bars: vec![bar(15.3, 12.6, 18.3, None), bar(10.0, 7.4, 12.7, None)],
            }],
        },
    ]
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() < 0.01
}

#[test]
fn every_bar_and_whisker_reads_back_at_its_value() {
    let sections = dialects();
    let svg = chart(sections.clone()).to_svg();
    let rows = geometry::bar_rows(&svg);
    let expected: Vec<&Row> = sections.iter().flat_map(|s| &s.rows).collect();
    assert_eq!(
        rows.len(),
        expected.len(),
        "one drawn row per data row, no empty one"
    );
    for (read, row) in rows.iter().zip(expected) {
        assert_eq!(read.label, row.label);
        let drawn: Vec<&Bar> = row.bars.iter().flatten().collect();
        assert_eq!(read.bars.len(), drawn.len(), "{}: bars", row.label);
        for (read_bar, bar) in read.bars.iter().zip(drawn) {
            assert!(
                close(read_bar.value, bar.value),
                "{}: {} read back as {}",
                row.label,
                bar.value,
                read_bar.value
            );
            match (read_bar.interval, bar.interval) {
                (Some((low, high)), Some(i)) => assert!(
                    close(low, i.low) && close(high, i.high),
                    "{}: whisker [{low}, {high}] for [{}, {}]",
                    row.label,
                    i.low,
                    i.high
                ),
                (None, None) => {}
                (read, drawn) => panic!("{}: whisker {read:?} for interval {drawn:?}", row.label),
            }
            let mark = bar.mark.map(|m| match m {
                Mark::Lower => "lower".to_string(),
                Mark::Higher => "higher".to_string(),
            });
            assert_eq!(read_bar.mark, mark, "{}", row.label);
        }
    }
}

#[test]
fn the_legend_says_what_whiskers_and_marks_are_in_the_callers_words() {
    let svg = chart(dialects()).to_svg();
    assert!(svg.contains(">90 % bootstrap interval over utterances</text>"));
    assert!(svg.contains(">significantly lower than the baseline</text>"));
    assert!(svg.contains(">significantly higher than the baseline</text>"));
    assert!(
        !svg.contains("95 %"),
        "no confidence level but the caller's"
    );
    // Without marks or intervals, their legend entries are left out.
    let mut plain = dialects();
    for row in plain.iter_mut().flat_map(|s| s.rows.iter_mut()) {
        for bar in row.bars.iter_mut().flatten() {
            bar.interval = None;
            bar.mark = None;
        }
    }
    let svg = chart(plain).to_svg();
    assert!(!svg.contains("bootstrap interval") && !svg.contains("significantly"));
    assert_eq!(svg.matches("class=\"whisker\"").count(), 0);
}

#[test]
fn a_row_without_values_says_so_and_empty_sections_are_left_out() {
    let mut sections = dialects();
    sections.push(Section {
        heading: Some("By speaker".into()),
        rows: vec![],
    });
    sections[0].rows.push(Row {
        label: "silent".into(),
        bars: vec![
            None,
            Some(Bar {
                value: f64::NAN,
                interval: None,
                mark: None,
            }),
        ],
    });
    let svg = chart(sections).to_svg();
    assert!(!svg.contains("By speaker"));
    let rows = geometry::bar_rows(&svg);
    let silent = rows.iter().find(|r| r.label == "silent").unwrap();
    assert!(silent.bars.is_empty() && silent.no_value);
    assert!(rows.iter().all(|r| !r.bars.is_empty() || r.no_value));
}

#[test]
fn labels_and_titles_are_escaped_and_the_document_is_well_formed() {
    let svg = chart(dialects()).to_svg();
    assert!(svg.contains("data-label=\"fells &amp; &lt;marsh&gt;\""));
    assert!(svg.starts_with("<svg ") && svg.trim_end().ends_with("</svg>"));
    // Every group that opens closes.
    assert_eq!(svg.matches("<g ").count(), svg.matches("</g>").count());
    // The chart is laid out for a page about 900 px wide.
    let elements = geometry::elements(&svg);
    let width = elements[0].number("width");
    assert!((700.0..=1100.0).contains(&width), "width {width}");
}

#[test]
fn a_tall_chart_repeats_the_value_axis_above_the_rows() {
    let rows: Vec<Row> = (0..30)
        .map(|i| Row {
            label: format!("speaker {i:02}"),
            bars: vec![bar(i as f64, 0.5 * i as f64, 1.5 * i as f64, None), None],
        })
        .collect();
    let svg = chart(vec![Section {
        heading: None,
        rows,
    }])
    .to_svg();
    let elements = geometry::elements(&svg);
    let ticks: Vec<f64> = elements
        .iter()
        .filter(|e| e.class() == "tick")
        .map(|e| e.number("y"))
        .collect();
    let first_row = elements
        .iter()
        .find(|e| e.class() == "label")
        .unwrap()
        .number("y");
    assert!(ticks.iter().any(|&y| y < first_row) && ticks.iter().any(|&y| y > first_row));
    let read = geometry::bar_rows(&svg);
    assert_eq!(read.len(), 30);
    assert!(close(read[29].bars[0].interval.unwrap().1, 43.5));
}
