#!/usr/bin/env python3
"""Weighted conformal p-values computed directly from design.md 2.2 with numpy.

Writes two CSV files for tests/pvalue_validity.rs:

* tests/data/pvalue_labeled.csv: labeled scores (grid values with ties, about a quarter
  +inf as the clipped score gives outcomes above their threshold) and weights spanning six
  orders of magnitude (10^U(-3, 3)).
* tests/data/pvalue_pool.csv: pool scores (copies of labeled scores, ties within the pool,
  values below and above every finite labeled score), pool weights 10^U(-3, 3), a uniform
  draw u per unit, and from the formulas with plain masked sums (no sorting, no prefix sums):
    weight_below = sum_i w_i 1{V_i < Vh_j}
    weight_tied  = sum_i w_i 1{V_i = Vh_j}
    conservative = (sum_i w_i 1{V_i <= Vh_j} + w_j) / (W + w_j)
    randomized   = (weight_below + u_j (w_j + weight_tied)) / (W + w_j)
    conservative_unit_weights = (#{V_i <= Vh_j} + 1) / (n + 1)
Floats are written with repr() (shortest round-trip form; +inf as "inf").

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_pvalue_fixture.py [OUT_DIR]
"""

import csv
import sys
from pathlib import Path

import numpy as np

SEED = 20_261_203
N_LABELED = 80
N_POOL = 60

DEFAULT_OUT = Path(__file__).resolve().parent.parent / "data"


def main():
    out_dir = Path(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_OUT
    rng = np.random.default_rng(SEED)

    # Labeled: scores on a 0.25 grid (many ties), a quarter clipped to +inf.
    labeled_scores = rng.integers(-8, 9, size=N_LABELED) * 0.25
    labeled_scores[rng.random(N_LABELED) < 0.25] = np.inf
    labeled_weights = 10.0 ** rng.uniform(-3.0, 3.0, size=N_LABELED)
    finite = labeled_scores[np.isfinite(labeled_scores)]

    # Pool: a third copied from labeled finite scores (ties to labeled), a third on a finer
    # grid (ties within the pool, some off the labeled grid), the rest outside the range.
    pool_scores = np.empty(N_POOL)
    kind = rng.integers(0, 3, size=N_POOL)
    for j in range(N_POOL):
        if kind[j] == 0:
            pool_scores[j] = finite[rng.integers(0, len(finite))]
        elif kind[j] == 1:
            pool_scores[j] = rng.integers(-20, 21) * 0.125
        else:
            pool_scores[j] = rng.choice([-5.0, -2.5, 2.5, 7.0]) + rng.uniform(-0.1, 0.1)
    pool_weights = 10.0 ** rng.uniform(-3.0, 3.0, size=N_POOL)
    u = rng.uniform(size=N_POOL)

    total = labeled_weights.sum()
    rows = []
    for j in range(N_POOL):
        v, w = pool_scores[j], pool_weights[j]
        below = labeled_weights[labeled_scores < v].sum()
        tied = labeled_weights[labeled_scores == v].sum()
        at_or_below = labeled_weights[labeled_scores <= v].sum()
        conservative = (at_or_below + w) / (total + w)
        randomized = (below + u[j] * (w + tied)) / (total + w)
        unit = ((labeled_scores <= v).sum() + 1) / (N_LABELED + 1)
        rows.append([v, w, u[j], below, tied, conservative, randomized, unit])

    header = f"# made by tests/scripts/make_pvalue_fixture.py, numpy {np.__version__}, seed {SEED}"
    out_dir.mkdir(parents=True, exist_ok=True)
    with open(out_dir / "pvalue_labeled.csv", "w", newline="", encoding="utf-8") as f:
        f.write(header + "\n")
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(["score", "weight"])
        for v, w in zip(labeled_scores, labeled_weights):
            writer.writerow([repr(float(v)), repr(float(w))])
    with open(out_dir / "pvalue_pool.csv", "w", newline="", encoding="utf-8") as f:
        f.write(header + "\n")
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(["score", "weight", "u", "weight_below", "weight_tied",
                         "conservative", "randomized", "conservative_unit_weights"])
        for row in rows:
            writer.writerow([repr(float(x)) for x in row])
    print(f"wrote {out_dir}/pvalue_labeled.csv ({N_LABELED} rows), pvalue_pool.csv ({N_POOL} rows)")


if __name__ == "__main__":
    main()
