//! The augmentations against general-purpose reference libraries: room impulse responses
//! against pyroomacoustics' image-source `ShoeBox`, Sabine absorption against
//! `pyroomacoustics.inverse_sabine`, the band-limiting filters against scipy's Butterworth
//! design; the simulated codec's window and frame spectra against `scipy.signal.stft`; the
//! re-voicing step's autocorrelation and Levinson–Durbin recursion against `numpy.correlate` and
//! `scipy.linalg.solve_toeplitz`. Values computed by `scripts/reference/augment_reference.py`,
//! `codec_reference.py` and `revoice_reference.py` and committed in `tests/fixtures/audio/`
//! (`augment_reference.json`, `codec_reference.json`, `revoice_reference.json`).

use std::path::PathBuf;

use isogloss_audio::augment::{
    autocorrelation, band_limit_gain, codec_window, frame_spectra, image_source_rir,
    levinson_durbin, sabine_absorption, FftPlans, ImageSourceSettings, Room, CODEC_FRAME,
    CODEC_HOP,
};
use serde_json::Value;

fn fixture(name: &str) -> Value {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/audio")
        .join(name);
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn reference() -> Value {
    fixture("augment_reference.json")
}

fn numbers(value: &Value) -> Vec<f64> {
    value
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

fn triple(value: &Value) -> [f64; 3] {
    numbers(value).try_into().unwrap()
}

#[test]
fn image_source_responses_equal_pyroomacoustics_shoebox() {
    let reference = reference();
    for room_value in reference["rooms"].as_array().unwrap() {
        let room = Room {
            dimensions_m: triple(&room_value["dimensions_m"]),
            source_m: triple(&room_value["source_m"]),
            microphone_m: triple(&room_value["microphone_m"]),
            absorption: room_value["absorption"].as_f64().unwrap(),
        };
        let settings = ImageSourceSettings {
            sample_rate: room_value["sample_rate"].as_u64().unwrap() as u32,
            speed_of_sound: room_value["speed_of_sound"].as_f64().unwrap(),
            max_order: Some(room_value["max_order"].as_u64().unwrap() as usize),
            max_seconds: None,
            fractional_delay_taps: room_value["fractional_delay_taps"].as_u64().unwrap() as usize,
        };
        let expected = numbers(&room_value["rir"]);
        let ours = image_source_rir(&room, &settings);
        // pyroomacoustics allocates a few samples more than the last tap needs; they are zero.
        assert!(
            ours.len() <= expected.len(),
            "{} > {}",
            ours.len(),
            expected.len()
        );
        assert!(expected[ours.len()..].iter().all(|&v| v == 0.0));
        let peak = expected.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let worst = ours
            .iter()
            .zip(&expected)
            .map(|(&a, &b)| (f64::from(a) - b).abs())
            .fold(0.0f64, f64::max);
        let error_energy: f64 = ours
            .iter()
            .zip(&expected)
            .map(|(&a, &b)| (f64::from(a) - b).powi(2))
            .sum();
        let energy: f64 = expected.iter().map(|v| v * v).sum();
        let snr_db = 10.0 * (energy / error_energy).log10();
        // pyroomacoustics ShoeBox (see the fixture's provenance). It reads its sinc from a table
        // interpolated linearly every 1/20 sample (error up to h²/8·max|sinc''| = 0.05²/8·π²/3
        // ≈ 1.0e-3 of an arrival's amplitude) and accumulates in f32; we evaluate the sinc
        // exactly in f64. Measured: worst sample 0.90e-3–0.99e-3 of the peak, error 58.9–60.8 dB
        // below the response; asserted with margin at 2e-3 of the peak and 55 dB.
        assert!(
            worst <= 2e-3 * peak,
            "{:?}: worst difference {worst:e}, peak {peak}",
            room.dimensions_m
        );
        assert!(snr_db >= 55.0, "{:?}: {snr_db:.1} dB", room.dimensions_m);
        eprintln!(
            "{:?}: worst difference {:.2e} of the peak, error {snr_db:.1} dB below the response",
            room.dimensions_m,
            worst / peak
        );
    }
}

#[test]
fn sabine_absorption_equals_pyroomacoustics_inverse_sabine() {
    for case in reference()["sabine"].as_array().unwrap() {
        let rt60 = case["rt60_seconds"].as_f64().unwrap();
        let dimensions = triple(&case["dimensions_m"]);
        let ours = sabine_absorption(rt60, dimensions, 343.0);
        // pyroomacoustics.inverse_sabine, same formula: equal to rounding.
        let expected = case["absorption"].as_f64().unwrap();
        assert!(
            (ours - expected).abs() < 1e-12,
            "{dimensions:?}: {ours} vs {expected}"
        );
    }
}

#[test]
fn band_limit_gain_equals_scipy_butterworth_forward_backward() {
    for case in reference()["butterworth"].as_array().unwrap() {
        let cut = case["cut_hz"].as_f64().unwrap();
        let (low, high) = match case["type"].as_str().unwrap() {
            "highpass" => (Some(cut), None),
            _ => (None, Some(cut)),
        };
        let frequencies = numbers(&case["frequencies_hz"]);
        let gains = numbers(&case["forward_backward_gain"]);
        for (&frequency, &expected) in frequencies.iter().zip(&gains) {
            let ours = band_limit_gain(frequency, low, high, 16_000);
            // scipy.signal.butter(4, cut, fs=16000) |H|² from sosfreqz: the same bilinear
            // design, so equal to rounding (relative 1e-9, absolute 1e-15 deep in the stop band).
            assert!(
                (ours - expected).abs() <= 1e-9 * expected + 1e-15,
                "{cut} Hz {:?} at {frequency} Hz: {ours} vs {expected}",
                case["type"]
            );
        }
    }
}

#[test]
fn the_window_is_the_square_root_of_scipys_periodic_hann() {
    let reference = fixture("codec_reference.json");
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
    let reference = fixture("codec_reference.json");
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

#[test]
fn linear_prediction_equals_numpy_and_scipy_solve_toeplitz() {
    let reference = fixture("revoice_reference.json");
    let order = reference["order"].as_u64().unwrap() as usize;
    for case in reference["cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let frame = numbers(&case["frame"]);
        let expected_r = numbers(&case["r"]);
        let r = autocorrelation(&frame, order);
        for (lag, (ours, theirs)) in r.iter().zip(&expected_r).enumerate() {
            assert!(
                (ours - theirs).abs() <= 1e-12 * expected_r[0],
                "{name}: r[{lag}] {ours} against numpy's {theirs}"
            );
        }
        // The recursion on numpy's autocorrelation, so the two checks stay apart.
        let mut solved = expected_r.clone();
        solved[0] *= 1.0 + case["correction"].as_f64().unwrap();
        let (polynomial, error) = levinson_durbin(&solved).unwrap();
        for (k, (ours, theirs)) in polynomial
            .iter()
            .zip(numbers(&case["polynomial"]))
            .enumerate()
        {
            assert!(
                (ours - theirs).abs() <= 1e-8 * theirs.abs().max(1.0),
                "{name}: a[{k}] {ours} against scipy's {theirs}"
            );
        }
        let theirs = case["error"].as_f64().unwrap();
        assert!(
            (error - theirs).abs() <= 1e-8 * theirs,
            "{name}: error {error} against {theirs}"
        );
    }
}
