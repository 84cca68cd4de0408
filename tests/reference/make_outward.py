#!/usr/bin/env python3
"""High-precision Clopper-Pearson limits for tests/stats_outward.rs (defect 6 of issue 10).

Run once by hand (CI does not rerun it; the committed JSON is the reference):

    pip install mpmath gmpy2      # values committed were made with mpmath 1.3.0
    python3 tests/reference/make_outward.py > tests/reference/outward_cp.json

Method (converges for every n, k and level): the binomial tail
    F(k; n, p) = P(X <= k),  X ~ Bin(n, p),
is a finite sum of positive terms. It is summed in mpmath at 60 significant digits from
j = k downwards (term ratio t_{j-1}/t_j = j q / ((n-j+1) p)), until the geometric bound on the
remaining terms is below 1e-55 of the partial sum; ln t_k comes from mpmath's loggamma. The
point p is carried as a logit s, so that both p and q = 1 - p keep full relative precision.
The upper limit U solves ln F(k; n, U) = -T; the lower limit L solves
ln P(X >= k; n, L) = ln F(n - k; n, 1 - L) = -T, with T = level + ln 2 for a two-sided interval
and T = level for a one-sided one. The root is found by Newton's method in s, safeguarded by a shrinking bracket (to 1e-45).
k = 0 upper and k = n lower also have closed forms, U = -expm1(-T/n) and L = exp(-T/n); both
are recorded and must agree with the sum.

Cross-check: for n <= 4000 the same tail is evaluated with mpmath.betainc (regularized
incomplete beta, I_q(n-k, k+1)) at every computed limit; the largest disagreement in ln F is
written to "meta". Every limit is also written rounded down and up to the neighbouring
doubles (exact directed rounding through fractions.Fraction), which is what the Rust test
compares against: an outward upper limit is >= "upper_up", an outward lower limit <= "lower_down".
"""

import json
import math
import sys
from fractions import Fraction

import mpmath
from mpmath import mp, mpf

mp.dps = 60

NS = [1, 2, 10, 1000, 4000, 100_000, 1_000_000, 100_000_000, 1_000_000_000]
LEVELS = [3.0, 10.0, 30.0, 300.0, 3000.0, 30000.0, 100000.0]
SIDES = ["two", "upper", "lower"]


def ks_for(n):
    ks = {0, 1, 2, 10, n // 100, n // 2, n - 1, n}
    return sorted(k for k in ks if 0 <= k <= n)


def pq(s):
    """p and q = 1 - p from the logit s, both to full relative precision."""
    return 1 / (1 + mp.exp(-s)), 1 / (1 + mp.exp(s))


def ln_cdf(n, k, p, q):
    """ln P(X <= k) for X ~ Bin(n, p), by the sum of binomial terms (see the module doc)."""
    return ln_cdf_and_slope(n, k, p, q)[0]


def ln_cdf_and_slope(n, k, p, q):
    """ln P(X <= k) and its derivative in the logit s: d ln F / ds = -(n - k) p / S, where
    S = F / t_k is the sum below (from dF/dp = -n P(Bin(n-1, p) = k))."""
    n, k = mpf(n), mpf(k)
    ln_tk = (mp.loggamma(n + 1) - mp.loggamma(k + 1) - mp.loggamma(n - k + 1)
             + (k * mp.log(p) if k > 0 else 0) + ((n - k) * mp.log(q) if n > k else 0))
    total = mpf(1)
    term = mpf(1)
    j = k
    tiny = mpf(10) ** -55
    while j >= 1:
        rho = j * q / ((n - j + 1) * p)
        term *= rho
        total += term
        j -= 1
        if rho < 1:
            # Every later ratio is smaller than rho: the rest is at most term * rho / (1 - rho).
            if term * rho / (1 - rho) < tiny * total:
                break
    return ln_tk + mp.log(total), -(n - k) * p / total


def newton(fd, s_lo, s_hi):
    """Root of a decreasing f in [s_lo, s_hi] by Newton's method kept inside a bracket that
    shrinks at every step (bisection when a step leaves it); fd returns (f, f')."""
    s = (s_lo + s_hi) / 2
    for _ in range(300):
        f, d = fd(s)
        if f > 0:
            s_lo = s
        else:
            s_hi = s
        step = f / d if d != 0 else None
        cand = s - step if step is not None else None
        if cand is None or not (s_lo < cand < s_hi):
            cand = (s_lo + s_hi) / 2
        if abs(cand - s) <= mpf(10) ** -45 * max(1, abs(s)) or s_hi - s_lo <= mpf(10) ** -45:
            return cand
        s = cand
    raise RuntimeError("no convergence")


def solve(f, s_lo, s_hi):
    """Root of a decreasing f in [s_lo, s_hi] (f(s_lo) > 0 > f(s_hi)) by bisection."""
    flo, fhi = f(s_lo), f(s_hi)
    assert flo > 0 > fhi, (s_lo, s_hi, flo, fhi)
    # Illinois (regula falsi) with bisection safeguard: converges for any continuous f.
    side = 0
    for _ in range(400):
        if s_hi - s_lo <= mpf(10) ** -40 * max(1, abs(s_lo)):
            break
        s = (s_lo * fhi - s_hi * flo) / (fhi - flo)
        if not (s_lo < s < s_hi):
            s = (s_lo + s_hi) / 2
        fs = f(s)
        if fs > 0:
            s_lo, flo = s, fs
            if side == 1:
                fhi /= 2
            side = 1
        else:
            s_hi, fhi = s, fs
            if side == -1:
                flo /= 2
            side = -1
    return (s_lo + s_hi) / 2


def kl_upper_logit(n, k, t):
    """Logit of the KL (Chernoff) upper limit, which is >= the Clopper-Pearson one."""
    r = mpf(k) / n
    if k == n:
        return None

    def g(s):
        p, q = pq(s)
        v = (r * mp.log(r / p) if k > 0 else 0) + (1 - r) * mp.log((1 - r) / q)
        return t / n - v

    lo = mp.log(r / (1 - r)) if k > 0 else mpf(-800)
    hi = lo + 1
    while g(hi) > 0:
        hi = lo + 2 * (hi - lo)
    return solve(g, lo, hi)


def upper_limit(n, k, t):
    """Logit of the exact upper limit: ln F(k; n, U) = -T."""
    f = lambda s: ln_cdf(n, k, *pq(s)) + t
    lo = mp.log(mpf(k) / (n - k)) if k > 0 else mpf(-2000)
    # For tiny levels the limit can lie below k/n; step down until F > e^-T.
    while f(lo) <= 0:
        lo -= 1
    hi = kl_upper_logit(n, k, t) + mpf(10) ** -30
    while f(hi) >= 0:
        hi += 1

    def fd(s):
        v, d = ln_cdf_and_slope(n, k, *pq(s))
        return v + t, d

    return newton(fd, lo, hi)


def to_fraction(x):
    man, exp = x.man, x.exp
    return Fraction(int(man)) * (Fraction(2) ** int(exp))


def directed(x):
    """Largest double <= x and smallest double >= x (x an mpf in [0, 1])."""
    fr = to_fraction(x)
    f = float(fr)
    if Fraction(f) > fr:
        down, up = math.nextafter(f, -math.inf), f
    elif Fraction(f) < fr:
        down, up = f, math.nextafter(f, math.inf)
    else:
        down = up = f
    return down, up


def one_minus(s_logit):
    """1 - p from a logit, exactly as an mpf at the working precision."""
    return pq(s_logit)[1]


def record(n, k, side, level):
    t = mpf(level) + (mp.log(2) if side == "two" else 0)
    out = {"n": n, "k": k, "sides": side, "level": level}
    check = {}
    if side in ("two", "upper"):
        if k == n:
            up = mpf(1)
        else:
            s = upper_limit(n, k, t)
            up = pq(s)[0]
            if n <= 4000:
                p, q = pq(s)
                check["upper"] = float(abs(mp.log(mp.betainc(n - k, k + 1, 0, q, regularized=True)) + t))
            if k == 0:
                closed = -mp.expm1(-t / n)
                check["upper_closed"] = float(abs(closed / up - 1))
        d, u = directed(up)
        out.update({"upper": mpmath.nstr(up, 30), "upper_down": d, "upper_up": u})
    if side in ("two", "lower"):
        if k == 0:
            lo = mpf(0)
        else:
            # P(X >= k; n, L) = P(Y <= n - k; n, 1 - L): the upper limit of Y's rate is 1 - L.
            s = upper_limit(n, n - k, t)
            lo = pq(s)[1]
            if n <= 4000:
                p, q = pq(s)
                check["lower"] = float(abs(mp.log(mp.betainc(k, n - k + 1, 0, q, regularized=True)) + t))
            if k == n:
                closed = mp.exp(-t / n)
                check["lower_closed"] = float(abs(closed / lo - 1))
        d, u = directed(lo)
        out.update({"lower": mpmath.nstr(lo, 30), "lower_down": d, "lower_up": u})
    return out, check


def main():
    cases = []
    for n in NS:
        for k in ks_for(n):
            for side in SIDES:
                for level in LEVELS:
                    cases.append((n, k, side, level))
    # The review's examples (issue 10, defect 6).
    cases += [(1, 0, "upper", 30.0), (1000, 10, "upper", 30000.0),
              (100_000_000, 1, "upper", 3.0), (100_000_000, 1, "two", 3.0)]
    seen, rows, worst = set(), [], {}
    for c in cases:
        if c in seen:
            continue
        seen.add(c)
        row, check = record(*c)
        rows.append(row)
        for key, v in check.items():
            worst[key] = max(worst.get(key, 0.0), v)
        print(f"{c}", file=sys.stderr, flush=True)
    meta = {
        "generator": "tests/reference/make_outward.py",
        "mpmath": mpmath.__version__,
        "digits": mp.dps,
        "method": "log-space sum of binomial terms, safeguarded Newton in the logit",
        "cross_check_max_abs_ln_tail_difference": worst,
    }
    json.dump({"meta": meta, "cases": rows}, sys.stdout, indent=1)
    print()


if __name__ == "__main__":
    main()
