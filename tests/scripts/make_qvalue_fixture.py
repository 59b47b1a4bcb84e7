#!/usr/bin/env python3
"""Reference p-values and q-values for the README example, for tests/cli_draw.rs.

Reads the README fixtures fixtures/labeled.csv and fixtures/pool.csv, computes with numpy
the conservative weighted conformal p-values of design.md 2.2 for the clipped score at
threshold 6.5 with the weights in column `w` (p_j = (sum_i w_i 1{V_i <= Vh_j} + w_j) /
(W + w_j), V_i = +inf when y_i > 6.5 else 6.5 - pred_i, Vh_j = 6.5 - pred_j), and adjusts
them with statsmodels.stats.multitest.multipletests, methods "fdr_bh" (the q-value) and
"fdr_by". Writes one CSV row per pool unit in input order: id, p_value, q_value_bh,
q_value_by (shortest round-trip floats via repr).

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_qvalue_fixture.py [OUT]

OUT defaults to tests/data/qvalue_statsmodels.csv. Deterministic (no randomness), so
.ci/run regenerates it twice into a temporary folder and diffs it with the committed file.
"""

import csv
import sys
from pathlib import Path

import numpy as np
from statsmodels.stats.multitest import multipletests

ROOT = Path(__file__).resolve().parent.parent.parent
DEFAULT_OUT = ROOT / "tests" / "data" / "qvalue_statsmodels.csv"
THRESHOLD = 6.5


def read(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def main():
    out = Path(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_OUT
    labeled = read(ROOT / "fixtures" / "labeled.csv")
    pool = read(ROOT / "fixtures" / "pool.csv")
    y = np.array([float(r["y"]) for r in labeled])
    mu = np.array([float(r["pred"]) for r in labeled])
    w = np.array([float(r["w"]) for r in labeled])
    scores = np.where(y > THRESHOLD, np.inf, THRESHOLD - mu)
    pool_scores = np.array([THRESHOLD - float(r["pred"]) for r in pool])
    pool_w = np.array([float(r["w"]) for r in pool])
    total = w.sum()
    below = (w[None, :] * (scores[None, :] <= pool_scores[:, None])).sum(axis=1)
    p = (below + pool_w) / (total + pool_w)
    q_bh = multipletests(p, method="fdr_bh")[1]
    q_by = multipletests(p, method="fdr_by")[1]
    out.parent.mkdir(parents=True, exist_ok=True)
    with open(out, "w", newline="") as f:
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(["id", "p_value", "q_value_bh", "q_value_by"])
        for r, pj, a, b in zip(pool, p, q_bh, q_by):
            writer.writerow([r["id"], repr(float(pj)), repr(float(a)), repr(float(b))])


if __name__ == "__main__":
    main()
