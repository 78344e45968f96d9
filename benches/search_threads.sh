#!/bin/sh
# Branch and bound on every core: two ballast binaries side by side in one run, each case run by both
# binaries one right after the other (so both see the same load). From the project root:
#   BEFORE=/tmp/ballast-main AFTER=/tmp/ballast-new sh benches/search_threads.sh [OUT_DIR]
# Cases: (d) the hard digits instance (tests/data/digits_mlp_deep.model.json, eps 0.06, the 30 rows of
# target/bench-fixtures/digits_deep_30.csv, --budget 30); (c) the 784-input fixtures 256x2 and 256x3
# (eps 0.02, 200 rows, --budget 5; see benches/wide_compare.sh); and one hard sample alone (ROW of
# wide_test.csv on 256x3, default 138, --budget 60) with RAYON_NUM_THREADS=1 and =2.
# CASES picks among d, c and row (default all three). Copy both binaries out of target/ first so that builds during the run cannot replace them.
# Every command runs under `nice -n 10` and `/usr/bin/time` (wall, user, system seconds); the load
# average is recorded before each command. Prints a Markdown table; raw outputs stay in OUT_DIR.
set -eu
BEFORE=${BEFORE:?set BEFORE to the binary before the change}
AFTER=${AFTER:?set AFTER to the binary after the change}
ROW=${ROW:-138}
CASES=${CASES:-d c row}
OUT=${1:-target/bench-threads}
FIX=target/bench-fixtures
PYTHON=${PYTHON:-/work/venv/bin/python}
[ -x /usr/bin/time ] || { echo "needs GNU time at /usr/bin/time" >&2; exit 2; }
for f in "$FIX/wide_256x2.model.json" "$FIX/wide_256x3.model.json" "$FIX/wide_test.csv" "$FIX/digits_deep_30.csv"; do
    [ -f "$f" ] || { nice -n 10 "$PYTHON" tests/reference/wide_fixtures.py --out "$FIX"; break; }
done
mkdir -p "$OUT"
head -1 "$FIX/wide_test.csv" >"$OUT/row.csv"
sed -n "$((ROW + 2))p" "$FIX/wide_test.csv" >>"$OUT/row.csv"
{
    echo "date: $(date -u +%Y-%m-%dT%H:%M:%SZ)"
    echo "before: $BEFORE ($(sha256sum "$BEFORE" | cut -c1-12))"
    echo "after: $AFTER ($(sha256sum "$AFTER" | cut -c1-12))"
    echo "cpu: $(nproc) x $(sed -n 's/^model name[[:space:]]*: //p' /proc/cpuinfo | head -1)"
} >"$OUT/machine.txt"

# run NAME THREADS BINARY ARGS...: report to OUT/NAME.json, times to OUT/NAME.time, load to OUT/NAME.load,
# and to OUT/NAME.sched the process's threads' time on a core and waiting for one (nanoseconds, summed
# over threads, from /proc/PID/task/*/schedstat polled every 0.1 s until the process ends): their sum
# over the wall time is the average number of threads that had work, whatever the load.
run() {
    name=$1
    threads=$2
    shift 2
    echo "== $name" >&2
    cut -d' ' -f1-3 /proc/loadavg >"$OUT/$name.load"
    if [ "$threads" = all ]; then
        unset RAYON_NUM_THREADS
    else
        export RAYON_NUM_THREADS=$threads
    fi
    nice -n 10 /usr/bin/time -f "%e %U %S" -o "$OUT/$name.time" "$@" --report "$OUT/$name.json" \
        >"$OUT/$name.out" 2>&1 &
    timer=$!
    pid=
    while kill -0 "$timer" 2>/dev/null; do
        [ -n "$pid" ] || pid=$(pgrep -P "$timer" | head -1 || true)
        if [ -n "$pid" ] && [ -d "/proc/$pid" ]; then
            # keep the largest total: threads that have ended drop out of the snapshot
            cat /proc/"$pid"/task/*/schedstat 2>/dev/null |
                awk -v last="$(cat "$OUT/$name.sched" 2>/dev/null || echo 0 0 0)" \
                    '{cpu += $1; wait += $2} END {split(last, l, " ");
                      if (cpu + wait >= l[1] + l[2]) printf "%.0f %.0f %d\n", cpu, wait, NR; else print last}' \
                    >"$OUT/$name.sched.tmp" && mv "$OUT/$name.sched.tmp" "$OUT/$name.sched"
        fi
        sleep 0.1
    done
    wait "$timer" || true
    unset RAYON_NUM_THREADS
}

# wanted CASE: true when CASE is in CASES
wanted() {
    case " $CASES " in *" $1 "*) return 0 ;; *) return 1 ;; esac
}
wanted d && for side in before after; do
    [ $side = before ] && bin=$BEFORE || bin=$AFTER
    run "d.$side" all "$bin" certify --model tests/data/digits_mlp_deep.model.json \
        --data "$FIX/digits_deep_30.csv" --eps 0.06 --budget 30
done
wanted c && for net in 2 3; do
    for side in before after; do
        [ $side = before ] && bin=$BEFORE || bin=$AFTER
        run "c$net.$side" all "$bin" certify --model "$FIX/wide_256x$net.model.json" --data "$FIX/wide_test.csv" \
            --eps 0.02 --budget 5
    done
done
wanted row && for threads in 1 2; do
    for side in before after; do
        [ $side = before ] && bin=$BEFORE || bin=$AFTER
        run "row.$side.t$threads" $threads "$bin" certify --model "$FIX/wide_256x3.model.json" \
            --data "$OUT/row.csv" --eps 0.02 --budget 60
    done
done
echo "load at end: $(cut -d' ' -f1-3 /proc/loadavg)" >>"$OUT/machine.txt"

"$PYTHON" - "$OUT" "$ROW" <<'EOF'
import json, os, sys
out, row = sys.argv[1], sys.argv[2]
print(open(f"{out}/machine.txt").read())
print("| case | binary | certified | cex | miscl. | unresolved | search s (summed over samples) | wall s | user s | sys s | threads with work (avg) | load (1 min) |")
print("|---|---|---|---|---|---|---|---|---|---|---|---|")
names = [("d", "(d) deep 64-64-32-10, eps 0.06, 30 rows, --budget 30"),
         ("c2", "(c) 256x2, eps 0.02, --budget 5"), ("c3", "(c) 256x3, eps 0.02, --budget 5"),
         ("row.%s.t1", f"256x3 row {row} alone, 1 thread, --budget 60"),
         ("row.%s.t2", f"256x3 row {row} alone, 2 threads, --budget 60")]
for key, label in names:
    for side in ("before", "after"):
        name = key % side if "%s" in key else f"{key}.{side}"
        if not os.path.exists(f"{out}/{name}.load"):
            continue  # case not run
        try:
            report = json.load(open(f"{out}/{name}.json"))
            open(f"{out}/{name}.time").close()
        except (OSError, ValueError):
            print(f"| {label} | {side} | no report (see {name}.out) |||||||||")
            continue
        counts = {s: 0 for s in ("certified", "counterexample", "misclassified", "unresolved")}
        search = 0.0
        for s in report["samples"]:
            counts[s["status"]] += 1
            search += s.get("stage_seconds", {}).get("search", 0.0)
        wall, user, system = open(f"{out}/{name}.time").read().split()[-3:]
        load = open(f"{out}/{name}.load").read().split()[0]
        try:
            cpu, wait, _ = open(f"{out}/{name}.sched").read().split()
            busy = f"{(float(cpu) + float(wait)) / 1e9 / float(wall):.2f}"
        except (OSError, ValueError):
            busy = "?"
        print(f"| {label} | {side} | {counts['certified']} | {counts['counterexample']} | "
              f"{counts['misclassified']} | {counts['unresolved']} | {search:.1f} | {wall} | {user} | {system} | "
              f"{busy} | {load} |")
EOF
