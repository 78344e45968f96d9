#!/bin/sh
# 784-input networks and the hard digits instance: ballast against outside references, side by side in
# one run (issue 17's benchmark list). From the project root:
#   sh benches/wide_compare.sh [OUT_DIR]          # raw outputs in OUT_DIR (default target/bench-wide)
# Environment: PYTHON (default /work/venv/bin/python), LIMIT (seconds per case, default 900),
# HARD_BUDGET (ballast's per-sample budget on the hard instance, default 30), CASES (which of a b c d to
# run, default all: e.g. CASES="a c"), BALLAST (a ballast binary to time instead of building
# target/release/ballast; copy it elsewhere first if you keep building while the script runs).
# Every timed command runs under `nice -n 10`, `timeout` and `/usr/bin/time -v` (wall time, peak RSS).
# `timeout --foreground` signals only the command (without it GNU timeout also signals its process group;
# in one run ballast then stopped at once without a report, as after a second signal); SIGKILL 60 s later.
# The numpy references run once with 1 and once with 2 BLAS threads; the table keeps the faster run.
# Prints a Markdown table (benches/wide_table.py); results go in docs/benchmarks/wide.md.
set -eu
PYTHON=${PYTHON:-/work/venv/bin/python}
LIMIT=${LIMIT:-900}
HARD_BUDGET=${HARD_BUDGET:-30}
CASES=${CASES:-a b c d}
OUT=${1:-target/bench-wide}
FIX=target/bench-fixtures
M2=$FIX/wide_256x2.model.json
M3=$FIX/wide_256x3.model.json
DATA=$FIX/wide_test.csv
REF=tests/reference
[ -x /usr/bin/time ] || { echo "needs GNU time at /usr/bin/time (apt-get install time)" >&2; exit 2; }
mkdir -p "$OUT"

# run NAME COMMAND...: stdout+stderr to OUT/NAME.out, time -v to OUT/NAME.time, exit code to OUT/NAME.rc
run() {
    name=$1
    shift
    echo "== $name: $*" >&2
    set +e
    nice -n 10 /usr/bin/time -v -o "$OUT/$name.time" timeout --foreground -k 60 "$LIMIT" "$@" >"$OUT/$name.out" 2>&1
    echo $? >"$OUT/$name.rc"
    set -e
}

# run_ref NAME SCRIPT ARGS...: a numpy reference with 1 and with 2 BLAS threads (NAME.t1, NAME.t2)
run_ref() {
    ref_name=$1
    ref_script=$2
    shift 2
    for t in 1 2; do
        run "$ref_name.t$t" env OPENBLAS_NUM_THREADS=$t OMP_NUM_THREADS=$t "$PYTHON" "$REF/$ref_script" "$@" \
            --json "$OUT/$ref_name.t$t.json"
    done
}

if [ -z "${BALLAST:-}" ]; then
    nice -n 10 cargo build --release --quiet
    BALLAST=target/release/ballast
fi
# wanted CASE: true when CASE is in CASES
wanted() {
    case " $CASES " in *" $1 "*) return 0 ;; *) return 1 ;; esac
}
for f in "$M2" "$M3" "$DATA" "$FIX/digits_deep_30.csv"; do
    [ -f "$f" ] || { nice -n 10 "$PYTHON" "$REF/wide_fixtures.py" --out "$FIX"; break; }
done
{
    echo "date: $(date -u +%Y-%m-%dT%H:%M:%SZ)"
    echo "commit: $(git rev-parse --short HEAD)$(git diff --quiet HEAD -- src || echo ' (src modified)')"
    echo "binary: $BALLAST ($(sha256sum "$BALLAST" | cut -c1-12))"
    echo "cases: $CASES"
    echo "cpu: $(nproc) x $(sed -n 's/^model name[[:space:]]*: //p' /proc/cpuinfo | head -1)"
    echo "load at start: $(cut -d' ' -f1-3 /proc/loadavg)"
} >"$OUT/machine.txt"

# (a) bounds only
if wanted a; then
run a.ballast "$BALLAST" certify --model "$M2" --data "$DATA" --eps 0.02 --budget 0 --report "$OUT/a.ballast.json"
run_ref a.crown crown_reference.py --model "$M2" --data "$DATA" --eps 0.02
fi

# (b) attacks: PGD 100 steps x 5 restarts, ballast's full schedule (FGSM first, targeted runs when the
# untargeted ones fail; against the reference's --targeted) and --untargeted-only (against its default)
if wanted b; then
run b.ballast "$BALLAST" attack --model "$M2" --data "$DATA" --eps 0.02 --steps 100 --restarts 5 \
    --out "$OUT/b.ballast.csv"
run b.ballast-untargeted "$BALLAST" attack --model "$M2" --data "$DATA" --eps 0.02 --steps 100 \
    --restarts 5 --untargeted-only --out "$OUT/b.ballast-untargeted.csv"
run_ref b.pgd pgd_batched_reference.py --model "$M2" --data "$DATA" --eps 0.02
run_ref b.pgd-targeted pgd_batched_reference.py --model "$M2" --data "$DATA" --eps 0.02 --targeted
fi

# (c) with a budget; on 256x3 the smallest eps of the grid where the linear relaxation leaves >= 10% open
if wanted c; then
run c.sweep env OPENBLAS_NUM_THREADS=1 "$PYTHON" "$REF/crown_reference.py" --model "$M3" --data "$DATA" \
    --eps 0.005 0.01 0.015 0.02 0.025 0.03 --json "$OUT/c.sweep.json"
EPS3=$("$PYTHON" -c 'import json, sys
r = json.load(open(sys.argv[1]))["results"]
print(next((e["epsilon"] for e in r if e["open"] >= 0.1 * e["correct"]), r[-1]["epsilon"]))' "$OUT/c.sweep.json") ||
    { echo "the eps sweep gave no result: see $OUT/c.sweep.out" >&2; exit 1; }
echo "256x3: eps $EPS3 (smallest of the grid where the linear relaxation leaves >= 10% of correct rows open)" \
    >"$OUT/c.eps.txt"
# --progress: the progress line (rate, estimated time left) goes into the .out files every 10 s
run c2.ballast "$BALLAST" certify --model "$M2" --data "$DATA" --eps 0.02 --budget 5 --progress \
    --report "$OUT/c2.ballast.json"
run c3.ballast "$BALLAST" certify --model "$M3" --data "$DATA" --eps "$EPS3" --budget 5 --progress \
    --report "$OUT/c3.ballast.json"
fi

# (d) the hard instance: digits 64-64-32-10, eps 0.06, the 30 rows milp_reference.py --bench solves
if wanted d; then
run d.ballast "$BALLAST" certify --model tests/data/digits_mlp_deep.model.json --data "$FIX/digits_deep_30.csv" \
    --eps 0.06 --budget "$HARD_BUDGET" --report "$OUT/d.ballast.json"
run d.milp "$PYTHON" "$REF/milp_reference.py" --bench --only digits_mlp_deep --eps-deep 0.06 \
    --out "$OUT/d.milp.json"
fi

echo "load at end: $(cut -d' ' -f1-3 /proc/loadavg)" >>"$OUT/machine.txt"
"$PYTHON" benches/wide_table.py "$OUT"
