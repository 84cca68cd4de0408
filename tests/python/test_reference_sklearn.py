"""Reference check on an open dataset that ships inside scikit-learn (no download).

Data: scikit-learn's bundled Wisconsin breast cancer table (`sklearn.datasets.load_breast_cancer`,
569 rows, 2 classes). A logistic regression is trained on part of it; 200 rows are split off as
the holdout and never seen by the model. The daemon must then agree with two outside references:

* its exact error (read as an auditor, History(exact=true)) equals 1 - sklearn.metrics.accuracy_score;
* its released interval for this first, non-adaptive query equals statsmodels'
  `proportion_confint(k, n, alpha=exp(-level_nats), method="beta")` (Clopper-Pearson).

The holdout releases `rounded:1/200` with n = 200 rows, so every rounding cell is one error count
and the worst case over the cell is the Clopper-Pearson interval of that count itself.

Checked with scikit-learn 1.9.1, statsmodels 0.15.0, scipy 1.17.1, numpy 2.4.6 (the versions in
use are printed in pytest's header by conftest.py).
"""

import math

import numpy as np
import pytest

import holdout_ledger as hl

# Imported outright (no importorskip): in CI a missing reference library must fail, not skip.
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import accuracy_score
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.proportion import proportion_confint

HOLDOUT_ROWS = 200
DELTA = 0.05


def test_daemon_error_and_interval_match_sklearn_and_statsmodels(daemon):
    data = load_breast_cancer()
    row_ids = np.array([f"bc-{i:03d}" for i in range(len(data.target))])
    x_train, x_hold, y_train, y_hold, _, ids_hold = train_test_split(
        data.data, data.target, row_ids, test_size=HOLDOUT_ROWS, random_state=11,
        stratify=data.target,
    )
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=2000))
    model.fit(x_train, y_train)
    predicted = model.predict(x_hold)
    n = len(y_hold)
    assert n == HOLDOUT_ROWS
    sk_error = 1.0 - accuracy_score(y_hold, predicted)
    k = int(np.sum(predicted != y_hold))
    assert 0 < k < n // 4, f"a degenerate model ({k} errors) would not exercise the interval"

    with hl.connect(daemon.url, daemon.admin) as custodian:
        info = custodian.create_holdout(
            "bc-holdout", y_hold, ids=ids_hold, metric="error", method="exact",
            classes=["0", "1"], delta=DELTA,
            schedule="series", answers=f"rounded:1/{n}", tolerance=0.5,
            description="scikit-learn breast cancer rows held out from training",
        )
    assert info.rows == n and info.targets[0].classes == ("0", "1")
    analyst = hl.connect(daemon.url, daemon.add_user("ref-analyst", "analyst"))
    auditor = hl.connect(daemon.url, daemon.add_user("ref-auditor", "auditor"))

    # numpy predictions with ids in the split's (shuffled) order.
    answer = analyst.submit("bc-holdout", predicted, ids=ids_hold, note="logistic regression")

    # Released score: the cell of k errors on a 1/n grid is k/n itself.
    assert answer.query == 1 and answer.score == pytest.approx(k / n, abs=1e-12)
    # Exact score as an auditor reads it.
    hist = auditor.history("bc-holdout", exact=True)
    (entry,) = [h for h in hist if h.kind == "answer"]
    assert len(entry.exact_scores) == 1
    exact = entry.exact_scores[0]
    assert exact == pytest.approx(sk_error, abs=1e-12), (exact, sk_error)
    assert round(exact * n) == k

    # First query, series schedule: delta_1 = delta / 2, no transcript cost yet.
    assert answer.delta_i == pytest.approx(DELTA / 2, rel=1e-12)
    assert answer.level_nats == pytest.approx(math.log(2 / DELTA), rel=1e-12)
    alpha = math.exp(-answer.level_nats)
    lo, hi = proportion_confint(k, n, alpha=alpha, method="beta")
    print(f"\nbreast cancer holdout: n={n} k={k} sklearn error={sk_error:.6f} daemon exact={exact:.6f}"
          f"\nlevel alpha={alpha:.6g}: daemon [{answer.interval.lower:.10f}, {answer.interval.upper:.10f}]"
          f" statsmodels beta [{lo:.10f}, {hi:.10f}]")
    assert answer.interval.lower == pytest.approx(lo, abs=1e-9)
    assert answer.interval.upper == pytest.approx(hi, abs=1e-9)
    # And it is not the interval at a neighbouring count (the comparison has teeth).
    lo2, hi2 = proportion_confint(k + 1, n, alpha=alpha, method="beta")
    assert abs(answer.interval.upper - hi2) > 1e-4
    analyst.close()
    auditor.close()
