#!/bin/sh
# Two-budget requirement lists on the digits data: `ballast retrain` against a list (one multiplier per
# line, primal-dual) vs a grid of fixed penalty weights (one weight on every line's robust term), each
# judged by the same list on the held-out test rows. From the project root:
#   sh benches/list_tradeoff.sh [OUT_DIR]            # default target/bench-list
# Environment: FLOORS (pairs "f1:f2" for eps 0.02 and 0.05, space separated, default "0.9:0.7 0.9:0.8"),
# PENALTIES (default "0.1 0.3 1 3 10"), EPOCHS (default 60), HIDDEN (default 32), SEED (initialisation,
# split and shuffling, default 0), BALLAST (a binary to run instead of building one).
# Each run trains a 64-32-10 network from scratch (--hidden; tests/data/digits_mlp.model.json only gives
# the input range and classes: it was trained on every training row, so a validation split of them
# would not be held out from it) on tests/data/digits_train.csv (80/20 validation split, seed SEED); the
# acceptance rows tests/data/digits_test.csv (540) are certified once after the last round. Prints one
# Markdown table; the results are in docs/benchmarks/train.md ("Two budgets at once").
set -eu
OUT=${1:-target/bench-list}
FLOORS=${FLOORS:-"0.9:0.7 0.9:0.8"}
PENALTIES=${PENALTIES:-"0.1 0.3 1 3 10"}
EPOCHS=${EPOCHS:-60}
HIDDEN=${HIDDEN:-32}
SEED=${SEED:-0}
MODEL=tests/data/digits_mlp.model.json
mkdir -p "$OUT"
# BALLAST=path runs a given binary (no build).
if [ -z "${BALLAST:-}" ]; then
    nice -n 10 cargo build --release --quiet
    BALLAST=target/release/ballast
fi
export RAYON_NUM_THREADS=${RAYON_NUM_THREADS:-2}
echo "machine: $(nproc) cores, load $(cut -d' ' -f1-3 /proc/loadavg)"

summary() {
    # label, model file, exit code: one table row from the model's provenance
    python3 - "$1" "$2" "$3" <<'EOF'
import json, sys
label, path, code = sys.argv[1], sys.argv[2], sys.argv[3]
final = json.load(open(path))["provenance"]["retrain"]["final"]
lines = final["requirements"]
shown = " / ".join(f"{l['measured']*100:.2f}" for l in lines)
short = max((l["floor"] - l["measured"]) * 100 for l in lines)
print(f"| {label} | {'pass' if code == '0' else 'fail'} | {shown} | {max(short, 0):.2f} | {final['clean_accuracy']*100:.2f} |")
EOF
}

echo "| run | verdict | certified at 0.02 / 0.05 (%) | worst shortfall (points) | clean (%) |"
echo "| --- | --- | --- | --- | --- |"
for pair in $FLOORS; do
    f1=${pair%%:*}
    f2=${pair##*:}
    req="$OUT/list-$f1-$f2.toml"
    printf 'norm = "linf"\n\n[[requirements]]\nepsilon = 0.02\nfloor = %s\n\n[[requirements]]\nepsilon = 0.05\nfloor = %s\n' "$f1" "$f2" > "$req"
    echo "| **floors $f1 at 0.02, $f2 at 0.05** | | | | |"
    common="--model $MODEL --train tests/data/digits_train.csv --acceptance tests/data/digits_test.csv --requirement $req --epochs $EPOCHS --hidden $HIDDEN --seed $SEED"
    code=0
    nice -n 10 $BALLAST retrain $common --out "$OUT/pd-$f1-$f2.json" > "$OUT/pd-$f1-$f2.log" 2>&1 || code=$?
    summary "primal-dual (1 run, up to 3 rounds)" "$OUT/pd-$f1-$f2.json" $code
    for w in $PENALTIES; do
        code=0
        nice -n 10 $BALLAST retrain $common --penalty "$w" --max-rounds 1 --keep last \
            --out "$OUT/pen-$w-$f1-$f2.json" > "$OUT/pen-$w-$f1-$f2.log" 2>&1 || code=$?
        summary "penalty $w" "$OUT/pen-$w-$f1-$f2.json" $code
    done
done
