//! Inversion of the binary Kullback-Leibler divergence (the Chernoff bound of Hoeffding 1963).
//!
//! For independent losses in [0, 1] with empirical mean `p` over `n` rows, the true mean `q`
//! satisfies `P(kl(p || q) >= c, q > p) <= exp(-n c)`, and the same below. Solving
//! `kl(p || q) = ln(1/a) / n` on one side gives a one-sided limit at level `a`.
//!
//! The solve runs in the log of whichever of `q` and `1 - q` is small, so it stays exact at
//! thousands of nats. Results are rounded outwards by construction (the returned point keeps
//! `kl(p || q) >= c` by our own evaluation).

use super::beta::{Point, TailBound, UNIT, point_logs, solve_increasing, widen};

/// `kl(p || q)` with `q` held as a [`Point`]; `0 ln 0 = 0`.
fn kl(p: f64, q: Point) -> f64 {
    let term = |a: f64, b: f64| if a == 0.0 { 0.0 } else { a * (a.ln() - b.ln()) };
    term(p, q.x) + term(1.0 - p, q.y)
}

/// Upper limit: the largest `q >= p` with `kl(p || q) <= c`, returned as a point whose true
/// value is at least the exact root (so the limit is conservative). `p` in [0, 1], `c > 0`.
pub(crate) fn upper_point(p: f64, c: f64) -> Point {
    if p >= 1.0 {
        return Point { x: 1.0, y: 0.0 };
    }
    if p <= 0.0 {
        // kl(0 || q) = -ln(1 - q): closed form, q = 1 - e^{-c}.
        return Point {
            x: -(-c).exp_m1(),
            y: (-c).exp(),
        };
    }
    let u_min = f64::MIN_POSITIVE.ln();
    let half = Point { x: 0.5, y: 0.5 };
    if p < 0.5 && kl(p, half) > c {
        // Root in (p, 1/2): search ln q; g = kl - c increases; keep the end with g >= 0.
        let g = |u: f64| {
            let q = Point::from_x(u.exp());
            Some((kl(p, q) - c, (q.x - p) / q.y))
        };
        let (_, hi) = solve_increasing(g, p.ln(), half.x.ln()).unwrap_or((0.0, half.x.ln()));
        Point::from_x(hi.exp())
    } else {
        // Root in (max(p, 1/2), 1): search ln(1 - q); g = c - kl increases; keep g <= 0.
        let y_max = (1.0 - p).min(0.5);
        let g = |v: f64| {
            let q = Point::from_y(v.exp());
            Some((c - kl(p, q), (q.x - p) / q.x))
        };
        if c - kl(p, Point::from_y(f64::MIN_POSITIVE)) >= 0.0 {
            return Point { x: 1.0, y: 0.0 };
        }
        let (lo, _) = solve_increasing(g, u_min, y_max.ln()).unwrap_or((u_min, 0.0));
        Point::from_y(lo.exp())
    }
}

/// Upper KL limit for mean `p` at `c = ln(1/a)/n` nats per row.
pub(crate) fn upper(p: f64, c: f64) -> f64 {
    upper_point(p, c).x
}

/// Lower KL limit, by the symmetry `kl(p || q) = kl(1-p || 1-q)`.
pub(crate) fn lower(p: f64, c: f64) -> f64 {
    upper_point(1.0 - p, c).y
}

/// `kl(p || q)` with an absolute bound on its evaluation error. `p` may carry a relative error
/// of one unit (a ratio of counts such as `k / n`); `q`'s small coordinate is exact.
fn kl_bounded(p: f64, q: Point) -> (f64, f64) {
    let p1 = 1.0 - p;
    let (lp, lp1) = if p <= 0.5 {
        (p.ln(), (-p).ln_1p())
    } else {
        ((-p1).ln_1p(), p1.ln())
    };
    let (lqx, lqy) = point_logs(q);
    let term = |a: f64, la: f64, lb: f64| {
        if a == 0.0 {
            (0.0, 0.0)
        } else {
            let v = a * (la - lb);
            (
                v,
                4.0 * UNIT * a * (la.abs() + lb.abs() + 1.0) + UNIT * v.abs(),
            )
        }
    };
    let (t1, e1) = term(p, lp, lqx);
    let (t2, e2) = term(p1, lp1, lqy);
    let v = t1 + t2;
    // d kl / dp = ln(p/q) - ln((1-p)/(1-q)), times a relative error of one unit in p.
    let e_p = if p > 0.0 && p1 > 0.0 {
        UNIT * p * ((lp - lqx).abs() + (lp1 - lqy).abs())
    } else {
        0.0
    };
    (v, e1 + e2 + e_p + UNIT * (t1.abs() + t2.abs()))
}

/// Certified bound on the Chernoff tail `-n kl(p || q)` at `q = v`, which bounds
/// `ln P(mean <= p | q)` for `v >= p` (`up`) and `ln P(mean >= p | q)` for `v <= p`. On the
/// wrong side of `p` it certifies nothing (`+inf`).
pub(crate) fn chernoff_bound(p: f64, n: f64, v: f64, up: bool) -> TailBound {
    if (up && v < p) || (!up && v > p) {
        return TailBound {
            ln: f64::INFINITY,
            slope: 0.0,
        };
    }
    let q = Point::from_x(v);
    let (k, e) = kl_bounded(p, q);
    TailBound {
        ln: -(n * (k - e)) * (1.0 - 2.0 * UNIT),
        slope: -n * (v - p) / (q.x * q.y),
    }
}

/// Upper KL limit at mean `p` over `n` rows with tail `t` nats, moved outward until the
/// Chernoff bound is certified to be at most `e^-t` (core version 2).
pub(crate) fn upper_outward(p: f64, n: f64, t: f64) -> f64 {
    if p >= 1.0 {
        return 1.0;
    }
    let cand = upper(p, t / n);
    widen(cand, true, t, |v| Some(chernoff_bound(p, n, v, true))).unwrap_or(1.0)
}

/// Lower KL limit, outward as [`upper_outward`].
pub(crate) fn lower_outward(p: f64, n: f64, t: f64) -> f64 {
    if p <= 0.0 {
        return 0.0;
    }
    let cand = lower(p, t / n);
    widen(cand, false, t, |v| Some(chernoff_bound(p, n, v, false))).unwrap_or(0.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn roots_satisfy_the_equation() {
        for &p in &[0.0, 1e-6, 0.01, 0.3, 0.5, 0.7, 0.999, 1.0] {
            for &c in &[1e-4, 0.01, 0.3, 3.0, 50.0] {
                let (lo, hi) = (lower(p, c), upper(p, c));
                assert!(lo <= p && p <= hi, "p={p} c={c}: [{lo}, {hi}]");
                if hi < 1.0 {
                    let k = kl(p, Point::from_x(hi));
                    assert!((k - c).abs() <= 1e-9 * c.max(1.0), "p={p} c={c} k={k}");
                    assert!(k >= c * (1.0 - 1e-12));
                }
                if lo > 0.0 {
                    let k = kl(p, Point::from_x(lo));
                    assert!((k - c).abs() <= 1e-9 * c.max(1.0), "p={p} c={c} k={k}");
                }
            }
        }
    }

    #[test]
    fn small_means_keep_relative_precision() {
        // kl(0.001 || q) = 1e-3 has its root near 0.00314; solved without cancellation.
        let q = upper(0.001, 1e-3);
        assert!(q > 0.003 && q < 0.0033, "{q}");
        let k = kl(0.001, Point::from_x(q));
        assert!((k / 1e-3 - 1.0).abs() < 1e-10);
    }

    #[test]
    fn outward_limits_certify_the_chernoff_condition() {
        for &p in &[0.0, 1e-6, 0.01, 0.3, 0.5, 0.7, 0.999, 1.0] {
            for &(n, t) in &[(10.0, 3.0), (1000.0, 30.0), (1e6, 700.0), (4000.0, 3e4)] {
                let (lo, hi) = (lower_outward(p, n, t), upper_outward(p, n, t));
                assert!(
                    lo <= lower(p, t / n) && hi >= upper(p, t / n),
                    "p={p} n={n}"
                );
                if hi < 1.0 {
                    assert!(chernoff_bound(p, n, hi, true).ln <= -t, "p={p} n={n} t={t}");
                    // Not absurdly wider than the plain root.
                    assert!(hi - upper(p, t / n) <= 1e-9 * hi, "p={p} n={n} t={t}");
                }
                if lo > 0.0 {
                    assert!(
                        chernoff_bound(p, n, lo, false).ln <= -t,
                        "p={p} n={n} t={t}"
                    );
                    assert!(lower(p, t / n) - lo <= 1e-9 * lower(p, t / n));
                }
            }
        }
    }
}
