"""Regression answers in the target's own units through the Python client: ``units`` (and
``score_units``, ``best_units``) on answers, history, leaderboard rows and a ranking, limits
converted outward; ``None`` for a classification target.

Invented data: 400 kiln firings with a temperature drift in degrees (abs_error:100).
"""

from fractions import Fraction

import pandas as pd
import pytest

import holdout_ledger as hl
from holdout_ledger import types as T

N = 400


def firings(prefix):
    ids = [f"{prefix}-{i:04d}" for i in range(N)]
    drift = [float((i * 37) % 90) + 5.0 for i in range(N)]
    return pd.DataFrame({"id": ids, "label": drift})


def off_by(labels, offset):
    return pd.DataFrame({"id": labels["id"], "prediction": labels["label"] + offset})


def test_scaled_limits_are_converted_outward():
    for lo, hi, b in [(0.1, 0.3, 340.0), (0.123456789, 0.7, 3.3), (0.0, 1.0, 7.0)]:
        iv = T.Interval(lo, hi).scaled(b)
        assert Fraction(iv.lower) <= Fraction(lo) * Fraction(b)
        assert Fraction(iv.upper) >= Fraction(hi) * Fraction(b)
        assert iv.lower == pytest.approx(lo * b)
    assert T.Target("y", "y", "abs_error:340", "kl", ()).bound == 340.0
    assert T.Target("y", "y", "sq_error:2", "kl", ()).measure == "mean squared error"
    assert T.Target("y", "y", "error", "exact", ("a", "b")).bound is None


def test_every_view_carries_the_units(daemon):
    labels = firings("firing")
    round_labels = firings("final")
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("kiln", labels, metric="abs_error:100", answers="rounded:0.01",
                             tolerance=0.3)
        admin.create_holdout("kiln-final", round_labels.assign(label=round_labels["label"] + 1),
                             metric="abs_error:100", answers="sealed:0.01", tolerance=0.3,
                             shares="roster:kiln,glaze")
    kiln = hl.connect(daemon.url, daemon.add_user("kiln-1", "analyst", team="kiln"))
    glaze = hl.connect(daemon.url, daemon.add_user("glaze-1", "analyst", team="glaze"))
    a = kiln.submit("kiln", off_by(labels, 30.0))
    assert a.score_units == pytest.approx(30.0)
    assert a.units.lower <= 30.0 <= a.units.upper
    assert Fraction(a.units.lower) <= Fraction(a.interval.lower) * 100
    [entry] = kiln.history("kiln")
    assert entry.answer.units == a.units
    board = kiln.leaderboard("kiln")
    assert board.rows[0].best_units == pytest.approx(30.0) and board.rows[0].units == a.units
    kiln.submit("kiln-final", off_by(round_labels, 31.0), final=True)
    glaze.submit("kiln-final", off_by(round_labels, 51.0), final=True)
    daemon.cli(daemon.admin, "close", "kiln-final", check=0)
    ranking = kiln.ranking("kiln-final")
    assert [round(e.score_units) for e in ranking.entries] == [30, 50]
    assert ranking.comparisons[0].units.upper < 0
    kiln.close()
    glaze.close()
