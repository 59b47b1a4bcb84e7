"""Reference fixture for src/shift/boosted.rs: tests/data/boosted_sklearn.json.

What it is: three covariate-shift cases (labeled set vs pool) drawn with numpy, written
into the JSON together with scikit-learn 1.6.1's cross-fitted HistGradientBoostingClassifier
results on them (out-of-fold log-odds and AUC), the true log density ratio of every row, and
the out-of-fold Spearman of a linear logistic regression with the truth (the contrast).
Read by tests/boosted_reference.rs. CI (.ci/run) regenerates this file twice and diffs
both runs against the committed copy, so the script must stay deterministic.

Usage: make_boosted_fixture.py OUTPUT.json
Packages: tests/scripts/requirements.txt (numpy 2.2.6, scipy 1.15.3, scikit-learn 1.6.1).
"""

import json
import os
import sys

# One thread: scikit-learn's histogram code is deterministic per thread count, this makes
# the run independent of the machine.
os.environ["OMP_NUM_THREADS"] = "1"

import numpy as np  # noqa: E402
import scipy  # noqa: E402
import sklearn  # noqa: E402
from scipy.stats import spearmanr  # noqa: E402
from sklearn.ensemble import HistGradientBoostingClassifier  # noqa: E402
from sklearn.linear_model import LogisticRegression  # noqa: E402
from sklearn.metrics import roc_auc_score  # noqa: E402
from sklearn.model_selection import StratifiedKFold  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

SEED = 20261210
CLIP = 1e-3
# Same settings as weighbridge's BoostedParams::default() (scikit-learn's defaults, with
# early stopping switched on explicitly).
HGB = dict(
    learning_rate=0.1,
    max_iter=100,
    max_leaf_nodes=31,
    min_samples_leaf=20,
    l2_regularization=0.0,
    max_bins=255,
    early_stopping=True,
    scoring="loss",
    validation_fraction=0.1,
    n_iter_no_change=10,
    tol=1e-7,
)
FOLD_SEEDS = [0, 1, 2, 3, 4]


def r12(v):
    """Round to 12 significant digits so the text does not depend on libm's last bits."""
    return float(f"{float(v):.12g}")


def variance_case(rng):
    """Labeled x0 ~ N(0, 1), pool x0 ~ N(0, 0.6^2); three N(0, 1) noise features."""
    n_lab, n_pool, sd = 2000, 2400, 0.6
    lab = rng.normal(size=(n_lab, 4))
    pool = rng.normal(size=(n_pool, 4))
    pool[:, 0] *= sd
    x = np.vstack([lab, pool])
    # log N(x0; 0, sd^2) - log N(x0; 0, 1)
    truth = -np.log(sd) - x[:, 0] ** 2 / (2 * sd**2) + x[:, 0] ** 2 / 2
    desc = "labeled x0 ~ N(0,1), pool x0 ~ N(0,0.6^2); x1..x3 ~ N(0,1) noise in both"
    return desc, x, n_lab, n_pool, truth


def band_case(rng):
    """Threshold (band) shift: labeled x0 ~ U(-2, 2); pool x0 from U(-0.5, 0.5) with
    probability 1/2, else U(-2, 2). The log ratio is a step: log 2.5 inside |x0| < 0.5,
    log 0.5 outside. Two N(0, 1) noise features."""
    n_lab, n_pool = 2000, 2000
    lab = np.column_stack([rng.uniform(-2, 2, n_lab), rng.normal(size=(n_lab, 2))])
    inner = rng.random(n_pool) < 0.5
    x0 = np.where(inner, rng.uniform(-0.5, 0.5, n_pool), rng.uniform(-2, 2, n_pool))
    pool = np.column_stack([x0, rng.normal(size=(n_pool, 2))])
    x = np.vstack([lab, pool])
    truth = np.where(np.abs(x[:, 0]) < 0.5, np.log(2.5), np.log(0.5))
    desc = "labeled x0 ~ U(-2,2); pool x0 ~ U(-0.5,0.5) w.p. 1/2 else U(-2,2); x1,x2 noise"
    return desc, x, n_lab, n_pool, truth


def interaction_case(rng):
    """Interaction shift: labeled (x0, x1) ~ N(0, I); pool (x0, x1) ~ N(0, [[1, r], [r, 1]])
    with r = 0.7, so the log ratio depends on x0 * x1 and both margins are the same. Two
    N(0, 1) noise features."""
    n_lab, n_pool, r = 2400, 2000, 0.7
    lab = rng.normal(size=(n_lab, 4))
    pool = rng.normal(size=(n_pool, 4))
    z = rng.normal(size=n_pool)
    pool[:, 1] = r * pool[:, 0] + np.sqrt(1 - r**2) * z
    x = np.vstack([lab, pool])
    a, b = x[:, 0], x[:, 1]
    truth = (
        -0.5 * np.log(1 - r**2)
        - (a**2 - 2 * r * a * b + b**2) / (2 * (1 - r**2))
        + (a**2 + b**2) / 2
    )
    desc = "labeled (x0,x1) ~ N(0,I); pool (x0,x1) ~ N(0,[[1,0.7],[0.7,1]]); x2,x3 noise"
    return desc, x, n_lab, n_pool, truth


def cross_fit(x, y, w, fold_seed, make):
    """Out-of-fold log-odds (clipped to logit(CLIP), logit(1 - CLIP)) over
    StratifiedKFold(5, shuffle=True, random_state=fold_seed), class sample weights."""
    lo = np.log(CLIP / (1 - CLIP))
    oof = np.zeros(len(y))
    iters = []
    folds = StratifiedKFold(5, shuffle=True, random_state=fold_seed)
    for train, test in folds.split(x, y):
        model, transform = make()
        model.fit(transform(x[train], train=True), y[train], sample_weight=w[train])
        oof[test] = model.decision_function(transform(x[test], train=False))
        # HistGradientBoosting: trees kept; LogisticRegression: lbfgs iterations.
        iters.append(int(np.max(model.n_iter_)))
    return np.clip(oof, lo, -lo), iters


def boosted(fold_seed):
    def make():
        model = HistGradientBoostingClassifier(random_state=fold_seed, **HGB)
        return model, lambda x, train: x

    return make


def linear():
    scaler = StandardScaler()

    def transform(x, train):
        return scaler.fit_transform(x) if train else scaler.transform(x)

    return LogisticRegression(C=1.0, max_iter=1000), transform


def main():
    out_path = sys.argv[1]
    rng = np.random.default_rng(SEED)
    cases = []
    for name, draw in [
        ("variance", variance_case),
        ("band", band_case),
        ("interaction", interaction_case),
    ]:
        desc, x, n_lab, n_pool, truth = draw(rng)
        y = np.r_[np.zeros(n_lab, dtype=bool), np.ones(n_pool, dtype=bool)]
        n = n_lab + n_pool
        # Class-balance weights: each class sums to n / 2.
        w = np.where(y, n / (2 * n_pool), n / (2 * n_lab))
        runs = [cross_fit(x, y, w, s, boosted(s)) for s in FOLD_SEEDS]
        main_oof, main_iters = runs[0]
        lin_oof, _ = cross_fit(x, y, w, FOLD_SEEDS[0], linear)
        aucs = [roc_auc_score(y, oof) for oof, _ in runs]
        cross_seed = [spearmanr(main_oof, oof)[0] for oof, _ in runs[1:]]
        cases.append(
            {
                "name": name,
                "description": desc,
                "rows": n,
                "features": x.shape[1],
                "labeled_rows": n_lab,
                "pool_rows": n_pool,
                "labeled_weight": r12(n / (2 * n_lab)),
                "pool_weight": r12(n / (2 * n_pool)),
                # Column-major: x[f][r].
                "x": [[r12(v) for v in x[:, f]] for f in range(x.shape[1])],
                "y": [bool(v) for v in y],
                "true_log_ratio": [r12(v) for v in truth],
                "sklearn_oof_log_odds": [r12(v) for v in main_oof],
                "sklearn_oof_auc": r12(aucs[0]),
                "sklearn_n_iter_per_fold": main_iters,
                "sklearn_spearman_truth": r12(spearmanr(main_oof, truth)[0]),
                "sklearn_oof_auc_over_fold_seeds": [r12(a) for a in aucs],
                "sklearn_spearman_between_fold_seeds": [r12(s) for s in cross_seed],
                "linear_oof_auc": r12(roc_auc_score(y, lin_oof)),
                "linear_spearman_truth": r12(spearmanr(lin_oof, truth)[0]),
            }
        )
    doc = {
        "source": "tests/scripts/make_boosted_fixture.py",
        "versions": {
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "scikit-learn": sklearn.__version__,
        },
        "seed": SEED,
        "fold_seeds": FOLD_SEEDS,
        "probability_clip": CLIP,
        "hist_gradient_boosting": HGB,
        "linear": "StandardScaler + LogisticRegression(C=1.0), same folds and class weights",
        "cases": cases,
    }
    with open(out_path, "w") as fh:
        json.dump(doc, fh, indent=1)
        fh.write("\n")
    for c in cases:
        print(
            c["name"],
            "auc",
            c["sklearn_oof_auc"],
            "auc over seeds",
            c["sklearn_oof_auc_over_fold_seeds"],
            "spearman truth",
            c["sklearn_spearman_truth"],
            "between seeds",
            c["sklearn_spearman_between_fold_seeds"],
            "linear",
            c["linear_spearman_truth"],
            "iters",
            c["sklearn_n_iter_per_fold"],
            file=sys.stderr,
        )


if __name__ == "__main__":
    main()
