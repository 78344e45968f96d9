#!/bin/sh
# Retraining the demo CNN (models/pump-cnn.json, 64-bin spectra) to its floor with `ballast retrain`,
# timed, on the committed demo files (issue 18's benchmark: at most 2 minutes on 2 cores). The flags
# follow the schedule `ballast demo` uses for the CNN (src/demo/pipeline.rs: 16 epochs, 6-epoch ramp,
# later rounds of 8 epochs, one validation check per epoch, batches of 32, dual step 0.5, slack step
# 0.02; `ballast retrain` keeps its own defaults otherwise). From the project root:
#   sh benches/cnn_retrain.sh [OUT_DIR] [MODEL]      # default target/bench-cnn, models/pump-cnn.json
# Also times the two certify runs around it (--budget 0.5, as the demo) and `ballast demo` as a whole.
# Results go in docs/benchmarks/cnn-retrain.md.
set -eu
OUT=${1:-target/bench-cnn}
MODEL=${2:-models/pump-cnn.json}
BALLAST=target/release/ballast
DATA=demo-data
[ -x /usr/bin/time ] || { echo "needs GNU time at /usr/bin/time (apt-get install time)" >&2; exit 2; }
mkdir -p "$OUT"
nice -n 10 cargo build --release --quiet
export RAYON_NUM_THREADS=${RAYON_NUM_THREADS:-2}
echo "machine: $(nproc) cores, load $(cut -d' ' -f1-3 /proc/loadavg), RAYON_NUM_THREADS=$RAYON_NUM_THREADS"

timed() {
    label=$1
    shift
    /usr/bin/time -f "$label: %e s wall, %U s user, %M KB peak" "$@" > "$OUT/$label.out" 2>&1 || true
    grep -E "^(certified accuracy|retrain:|verdict)|s wall" "$OUT/$label.out" || tail -3 "$OUT/$label.out"
}

timed certify-before $BALLAST certify --model "$MODEL" --data $DATA/spectrum-acceptance.csv \
    --requirement $DATA/spectrum-requirement.toml --budget 0.5 --report "$OUT/before.json"
timed retrain $BALLAST retrain --model "$MODEL" --train $DATA/spectrum-train.csv \
    --acceptance $DATA/spectrum-acceptance.csv --requirement $DATA/spectrum-requirement.toml \
    --epochs 16 --ramp-epochs 6 --round-epochs 8 --max-rounds 3 --checks-per-epoch 1 --batch-size 32 \
    --dual-step 0.5 --slack-step 0.02 --seed 20260412 --out "$OUT/retrained.json"
timed certify-after $BALLAST certify --model "$OUT/retrained.json" \
    --data $DATA/spectrum-acceptance.csv --requirement $DATA/spectrum-requirement.toml --budget 0.5 \
    --report "$OUT/after.json"
rm -rf "$OUT/demo"
timed demo $BALLAST demo --out "$OUT/demo"
