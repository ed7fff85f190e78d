//! Training-step throughput of the TDNN + CTC + AdamW (a benchmark, not a test), and the machine's
//! matrix-multiply rate for the largest layer's shape, so the step can be reported as a fraction of
//! it (matrix-product FLOPs the step needs, divided by the step time, over that rate).
//!
//! Mirrors `scripts/bench/tdnn_torch.py` (same config, batch, frames, units, labels):
//! `RAYON_NUM_THREADS=2 cargo bench -p isogloss-acoustic --bench train_step -- --batch 16 --frames 600`
//! `--normalization batch|layer|none` overrides the configuration's. Prints one JSON line, with
//! the median wall time and the median CPU time of the process per step (on a loaded machine
//! the CPU time with `RAYON_NUM_THREADS=1` is the steadier figure). `--precision f32|bf16` sets
//! `[training] matmul_precision`; the line also gives the rate of the three products of one
//! offset of the largest layer (forward, weight gradient, input gradient) in f32 and in bf16.

use std::time::Instant;

use candle_core::{Device, Tensor};
use isogloss_acoustic::config::{MatmulPrecision, ModelConfig, Normalization};
use isogloss_acoustic::train::Trainer;
use isogloss_acoustic::units::{UnitInventory, UnitKind};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// CPU time consumed by the process (all its threads), in seconds.
fn process_cpu_seconds() -> f64 {
    let mut now = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: clock_gettime writes one timespec through a valid pointer to a local.
    let status = unsafe { libc::clock_gettime(libc::CLOCK_PROCESS_CPUTIME_ID, &mut now) };
    assert_eq!(status, 0, "the process CPU clock is not available");
    now.tv_sec as f64 + now.tv_nsec as f64 * 1e-9
}

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(|a, b| a.total_cmp(b));
    values[values.len() / 2]
}

fn main() {
    let mut config_path = None;
    let mut normalization = None;
    let mut precision = None;
    let (mut batch, mut frames, mut steps, mut dims, mut units, mut labels) =
        (16, 600, 12, 39, 40, 60);
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < args.len() {
        let value = args.get(i + 1).cloned().unwrap_or_default();
        match args[i].as_str() {
            "--config" => config_path = Some(value),
            "--normalization" => normalization = Some(value),
            "--precision" => precision = Some(value),
            "--batch" => batch = value.parse().unwrap_or(batch),
            "--frames" => frames = value.parse().unwrap_or(frames),
            "--steps" => steps = value.parse().unwrap_or(steps),
            "--dims" => dims = value.parse().unwrap_or(dims),
            "--units" => units = value.parse().unwrap_or(units),
            "--labels" => labels = value.parse().unwrap_or(labels),
            _ => {
                i += 1;
                continue;
            }
        }
        i += 2;
    }
    let mut config = match config_path {
        Some(path) => ModelConfig::read(std::path::Path::new(&path)).expect("readable config"),
        None => ModelConfig::small(),
    };
    if let Some(name) = normalization {
        config.model.normalization = match name.as_str() {
            "batch" => Normalization::Batch,
            "layer" => Normalization::Layer,
            "none" => Normalization::None,
            other => panic!("--normalization is batch, layer or none, not {other:?}"),
        };
    }
    if let Some(name) = precision {
        config.training.matmul_precision = match name.as_str() {
            "f32" => MatmulPrecision::F32,
            "bf16" => MatmulPrecision::Bf16,
            other => panic!("--precision is f32 or bf16, not {other:?}"),
        };
    }
    let inventory = UnitInventory {
        kind: UnitKind::Phones,
        units: (0..units)
            .map(|u| {
                if u == 0 {
                    "<ctc-blank>".to_string()
                } else {
                    format!("u{u}")
                }
            })
            .collect(),
    };
    let mut trainer = Trainer::new(config.clone(), inventory, dims, 0).expect("valid model");
    let mut rng = ChaCha8Rng::seed_from_u64(0);
    let features: Vec<Array2<f32>> = (0..batch)
        .map(|_| Array2::from_shape_fn((frames, dims), |_| rng.random_range(-1.0..1.0)))
        .collect();
    let targets: Vec<Vec<u32>> = (0..batch)
        .map(|_| {
            (0..labels)
                .map(|_| rng.random_range(1..units as u32))
                .collect()
        })
        .collect();
    let refs: Vec<&Array2<f32>> = features.iter().collect();
    let (mut times, mut cpu_times) = (Vec::new(), Vec::new());
    for _ in 0..steps {
        let (start, cpu_start) = (Instant::now(), process_cpu_seconds());
        trainer
            .train_batch(&refs, targets.clone(), &mut rng)
            .expect("training step runs");
        times.push(start.elapsed().as_secs_f64());
        cpu_times.push(process_cpu_seconds() - cpu_start);
    }
    let step = median(times[2..].to_vec());
    let cpu_step = median(cpu_times[2..].to_vec());

    // Matrix-product FLOPs one step needs (what a convolution computes, and what the fused layers
    // compute): per layer, output rows × K·D × H multiply-adds forward, the same again for the
    // weight gradient and for the input gradient (none for the first layer, whose input is the
    // features).
    let (left, right) = config.model.context();
    let mut frames_in = frames + left + right;
    let mut input = dims;
    let mut flops = 0f64;
    let mut widest = (0usize, 0usize, 0usize);
    // (rows, input width, output width) of the layer with the most multiply-adds.
    let mut widest_layer = (0usize, 0usize, 0usize);
    let mut first = true;
    let mut layers: Vec<(usize, usize, usize, usize)> = config
        .model
        .layers
        .iter()
        .map(|l| {
            let span = (l.taps[l.taps.len() - 1] - l.taps[0]) as usize;
            (l.taps.len(), l.width, l.keep_every, span)
        })
        .collect();
    layers.push((1, units, 1, 0));
    for (k, output, subsample, span) in layers {
        let frames_out = (frames_in - 1 - span) / subsample + 1;
        let rows = batch * frames_out;
        let macs = (rows * k * input * output) as f64;
        flops += 2.0 * macs * if first { 2.0 } else { 3.0 };
        first = false;
        if rows * input * k * output > widest.0 * widest.1 * widest.2 {
            widest = (rows, input, k * output);
            widest_layer = (rows, input, output);
        }
        frames_in = frames_out;
        input = output;
    }

    // The machine's matmul rate on the largest layer's shape.
    let a = Tensor::randn(0f32, 1.0, (widest.0, widest.1), &Device::Cpu).expect("tensor");
    let b = Tensor::randn(0f32, 1.0, (widest.1, widest.2), &Device::Cpu).expect("tensor");
    let mut matmul_times = Vec::new();
    for _ in 0..7 {
        let start = Instant::now();
        let c = a.matmul(&b).expect("matmul");
        let _ = c.sum_all().expect("sum");
        matmul_times.push(start.elapsed().as_secs_f64());
    }
    let matmul_gflops = 2.0 * (widest.0 * widest.1 * widest.2) as f64 / median(matmul_times) / 1e9;
    let step_gflops = flops / step / 1e9;
    // The three products of one offset of that layer, as the fused layer runs them, in f32 and
    // with bf16 operands (the same function; bf16 runs f32 on a CPU without AVX-512 BF16).
    let (rows, d, h) = widest_layer;
    let products: Vec<String> = [
        ("forward", (rows, h, d), (false, false)),
        ("weight_gradient", (d, h, rows), (true, false)),
        ("input_gradient", (rows, d, h), (false, true)),
    ]
    .iter()
    .map(|&(name, shape, layout)| {
        let rate = |precision| {
            let seconds = isogloss_acoustic::time_matmul(precision, shape, layout, 15)
                .expect("product runs");
            2.0 * (shape.0 * shape.1 * shape.2) as f64 / seconds / 1e9
        };
        format!(
            "{{\"product\": \"{name}\", \"m_n_k\": [{}, {}, {}], \"f32_gflops\": {:.1}, \"bf16_gflops\": {:.1}}}",
            shape.0,
            shape.1,
            shape.2,
            rate(MatmulPrecision::F32),
            rate(MatmulPrecision::Bf16)
        )
    })
    .collect();
    println!(
        "{{\"impl\": \"isogloss candle\", \"normalization\": \"{:?}\", \"threads\": {}, \"batch\": {batch}, \"frames\": {frames}, \"parameters\": {}, \"median_step_seconds\": {step:.4}, \"median_step_cpu_seconds\": {cpu_step:.4}, \"matmul_gflop_per_step\": {:.2}, \"frames_per_second\": {:.1}, \"step_matmul_gflops\": {step_gflops:.2}, \"machine_matmul_gflops\": {matmul_gflops:.2}, \"fraction_of_matmul_rate\": {:.3}, \"matmul_precision\": \"{}\", \"layer_products\": [{}]}}",
        config.model.normalization,
        std::env::var("RAYON_NUM_THREADS").unwrap_or_else(|_| "default".into()),
        config.model.parameter_count(dims, units),
        flops / 1e9,
        (batch * frames) as f64 / step,
        step_gflops / matmul_gflops,
        trainer.matmul_precision().name(),
        products.join(", "),
    );
}
