#!/usr/bin/env python3
"""Reference values for tests/shift_reference.rs (the `shift` module).

Writes one JSON file with:
  * logistic: seeded labeled/pool feature tables (wildly different scales, one constant
    column) and scikit-learn LogisticRegression fits on StandardScaler'd features
    (C = 1/alpha, lbfgs, tol 1e-10, max_iter 100000), for several alphas, with and without
    class sample weights, and with squared features added (each expanded column
    standardized again on the fitting rows, as the Rust design does);
  * auc: scores with many ties, sklearn.metrics.roc_auc_score, and the DeLong variance from
    its O(n0 n1) definition (DeLong, DeLong & Clarke-Pearson 1988) in numpy;
  * khat: arviz.psislw(log_w, reff=1.0) Pareto k for fixed weight vectors (lognormal
    n = 2000, a heavy Pareto tail, short vectors with <= 4 tail values -> inf, ties);
  * smd: weighted/unweighted standardized mean differences by hand in numpy (Austin 2009
    formula; weighted variance with the reliability-weights factor S / (S^2 - sum w^2),
    Austin & Stuart 2015) and Kish ESS = (sum w)^2 / sum w^2.
Infinite values are written as null. Package versions and the seed are recorded.

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_shift_fixtures.py [OUT]

OUT defaults to tests/data/shift_reference.json. Deterministic for fixed package versions.
"""

import json
import sys
from pathlib import Path

import arviz as az
import numpy as np
import sklearn
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.preprocessing import StandardScaler

SEED = 20_261_203


def finite_or_none(v):
    v = float(v)
    return v if np.isfinite(v) else None


def standardize(a):
    return StandardScaler().fit_transform(a)


def logistic_cases(rng):
    n0, n1 = 300, 450
    names = ["scale_1", "scale_100", "tiny", "offset_1000", "flat"]
    lab = np.column_stack([
        rng.normal(0.0, 1.0, n0),
        rng.normal(0.0, 100.0, n0),
        rng.normal(0.0, 0.01, n0),
        rng.normal(1000.0, 5.0, n0),
        np.full(n0, 3.0),
    ])
    pool = np.column_stack([
        rng.normal(0.4, 1.2, n1),
        rng.normal(30.0, 100.0, n1),
        rng.normal(0.004, 0.01, n1),
        rng.normal(1001.0, 4.0, n1),
        np.full(n1, 3.0),
    ])
    x = np.vstack([lab, pool])
    y = np.r_[np.zeros(n0), np.ones(n1)]
    kept = x[:, :4]  # "flat" is constant and dropped
    z = standardize(kept)
    squares = standardize(z**2)
    cases = []
    for alpha, expansion, weighted in [
        (1.0, "none", False),
        (0.01, "none", False),
        (25.0, "none", False),
        (1.0, "none", True),
        (0.5, "squares", False),
    ]:
        design = z if expansion == "none" else np.column_stack([z, squares])
        sw = np.r_[np.full(n0, 2.5), np.full(n1, 1.0)] if weighted else None
        model = LogisticRegression(C=1.0 / alpha, tol=1e-10, max_iter=100_000, solver="lbfgs")
        model.fit(design, y, sample_weight=sw)
        cases.append({
            "alpha": alpha,
            "expansion": expansion,
            "labeled_sample_weight": 2.5 if weighted else 1.0,
            "pool_sample_weight": 1.0,
            "coefficients": [float(model.intercept_[0])] + [float(c) for c in model.coef_[0]],
            "auc_in_sample": float(roc_auc_score(y, model.decision_function(design))),
        })
    return {
        "names": names,
        "labeled_rows": n0,
        "pool_rows": n1,
        "labeled": lab.T.ravel().tolist(),  # column-major
        "pool": pool.T.ravel().tolist(),
        "cases": cases,
    }


def delong(scores, y):
    pos = scores[y == 1]
    neg = scores[y == 0]
    psi = (pos[:, None] > neg[None, :]) + 0.5 * (pos[:, None] == neg[None, :])
    v10 = psi.mean(axis=1)
    v01 = psi.mean(axis=0)
    return float(v10.mean()), float(v10.var(ddof=1) / len(pos) + v01.var(ddof=1) / len(neg))


def auc_cases(rng):
    out = []
    for n, decimals in [(60, 1), (400, 1), (1000, 2)]:
        y = (rng.random(n) < 0.4).astype(int)
        scores = np.round(rng.normal(0.0, 1.0, n) + 0.7 * y, decimals)
        auc, var = delong(scores, y)
        out.append({
            "scores": scores.tolist(),
            "positive": y.astype(bool).tolist(),
            "roc_auc_score": float(roc_auc_score(y, scores)),
            "delong_auc": auc,
            "delong_variance": var,
        })
    return out


def khat_cases(rng):
    vectors = {
        "lognormal_sigma1_n2000": rng.normal(0.0, 1.0, 2000),
        "lognormal_sigma2_n500": rng.normal(0.0, 2.0, 500),
        "pareto_shape_0.8_n1000": np.log(rng.pareto(0.8, 1000) + 1.0),
        "student_t3_n300": rng.standard_t(3, 300),
        "short_n20_tail4": rng.normal(0.0, 1.0, 20),
        "short_n7": rng.normal(0.0, 1.0, 7),
        "n30_tail6": rng.normal(0.0, 1.5, 30),
        "ties_n200": np.round(rng.normal(0.0, 1.0, 200), 1),
    }
    out = []
    for name, log_w in vectors.items():
        _, k = az.psislw(log_w.copy(), reff=1.0)
        out.append({"name": name, "log_weights": log_w.tolist(), "khat": finite_or_none(k)})
    return out


def weighted_stats(x, w):
    s, s2 = w.sum(), (w**2).sum()
    mean = (w * x).sum() / s
    var = s / (s * s - s2) * (w * (x - mean) ** 2).sum()
    return mean, var


def smd_cases(rng):
    out = []
    for n0, n1 in [(50, 80), (400, 300)]:
        lab = rng.normal(0.0, 1.0, n0)
        pool = rng.normal(0.5, 1.5, n1)
        w = np.exp(0.8 * lab) * rng.uniform(0.5, 1.5, n0)
        mp, vp = pool.mean(), pool.var(ddof=1)
        mu, vu = lab.mean(), lab.var(ddof=1)
        mw, vw = weighted_stats(lab, w)
        out.append({
            "labeled": lab.tolist(),
            "pool": pool.tolist(),
            "weights": w.tolist(),
            "smd_unweighted": float((mp - mu) / np.sqrt((vp + vu) / 2)),
            "smd_weighted": float((mp - mw) / np.sqrt((vp + vw) / 2)),
            "ess": float(w.sum() ** 2 / (w**2).sum()),
        })
    return out


def main():
    out_path = Path(sys.argv[1]) if len(sys.argv) > 1 else (
        Path(__file__).resolve().parent.parent / "data" / "shift_reference.json")
    rng = np.random.default_rng(SEED)
    data = {
        "made_by": "tests/scripts/make_shift_fixtures.py",
        "seed": SEED,
        "versions": {
            "numpy": np.__version__,
            "scikit-learn": sklearn.__version__,
            "arviz": az.__version__,
        },
        "logistic": logistic_cases(rng),
        "auc": auc_cases(rng),
        "khat": khat_cases(rng),
        "smd": smd_cases(rng),
    }
    out_path.write_text(json.dumps(data, indent=1, allow_nan=False) + "\n")


if __name__ == "__main__":
    main()
