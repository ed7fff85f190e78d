#!/usr/bin/env bash
# Data-parallel training speed on one machine: epochs of the same training run, alternating
# between arms, each arm resuming the checkpoint the previous one left (so every arm trains the
# same model at the same stage, and each decodes its audio cache once, before round 1):
#
#   one-2t   the feature build, one process, 2 threads
#   ranks-2  the feature build, mpirun -np 2, 1 thread per rank
#   plain-2t a build without the `mpi` feature, one process, 2 threads
#   other-2  with a fifth argument, another build with the feature (e.g. an older commit's),
#            mpirun -np 2, 1 thread per rank: a before/after of a change to the exchanges
#
# Prints each epoch's input frames per second of wall time (feature work included, dev pass
# excluded: `frames_per_second` of training.jsonl) and the share of the training pass rank 0
# spent in sums over the ranks (`exchange_seconds` / `train_seconds`; 0 in one process), and
# the median per arm.
#
# usage: scripts/bench/data_parallel.sh MPI_BINARY PLAIN_BINARY [ROUNDS] [UTTERANCES] [OTHER_MPI_BINARY]
# Build the two binaries first, e.g.
#   cargo build --release -p isogloss && cp target/release/isogloss /tmp/isogloss-plain
#   cargo build --release -p isogloss --features mpi && cp target/release/isogloss /tmp/isogloss-mpi
set -euo pipefail
cd "$(dirname "$0")/../.."
MPI_BIN=$1
PLAIN_BIN=$2
ROUNDS=${3:-3}
UTTERANCES=${4:-600}
OTHER_BIN=${5:-}
WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT
# A prefix of the demo training split, audio paths made absolute.
DEMO=$(pwd)/tests/data/demo
awk -F'\t' -v OFS='\t' -v demo="$DEMO" -v n="$UTTERANCES" \
    'NR == 1 { print; next } NR <= n + 1 { $2 = demo "/" $2; print }' \
    "$DEMO/train.tsv" > "$WORK/train.tsv"
awk -F'\t' -v OFS='\t' -v demo="$DEMO" 'NR == 1 { print; next } { $2 = demo "/" $2; print }' \
    "$DEMO/dev.tsv" > "$WORK/dev.tsv"
OUT=$WORK/model
COMMON=(train --manifest "$WORK/train.tsv" --dev "$WORK/dev.tsv" --column dialectal
    --config configs/tdnn-narrow.toml --out "$OUT")
export OMPI_ALLOW_RUN_AS_ROOT=1 OMPI_ALLOW_RUN_AS_ROOT_CONFIRM=1
unset RAYON_NUM_THREADS
epoch=0
run() { # arm, threads per process, then the command before "train"
    local arm=$1 threads=$2
    shift 2
    epoch=$((epoch + 1))
    local resume=()
    [ -f "$OUT/checkpoint.safetensors" ] && resume=(--resume)
    # Exit code 2: some utterances could not be used (a dev row whose letters the training
    # prefix lacks), the run itself went through.
    local status=0
    "$@" "${COMMON[@]}" "${resume[@]}" --epochs "$epoch" --threads "$threads" >/dev/null 2>"$WORK/stderr" || status=$?
    if [ "$status" -ne 0 ] && [ "$status" -ne 2 ]; then
        cat "$WORK/stderr" >&2
        exit 1
    fi
    local line fps exchange train
    line=$(grep '"event":"epoch"' "$OUT/training.jsonl" | tail -n 1)
    fps=$(echo "$line" | sed 's/.*"frames_per_second":\([0-9.e+-]*\).*/\1/')
    exchange=$(echo "$line" | sed -n 's/.*"exchange_seconds":\([0-9.e+-]*\).*/\1/p')
    train=$(echo "$line" | sed 's/.*"train_seconds":\([0-9.e+-]*\).*/\1/')
    # Share of rank 0's training pass spent in sums over the ranks (waits included).
    echo "$arm $fps $(awk -v e="${exchange:-0}" -v t="$train" 'BEGIN { printf "%.3f", e / t }')" |
        tee -a "$WORK/results"
}
MPIRUN=(mpirun --oversubscribe --bind-to none -np 2 --mca btl_vader_single_copy_mechanism none)
# Warm-up: each arm decodes its cache (not timed: the first epoch of each is discarded).
run warm-one 2 "$MPI_BIN" >/dev/null
run warm-ranks 1 "${MPIRUN[@]}" "$MPI_BIN" >/dev/null
run warm-plain 2 "$PLAIN_BIN" >/dev/null
[ -n "$OTHER_BIN" ] && run warm-other 1 "${MPIRUN[@]}" "$OTHER_BIN" >/dev/null
: > "$WORK/results"
for round in $(seq "$ROUNDS"); do
    echo "round $round (load average $(cut -d' ' -f1 /proc/loadavg))"
    run one-2t 2 "$MPI_BIN"
    run ranks-2 1 "${MPIRUN[@]}" "$MPI_BIN"
    run plain-2t 2 "$PLAIN_BIN"
    if [ -n "$OTHER_BIN" ]; then run other-2 1 "${MPIRUN[@]}" "$OTHER_BIN"; fi
done
median() { sort -g | awk '{ v[NR] = $1 } END { printf "%s", (NR % 2) ? v[(NR + 1) / 2] : (v[NR / 2] + v[NR / 2 + 1]) / 2 }'; }
echo "medians (frames/s; for the ranks, the share of the training pass spent in exchanges):"
arms=(one-2t ranks-2 plain-2t)
[ -n "$OTHER_BIN" ] && arms+=(other-2)
for arm in "${arms[@]}"; do
    printf '%s %.0f' "$arm" "$(grep "^$arm " "$WORK/results" | cut -d' ' -f2 | median)"
    [ "$arm" = ranks-2 ] || [ "$arm" = other-2 ] && printf ' %.3f' "$(grep "^$arm " "$WORK/results" | cut -d' ' -f3 | median)"
    echo
done
