#!/usr/bin/env python3
"""Benchmark: MFCC + delta + delta-delta throughput of isogloss-features against librosa, one core.

Both sides get the same 60 s of audio (the committed espeak-ng sentence
tests/fixtures/features/speech.wav repeated) and the same settings (the default front end:
pre-emphasis 0.97 with y[0]=x[0], 400-sample symmetric Hamming frames every 160 samples, 512-point
power spectrum, 40 HTK mel filters 20-8000 Hz without area normalisation, natural log floored at
1e-10, orthonormal DCT-II c0..c12, deltas over +-2 frames with edges replicated).

librosa side, timed end to end on float32 samples: librosa.effects.preemphasis(zi=0) ->
librosa.feature.melspectrogram(center=False, window=symmetric Hamming, htk=True, norm=None) ->
natural log -> librosa.feature.mfcc(S=log-mel, norm="ortho") -> librosa.feature.delta twice.
(librosa centres the 400-sample window inside each 512-sample frame, so its frames start 56
samples later and it yields one frame fewer; the work per frame is the same.)

Rust side: `cargo bench -p isogloss-features --bench mfcc_throughput -- --json`.

Both run pinned to one CPU (sched_setaffinity) with BLAS/OpenMP limited to one thread. The rounds
alternate Rust and librosa so that load from other processes hits both alike; the report gives
medians over all runs. Speed is a multiple of real time: audio seconds / wall-clock seconds.

Run from the repository root:
  /work/venv/bin/python scripts/bench/features_bench.py [--seconds 60] [--rounds 3] [--runs 15]
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import pathlib  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import time  # noqa: E402

import librosa  # noqa: E402
import numpy as np  # noqa: E402
import soundfile  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parents[2]
WAV = ROOT / "tests" / "fixtures" / "features" / "speech.wav"
CPU = 0


def pin_to_one_cpu() -> None:
    os.sched_setaffinity(0, {CPU})


def repeated_speech(seconds: float) -> np.ndarray:
    pcm, rate = soundfile.read(WAV, dtype="int16")
    assert rate == 16000
    sentence = pcm.astype(np.float32) / 32768.0
    wanted = int(seconds * 16000)
    return np.resize(sentence, wanted)  # repeats the sentence, like the Rust benchmark


def librosa_mfcc_deltas(y: np.ndarray) -> np.ndarray:
    emphasised = librosa.effects.preemphasis(y, coef=0.97, zi=0.0)
    mel = librosa.feature.melspectrogram(
        y=emphasised, sr=16000, n_fft=512, hop_length=160, win_length=400,
        window=np.hamming(400), center=False, power=2.0,
        n_mels=40, fmin=20.0, fmax=8000.0, htk=True, norm=None,
    )
    log_mel = np.log(np.maximum(mel, 1e-10))
    cepstra = librosa.feature.mfcc(S=log_mel, n_mfcc=13, dct_type=2, norm="ortho")
    delta = librosa.feature.delta(cepstra, width=5, order=1, mode="nearest")
    delta_delta = librosa.feature.delta(delta, width=5, order=1, mode="nearest")
    return np.concatenate([cepstra, delta, delta_delta], axis=0).T


def time_librosa(y: np.ndarray, runs: int) -> list:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        features = librosa_mfcc_deltas(y)
        times.append(time.perf_counter() - start)
    assert features.shape[1] == 39
    return times


def time_rust(seconds: float, runs: int) -> dict:
    command = ["cargo", "bench", "-q", "-p", "isogloss-features", "--bench", "mfcc_throughput", "--",
               "--json", "--seconds", str(seconds), "--runs", str(runs)]
    output = subprocess.run(command, cwd=ROOT, check=True, capture_output=True, text=True,
                            preexec_fn=pin_to_one_cpu).stdout
    results = [json.loads(line) for line in output.splitlines() if line.startswith("{")]
    return next(r for r in results if r["kind"] == "mfcc+delta+delta-delta")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0, help="audio length (default 60)")
    parser.add_argument("--rounds", type=int, default=3, help="alternating Rust/librosa rounds (default 3)")
    parser.add_argument("--runs", type=int, default=15, help="timed runs per side per round (default 15)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    args = parser.parse_args()

    # Build first (not pinned, not timed).
    subprocess.run(["cargo", "bench", "-q", "-p", "isogloss-features", "--bench", "mfcc_throughput", "--no-run"],
                   cwd=ROOT, check=True)
    pin_to_one_cpu()
    y = repeated_speech(args.seconds)
    librosa_mfcc_deltas(y)  # warm-up: imports, caches

    rust_medians, librosa_times = [], []
    for _ in range(args.rounds):
        rust_medians.append(time_rust(args.seconds, args.runs)["median_seconds"])
        librosa_times.extend(time_librosa(y, args.runs))
    rust = statistics.median(rust_medians)
    reference = statistics.median(librosa_times)
    summary = {
        "audio_seconds": args.seconds,
        "rust_median_seconds": rust,
        "rust_real_time_factor": args.seconds / rust,
        "rust_round_medians_seconds": rust_medians,
        "librosa_median_seconds": reference,
        "librosa_real_time_factor": args.seconds / reference,
        "speedup_over_librosa": reference / rust,
        "runs_per_side": args.rounds * args.runs,
        "librosa": librosa.__version__,
        "numpy": np.__version__,
        "load_average": os.getloadavg(),
    }
    if args.json:
        print(json.dumps(summary))
        return
    print(f"MFCC+Δ+ΔΔ on {args.seconds:g} s of audio, one CPU, {args.rounds}×{args.runs} runs per side "
          f"(load average {summary['load_average'][0]:.1f}):")
    print(f"  isogloss-features  median {rust * 1e3:8.2f} ms  = {summary['rust_real_time_factor']:7.0f}× real time "
          f"(round medians {', '.join(f'{m * 1e3:.2f}' for m in rust_medians)} ms)")
    print(f"  librosa {librosa.__version__:<10} median {reference * 1e3:8.2f} ms  = "
          f"{summary['librosa_real_time_factor']:7.0f}× real time")
    print(f"  ratio: isogloss-features is {summary['speedup_over_librosa']:.1f}× faster than librosa")


if __name__ == "__main__":
    main()
