#!/bin/sh
# Attack speed, ballast against a batched numpy PGD, side by side in one run (from the project root):
#   sh benches/attack_compare.sh
# Workload: the 784-256-256-10 fixture (target/bench-fixtures/wide_256x2.model.json, 200 rows of
# wide_test.csv, made by tests/reference/wide_fixtures.py), L-inf eps 0.02, PGD 100 steps x 5 restarts.
#   - ballast: `ballast attack` with its default schedule (FGSM, 5 x 100 untargeted, then one targeted
#     run per other class; stop at the first counterexample), --precision single and double;
#     BEFORE=path/to/older/ballast adds that binary's run.
#   - numpy: tests/reference/pgd_batched_reference.py, every sample stepped at once, untargeted 5 x 100
#     and --targeted (the same schedule as ballast's), with 1 and 2 BLAS threads.
# Environment: PYTHON (default /work/venv/bin/python), REF (folder of the reference scripts, default
# tests/reference), ROUNDS (default 2), THREADS (BLAS thread counts for numpy, default "1 2"). Wall times come from GNU time; results go in
# docs/benchmarks/attack.md. Last, `cargo bench --bench attack` times the untargeted schedule in the library.
set -eu
PYTHON=${PYTHON:-/work/venv/bin/python}
REF=${REF:-tests/reference}
ROUNDS=${ROUNDS:-2}
THREADS=${THREADS:-1 2}
FIX=target/bench-fixtures
MODEL=$FIX/wide_256x2.model.json
DATA=$FIX/wide_test.csv
[ -f "$MODEL" ] || nice -n 10 "$PYTHON" "$REF/wide_fixtures.py" --out "$FIX"
nice -n 10 cargo build --release --quiet
echo "date: $(date -u +%Y-%m-%dT%H:%M:%SZ)"
echo "commit: $(git rev-parse --short HEAD)"
echo "cpu: $(nproc) x $(sed -n 's/^model name[[:space:]]*: //p' /proc/cpuinfo | head -1)"

timed() {
    label=$1
    shift
    start=$(date +%s.%N)
    out=$(nice -n 10 "$@" 2>&1)
    end=$(date +%s.%N)
    found=$(echo "$out" | sed -n 's/^counterexamples: //p; s/.*: found \([0-9]*\) .*/\1/p' | head -1)
    inner=$(echo "$out" | sed -n 's/.*; attack \([0-9.]*\) s$/, attack alone \1 s/p')
    printf '%-44s %8.2f s  found %s  (load %s%s)\n' "$label" "$(echo "$end - $start" | bc)" "$found" \
        "$(cut -d' ' -f1 /proc/loadavg)" "$inner"
}

for round in $(seq "$ROUNDS"); do
    echo "== round $round"
    for p in single double; do
        timed "ballast attack --precision $p" target/release/ballast attack --model "$MODEL" \
            --data "$DATA" --eps 0.02 --steps 100 --restarts 5 --precision "$p"
    done
    if [ -n "${BEFORE:-}" ]; then
        timed "ballast before ($BEFORE)" "$BEFORE" attack --model "$MODEL" --data "$DATA" --eps 0.02 \
            --steps 100 --restarts 5
    fi
    if [ -f "$REF/pgd_batched_reference.py" ]; then
        for t in $THREADS; do
            timed "numpy batched 5x100, $t BLAS thread(s)" env OPENBLAS_NUM_THREADS=$t OMP_NUM_THREADS=$t \
                "$PYTHON" "$REF/pgd_batched_reference.py" --model "$MODEL" --data "$DATA" --eps 0.02
            timed "numpy batched --targeted, $t BLAS thread(s)" env OPENBLAS_NUM_THREADS=$t \
                OMP_NUM_THREADS=$t "$PYTHON" "$REF/pgd_batched_reference.py" --model "$MODEL" \
                --data "$DATA" --eps 0.02 --targeted
        done
    else
        echo "($REF/pgd_batched_reference.py not found: numpy runs skipped)"
    fi
done
echo "== cargo bench --bench attack (the untargeted schedule above, in the library, and the digits MLP)"
nice -n 10 cargo bench --bench attack -- --noplot 2>&1 | grep -E "^pgd|thrpt|time:"
