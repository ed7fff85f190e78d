//! Cost of each augmentation per second of audio, beside the cost of MFCC extraction of the same
//! audio, so that the price of on-the-fly augmentation in a training loop is known. A benchmark,
//! not a test: `cargo bench -p isogloss-features --bench augment`.
//!
//! Flags after `--`: `--seconds S` utterance length (default 5, the committed espeak-ng sentence
//! repeated), `--runs R` timed runs per step (default 21, after 3 warm-up runs), `--bank N` room
//! responses to generate for the bank timing (default 64).
//!
//! Times are the calling thread's CPU time (medians), which on a shared machine is the cost of
//! the work itself; the bank is built on all rayon threads and is timed by the wall clock.

mod support;

use std::hint::black_box;
use std::time::Instant;

use isogloss_audio::augment::{
    babble, band_limit, coloured_noise, hum, mix_at_snr, reverberate, revoice, simulate_codec,
    AugmentConfig, Augmenter, CodecSettings, HumSettings, ReverbConfig, RevoiceSettings, RirBank,
};
use isogloss_audio::volume_perturb;
use isogloss_features::mel::MelFilterbank;
use isogloss_features::{FeatureConfig, FeatureExtractor, VtlpWarp};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use support::{fail, parse, repeated_speech, thread_cpu_seconds};

fn main() {
    let mut seconds = 5.0f64;
    let mut runs = 21usize;
    let mut bank_size = 64usize;
    let mut args = std::env::args().skip(1);
    while let Some(arg) = args.next() {
        match arg.as_str() {
            "--seconds" => seconds = parse(args.next(), "--seconds"),
            "--runs" => runs = parse(args.next(), "--runs"),
            "--bank" => bank_size = parse(args.next(), "--bank"),
            // `cargo bench` passes `--bench` to harness-less benchmarks.
            "--bench" => {}
            other => fail(&format!("unknown flag {other}")),
        }
    }
    let speech = repeated_speech(seconds);
    let others: Vec<Vec<f32>> = (1..=6)
        .map(|k| repeated_speech(seconds * (0.5 + 0.2 * k as f64)))
        .collect();
    let reverb = ReverbConfig {
        bank_size,
        ..ReverbConfig::default()
    };

    let threads = rayon::current_num_threads();
    let start = Instant::now();
    let bank = RirBank::generate(&reverb, 16_000);
    let bank_seconds = start.elapsed().as_secs_f64();
    let lengths: Vec<usize> = (0..bank.len())
        .map(|i| bank.get(i).unwrap().samples.len())
        .collect();
    println!(
        "RIR bank: {bank_size} responses (RT60 {:?} s, rooms {:?}–{:?} m) in {bank_seconds:.2} s wall on {threads} threads ({:.1} ms per response·thread); response length median {} samples, longest {}",
        reverb.rt60_seconds,
        reverb.room_min_m,
        reverb.room_max_m,
        bank_seconds * threads as f64 * 1e3 / bank_size as f64,
        median_usize(&lengths),
        lengths.iter().max().unwrap(),
    );

    let extractor = FeatureExtractor::new(&FeatureConfig::default()).unwrap();
    let config = extractor.config().clone();
    let warp = VtlpWarp::new(1.07, 4800.0, 16_000).unwrap();
    let mfcc = time(runs, || {
        black_box(extractor.extract(black_box(&speech)));
    });
    println!(
        "utterance of {seconds} s; CPU medians over {runs} runs; cost per second of audio and as a share of MFCC extraction"
    );
    report("MFCC + Δ + ΔΔ extraction (reference)", mfcc, seconds, mfcc);
    let vtlp = time(runs, || {
        black_box(extractor.extract_warped(black_box(&speech), &warp).unwrap());
    });
    report("VTLP: extraction with a warped bank", vtlp, seconds, mfcc);
    let bank_build = time(runs * 10, || {
        black_box(
            MelFilterbank::warped(
                config.sample_rate,
                config.fft_size,
                config.mel_filters,
                config.band_low_hz,
                config.band_high_hz,
                &warp,
            )
            .unwrap(),
        );
    });
    println!(
        "  of which building the warped bank: {:.1} µs per utterance (MFCC extraction: {:.2} µs per frame)",
        bank_build * 1e6,
        mfcc * 1e6 / config.frame_count(speech.len()) as f64
    );

    let augmenter = Augmenter::new(AugmentConfig::default()).unwrap();
    let plans = augmenter.plans();
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for (name, exponent) in [("white", 0.0), ("pink", 1.0), ("brown", 2.0)] {
        let cost = time(runs, || {
            let mut samples = speech.clone();
            let noise = coloured_noise(samples.len(), exponent, 16_000, &mut rng, plans);
            black_box(mix_at_snr(&mut samples, &noise, 10.0));
        });
        report(
            &format!("noise: {name}, generated and mixed"),
            cost,
            seconds,
            mfcc,
        );
    }
    let talkers: Vec<std::borrow::Cow<[f32]>> = others[..4]
        .iter()
        .map(|t| std::borrow::Cow::Borrowed(&t[..]))
        .collect();
    let cost = time(runs, || {
        let mut samples = speech.clone();
        let noise = babble(&talkers, samples.len(), &mut rng).unwrap();
        black_box(mix_at_snr(&mut samples, &noise, 10.0));
    });
    report("noise: babble of 4 talkers, mixed", cost, seconds, mfcc);
    let cost = time(runs, || {
        let mut samples = speech.clone();
        let settings = HumSettings::draw(16_000, &mut rng);
        let noise = hum(samples.len(), 16_000, &settings, &mut rng);
        black_box(mix_at_snr(&mut samples, &noise, 10.0));
    });
    report("noise: mains hum, drawn and mixed", cost, seconds, mfcc);
    let mut index = 0;
    let cost = time(runs, || {
        let mut samples = speech.clone();
        reverberate(&mut samples, bank.get(index % bank.len()).unwrap(), plans);
        index += 1;
        black_box(samples);
    });
    report(
        "reverberation (bank responses in turn)",
        cost,
        seconds,
        mfcc,
    );
    let cost = time(runs, || {
        let mut samples = speech.clone();
        band_limit(&mut samples, Some(300.0), Some(3400.0), 16_000);
        black_box(samples);
    });
    report("band-limit (telephone)", cost, seconds, mfcc);
    let cost = time(runs, || {
        let mut samples = speech.clone();
        volume_perturb(&mut samples, 0.7);
        black_box(samples);
    });
    report("gain", cost, seconds, mfcc);
    let codec = CodecSettings {
        cutoff_hz: 5_500.0,
        band_snr_db: 12.0,
        floor_db: 30.0,
    };
    let cost = time(runs, || {
        let mut samples = speech.clone();
        simulate_codec(&mut samples, &codec, plans);
        black_box(samples);
    });
    report(
        "codec (5.5 kHz cut-off, 12 dB band SNR)",
        cost,
        seconds,
        mfcc,
    );
    let voice = RevoiceSettings {
        f0_hz: 150.0,
        intonation_semitones: 2.0,
        breath: 0.2,
        tilt: 0.2,
        bandwidth_factor: 0.97,
    };
    let cost = time(runs, || {
        let mut samples = speech.clone();
        black_box(revoice(&mut samples, &voice, &mut rng));
        black_box(samples);
    });
    report("re-voicing (150 Hz, γ 0.97)", cost, seconds, mfcc);
    let copy = time(runs, || {
        black_box(speech.clone());
    });
    report(
        "(copying the utterance, included above)",
        copy,
        seconds,
        mfcc,
    );

    let everything = AugmentConfig {
        reverb: reverb.clone(),
        ..AugmentConfig::default()
    }
    .every_step();
    for (name, config, draws) in [
        ("whole chain, every step drawn", everything, runs),
        // Most utterances draw little with the default probabilities: a mean over many.
        (
            "whole chain, default probabilities (mean)",
            AugmentConfig::default(),
            runs * 20,
        ),
    ] {
        let augmenter = Augmenter::new(AugmentConfig {
            reverb: ReverbConfig {
                bank_size: bank_size.min(8),
                ..config.reverb.clone()
            },
            ..config
        })
        .unwrap();
        let (median, mean) = time_both(draws, || {
            let mut samples = speech.clone();
            black_box(
                augmenter
                    .apply(&mut samples, &mut rng, Some(&others))
                    .unwrap(),
            );
        });
        report(
            name,
            if draws == runs { median } else { mean },
            seconds,
            mfcc,
        );
    }
}

fn report(name: &str, seconds_per_utterance: f64, audio_seconds: f64, mfcc: f64) {
    println!(
        "  {name:<44} {:>8.3} ms per s of audio ({:>6.0}× real time, {:>5.2}× MFCC)",
        seconds_per_utterance * 1e3 / audio_seconds,
        audio_seconds / seconds_per_utterance,
        seconds_per_utterance / mfcc,
    );
}

/// Median thread CPU time of `runs` calls (after 3 warm-up calls), in seconds.
fn time(runs: usize, work: impl FnMut()) -> f64 {
    time_both(runs, work).0
}

/// Median and mean thread CPU time of `runs` calls (after 3 warm-up calls), in seconds.
fn time_both(runs: usize, mut work: impl FnMut()) -> (f64, f64) {
    for _ in 0..3 {
        work();
    }
    let mut times: Vec<f64> = (0..runs.max(1))
        .map(|_| {
            let start = thread_cpu_seconds();
            work();
            thread_cpu_seconds() - start
        })
        .collect();
    times.sort_by(f64::total_cmp);
    let mean = times.iter().sum::<f64>() / times.len() as f64;
    (times[times.len() / 2], mean)
}

fn median_usize(values: &[usize]) -> usize {
    let mut sorted = values.to_vec();
    sorted.sort_unstable();
    sorted[sorted.len() / 2]
}
