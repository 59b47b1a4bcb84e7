#!/usr/bin/env python3
"""Semi-real screening inputs from open datasets that ship inside the scikit-learn wheel
(no download): a labeled CSV and a pool CSV per dataset in weighbridge's input format, for
tests/validation_open_data.rs and examples/validation_table.rs.

For each dataset the rows are split three ways, seeded:
  * training rows, a uniform random subset: the prediction model is fit on these only, so
    that the model is separate from every labeled (calibration) row and every pool row
    (design.md 1, cautions);
  * pool rows, drawn from the remaining rows without replacement with probability
    proportional to exp(-SHIFT * z), z the standardized value of one named feature (a real,
    documented covariate shift: the pool leans toward small values of that feature, where
    interesting outcomes are rarer, as when the assayed set favoured promising compounds);
  * labeled rows: the rest.
The model's prediction `pred` is written for labeled and pool rows; the outcome `y` only for
labeled rows (pool outcomes go to a separate truth file, never read by the screen itself).
Feature columns are renamed f1..fk in the dataset's column order (the mapping is in
FEATURE_NAMES of the output README line and below).

Datasets:
  * diabetes (`sklearn.datasets.load_diabetes(scaled=False)`, 442 rows, 10 features: age,
    sex, bmi, bp, s1..s6; outcome: disease progression one year after baseline). Model:
    `LinearRegression()` on the training rows; pred = predicted progression. Threshold
    140.5, the median outcome of all 442 rows: "interesting" = progression above it. Pool
    shift along bmi (f3).
  * breast_cancer (`sklearn.datasets.load_breast_cancer()`, 569 rows, 30 features).
    Outcome y = 1 for malignant (scikit-learn's target 0), 0 for benign; "interesting" =
    malignant. Model: `make_pipeline(StandardScaler(), LogisticRegression(C=1.0))` (lbfgs)
    on the training rows; pred = predicted probability of malignant, rounded to 6 decimals.
    Threshold 0.5 with the clipped score (design.md 2.1, binary outcomes). Pool shift along
    mean radius (f1).

Usage:
    tests/scripts/.venv/bin/python tests/scripts/make_open_data.py [OUT_DIR]

OUT_DIR defaults to tests/data/open/. Writes <name>_labeled.csv, <name>_pool.csv and
<name>_pool_truth.csv per dataset. Deterministic: every draw comes from numpy's
default_rng(SEED + dataset index); the fits have no randomness.
"""

import csv
import sys
from pathlib import Path

import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

SEED = 20_261_205
SHIFT = 1.0
DEFAULT_OUT = Path(__file__).resolve().parent.parent / "data" / "open"


def fmt(x):
    """Shortest round-trip form of a float; integers without a trailing .0."""
    x = float(x)
    return str(int(x)) if x.is_integer() else repr(x)


def split(rng, z, n_train, n_pool):
    """Training rows uniform; pool rows weighted by exp(-SHIFT z) among the rest."""
    n = len(z)
    order = rng.permutation(n)
    train = np.sort(order[:n_train])
    rest = order[n_train:]
    p = np.exp(-SHIFT * z[rest])
    pool = np.sort(rng.choice(rest, size=n_pool, replace=False, p=p / p.sum()))
    labeled = np.sort(np.setdiff1d(rest, pool))
    return train, labeled, pool


def standardized(column):
    return (column - column.mean()) / column.std()


def diabetes(rng):
    data = load_diabetes(scaled=False)
    x, y = data.data, data.target.astype(float)
    train, labeled, pool = split(rng, standardized(x[:, 2]), n_train=142, n_pool=100)
    model = LinearRegression().fit(x[train], y[train])
    pred = np.round(model.predict(x), 4)
    return x, y, pred, labeled, pool, len(train), list(data.feature_names)


def breast_cancer(rng):
    data = load_breast_cancer()
    x, y = data.data, (data.target == 0).astype(float)
    train, labeled, pool = split(rng, standardized(x[:, 0]), n_train=169, n_pool=150)
    model = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=10_000))
    model.fit(x[train], y[train])
    pred = np.round(model.predict_proba(x)[:, 1], 6)
    return x, y, pred, labeled, pool, len(train), list(data.feature_names)


DATASETS = [("diabetes", diabetes), ("breast_cancer", breast_cancer)]


def write(path, header, rows):
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)


def main():
    out_dir = Path(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_OUT
    out_dir.mkdir(parents=True, exist_ok=True)
    for index, (name, make) in enumerate(DATASETS):
        rng = np.random.default_rng(SEED + index)
        x, y, pred, labeled, pool, n_train, names = make(rng)
        k = x.shape[1]
        features = [f"f{i + 1}" for i in range(k)]
        ident = lambda i: f"{name}-{i:03d}"  # row index in the scikit-learn dataset
        write(
            out_dir / f"{name}_labeled.csv",
            ["id", "y", "pred", *features],
            [[ident(i), fmt(y[i]), fmt(pred[i]), *map(fmt, x[i])] for i in labeled],
        )
        write(
            out_dir / f"{name}_pool.csv",
            ["id", "pred", *features],
            [[ident(i), fmt(pred[i]), *map(fmt, x[i])] for i in pool],
        )
        write(
            out_dir / f"{name}_pool_truth.csv",
            ["id", "y"],
            [[ident(i), fmt(y[i])] for i in pool],
        )
        mapping = ", ".join(f"{f}={n}" for f, n in zip(features, names))
        print(
            f"{name}: scikit-learn {sklearn.__version__}, numpy {np.__version__}, seed "
            f"{SEED + index}: {n_train} training, {len(labeled)} labeled, {len(pool)} pool "
            f"rows; {mapping}"
        )


if __name__ == "__main__":
    main()
