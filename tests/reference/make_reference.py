#!/usr/bin/env python3
"""Reference Clopper-Pearson limits for tests/stats_reference.rs.

Run once by hand (CI does not rerun it; the committed JSON is the reference):

    pip install scipy statsmodels
    python3 tests/reference/make_reference.py > tests/reference/clopper_pearson.json

Two computations are recorded for every case and must agree with each other:
* scipy.stats.beta.ppf / beta.isf (lower limit Beta(k, n-k+1) quantile at a, upper limit the
  inverse survival function of Beta(k+1, n-k) at a; a = d/2 two-sided, a = d one-sided);
* statsmodels.stats.proportion.proportion_confint(method="beta") for the two-sided cases
  (one-sided cases: proportion_confint at alpha = 2d, whose tails are d each). statsmodels
  calls scipy underneath, so this checks the tail conventions, not scipy's numerics.
"""

import json
import sys

import scipy
import statsmodels
from scipy.stats import beta
from statsmodels.stats.proportion import proportion_confint

NS = [1, 2, 7, 100, 1000, 12345, 100000, 1000000]
DS = [0.05, 1e-3, 1e-6, 1e-9, 1e-12]


def ks_for(n):
    ks = {0, 1, 2, n // 10, n // 2, n - 1, n, 3 * n // 1000}
    return sorted(k for k in ks if 0 <= k <= n)


def limits(n, k, a):
    lower = 0.0 if k == 0 else float(beta.ppf(a, k, n - k + 1))
    upper = 1.0 if k == n else float(beta.isf(a, k + 1, n - k))
    return lower, upper


def main():
    cases = []
    for n in NS:
        for k in ks_for(n):
            for d in DS:
                for sides, a, sm_alpha in (("two", d / 2, d), ("one", d, 2 * d)):
                    lower, upper = limits(n, k, a)
                    sm_lo, sm_hi = proportion_confint(k, n, alpha=sm_alpha, method="beta")
                    cases.append(
                        {
                            "n": n,
                            "k": k,
                            "d": d,
                            "sides": sides,
                            "lower": lower,
                            "upper": upper,
                            "statsmodels_lower": float(sm_lo),
                            "statsmodels_upper": float(sm_hi),
                        }
                    )
    out = {
        "source": "scipy.stats.beta ppf/isf and statsmodels proportion_confint(method='beta')",
        "scipy": scipy.__version__,
        "statsmodels": statsmodels.__version__,
        "python": sys.version.split()[0],
        "note": "sides 'one': lower is the one-sided lower bound at d, upper the one-sided upper bound at d",
        "cases": cases,
    }
    json.dump(out, sys.stdout, indent=1)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
