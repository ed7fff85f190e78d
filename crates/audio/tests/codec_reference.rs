//! The simulated codec's transform against scipy: the window against
//! `scipy.signal.get_window("hann", 512)` (its square root), the frame spectra against
//! `scipy.signal.stft` of a fixed chirp-and-tones signal. Values computed by
//! `scripts/reference/codec_reference.py` and committed in
//! `tests/fixtures/audio/codec_reference.json`.

use std::path::PathBuf;

use isogloss_audio::augment::{codec_window, frame_spectra, FftPlans, CODEC_FRAME, CODEC_HOP};
use serde_json::Value;

fn reference() -> Value {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/audio/codec_reference.json");
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn numbers(value: &Value) -> Vec<f64> {
    value
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

#[test]
fn the_window_is_the_square_root_of_scipys_periodic_hann() {
    let reference = reference();
    assert_eq!(reference["frame"].as_u64(), Some(CODEC_FRAME as u64));
    assert_eq!(reference["hop"].as_u64(), Some(CODEC_HOP as u64));
    let want = numbers(&reference["window"]);
    let got = codec_window();
    assert_eq!(got.len(), want.len());
    for (n, (&g, &w)) in got.iter().zip(&want).enumerate() {
        assert!((f64::from(g) - w).abs() < 1e-6, "sample {n}: {g} vs {w}");
    }
}

#[test]
fn frame_spectra_equal_scipy_stft() {
    let reference = reference();
    let signal: Vec<f32> = numbers(&reference["signal"])
        .into_iter()
        .map(|v| v as f32)
        .collect();
    let spectra = frame_spectra(&signal, &FftPlans::new());
    let want_re = reference["spectra_re"].as_array().unwrap();
    let want_im = reference["spectra_im"].as_array().unwrap();
    assert_eq!(spectra.len(), want_re.len());
    // The largest bin is about 0.4·Σw/2 ≈ 65; f32 FFTs of 512 points keep ~1e-5 of it.
    let scale = spectra
        .iter()
        .flatten()
        .fold(0.0f64, |m, c| m.max(f64::from(c.norm())));
    for (t, frame) in spectra.iter().enumerate() {
        let (re, im) = (numbers(&want_re[t]), numbers(&want_im[t]));
        assert_eq!(frame.len(), CODEC_FRAME / 2 + 1);
        for (k, value) in frame.iter().enumerate() {
            let error = (f64::from(value.re) - re[k]).hypot(f64::from(value.im) - im[k]);
            assert!(
                error < 2e-5 * scale,
                "frame {t}, bin {k}: ({}, {}) vs ({}, {})",
                value.re,
                value.im,
                re[k],
                im[k]
            );
        }
    }
}
