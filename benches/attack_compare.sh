#!/bin/sh
# Attack throughput, ballast vs the numpy reference PGD, in one run (from the project root):
#   sh benches/attack_compare.sh
# Both: digits MLP fixture, correctly classified samples among the first 100 test rows, L-inf eps 0.05,
# PGD 100 steps x 5 restarts, full budget (no early exit). Results go in docs/benchmarks/attack.md.
set -e
PYTHON=${PYTHON:-/work/venv/bin/python}
date -u
nproc
cargo bench --bench attack -- --noplot 2>&1 | grep -E "^pgd|thrpt|time:"
"$PYTHON" tests/reference/pgd_reference.py --benchmark --samples 100 --eps 0.05
