"""Regression answers in the target's own units (``python3 -m unittest discover -s tests`` from
clients/python; loads ``types.py`` alone, so it runs without grpc or the generated stubs)."""

import importlib.util
import pathlib
import sys
import unittest
from fractions import Fraction

_path = pathlib.Path(__file__).resolve().parents[1] / "src" / "holdout_ledger" / "types.py"
_spec = importlib.util.spec_from_file_location("holdout_types", _path)
T = importlib.util.module_from_spec(_spec)
sys.modules["holdout_types"] = T
_spec.loader.exec_module(T)


class UnitsTest(unittest.TestCase):
    def test_bound_and_measure_come_from_the_metric(self):
        self.assertEqual(T.Target("y", "y", "abs_error:340", "kl", ()).bound, 340.0)
        self.assertEqual(T.Target("y", "y", "sq_error:2", "kl", ()).measure, "mean squared error")
        self.assertIsNone(T.Target("y", "y", "error", "exact", ("a", "b")).bound)
        self.assertEqual(T.Target("y", "y", "brier", "kl", ()).measure, "")

    def test_scaled_limits_are_converted_outward(self):
        for lo, hi, b in [(0.1, 0.3, 340.0), (0.123456789, 0.7, 3.3), (0.0, 1.0, 7.0)]:
            iv = T.Interval(lo, hi).scaled(b)
            self.assertLessEqual(Fraction(iv.lower), Fraction(lo) * Fraction(b))
            self.assertGreaterEqual(Fraction(iv.upper), Fraction(hi) * Fraction(b))
            self.assertAlmostEqual(iv.lower, lo * b)

    def test_views_fill_units_for_regression_targets_only(self):
        bounds = T._bounds([T.Target("mae", "y", "abs_error:340", "kl", ()),
                            T.Target("cls", "c", "error", "exact", ("a", "b"))])
        rows = (T.LeaderboardRow(1, "a", 0.13, T.Interval(0.1, 0.2), 1, 1, "", target="mae"),
                T.LeaderboardRow(1, "b", 0.2, T.Interval(0.15, 0.25), 1, 1, "", target="cls"))
        board = T._in_units(T.Leaderboard("h", "mae", rows, "", "", False, "best-per-team"), bounds)
        self.assertAlmostEqual(board.rows[0].best_units, 44.2)
        self.assertAlmostEqual(board.rows[0].units.upper, 68.0)
        self.assertIsNone(board.rows[1].units)
        cmp = T.Comparison(1, 2, T.Interval(-0.1, 0.05), 3.0, False, "mae")
        ranking = T._in_units(T.Ranking("h", "", "", (), (cmp,), "", ""), bounds)
        self.assertAlmostEqual(ranking.comparisons[0].units.lower, -34.0)


if __name__ == "__main__":
    unittest.main()
