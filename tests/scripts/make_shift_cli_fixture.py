#!/usr/bin/env python3
"""Reference values for tests/cli_shift.rs: what `weighbridge shift --features f1..f5`
should report on the README fixtures (fixtures/labeled.csv, fixtures/pool.csv), recomputed
with outside libraries.

Writes one JSON file with:
  * the domain classifier refit with scikit-learn: StandardScaler (population SD) on the
    300 labeled + 2000 pool rows, LogisticRegression(C = 1, lbfgs, tol 1e-12,
    max_iter 100000), label 0 = labeled, 1 = pool; its intercept and slopes, the linear
    predictor eta of every row, e(x) = sigmoid(eta), and the density-ratio weight
    w = (n / m) exp(eta) = (n / m) e / (1 - e) (design.md 2.5);
  * the AUC of eta in sample (sklearn.metrics.roc_auc_score) and 5-fold cross-validated
    (StratifiedKFold(5, shuffle=True, random_state=0) over a StandardScaler +
    LogisticRegression pipeline, pooled out-of-fold decision values);
  * Kish ESS (sum w)^2 / sum w^2 of the labeled weights (Kish 1965), numpy;
  * Pareto k-hat of the labeled weights: arviz.psislw(log w, reff=1.0);
  * SMD per feature, pool minus labeled (Austin 2009): unweighted with sample variances
    (ddof 1), weighted with numpy.average and numpy.cov(aweights=w) for the labeled side
    (numpy's aweights with ddof 1 is the reliability-weights variance of Austin & Stuart
    2015);
  * the number of pool rows with w_j / (W + w_j) > 0.1, W = sum of labeled weights
    (design.md 2.2).
No randomness beyond the fold split (random_state 0). Package versions are recorded.

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_shift_cli_fixture.py [OUT]

OUT defaults to tests/data/shift_cli_reference.json. Regenerate whenever fixtures/ change.
"""

import csv
import json
import sys
from pathlib import Path

import arviz as az
import numpy as np
import sklearn
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

ROOT = Path(__file__).resolve().parents[2]
FEATURES = ["f1", "f2", "f3", "f4", "f5"]
C = 1.0
FDR = 0.1


def read(path):
    with open(path, newline="") as handle:
        rows = list(csv.DictReader(handle))
    ids = [r["id"] for r in rows]
    x = np.array([[float(r[f]) for f in FEATURES] for r in rows])
    return ids, x


def classifier():
    return LogisticRegression(C=C, solver="lbfgs", tol=1e-12, max_iter=100_000)


def main():
    out = Path(sys.argv[1]) if len(sys.argv) > 1 else ROOT / "tests/data/shift_cli_reference.json"
    labeled_ids, xl = read(ROOT / "fixtures/labeled.csv")
    pool_ids, xp = read(ROOT / "fixtures/pool.csv")
    n, m = len(labeled_ids), len(pool_ids)
    x = np.vstack([xl, xp])
    y = np.r_[np.zeros(n), np.ones(m)]

    scaler = StandardScaler().fit(x)
    fit = classifier().fit(scaler.transform(x), y)
    eta = fit.decision_function(scaler.transform(x))
    e = 1.0 / (1.0 + np.exp(-eta))
    w = (n / m) * np.exp(eta)
    wl, wp = w[:n], w[n:]

    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    cv_eta = cross_val_predict(
        make_pipeline(StandardScaler(), classifier()), x, y, cv=folds, method="decision_function"
    )

    ess = wl.sum() ** 2 / (wl**2).sum()
    _, khat = az.psislw(np.log(wl), reff=1.0)

    balance = []
    for f, name in enumerate(FEATURES):
        lab, pool = xl[:, f], xp[:, f]
        pooled_unweighted = np.sqrt((pool.var(ddof=1) + lab.var(ddof=1)) / 2.0)
        weighted_mean = np.average(lab, weights=wl)
        weighted_var = float(np.cov(lab, aweights=wl))
        pooled_weighted = np.sqrt((pool.var(ddof=1) + weighted_var) / 2.0)
        balance.append(
            {
                "feature": name,
                "smd_unweighted": float((pool.mean() - lab.mean()) / pooled_unweighted),
                "smd_weighted": float((pool.mean() - weighted_mean) / pooled_weighted),
            }
        )

    total = wl.sum()
    unreachable = int(np.sum(wp / (total + wp) > FDR))

    result = {
        "made_by": "tests/scripts/make_shift_cli_fixture.py",
        "versions": {
            "python": sys.version.split()[0],
            "numpy": np.__version__,
            "scikit-learn": sklearn.__version__,
            "arviz": az.__version__,
        },
        "inputs": ["fixtures/labeled.csv", "fixtures/pool.csv"],
        "features": FEATURES,
        "C": C,
        "fdr": FDR,
        "n_labeled": n,
        "n_pool": m,
        "intercept": float(fit.intercept_[0]),
        "coefficients": [float(c) for c in fit.coef_[0]],
        "labeled_ids": labeled_ids,
        "pool_ids": pool_ids,
        "labeled_pool_probability": [float(v) for v in e[:n]],
        "pool_pool_probability": [float(v) for v in e[n:]],
        "labeled_weight": [float(v) for v in wl],
        "pool_weight": [float(v) for v in wp],
        "auc_in_sample": float(roc_auc_score(y, eta)),
        "auc_cross_validated": float(roc_auc_score(y, cv_eta)),
        "ess": float(ess),
        "khat": float(khat),
        "balance": balance,
        "unreachable_count": unreachable,
    }
    out.write_text(json.dumps(result) + "\n")


if __name__ == "__main__":
    main()
