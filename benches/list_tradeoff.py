#!/usr/bin/env python3
"""Two-budget requirement lists on the digits data: `ballast retrain` against a list (one multiplier per
line, primal-dual) vs a grid of fixed penalty weights (one weight on every line's robust term).

From the project root:
    python3 benches/list_tradeoff.py [OUT_DIR]          # default target/bench-list

Environment:
  FLOORS     pairs "f1:f2" (certified floors at eps 0.02 and 0.05), space separated,
             default "0.9:0.7 0.9:0.8 0.95:0.85"
  PENALTIES  default "0.1 0.3 1 3 10" ("none" for no penalty runs)
  SEEDS      initialisation, split and shuffling seeds, default "0 1 2"
  EPOCHS     default 60;  HIDDEN  default 32
  MODE       "acceptance" (default): retrain's verdict is on the test rows (`--acceptance`), so
             every floor is aimed one standard error above it on the validation rows;
             "validation": retrain's verdict is on its validation rows (no `--acceptance`, no margin),
             the protocol of the single-floor landing benchmark; the test rows are certified after.
  EXTRA      more flags for the primal-dual runs (e.g. "--preset landing")
  BALLAST    a binary to run (default: build and use target/release/ballast)

Each run trains a 64-32-10 network from scratch (`--hidden`; tests/data/digits_mlp.model.json only gives
the input range and classes) on tests/data/digits_train.csv (80/20 validation split by the seed). Every
written model is then certified once on the untouched tests/data/digits_test.csv (540 rows, bounds only)
against the same list. The penalty runs do not depend on the floors, so each weight is trained once per
seed and judged against every list. A model already in OUT_DIR is not trained again (delete the folder
for a fresh run). Prints Markdown tables; the results are in
docs/benchmarks/train.md ("Two budgets at once").
"""
import json
import os
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MODEL = "tests/data/digits_mlp.model.json"
TRAIN = "tests/data/digits_train.csv"
TEST = "tests/data/digits_test.csv"


def env_list(name, default):
    value = os.environ.get(name, default).split()
    return [] if value == ["none"] else value


def run(args, log, accepted=(0, 1)):
    with open(log, "w") as out:
        code = subprocess.call(args, stdout=out, stderr=subprocess.STDOUT)
    if code not in accepted:
        sys.exit(f"{' '.join(args)} exited {code}; see {log}")
    return code


def requirement(path, f1, f2):
    with open(path, "w") as out:
        out.write(
            f'norm = "linf"\n\n[[requirements]]\nepsilon = 0.02\nfloor = {f1}\n\n'
            f"[[requirements]]\nepsilon = 0.05\nfloor = {f2}\n"
        )


def train(args, model):
    """Runs `ballast retrain` unless `model` was written by an earlier run into the same folder."""
    if not os.path.exists(model):
        run([*args, "--out", model], model + ".log")


def on_test(ballast, model, req, report):
    """Certified per line and clean accuracy of `model` on the test rows, with the verdict (pass
    only when every line is proven; exit 3, undecided, is not a pass)."""
    code = run([ballast, "certify", "--model", model, "--data", TEST, "--requirement", req,
                "--report", report], report + ".log", accepted=(0, 1, 3))
    data = json.load(open(report))
    lines = [line["measured"] for line in data["requirements"]]
    return code == 0, lines, data["summary"]["clean_accuracy"]


def main():
    os.chdir(ROOT)
    out = sys.argv[1] if len(sys.argv) > 1 else "target/bench-list"
    os.makedirs(out, exist_ok=True)
    floors = [tuple(float(x) for x in p.split(":")) for p in env_list("FLOORS", "0.9:0.7 0.9:0.8 0.95:0.85")]
    penalties = env_list("PENALTIES", "0.1 0.3 1 3 10")
    seeds = env_list("SEEDS", "0 1 2")
    epochs, hidden = os.environ.get("EPOCHS", "60"), os.environ.get("HIDDEN", "32")
    mode = os.environ.get("MODE", "acceptance")
    extra = os.environ.get("EXTRA", "").split()
    ballast = os.environ.get("BALLAST")
    if not ballast:
        subprocess.check_call(["cargo", "build", "--release", "--quiet"])
        ballast = "target/release/ballast"
    os.environ.setdefault("RAYON_NUM_THREADS", "2")
    print(f"machine: {os.cpu_count()} cores, load {open('/proc/loadavg').read().split()[:3]}; "
          f"mode {mode}, extra {' '.join(extra) or 'none'}")
    rows = {}
    for seed in seeds:
        reqs = {}
        for f1, f2 in floors:
            reqs[(f1, f2)] = f"{out}/list-{f1}-{f2}.toml"
            requirement(reqs[(f1, f2)], f1, f2)
        common = ["--model", MODEL, "--train", TRAIN, "--epochs", epochs, "--hidden", hidden,
                  "--seed", seed]
        if mode == "acceptance":
            common += ["--acceptance", TEST]
        for w in penalties:
            model = f"{out}/pen-{w}-s{seed}.json"
            first = next(iter(reqs.values()))
            train([ballast, "retrain", *common, "--requirement", first, "--penalty", w,
                   "--max-rounds", "1", "--keep", "last"], model)
            last = json.load(open(model))["provenance"]["retrain"]["rounds"][-1]
            on_validation = ([line["measured"] for line in last["requirements"]],
                             last["clean_accuracy"])
            for pair, req in reqs.items():
                report = f"{model}.{pair[0]}-{pair[1]}.report.json"
                rows.setdefault(pair, []).append(
                    (seed, f"penalty {w}", *on_test(ballast, model, req, report), on_validation))
        for pair, req in reqs.items():
            model = f"{out}/pd-{pair[0]}-{pair[1]}-s{seed}.json"
            train([ballast, "retrain", *common, "--requirement", req, *extra], model)
            retrain = json.load(open(model))["provenance"]["retrain"]
            validation = [line["measured"] for line in retrain["rounds"][-1]["requirements"]]
            margins = retrain["generalisation_margins"]
            aims = [f + m for f, m in zip(pair, margins)]
            active = [p["binding"] for p in retrain["prices"]]
            landing = (validation, aims, active, len(retrain["rounds"]))
            rows.setdefault(pair, []).append(
                (seed, "primal-dual", *on_test(ballast, model, req, model + ".report.json"), landing))
    summary(rows, bool(penalties))
    for pair, results in rows.items():
        print(f"\n### floors {pair[0]} at 0.02, {pair[1]} at 0.05\n")
        print("| seed | run | test: verdict | test certified 0.02 / 0.05 (%) | test clean (%) "
              "| validation certified (%) | aimed on validation (%) | active lines |")
        print("| --- | --- | --- | --- | --- | --- | --- | --- |")
        for seed, label, passed, lines, clean, landing in results:
            shown = " / ".join(f"{x * 100:.2f}" for x in lines)
            if label == "primal-dual":
                validation, aims, active, _ = landing
                extra_cols = (" / ".join(f"{x * 100:.2f}" for x in validation),
                              " / ".join(f"{x * 100:.2f}" for x in aims),
                              ", ".join(str(i + 1) for i, a in enumerate(active) if a) or "none")
            else:
                extra_cols = ("", "", "")
            print(f"| {seed} | {label} | {'pass' if passed else 'fail'} | {shown} | {clean * 100:.2f} "
                  f"| {' | '.join(extra_cols)} |")


def summary(rows, with_penalties):
    """Per list and seed: primal-dual's test clean accuracy against the grid's best run meeting the
    list on the test rows, and against the run a user without the test rows would pick (meeting the
    list on the validation rows, highest validation clean accuracy); the landing of the active lines
    on the validation rows (points above the aimed level); rounds and runs needed."""
    print("\n### Summary (test clean accuracy in %, differences in test rows of 540)\n")
    print("| floors | seed | primal-dual (rounds) | grid: best meeting the list on test (weight) "
          "| grid: mean of those meeting it (runs) | grid: chosen on validation (weight) "
          "| primal-dual − best, rows | active lines: validation points above the aim |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- |")

    def shown(r):
        if r is None:
            return "none"
        return f"{r[4] * 100:.2f} ({r[1].split()[1]}){'' if r[2] else ', fails on test'}"

    for pair, results in rows.items():
        for seed in dict.fromkeys(r[0] for r in results):
            mine = [r for r in results if r[0] == seed]
            pd = next(r for r in mine if r[1] == "primal-dual")
            grid = [r for r in mine if r[1] != "primal-dual"]
            meeting = [r for r in grid if r[2]]
            best = max(meeting, key=lambda r: r[4], default=None)
            mean = (f"{sum(r[4] for r in meeting) / len(meeting) * 100:.2f} ({len(meeting)})"
                    if meeting else "none (0)")
            chosen = max((r for r in grid if all(m >= f for m, f in zip(r[5][0], pair))),
                         key=lambda r: r[5][1], default=None)
            validation, aims, active, rounds = pd[5]
            above = ", ".join(f"line {i + 1}: {(v - a) * 100:+.2f}"
                              for i, (v, a, on) in enumerate(zip(validation, aims, active)) if on)
            diff = f"{round((pd[4] - best[4]) * 540):+d}" if best and with_penalties else "—"
            print(f"| {pair[0]} / {pair[1]} | {seed} | {pd[4] * 100:.2f}{'' if pd[2] else ', fails'} "
                  f"({rounds}) | {shown(best)} | {mean} | {shown(chosen)} | {diff} "
                  f"| {above or 'none active'} |")


if __name__ == "__main__":
    main()
