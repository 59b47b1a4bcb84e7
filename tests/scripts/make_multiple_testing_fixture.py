#!/usr/bin/env python3
"""Reference BH / BY results from statsmodels for tests/reference_multiple_testing.rs.

Runs statsmodels.stats.multitest.multipletests (methods "fdr_bh" and "fdr_by") on seeded
random p-value vectors (m = 1, 7, 50, 1000; exact ties, values equal to 0 and 1) and on the
15 p-values of Benjamini & Hochberg (1995), section 4, at q in LEVELS. Writes, per vector,
the p-values, the adjusted p-values of both methods and, per level, the indices each method
rejects. The package versions and the seed are recorded in the output.

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_multiple_testing_fixture.py [OUT]

OUT defaults to tests/data/multiple_testing_statsmodels.json. The output is deterministic
for fixed package versions, so .ci/run regenerates it into a temporary folder and diffs it
against the committed file.
"""

import json
import sys
from pathlib import Path

import numpy as np
import statsmodels
from statsmodels.stats.multitest import multipletests

SEED = 20_261_202
LEVELS = [0.05, 0.1, 0.2, 0.5, 1.0]
# A comparison p_(k) <= q k / m closer than this (relative) is a floating-point coin flip
# that different algebraic forms decide differently; no vector may contain one, so that
# selections can be compared exactly. Common practice.
BOUNDARY_GAP = 1e-9

DEFAULT_OUT = Path(__file__).resolve().parent.parent / "data" / "multiple_testing_statsmodels.json"

# Benjamini & Hochberg (1995), section 4 (values from memory).
BH1995 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
          0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def with_ties_and_edges(rng, p, ties, zeros, ones):
    """Copy some entries onto others (exact ties) and set a few to exactly 0 and 1."""
    p = p.copy()
    m = len(p)
    for _ in range(ties):
        a, b = rng.integers(0, m, size=2)
        p[b] = p[a]
    p[rng.choice(m, size=zeros, replace=False)] = 0.0
    p[rng.choice(m, size=ones, replace=False)] = 1.0
    return p


def signal_mixture(rng, m, share):
    """Uniform nulls plus a share of small p-values (Beta(0.1, 1)), so BH selects some."""
    p = rng.uniform(size=m)
    signals = rng.random(m) < share
    p[signals] = rng.beta(0.1, 1.0, size=signals.sum())
    return p


def vectors(rng):
    out = [("bh1995_section4", np.array(BH1995))]
    out.append(("m1_zero", np.array([0.0])))
    out.append(("m1_one", np.array([1.0])))
    out.append(("m1_small", np.array([0.03])))
    out.append(("m1_uniform", rng.uniform(size=1)))
    out.append(("m7_uniform", rng.uniform(size=7)))
    out.append(("m7_mixture_ties_edges",
                with_ties_and_edges(rng, signal_mixture(rng, 7, 0.5), ties=2, zeros=1, ones=1)))
    out.append(("m50_mixture", signal_mixture(rng, 50, 0.3)))
    out.append(("m50_mixture_ties_edges",
                with_ties_and_edges(rng, signal_mixture(rng, 50, 0.3), ties=8, zeros=2, ones=3)))
    out.append(("m50_all_equal", np.full(50, rng.uniform(0.001, 0.05))))
    out.append(("m1000_uniform", rng.uniform(size=1000)))
    out.append(("m1000_mixture_ties_edges",
                with_ties_and_edges(rng, signal_mixture(rng, 1000, 0.2), ties=100, zeros=5, ones=20)))
    return out


def near_boundary(p, q, factor):
    """True if some p_(k) is within BOUNDARY_GAP (relative) of q k / (factor m).

    The one exempt case is p_(m) = 1 at q = 1 (BH, k = m): the line is exactly 1 in every
    algebraic form, so every implementation rejects there.
    """
    m = len(p)
    line = q * np.arange(1, m + 1) / (factor * m)
    s = np.sort(p)
    close = np.abs(s - line) <= BOUNDARY_GAP * line
    if factor == 1.0 and q == 1.0 and s[-1] == 1.0:
        close[-1] = False
    return bool(np.any(close))


def main():
    out_path = Path(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_OUT
    rng = np.random.default_rng(SEED)
    cases = []
    for name, p in vectors(rng):
        m = len(p)
        harmonic = float(np.sum(1.0 / np.arange(1, m + 1)))
        _, adj_bh, _, _ = multipletests(p, alpha=0.05, method="fdr_bh")
        _, adj_by, _, _ = multipletests(p, alpha=0.05, method="fdr_by")
        levels = []
        for q in LEVELS:
            for factor in (1.0, harmonic):
                if near_boundary(p, q, factor):
                    raise SystemExit(f"{name}: a comparison sits on the BH line at q = {q}; "
                                     "change the seed")
            rej_bh, _, _, _ = multipletests(p, alpha=q, method="fdr_bh")
            rej_by, _, _, _ = multipletests(p, alpha=q, method="fdr_by")
            levels.append({
                "q": q,
                "bh_rejected": [int(i) for i in np.flatnonzero(rej_bh)],
                "by_rejected": [int(i) for i in np.flatnonzero(rej_by)],
            })
        cases.append({
            "name": name,
            "p": [float(x) for x in p],
            "bh_adjusted": [float(x) for x in adj_bh],
            "by_adjusted": [float(x) for x in adj_by],
            "levels": levels,
        })
    doc = {
        "made_by": "tests/scripts/make_multiple_testing_fixture.py",
        "reference": "statsmodels.stats.multitest.multipletests, methods fdr_bh and fdr_by",
        "statsmodels_version": statsmodels.__version__,
        "numpy_version": np.__version__,
        "seed": SEED,
        "cases": cases,
    }
    out_path.parent.mkdir(parents=True, exist_ok=True)
    # One line per vector keeps the file small and its diffs readable.
    header = {k: v for k, v in doc.items() if k != "cases"}
    lines = ["{"]
    lines += [f" {json.dumps(k)}: {json.dumps(v)}," for k, v in header.items()]
    lines.append(' "cases": [')
    lines.append(",\n".join("  " + json.dumps(case) for case in cases))
    lines.append(" ]")
    lines.append("}")
    with open(out_path, "w", encoding="utf-8") as f:
        f.write("\n".join(lines) + "\n")
    print(f"wrote {out_path}: {len(cases)} vectors x {len(LEVELS)} levels")


if __name__ == "__main__":
    main()
