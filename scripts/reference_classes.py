"""Writes tests/reference/classes_sklearn.json: per-class errors, balanced error, AUC and
per-class Clopper-Pearson limits on scikit-learn's bundled breast-cancer table, for
tests/class_metrics_reference.rs.

Run with the bench venv (scikit-learn 1.9.1, scipy 1.17.1, numpy):
    target/bench-venv/bin/python scripts/reference_classes.py
The Clopper-Pearson limits are scipy's beta.ppf in the form statsmodels'
proportion_confint(method="beta") uses: lower = beta.ppf(a/2, k, n-k+1) (0 at k = 0),
upper = beta.ppf(1-a/2, k+1, n-k) (1 at k = n).
"""

import json
import math
import sys

import numpy as np
import scipy
import sklearn
from scipy.stats import beta
from sklearn.datasets import load_breast_cancer
from sklearn.metrics import balanced_accuracy_score, confusion_matrix, roc_auc_score


def cp(k, n, alpha):
    lo = 0.0 if k == 0 else float(beta.ppf(alpha / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1 - alpha / 2, k + 1, n - k))
    return lo, hi


def main(out):
    data = load_breast_cancer()
    y = data.target.astype(int)  # 0 = malignant, 1 = benign
    radius = data.data[:, list(data.feature_names).index("mean radius")]
    texture = data.data[:, list(data.feature_names).index("mean texture")]
    level = math.log(40.0)  # first query of a series schedule at delta 0.05
    predictors = {
        "radius_rule": np.where(radius > 15.0, 0, 1),
        "majority": np.ones_like(y),
    }
    cases = []
    for name, pred in predictors.items():
        cm = confusion_matrix(y, pred, labels=[0, 1])
        counts = cm.sum(axis=1)
        errors = counts - np.diag(cm)
        classes = len(counts)
        alpha = math.exp(-level) / classes
        cases.append({
            "name": name,
            "predictions": "".join(str(int(p)) for p in pred),
            "counts": [int(c) for c in counts],
            "errors": [int(e) for e in errors],
            "plain_error": float(np.mean(pred != y)),
            "balanced_error": float(1.0 - balanced_accuracy_score(y, pred)),
            "level_nats": level,
            "class_limits": [list(cp(int(e), int(c), alpha)) for e, c in zip(errors, counts)],
        })
    aucs = []
    for name, score in [("mean_radius", radius), ("mean_texture", texture)]:
        aucs.append({
            "name": name,
            "scores": [float(s) for s in score],
            "auc": float(roc_auc_score(y == 0, score)),
        })
    doc = {
        "source": f"scikit-learn {sklearn.__version__}, scipy {scipy.__version__}, numpy "
                  f"{np.__version__}; scripts/reference_classes.py",
        "labels": "".join(str(v) for v in y),
        "positive_class": "0",
        "cases": cases,
        "auc": aucs,
    }
    with open(out, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "tests/reference/classes_sklearn.json")
