//! Training curves read back from their SVG geometry agree with the epochs they were drawn from.

#[path = "support/geometry.rs"]
mod geometry;

use isogloss_chart::{EpochPoint, TrainingCurve};

fn curve(epochs: Vec<EpochPoint>, kept: Option<usize>) -> TrainingCurve {
    TrainingCurve {
        title: "Training curve".into(),
        notes: vec![],
        epochs,
        kept,
    }
}

fn epoch(epoch: usize, train_loss: f64, dev_loss: f64, error: f64) -> EpochPoint {
    EpochPoint {
        epoch,
        train_loss,
        dev_loss,
        dev_unit_error_percent: error,
    }
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() < 0.01 * (1.0 + b.abs())
}

#[test]
fn every_point_reads_back_at_its_epoch_and_value() {
    let epochs: Vec<EpochPoint> = (1..=12)
        .map(|e| {
            let e_f = e as f64;
            epoch(
                e,
                2.0 / e_f.sqrt(),
                1.8 / e_f.sqrt() + 0.02 * e_f,
                90.0 / e_f + 10.0,
            )
        })
        .collect();
    let svg = curve(epochs.clone(), Some(9)).to_svg();
    let points = geometry::curve_points(&svg);
    type Figure = fn(&EpochPoint) -> f64;
    let series: [(&str, Figure); 3] = [
        ("train loss", |e| e.train_loss),
        ("dev loss", |e| e.dev_loss),
        ("dev unit error rate", |e| e.dev_unit_error_percent),
    ];
    for (name, value) in series {
        let read = &points[name];
        assert_eq!(read.len(), epochs.len(), "{name}");
        for ((x, y), e) in read.iter().zip(&epochs) {
            assert!(
                close(*x, e.epoch as f64),
                "{name}: epoch {} at {x}",
                e.epoch
            );
            assert!(
                close(*y, value(e)),
                "{name}, epoch {}: {} read back as {y}",
                e.epoch,
                value(e)
            );
        }
    }
    assert!(svg.contains(">kept: epoch 9</text>"));
    assert_eq!(svg.matches("class=\"curve\"").count(), 3);
}

#[test]
fn a_single_epoch_shows_its_points_and_a_non_finite_loss_leaves_a_gap() {
    let svg = curve(vec![epoch(1, 1.7, 1.3, 83.5)], Some(1)).to_svg();
    let points = geometry::curve_points(&svg);
    assert!(close(points["dev loss"][0].1, 1.3) && close(points["dev loss"][0].0, 1.0));
    // One point makes no line, but its marker is there.
    assert_eq!(svg.matches("class=\"curve\"").count(), 0);

    let svg = curve(
        vec![
            epoch(1, 1.7, 1.3, 80.0),
            epoch(2, f64::NAN, 1.2, 70.0),
            epoch(3, 1.1, 1.0, 60.0),
            epoch(4, 1.0, 0.9, 50.0),
        ],
        None,
    )
    .to_svg();
    let points = geometry::curve_points(&svg);
    assert_eq!(points["train loss"].len(), 3);
    assert_eq!(points["dev loss"].len(), 4);
    // Train loss: epoch 1 alone, then 3–4 as one line; dev loss and error rate one line each.
    assert_eq!(
        svg.matches("class=\"curve\" data-series=\"train loss\"")
            .count(),
        1
    );
    assert_eq!(svg.matches("class=\"curve\"").count(), 3);
    assert!(!svg.contains("kept:"));
}
