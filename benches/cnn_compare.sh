#!/usr/bin/env bash
# CNN vs the same network written out as dense layers: `certify --budget 0` on 200 digits rows, in one
# run. Fixtures: tests/reference/cnn_fixtures.py --bench (a 23,850-parameter CNN: conv 3x3 x16 pad 1,
# relu, conv 3x3 x16 stride 2 pad 1, relu, dense 80, relu, dense 10; the dense form via
# scipy.signal.correlate). Usage: benches/cnn_compare.sh [eps ...]   (from the project root)
set -euo pipefail
PYTHON=${PYTHON:-/work/venv/bin/python}
FIX=target/bench-fixtures
cargo build --release --quiet
[ -f "$FIX/digits_cnn_wide.model.json" ] || "$PYTHON" tests/reference/cnn_fixtures.py --bench "$FIX"
for eps in "${@:-0.02 0.04}"; do
  for m in digits_cnn_wide digits_cnn_wide_dense; do
    /usr/bin/time -f "$m eps $eps: %e s wall, %U s user, %S s sys, %M KB peak" target/release/ballast certify \
      --model "$FIX/$m.model.json" --data "$FIX/digits_cnn_rows.csv" --eps "$eps" --budget 0 \
      --report "$FIX/$m.$eps.report.json" 2>&1 | grep -E "^certified [0-9]|wall"
  done
done
