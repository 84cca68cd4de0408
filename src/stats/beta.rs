//! The regularized incomplete beta function `I_x(a, b)` in log space, and its inversion.
//!
//! Clopper-Pearson limits at levels far below `f64::MIN_POSITIVE` need `ln I_x(a, b)`, never
//! `I_x` itself (which underflows). The prefactor `x^a y^b / B(a, b)` is evaluated with the
//! saddle-point decomposition used for binomial densities (Loader 2000: `stirlerr` and `bd0`),
//! which keeps full relative accuracy for `a + b` in the millions; the remaining factor is the
//! classical continued fraction (modified Lentz), which converges for `x < (a+1)/(a+b+2)`, with
//! the symmetry `I_x(a,b) = 1 - I_{1-x}(b,a)` on the other side.
//!
//! Points are carried as pairs `(x, 1-x)` so that whichever of the two is small keeps its full
//! relative precision (an upper limit of `1e-7` must not be computed as `1 - 0.9999999`).

use statrs::function::gamma::ln_gamma;

/// `ln(sqrt(2 pi))`.
const LN_SQRT_2PI: f64 = 0.918_938_533_204_672_8;
/// Iteration cap of the continued fraction; it needs about `sqrt(max(a, b))` terms at worst.
const CF_MAX_ITER: u32 = 200_000;
const CF_EPS: f64 = 1e-15;
const CF_TINY: f64 = 1e-300;

/// A point of (0, 1) held as `x` and `y = 1 - x`, the smaller of the two exact.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Point {
    pub(crate) x: f64,
    pub(crate) y: f64,
}

impl Point {
    /// The point whose `x` is `s`.
    pub(crate) fn from_x(s: f64) -> Point {
        Point { x: s, y: 1.0 - s }
    }

    /// The point whose `y` is `s`.
    pub(crate) fn from_y(s: f64) -> Point {
        Point { x: 1.0 - s, y: s }
    }
}

/// `ln(z!) - ln(sqrt(2 pi z) (z/e)^z)`, the error of Stirling's formula.
fn stirlerr(z: f64) -> f64 {
    if z > 15.0 {
        const S0: f64 = 1.0 / 12.0;
        const S1: f64 = 1.0 / 360.0;
        const S2: f64 = 1.0 / 1260.0;
        const S3: f64 = 1.0 / 1680.0;
        const S4: f64 = 1.0 / 1188.0;
        let z2 = z * z;
        (S0 - (S1 - (S2 - (S3 - S4 / z2) / z2) / z2) / z2) / z
    } else {
        ln_gamma(z + 1.0) - (z + 0.5) * z.ln() + z - LN_SQRT_2PI
    }
}

/// `x ln(x/m) + m - x`, accurate when `x` and `m` are close (series in `(x-m)/(x+m)`).
fn bd0(x: f64, m: f64) -> f64 {
    if (x - m).abs() < 0.1 * (x + m) {
        let v = (x - m) / (x + m);
        let v2 = v * v;
        let mut s = (x - m) * v;
        let mut ej = 2.0 * x * v;
        for j in 1..1000u32 {
            ej *= v2;
            let s1 = s + ej / f64::from(2 * j + 1);
            if s1 == s {
                return s1;
            }
            s = s1;
        }
        s
    } else {
        x * (x.ln() - m.ln()) + m - x
    }
}

/// `ln(x^a y^b / B(a, b))` for `a, b > 0` and a point strictly inside (0, 1).
fn ln_prefactor(a: f64, b: f64, p: Point) -> f64 {
    let c = a + b;
    -bd0(a, c * p.x) - bd0(b, c * p.y) + stirlerr(c) - stirlerr(a) - stirlerr(b)
        + 0.5 * (a.ln() + b.ln() - c.ln())
        - LN_SQRT_2PI
}

/// Continued fraction of `I_x(a, b)` (without the prefactor and the `1/a`), modified Lentz.
fn beta_cf(a: f64, b: f64, x: f64) -> Option<f64> {
    let fix = |v: f64| if v.abs() < CF_TINY { CF_TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / fix(1.0 - qab * x / qap);
    let mut h = d;
    for m in 1..=CF_MAX_ITER {
        let m = f64::from(m);
        let m2 = 2.0 * m;
        let aa = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 / fix(1.0 + aa * d);
        c = fix(1.0 + aa / c);
        h *= d * c;
        let aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 / fix(1.0 + aa * d);
        c = fix(1.0 + aa / c);
        let del = d * c;
        h *= del;
        if (del - 1.0).abs() < CF_EPS {
            return Some(h);
        }
    }
    None
}

/// `ln(1 - e^l)` for `l < 0`, accurate on both sides of `-ln 2`.
pub(crate) fn ln_one_minus_exp(l: f64) -> f64 {
    if l > -std::f64::consts::LN_2 {
        (-l.exp_m1()).ln()
    } else {
        (-l.exp()).ln_1p()
    }
}

/// Value and log-density of `ln I_x(a, b)`: returns `(ln I, ln(x^a y^b / B(a,b)))`.
///
/// `None` when the continued fraction does not converge (only for astronomically large `a + b`).
pub(crate) fn ln_beta_reg(a: f64, b: f64, p: Point) -> Option<(f64, f64)> {
    if p.x <= 0.0 {
        return Some((f64::NEG_INFINITY, f64::NEG_INFINITY));
    }
    if p.y <= 0.0 {
        return Some((0.0, f64::NEG_INFINITY));
    }
    let pre = ln_prefactor(a, b, p);
    if p.x < (a + 1.0) / (a + b + 2.0) {
        let cf = beta_cf(a, b, p.x)?;
        Some((pre + cf.ln() - a.ln(), pre))
    } else {
        let cf = beta_cf(b, a, p.y)?;
        let comp = pre + cf.ln() - b.ln();
        if comp >= 0.0 {
            return None;
        }
        Some((ln_one_minus_exp(comp), pre))
    }
}

/// The regularized incomplete beta in log space, `ln I_x(a, b)`, for `a, b > 0`, `x` in [0, 1].
///
/// ```
/// use holdout_ledger::stats::beta::ln_incomplete_beta;
/// // I_x(1, 1) = x.
/// assert!((ln_incomplete_beta(1.0, 1.0, 0.25).unwrap() - 0.25f64.ln()).abs() < 1e-14);
/// // I_x(3, 1) = x^3: far below f64 underflow it is still exact in log space.
/// let l = ln_incomplete_beta(3.0, 1.0, 1e-200).unwrap();
/// assert!((l - 3.0 * 1e-200f64.ln()).abs() < 1e-12);
/// ```
pub fn ln_incomplete_beta(a: f64, b: f64, x: f64) -> Option<f64> {
    ln_beta_reg(a, b, Point::from_x(x)).map(|v| v.0)
}

/// Solves `ln I_x(a, b) = target` (`target < 0`) and returns the root rounded towards smaller
/// `x`: the returned point satisfies `ln I_x(a, b) <= target` by our own evaluation.
///
/// `None` when the root lies below the normal range of f64 in `x` (callers fall back to a
/// containing interval), or when the evaluation fails.
pub(crate) fn solve_ln_beta_reg(a: f64, b: f64, target: f64) -> Option<Point> {
    let half = Point { x: 0.5, y: 0.5 };
    let (f_half, _) = ln_beta_reg(a, b, half)?;
    let u_min = f64::MIN_POSITIVE.ln();
    if f_half > target {
        // Root below x = 1/2: search s = x, increasing; keep the side with g <= 0.
        let g = |u: f64| {
            let p = Point::from_x(u.exp());
            let (f, pre) = ln_beta_reg(a, b, p)?;
            Some((f - target, (pre - p.y.ln() - f).exp()))
        };
        let (g_lo, _) = g(u_min)?;
        if g_lo > 0.0 {
            return None;
        }
        let (lo, _) = solve_increasing(g, u_min, half.x.ln())?;
        Some(Point::from_x(lo.exp()))
    } else {
        // Root at or above x = 1/2: search s = y; g = target - f increases with y; keep g >= 0.
        let g = |v: f64| {
            let p = Point::from_y(v.exp());
            let (f, pre) = ln_beta_reg(a, b, p)?;
            Some((target - f, (pre - p.x.ln() - f).exp()))
        };
        let (g_lo, _) = g(u_min)?;
        if g_lo >= 0.0 {
            return Some(Point::from_y(f64::MIN_POSITIVE));
        }
        let (_, hi) = solve_increasing(g, u_min, half.y.ln())?;
        Some(Point::from_y(hi.exp()))
    }
}

/// Safeguarded Newton on an increasing `g` with `g(lo) <= 0 <= g(hi)` (the caller has checked
/// both ends). `g` returns its value and derivative. Returns the final bracket `(lo, hi)`,
/// whose ends keep the signs above and are within about `1e-14` (relative to `u`) of each other.
pub(crate) fn solve_increasing<G>(mut g: G, mut lo: f64, mut hi: f64) -> Option<(f64, f64)>
where
    G: FnMut(f64) -> Option<(f64, f64)>,
{
    let mut u = hi;
    let (mut gu, mut du) = g(u)?;
    let mut slow = 0u32;
    for _ in 0..400 {
        let tol = 1e-14 * u.abs().max(1.0);
        let width = hi - lo;
        if width <= tol {
            return Some((lo, hi));
        }
        let step = gu / du;
        let mut cand = if step.is_finite() { u - step } else { f64::NAN };
        if step.is_finite() && step.abs() < 0.5 * tol {
            // Converged: step across the root by a hair to close the bracket.
            cand = if gu > 0.0 { u - tol } else { u + tol };
        }
        if !(cand > lo && cand < hi) || slow >= 2 {
            cand = 0.5 * (lo + hi);
            slow = 0;
        }
        let (gc, dc) = g(cand)?;
        if gc <= 0.0 {
            lo = cand;
        } else {
            hi = cand;
        }
        slow = if hi - lo > 0.5 * width { slow + 1 } else { 0 };
        // Newton from the newest point unless it made poor progress.
        u = cand;
        gu = gc;
        du = dc;
    }
    Some((lo, hi))
}
