#!/usr/bin/env bash
# Whole-epoch training speed with and without the feature prefetch, same binary: epochs of one
# training run, alternating between arms, each arm resuming the checkpoint the previous one left
# (so every arm trains the same model at the same stage; the audio cache is decoded once, by a
# warm-up epoch that is not counted):
#
#   prefetch-Nt  --threads N --prefetch (features of the next batch on one more thread)
#   in-turn-Nt   --threads N --no-prefetch (each batch's features on the pool, then its step)
#
# for N in THREADS (default "1 2"). Within a round the arms run in the order A B B A … and the
# next round reverses it, so a drift of the machine's load does not favour one arm.
#
# Prints per epoch: arm, input frames per second of wall time (`frames_per_second` of
# training.jsonl: feature work included, dev pass excluded), seconds the steps waited for
# features (`feature_seconds`), seconds of feature computation summed over threads
# (`feature_compute_seconds`), and the load average before the run; then per thread count the
# median of each arm and the median and range of the per-round ratios prefetch / in-turn.
#
# usage: scripts/bench/prefetch.sh BINARY [ROUNDS] [THREADS] [CONFIG]
# e.g.   cargo build --release -p isogloss && cp target/release/isogloss /tmp/isogloss-bench
#        scripts/bench/prefetch.sh /tmp/isogloss-bench 5 "1 2" configs/tdnn-small-robust.toml
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=$1
ROUNDS=${2:-5}
THREADS=${3:-"1 2"}
CONFIG=${4:-configs/tdnn-small-robust.toml}
WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT
DEMO=$(pwd)/tests/data/demo
for split in train dev; do
    awk -F'\t' -v OFS='\t' -v demo="$DEMO" 'NR == 1 { print; next } { $2 = demo "/" $2; print }' \
        "$DEMO/$split.tsv" > "$WORK/$split.tsv"
done
OUT=$WORK/model
COMMON=(train --manifest "$WORK/train.tsv" --dev "$WORK/dev.tsv" --column dialectal
    --config "$CONFIG" --out "$OUT")
unset RAYON_NUM_THREADS
epoch=0
field() { sed -n "s/.*\"$1\":\([0-9.e+-]*\).*/\1/p"; }
run() { # arm, threads, extra flags
    local arm=$1 threads=$2
    shift 2
    epoch=$((epoch + 1))
    local resume=()
    [ -f "$OUT/checkpoint.safetensors" ] && resume=(--resume)
    local load
    load=$(cut -d' ' -f1 /proc/loadavg)
    local status=0
    "$BIN" "${COMMON[@]}" "${resume[@]}" --epochs "$epoch" --threads "$threads" "$@" \
        >/dev/null 2>"$WORK/stderr" || status=$?
    # Exit code 2: some utterances could not be used; the run itself went through.
    if [ "$status" -ne 0 ] && [ "$status" -ne 2 ]; then
        cat "$WORK/stderr" >&2
        exit 1
    fi
    local line
    line=$(grep '"event":"epoch"' "$OUT/training.jsonl" | tail -n 1)
    echo "$arm $(echo "$line" | field frames_per_second) $(echo "$line" | field feature_seconds)" \
        "$(echo "$line" | field feature_compute_seconds) load=$load" | tee -a "$WORK/results"
}
run warm-up 2 >/dev/null
: > "$WORK/results"
for round in $(seq "$ROUNDS"); do
    echo "round $round"
    arms=()
    for n in $THREADS; do
        if [ $((round % 2)) -eq 1 ]; then arms+=("prefetch-${n}t" "in-turn-${n}t"); else arms+=("in-turn-${n}t" "prefetch-${n}t"); fi
    done
    # A B B A …: the second half of the round in reverse.
    order=("${arms[@]}")
    for ((i = ${#arms[@]} - 1; i >= 0; i--)); do order+=("${arms[$i]}"); done
    for arm in "${order[@]}"; do
        n=${arm##*-}
        n=${n%t}
        case $arm in
            prefetch-*) run "$arm" "$n" --prefetch ;;
            in-turn-*) run "$arm" "$n" --no-prefetch ;;
        esac
    done
done
median() { sort -g | awk '{ v[NR] = $1 } END { printf "%s", (NR % 2) ? v[(NR + 1) / 2] : (v[NR / 2] + v[NR / 2 + 1]) / 2 }'; }
echo "medians (frames/s; feature wait s; feature compute s) and prefetch / in-turn per round:"
for n in $THREADS; do
    for arm in "prefetch-${n}t" "in-turn-${n}t"; do
        printf '%s %.0f %.1f %.1f\n' "$arm" \
            "$(grep "^$arm " "$WORK/results" | cut -d' ' -f2 | median)" \
            "$(grep "^$arm " "$WORK/results" | cut -d' ' -f3 | median)" \
            "$(grep "^$arm " "$WORK/results" | cut -d' ' -f4 | median)"
    done
    # Each round has two epochs of each arm: the round's ratio is of their means.
    ratios=$(awk -v a="prefetch-${n}t " -v b="in-turn-${n}t " -v per=$((4 * $(echo "$THREADS" | wc -w))) '
        index($0, a) == 1 { r = int(c / per); p[r] += $2; np[r]++ }
        index($0, b) == 1 { r = int(c / per); q[r] += $2; nq[r]++ }
        !/^round/ { c++ }
        END { for (r in p) printf "%.3f\n", (p[r] / np[r]) / (q[r] / nq[r]) }' "$WORK/results")
    echo "ratio-${n}t median $(echo "$ratios" | median) range $(echo "$ratios" | sort -g | head -1)–$(echo "$ratios" | sort -g | tail -1) ($(echo "$ratios" | sort -g | tr '\n' ' '))"
done
