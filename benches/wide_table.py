#!/usr/bin/env python3
"""Markdown table of a benches/wide_compare.sh run: python3 benches/wide_table.py OUT_DIR
(can be rerun alone on the raw outputs of a finished run).

ballast's time is the wall time of the whole command (/usr/bin/time, loading included); a numpy
reference's time is the loop it measures itself (loading excluded), from the faster of its 1- and
2-BLAS-thread runs. Peak memory is the maximum resident set size of the process (/usr/bin/time -v).
"""
import csv
import json
import os
import re
import sys

OUT = sys.argv[1]


def path(name):
    return os.path.join(OUT, name)


def load(name):
    try:
        with open(path(name)) as f:
            return json.load(f)
    except (OSError, ValueError):
        return None


def process(name):
    """(wall seconds, peak MiB, exit code) of a run."""
    text = open(path(name + ".time")).read()
    clock = re.search(r"Elapsed \(wall clock\) time.*: (?:(\d+):)?(\d+):([\d.]+)", text)
    wall = int(clock.group(1) or 0) * 3600 + int(clock.group(2)) * 60 + float(clock.group(3))
    peak = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", text).group(1)) / 1024
    rc = int(open(path(name + ".rc")).read())
    return wall, peak, rc


def status(rc):
    return {124: " **timed out**", 137: " **killed**"}.get(rc, "")


def journal(name):
    """The statuses of the samples an unfinished run wrote to its journal."""
    try:
        lines = [json.loads(x) for x in open(path(name + ".journal.jsonl")) if x.strip()][1:]
    except (OSError, ValueError):
        return "no journal"
    counts = {k: sum(x["status"] == k for x in lines) for k in ("certified", "counterexample", "misclassified")}
    return (f"journal: {len(lines)} finished: certified {counts['certified']}, cex {counts['counterexample']}, "
            f"miscl. {counts['misclassified']}, unresolved {len(lines) - sum(counts.values())}")


def ballast(name):
    """(result text, seconds, peak MiB, summary or None)."""
    wall, peak, rc = process(name)
    r = load(name + ".json")
    if r is None:
        return f"no report (exit {rc}){status(rc)}; {journal(name)}", wall, peak, None
    s = r["summary"]
    stages = ", ".join(f"{st['stage']} {st['seconds']:.1f}" for st in r["stages"] if st["seconds"] >= 0.05)
    text = (f"certified {s['certified']}, cex {s['counterexample']}, miscl. {s['misclassified']}, "
            f"unresolved {s['unresolved']}{'' if r['complete'] else ' (partial)'}{status(rc)}; "
            f"stage CPU-s: {stages}")
    return text, wall, peak, s


def reference(name):
    """(result json, seconds, BLAS threads, process wall, peak MiB): the faster of the 1- and 2-thread runs."""
    runs = []
    for t in (1, 2):
        j = load(f"{name}.t{t}.json")
        if j is not None:
            wall, peak, _ = process(f"{name}.t{t}")
            runs.append((j["seconds"] if "seconds" in j else j["results"][0]["seconds"], t, j, wall, peak))
    if not runs:
        sys.exit(f"reference {name} gave no result: see {path(name)}.t1.out")
    seconds, threads, j, wall, _ = min(runs, key=lambda r: r[0])
    return j, seconds, threads, wall, max(r[4] for r in runs)


def ran(name):
    """True when the run wrote this case (CASES may leave some out)."""
    return os.path.exists(path(name + ".time"))


def verdict(ok):
    return "met" if ok else "**not met**"


rows, peaks = [], []


def row(case, tool, result, seconds, peak, target=""):
    rows.append(f"| {case} | {tool} | {result} | {seconds} | {peak:.0f} MiB | {target} |")
    peaks.append(peak)


# (a) certify --budget 0 vs the per-sample linear relaxation
if ran("a.ballast"):
    text, wall, peak, s = ballast("a.ballast")
    ref, sec, threads, pwall, rpeak = reference("a.crown")
    row("(a) 256×2, eps 0.02, `--budget 0`", "ballast certify", text, f"{wall:.1f} s", peak)
    c = ref["results"][0]
    ok = s is not None and wall <= 2 * sec and s["certified"] >= c["certified"]
    row("", "crown_reference.py", f"certified {c['certified']} of {c['correct']} correct",
        f"{sec:.2f} s ({threads} BLAS thr.; process {pwall:.1f} s)", rpeak,
        f"ballast {wall / sec:.2f}× the reference (≤ 2×, certify ≥): {verdict(ok)}")

# (b) attack vs batched PGD: each ballast schedule against the reference running the same schedule
# (older runs without b.ballast-untargeted compare the full schedule with both references)
if ran("b.ballast"):
    pairs = [("b.ballast", "ballast attack", (("b.pgd", "5×100 untargeted"), ("b.pgd-targeted", "+ FGSM + 9 targeted runs")))]
    if ran("b.ballast-untargeted"):
        pairs = [("b.ballast-untargeted", "ballast attack --untargeted-only", (("b.pgd", "5×100 untargeted"),)),
                 ("b.ballast", "ballast attack (full schedule)", (("b.pgd-targeted", "+ FGSM + 9 targeted runs"),))]
    for name_b, label_b, refs in pairs:
        wall, peak, rc = process(name_b)
        out = open(path(name_b + ".out")).read()
        found = re.search(r"counterexamples: (\d+)", out)
        found = int(found.group(1)) if found else None
        rows_b = set()
        if os.path.exists(path(name_b + ".csv")):
            rows_b = {int(r["sample"]) for r in csv.DictReader(open(path(name_b + ".csv")))}
        row("(b) 256×2, eps 0.02, PGD 100×5", label_b, f"found {found}{status(rc)}", f"{wall:.1f} s", peak)
        for name, label in refs:
            ref, sec, threads, pwall, rpeak = reference(name)
            same = "same rows" if set(ref["found_rows"]) == rows_b else "other rows"
            ok = found is not None and wall <= 0.5 * sec and found >= ref["found"]
            row("", f"pgd_batched_reference.py ({label})", f"found {ref['found']} ({same}), rejected {ref['rejected']}",
                f"{sec:.2f} s ({threads} BLAS thr.; process {pwall:.1f} s)", rpeak,
                f"ballast {wall / sec:.1f}× the reference (≤ 0.5×, found ≥): {verdict(ok)}")

# (c) with a budget
if ran("c2.ballast"):
    sweep = load("c.sweep.json")["results"]
    eps3 = float(open(path("c.eps.txt")).read().split()[2])
    text, wall, peak, s = ballast("c2.ballast")
    row("(c) 256×2, eps 0.02, `--budget 5`", "ballast certify", text, f"{wall:.1f} s", peak,
        f"no unresolved: {verdict(s is not None and s['unresolved'] == 0)}")
    text, wall, peak, s = ballast("c3.ballast")
    lin = next(e for e in sweep if e["epsilon"] == eps3)
    decided = (s["samples"] - s["unresolved"]) / s["samples"] if s else None
    row(f"(c) 256×3, eps {eps3}, `--budget 5`", "ballast certify", text, f"{wall:.1f} s", peak,
        f"decided {decided:.1%} of all rows (≥ 90%): {verdict(decided >= 0.9)}; unresolved {s['unresolved']} of the "
        f"{lin['open']} the linear relaxation leaves open" if s else f"unfinished: {verdict(False)}")
    row("", "crown_reference.py (eps choice)",
        f"certified {lin['certified']} of {lin['correct']}, open {lin['open']} "
        f"({lin['open'] / lin['correct']:.1%}) at eps {eps3}", f"{lin['seconds']:.2f} s", process("c.sweep")[1])

# (d) the hard instance vs HiGHS
if ran("d.ballast"):
    text, wall, peak, s = ballast("d.ballast")
    d = load("d.ballast.json")
    milp = load("d.milp.json")
    mwall, mpeak, mrc = process("d.milp")
    row(f"(d) 64-64-32-10, eps 0.06, 30 rows, `--budget {d['settings']['budget_seconds'] if d else '?'}`",
        "ballast certify", text, f"{wall:.1f} s", peak)
    if milp:
        run = milp["runs"][0]
        robust = run["robust"]
        statuses = [x["status"] for x in d["samples"]] if d else []
        equal = sum((st == "certified" and r) or (st == "counterexample" and not r) for st, r in zip(statuses, robust))
        wrong = sum((st == "certified" and not r) or (st == "counterexample" and r) for st, r in zip(statuses, robust))
        sec = run["milp_solve_seconds"]
        ok = d is not None and equal == 30 and wall * 30 <= sec
        row("", "milp_reference.py (scipy.optimize.milp)",
            f"robust {sum(robust)}/30, LP proves {sum(run['lp_proved'])}; ballast's verdicts equal on {equal}, "
            f"contradict on {wrong}", f"{sec:.1f} s MILP solves (process {mwall:.1f} s)", mpeak,
            f"ballast {sec / wall:.1f}× faster (≥ 30×, all 30 equal): {verdict(ok)}")
    else:
        row("", "milp_reference.py", f"no result (exit {mrc}){status(mrc)}", f"{mwall:.1f} s", mpeak)

print(open(path("machine.txt")).read().strip().replace("\n", "  \n"))
print()
print("| case | tool | result | time | peak RSS | target (issue 17) |")
print("|---|---|---|---|---|---|")
print("\n".join(rows))
print()
print(f"Peak memory over all runs: {max(peaks):.0f} MiB (target ≤ 1024 MiB): {verdict(max(peaks) <= 1024)}.")
