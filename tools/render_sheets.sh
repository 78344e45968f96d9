#!/bin/sh
# Renders every kind of sheet ballast writes and takes a screenshot of each with headless Chromium, so a
# person can look at them before a release: the demo's sheets before and after retraining (the "after"
# sheet shows the model's lineage), the comparison of the two (ballast compare), a sweep with a floor
# (plot, floor epsilons), an interrupted run, a run with --out-of-range clip, and the retraining plots.
# Run from the project root:
#
#   sh tools/render_sheets.sh [OUT]          # default OUT: target/sheets
#
# Needs a release build (cargo build --release) and, for the screenshots, `chromium` on the PATH
# (Debian: apt-get install chromium). Without Chromium it still writes the sheets. Chromium runs headless
# with a fresh profile and no background network traffic (the sheets fetch nothing).
set -eu
OUT=${1:-target/sheets}
B=target/release/ballast
mkdir -p "$OUT"
rm -rf "$OUT/demo" "$OUT/compare" "$OUT/sweep" "$OUT/interrupted" "$OUT/clip" "$OUT/retrained.retrain" "$OUT"/*.png

$B demo --out "$OUT/demo" > "$OUT/demo.log"
# Before against after on the same acceptance set.
$B compare "$OUT/demo/before/report.json" "$OUT/demo/after/report.json" --out "$OUT/compare" > "$OUT/compare.log" || true
# A sweep with a floor, radii for the histogram.
$B certify --model models/pump-mlp.json --data demo-data/acceptance.csv --requirement demo-data/requirement.toml \
    --eps 0.5,1,1.5,2 --radius --sheet "$OUT/sweep" > /dev/null || true
# An interrupted run: SIGINT once the journal holds finished samples.
$B certify --model tests/data/digits_mlp_deep.model.json --data tests/data/digits_test.csv --eps 0.06 --budget 2 \
    --report "$OUT/interrupted/r.json" --sheet "$OUT/interrupted" > /dev/null 2>&1 &
pid=$!
mkdir -p "$OUT/interrupted"
while [ "$(cat "$OUT/interrupted/r.journal.jsonl" 2>/dev/null | wc -l)" -lt 3 ]; do sleep 0.1; done
kill -INT $pid; wait $pid || true
# Rows outside the range, clipped: a two-input model with range [0, 1] and rows beyond it.
mkdir -p "$OUT/clip"
printf '%s\n' '{"format":"ballast.model/1","input":{"dim":2,"names":["a","b"],"lower":0.0,"upper":1.0},' \
    '"layers":[{"kind":"dense","weights":[[4.0,-4.0],[-4.0,4.0]],"bias":[0.0,0.0]}]}' > "$OUT/clip/m.json"
printf 'a,b,label\n0.9,0.1,0\n1.5,0.2,0\n0.2,0.8,1\n0.1,-0.3,1\n0.7,0.4,0\n' > "$OUT/clip/d.csv"
$B certify --model "$OUT/clip/m.json" --data "$OUT/clip/d.csv" --eps 0.1 --out-of-range clip \
    --sheet "$OUT/clip" > /dev/null 2>&1 || true
# Retraining plots (two rounds).
$B retrain --model models/pump-mlp.json --train demo-data/train.csv --acceptance demo-data/acceptance.csv \
    --requirement demo-data/requirement.toml --epochs 20 --max-rounds 2 --out "$OUT/retrained.json" > /dev/null 2>&1 || true

if command -v chromium > /dev/null; then
    PROFILE=$(mktemp -d)
    shot() { chromium --headless --no-sandbox --disable-gpu --disable-background-networking \
        --disable-component-update --disable-sync --no-first-run --user-data-dir="$PROFILE" \
        --hide-scrollbars --window-size="$3" --screenshot="$2" "file://$(realpath "$1")" > /dev/null 2>&1; }
    for kind in demo/before demo/after demo/cnn-before compare sweep interrupted clip; do
        shot "$OUT/$kind/sheet.html" "$OUT/$(echo $kind | tr / -).png" 1000,5200
    done
    shot "$OUT/retrained.retrain/accuracy.svg" "$OUT/retrain-accuracy.png" 660,380
    shot "$OUT/retrained.retrain/loss_and_multiplier.svg" "$OUT/retrain-losses.png" 660,380
    rm -rf "$PROFILE"
    echo "screenshots in $OUT/*.png"
else
    echo "chromium not found: sheets written to $OUT, no screenshots"
fi
