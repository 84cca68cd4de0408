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
    bd0_with_ln(x, || x.ln(), m)
}

/// [`bd0`] with `ln x` supplied (only computed, by `ln_x`, when the series does not apply):
/// the same operations in the same order, so the same bits.
fn bd0_with_ln(x: f64, ln_x: impl FnOnce() -> f64, m: f64) -> f64 {
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
        x * (ln_x() - m.ln()) + m - x
    }
}

/// What [`ln_prefactor_with`] and [`ln_beta_reg_eval`] compute from `a` and `b` alone: the same
/// values, computed once per pair instead of at every point (a solve evaluates one pair at a
/// dozen points or more, and these logarithms were a fifth of an audit's work). The sums that
/// use them are still formed in the same order, so every result keeps its bits.
#[derive(Debug, Clone, Copy)]
struct PairConsts {
    a: u64,
    b: u64,
    ln_a: f64,
    ln_b: f64,
    /// `stirlerr(a + b)`, `stirlerr(a)`, `stirlerr(b)`.
    st_c: f64,
    st_a: f64,
    st_b: f64,
    /// `0.5 * (ln a + ln b - ln(a + b))`.
    half_logs: f64,
}

impl PairConsts {
    fn of(a: f64, b: f64) -> PairConsts {
        thread_local! {
            static LAST: std::cell::Cell<Option<PairConsts>> = const { std::cell::Cell::new(None) };
        }
        if let Some(k) = LAST.get()
            && k.a == a.to_bits()
            && k.b == b.to_bits()
        {
            return k;
        }
        let c = a + b;
        let (ln_a, ln_b) = (a.ln(), b.ln());
        let k = PairConsts {
            a: a.to_bits(),
            b: b.to_bits(),
            ln_a,
            ln_b,
            st_c: stirlerr(c),
            st_a: stirlerr(a),
            st_b: stirlerr(b),
            half_logs: 0.5 * (ln_a + ln_b - c.ln()),
        };
        LAST.set(Some(k));
        k
    }
}

/// `ln(x^a y^b / B(a, b))` for `a, b > 0` and a point strictly inside (0, 1), with the pair's
/// constants at hand.
fn ln_prefactor_with(a: f64, b: f64, p: Point, k: &PairConsts) -> f64 {
    let c = a + b;
    -bd0_with_ln(a, || k.ln_a, c * p.x) - bd0_with_ln(b, || k.ln_b, c * p.y) + k.st_c
        - k.st_a
        - k.st_b
        + k.half_logs
        - LN_SQRT_2PI
}

/// Continued fraction of `I_x(a, b)` (without the prefactor and the `1/a`), modified Lentz.
///
/// `y = 1 - x`. With `precise` (core version 2) the first denominator `1 - (a+b) x / (a+1)` is
/// formed as `(1 - b + (a+b) y) / (a+1)` when `x > 1/2`, which does not cancel when `x` is
/// near 1 (at n = 1e8, k = 1 the plain form lost 8 digits). Without it the numbers of core
/// version 1 are kept bit for bit.
fn beta_cf(a: f64, b: f64, x: f64, y: f64, precise: bool) -> Option<f64> {
    let fix = |v: f64| if v.abs() < CF_TINY { CF_TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let first = if precise && x > 0.5 {
        (1.0 - b + qab * y) / qap
    } else {
        1.0 - qab * x / qap
    };
    let mut c = 1.0;
    let mut d = 1.0 / fix(first);
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
    ln_beta_reg_with(a, b, p, false)
}

/// [`ln_beta_reg`], with the continued fraction formed without cancellation near `x = 1`
/// when `precise` (core version 2).
///
/// Remembered per thread by the exact bits of its arguments ([`memo`]): every inversion
/// starts its search from the same points (`x = 1/2`, the bottom of the normal range, the
/// first midpoints), whatever its level, so most evaluations repeat earlier ones exactly.
pub(crate) fn ln_beta_reg_with(a: f64, b: f64, p: Point, precise: bool) -> Option<(f64, f64)> {
    let key = memo::Key::new(a, b, p, precise);
    if let Some(v) = memo::get(&key) {
        return v;
    }
    let v = ln_beta_reg_eval(a, b, p, precise);
    memo::put(key, v);
    v
}

thread_local! {
    static EVALUATIONS: std::cell::Cell<u64> = const { std::cell::Cell::new(0) };
}

/// How many times this thread evaluated `ln I_x(a, b)` so far (not counting values taken
/// from the [`memo`]): lets tests compare the work of two searches.
pub fn evaluations() -> u64 {
    EVALUATIONS.get()
}

/// [`ln_beta_reg_with`] evaluated, never remembered.
fn ln_beta_reg_eval(a: f64, b: f64, p: Point, precise: bool) -> Option<(f64, f64)> {
    ln_beta_reg_eval_with(a, b, p, precise, &PairConsts::of(a, b))
}

/// [`ln_beta_reg_eval`] with the pair's constants at hand (a solve takes them once, not at
/// each of its points).
fn ln_beta_reg_eval_with(
    a: f64,
    b: f64,
    p: Point,
    precise: bool,
    k: &PairConsts,
) -> Option<(f64, f64)> {
    EVALUATIONS.set(EVALUATIONS.get() + 1);
    if p.x <= 0.0 {
        return Some((f64::NEG_INFINITY, f64::NEG_INFINITY));
    }
    if p.y <= 0.0 {
        return Some((0.0, f64::NEG_INFINITY));
    }
    let pre = ln_prefactor_with(a, b, p, k);
    if p.x < (a + 1.0) / (a + b + 2.0) {
        let cf = beta_cf(a, b, p.x, p.y, precise)?;
        Some((pre + cf.ln() - k.ln_a, pre))
    } else {
        let cf = beta_cf(b, a, p.y, p.x, precise)?;
        let comp = pre + cf.ln() - k.ln_b;
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
    solve_ln_beta_reg_with(a, b, target, false)
}

/// [`solve_ln_beta_reg`] with the choice of continued fraction of [`ln_beta_reg_with`].
///
/// Remembered per thread like the evaluations ([`memo`], a short list of the latest solves):
/// the widest cell of a grid asks for the lower limit at `k` and the upper limit at `n - k`,
/// which are the same root (`I_x(k, n - k + 1)`, read as `x` or as `1 - x`).
pub(crate) fn solve_ln_beta_reg_with(a: f64, b: f64, target: f64, precise: bool) -> Option<Point> {
    let key = memo::SolveKey::new(a, b, target, precise);
    if let Some(root) = memo::solved(&key) {
        return root;
    }
    let root = solve_ln_beta_reg_eval(a, b, target, precise);
    memo::remember_solve(key, root);
    root
}

/// The root of `ln I_x(a, b) = target` as [`solve_ln_beta_reg_with`] with `precise`, searched
/// from a guess of it (core version 3): the Wilson score limit of the same proportion
/// ([`root_guess`]); the search brackets the root by steps growing away from the guess, then
/// runs the same safeguarded Newton inside that bracket. It finds the same root to within the
/// search's tolerance (about `1e-14` relative) with a handful of evaluations instead of dozens
/// from the ends of the whole range, but not always to the same last bits, so holdouts of
/// core version 2 keep [`solve_ln_beta_reg_with`]. The outward limits certify whatever root
/// they are given, so their guarantee does not rest on the guess.
pub(crate) fn solve_ln_beta_reg_from(a: f64, b: f64, target: f64) -> Option<Point> {
    let key = memo::SolveKey::new(a, b, target, true).started();
    if let Some(root) = memo::solved(&key) {
        return root;
    }
    let root = solve_from_eval(a, b, target, root_guess(a, b, target), Search::Bracket);
    memo::remember_solve(key, root);
    root
}

/// A point near the root of `ln I_x(a, b) = target`, found by Newton's method from the same
/// guess as [`solve_ln_beta_reg_from`] (core version 4): the search stops as soon as a Newton
/// step is below [`NEWTON_STOP`] (in the logarithm of the coordinate, so relative) and returns the point that step leads to, without
/// evaluating it or closing a bracket around the root. Near a simple root Newton's error after
/// a step is of the order of the step squared, so the point is within about `1e-14` relative
/// of the root; the outward limits then certify it by the binomial tail sum and move it
/// outward as far as needed ([`widen`]), so their guarantee rests on that check, never on this
/// search. About three or four evaluations per root instead of seven to nine.
pub(crate) fn solve_ln_beta_reg_newton(a: f64, b: f64, target: f64) -> Option<Point> {
    let key = memo::SolveKey::new(a, b, target, true).newton();
    if let Some(root) = memo::solved(&key) {
        return root;
    }
    let root = solve_from_eval(a, b, target, root_guess(a, b, target), Search::Newton);
    memo::remember_solve(key, root);
    root
}

/// The size of a Newton step at which [`solve_ln_beta_reg_newton`] stops, in the logarithm
/// of the searched coordinate (so a relative size in the coordinate itself).
const NEWTON_STOP: f64 = 1e-8;

/// Newton's method on an increasing `g` with `g(lo) <= 0 < g(hi)`, from `start`: each
/// evaluation narrows the bracket; a Newton step is taken when it stays inside the bracket and
/// is at most half the step before it, a bisection of the bracket otherwise.
/// Returns the point of the first Newton step below [`NEWTON_STOP`] (not evaluated),
/// or the bracket's middle once the bracket itself is that narrow.
fn newton_loose<G>(mut g: G, mut lo: f64, mut hi: f64, start: f64) -> Option<f64>
where
    G: FnMut(f64, bool) -> Option<(f64, f64)>,
{
    let mut u = start;
    let (mut gu, mut du) = g(u, false)?;
    let mut before = f64::INFINITY;
    for _ in 0..400 {
        if gu <= 0.0 {
            lo = u;
        } else {
            hi = u;
        }
        let tol = NEWTON_STOP;
        let step = gu / du;
        let cand = u - step;
        let newton = step.is_finite() && cand > lo && cand < hi;
        if newton && step.abs() <= tol {
            return Some(cand);
        }
        if hi - lo <= tol {
            return Some(0.5 * (lo + hi));
        }
        let next = if newton && 2.0 * step.abs() <= before {
            cand
        } else {
            0.5 * (lo + hi)
        };
        before = (next - u).abs();
        u = next;
        (gu, du) = g(u, false)?;
    }
    Some(0.5 * (lo + hi))
}

/// A guess of the root `x` of `I_x(a, b) = e^target`, that is of the lower limit `x` with
/// `P(Bin(m, x) >= a) = e^target` for `m = a + b - 1`: the Wilson score limit at the
/// proportion `a / m` with `z^2 = 2t - ln(4 pi t)`, `t = -target` (the normal tail's
/// asymptotic inverse). Only the number of evaluations depends on it.
fn root_guess(a: f64, b: f64, target: f64) -> f64 {
    let m = (a + b - 1.0).max(1.0);
    let p = (a / m).clamp(0.0, 1.0);
    let t = (-target).max(1e-3);
    let z2 = (2.0 * t - (4.0 * std::f64::consts::PI * t).ln()).max(0.25);
    let centre = p + z2 / (2.0 * m);
    let spread = (z2 * (p * (1.0 - p) / m + z2 / (4.0 * m * m))).sqrt();
    ((centre - spread) / (1.0 + z2 / m)).clamp(0.0, 1.0)
}

/// How a search from a guess finds its root once it has the guess.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Search {
    /// Bracket the root by steps growing away from the guess, then Newton inside the bracket
    /// until it is closed (core version 3, [`bracket_and_solve`]).
    Bracket,
    /// Newton from the guess, stopped at the first small step (core version 4,
    /// [`newton_loose`]).
    Newton,
}

fn solve_from_eval(a: f64, b: f64, target: f64, guess: f64, search: Search) -> Option<Point> {
    let k = PairConsts::of(a, b);
    let half = Point { x: 0.5, y: 0.5 };
    let (f_half, _) = ln_beta_reg_with(a, b, half, true)?;
    let u_min = f64::MIN_POSITIVE.ln();
    let top = half.x.ln();
    if f_half > target {
        // Root below x = 1/2, searched in u = ln x (as the plain solve).
        let g = |u: f64, _: bool| {
            let p = Point::from_x(u.exp());
            let (f, pre) = ln_beta_reg_eval_with(a, b, p, true, &k)?;
            Some((f - target, (pre - p.y.ln() - f).exp()))
        };
        let (g_lo, _) = ln_beta_reg_with(a, b, Point::from_x(u_min.exp()), true)
            .map(|(f, _)| (f - target, 0.0))?;
        if g_lo > 0.0 {
            return None;
        }
        let start = guess.clamp(f64::MIN_POSITIVE, 0.5).ln().clamp(u_min, top);
        let lo = match search {
            Search::Bracket => bracket_and_solve(g, u_min, top, start)?.0,
            Search::Newton => newton_loose(g, u_min, top, start)?,
        };
        Some(Point::from_x(lo.exp()))
    } else {
        // Root at or above x = 1/2, searched in v = ln y.
        let g = |v: f64, _: bool| {
            let p = Point::from_y(v.exp());
            let (f, pre) = ln_beta_reg_eval_with(a, b, p, true, &k)?;
            Some((target - f, (pre - p.x.ln() - f).exp()))
        };
        let (g_lo, _) = ln_beta_reg_with(a, b, Point::from_y(u_min.exp()), true)
            .map(|(f, _)| (target - f, 0.0))?;
        if g_lo >= 0.0 {
            return Some(Point::from_y(f64::MIN_POSITIVE));
        }
        let start = (1.0 - guess)
            .clamp(f64::MIN_POSITIVE, 0.5)
            .ln()
            .clamp(u_min, top);
        let hi = match search {
            Search::Bracket => bracket_and_solve(g, u_min, top, start)?.1,
            Search::Newton => newton_loose(g, u_min, top, start)?,
        };
        Some(Point::from_y(hi.exp()))
    }
}

/// For an increasing `g` with `g(lo) <= 0 < g(hi)` (checked by the caller): brackets the root
/// from `start` by steps that grow fourfold (at most to `lo` and `hi` themselves), then
/// searches the bracket as [`solve_increasing`] does, from the bracket's end nearer the root.
fn bracket_and_solve<G>(mut g: G, lo: f64, hi: f64, start: f64) -> Option<(f64, f64)>
where
    G: FnMut(f64, bool) -> Option<(f64, f64)>,
{
    // A relative step of 1/64 in x (or y): the guesses are within a few per cent when the
    // counts are not tiny, and the growth finds the root in a few more steps when they are.
    let mut step = (1.0 / 64.0f64).max(1e-3 * start.abs());
    let (g0, d0) = g(start, false)?;
    let (mut a, mut b) = (lo, hi);
    let (mut ga, mut gb) = (None, None);
    if g0 <= 0.0 {
        a = start;
        ga = Some((g0, d0));
        loop {
            let u = (a + step).min(hi);
            if u >= hi {
                break;
            }
            let (gu, du) = g(u, false)?;
            if gu > 0.0 {
                b = u;
                gb = Some((gu, du));
                break;
            }
            a = u;
            ga = Some((gu, du));
            step *= 4.0;
        }
    } else {
        b = start;
        gb = Some((g0, d0));
        loop {
            let u = (b - step).max(lo);
            if u <= lo {
                break;
            }
            let (gu, du) = g(u, false)?;
            if gu <= 0.0 {
                a = u;
                ga = Some((gu, du));
                break;
            }
            b = u;
            gb = Some((gu, du));
            step *= 4.0;
        }
    }
    // Start Newton from the end whose value is known and nearer zero.
    let from = match (ga, gb) {
        (Some((gl, dl)), Some((gh, dh))) => {
            if gl.abs() < gh.abs() {
                (a, gl, dl)
            } else {
                (b, gh, dh)
            }
        }
        (Some((gl, dl)), None) => (a, gl, dl),
        (None, Some((gh, dh))) => (b, gh, dh),
        (None, None) => {
            let (gh, dh) = g(b, false)?;
            (b, gh, dh)
        }
    };
    newton_tight(g, a, b, from)
}

/// Newton inside a bracket `[lo, hi]` of an increasing `g`, from `u` with known `(gu, du)`:
/// a Newton step is taken when it stays inside the bracket and at least halves the step
/// before it (converging as Newton does near a simple root), a bisection otherwise; once a
/// step is below the tolerance, a step of the tolerance across the root closes the bracket.
/// Returns the final bracket as [`solve_increasing`] does.
fn newton_tight<G>(
    mut g: G,
    mut lo: f64,
    mut hi: f64,
    (mut u, mut gu, mut du): (f64, f64, f64),
) -> Option<(f64, f64)>
where
    G: FnMut(f64, bool) -> Option<(f64, f64)>,
{
    let mut before = hi - lo;
    for _ in 0..400 {
        let tol = 1e-14 * u.abs().max(1.0);
        if hi - lo <= tol {
            return Some((lo, hi));
        }
        let step = gu / du;
        let mut cand = if step.is_finite() { u - step } else { f64::NAN };
        let close = step.is_finite() && step.abs() < 0.5 * tol;
        if close {
            cand = if gu > 0.0 { u - tol } else { u + tol };
        }
        if !(cand > lo && cand < hi) || (!close && 2.0 * step.abs() > before.abs()) {
            cand = 0.5 * (lo + hi);
        }
        before = cand - u;
        let (gc, dc) = g(cand, false)?;
        if gc <= 0.0 {
            lo = cand;
        } else {
            hi = cand;
        }
        u = cand;
        gu = gc;
        du = dc;
    }
    Some((lo, hi))
}

/// [`solve_ln_beta_reg_with`] computed, never remembered.
///
/// The search's start points and bisection midpoints go through the memo (they do not depend
/// on `target`, so solves at other levels meet them again); its Newton steps land on points
/// that depend on `target` and are evaluated without a look in the memo, which they never hit.
/// Both routes give the same bits, so the root is the same either way.
fn solve_ln_beta_reg_eval(a: f64, b: f64, target: f64, precise: bool) -> Option<Point> {
    let k = PairConsts::of(a, b);
    let ln_beta_reg = |a, b, p, remember: bool| {
        if remember {
            ln_beta_reg_with(a, b, p, precise)
        } else {
            ln_beta_reg_eval_with(a, b, p, precise, &k)
        }
    };
    let half = Point { x: 0.5, y: 0.5 };
    let (f_half, _) = ln_beta_reg(a, b, half, true)?;
    let u_min = f64::MIN_POSITIVE.ln();
    if f_half > target {
        // Root below x = 1/2: search s = x, increasing; keep the side with g <= 0.
        let g = |u: f64, remember: bool| {
            let p = Point::from_x(u.exp());
            let (f, pre) = ln_beta_reg(a, b, p, remember)?;
            Some((f - target, (pre - p.y.ln() - f).exp()))
        };
        let (g_lo, _) = g(u_min, true)?;
        if g_lo > 0.0 {
            return None;
        }
        let (lo, _) = solve_increasing_marked(g, u_min, half.x.ln())?;
        Some(Point::from_x(lo.exp()))
    } else {
        // Root at or above x = 1/2: search s = y; g = target - f increases with y; keep g >= 0.
        let g = |v: f64, remember: bool| {
            let p = Point::from_y(v.exp());
            let (f, pre) = ln_beta_reg(a, b, p, remember)?;
            Some((target - f, (pre - p.x.ln() - f).exp()))
        };
        let (g_lo, _) = g(u_min, true)?;
        if g_lo >= 0.0 {
            return Some(Point::from_y(f64::MIN_POSITIVE));
        }
        let (_, hi) = solve_increasing_marked(g, u_min, half.y.ln())?;
        Some(Point::from_y(hi.exp()))
    }
}

/// Safeguarded Newton on an increasing `g` with `g(lo) <= 0 <= g(hi)` (the caller has checked
/// both ends). `g` returns its value and derivative. Returns the final bracket `(lo, hi)`,
/// whose ends keep the signs above and are within about `1e-14` (relative to `u`) of each other.
pub(crate) fn solve_increasing<G>(mut g: G, lo: f64, hi: f64) -> Option<(f64, f64)>
where
    G: FnMut(f64) -> Option<(f64, f64)>,
{
    solve_increasing_marked(|u, _| g(u), lo, hi)
}

/// [`solve_increasing`], telling `g` with each point whether it is a Newton step (`false`)
/// or a start point or bisection midpoint (`true`), which repeat between searches from the
/// same bracket. The points visited are the same.
fn solve_increasing_marked<G>(mut g: G, lo: f64, hi: f64) -> Option<(f64, f64)>
where
    G: FnMut(f64, bool) -> Option<(f64, f64)>,
{
    let (gu, du) = g(hi, true)?;
    newton_from(g, lo, hi, (hi, gu, du))
}

/// The search of [`solve_increasing_marked`] from the point `u` in `[lo, hi]`, whose value and
/// derivative `(gu, du)` are known.
fn newton_from<G>(
    mut g: G,
    mut lo: f64,
    mut hi: f64,
    (mut u, mut gu, mut du): (f64, f64, f64),
) -> Option<(f64, f64)>
where
    G: FnMut(f64, bool) -> Option<(f64, f64)>,
{
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
        let mut midpoint = false;
        if !(cand > lo && cand < hi) || slow >= 2 {
            cand = 0.5 * (lo + hi);
            slow = 0;
            midpoint = true;
        }
        let (gc, dc) = g(cand, midpoint)?;
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

pub mod memo {
    //! A per-thread memo of `ln I_x(a, b)` evaluations, keyed by the exact bits of `a`, `b`,
    //! the point `(x, 1 - x)` and the continued-fraction variant.
    //!
    //! The evaluation is a pure function of those bits, so a remembered value is the value:
    //! results are bit for bit those of an uncached evaluation (`tests/stats_memo.rs` checks
    //! intervals both ways). Each inversion of a Beta limit starts its search from points that
    //! do not depend on the level (`x = 1/2`, the bottom of the normal range, the first
    //! bisection midpoints), so an audit replaying many answers at the same row counts meets
    //! the same evaluations again and again.
    //!
    //! Whole solves (the root of `ln I_x(a, b) = target`, a pure function of the bits of its
    //! arguments too) are remembered as well, the latest few: the widest cell of a grid needs
    //! each root twice (the lower limit at `k` and the upper limit at `n - k` are one root).
    //!
    //! The memo is per thread (no locks, nothing shared between the daemon's and the audit's
    //! threads) and bounded: 2-way sets, a new entry goes to the probation way and moves to
    //! the protected way when it is hit again, so the evaluations that recur are not pushed
    //! out by the one-off ones around each root.

    use super::Point;
    use std::cell::{Cell, RefCell};

    /// Sets (of two ways each): 4096 entries in all, about 300 KB per thread.
    const SETS: usize = 2048;

    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub(super) struct Key {
        a: u64,
        b: u64,
        x: u64,
        y: u64,
        precise: bool,
    }

    impl Key {
        pub(super) fn new(a: f64, b: f64, p: Point, precise: bool) -> Key {
            Key {
                a: a.to_bits(),
                b: b.to_bits(),
                x: p.x.to_bits(),
                y: p.y.to_bits(),
                precise,
            }
        }

        fn set(&self) -> usize {
            let h = self.a
                ^ self.b.rotate_left(17)
                ^ self.x.rotate_left(31)
                ^ self.y.rotate_left(47)
                ^ u64::from(self.precise);
            let h = (h ^ (h >> 29)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
            (h >> 40) as usize % SETS
        }
    }

    type Value = Option<(f64, f64)>;
    type Way = Option<(Key, Value)>;

    /// Solves remembered: the latest few, searched in order (a solve costs thousands of
    /// evaluations' worth of work; a look through eight keys is nothing beside it).
    const SOLVES: usize = 8;

    /// The arguments of one solve, by their exact bits.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub(super) struct SolveKey {
        a: u64,
        b: u64,
        target: u64,
        precise: bool,
        /// How the root was searched: 0 from the ends (core version 2), 1 from a guess (core
        /// version 3), 2 by Newton from a guess (core version 4). Each gives a root of its own,
        /// not always the same bits.
        search: u8,
    }

    impl SolveKey {
        pub(super) fn new(a: f64, b: f64, target: f64, precise: bool) -> SolveKey {
            SolveKey {
                a: a.to_bits(),
                b: b.to_bits(),
                target: target.to_bits(),
                precise,
                search: 0,
            }
        }

        /// The key of the search from a guess with the same arguments. The guess itself is
        /// not part of the key: callers derive it from the arguments alone.
        pub(super) fn started(self) -> SolveKey {
            SolveKey { search: 1, ..self }
        }

        /// The key of the Newton search from a guess (core version 4) with the same arguments.
        pub(super) fn newton(self) -> SolveKey {
            SolveKey { search: 2, ..self }
        }
    }

    type Solve = Option<(SolveKey, Option<Point>)>;

    thread_local! {
        static TABLE: RefCell<Vec<[Way; 2]>> = const { RefCell::new(Vec::new()) };
        static ENABLED: Cell<bool> = const { Cell::new(true) };
        static HITS: Cell<u64> = const { Cell::new(0) };
        static MISSES: Cell<u64> = const { Cell::new(0) };
        static SOLVED: RefCell<([Solve; SOLVES], usize)> =
            const { RefCell::new(([None; SOLVES], 0)) };
        static SOLVE_HITS: Cell<u64> = const { Cell::new(0) };
    }

    /// A remembered solve of `key` (`Some(root)`, the root itself possibly `None`), if any.
    pub(super) fn solved(key: &SolveKey) -> Option<Option<Point>> {
        if !ENABLED.get() {
            return None;
        }
        let found = SOLVED.with_borrow(|(ring, _)| {
            ring.iter()
                .flatten()
                .find(|(k, _)| k == key)
                .map(|&(_, root)| root)
        });
        if found.is_some() {
            SOLVE_HITS.set(SOLVE_HITS.get() + 1);
        }
        found
    }

    /// Remembers a solve, replacing the oldest.
    pub(super) fn remember_solve(key: SolveKey, root: Option<Point>) {
        if !ENABLED.get() {
            return;
        }
        SOLVED.with_borrow_mut(|(ring, next)| {
            ring[*next] = Some((key, root));
            *next = (*next + 1) % SOLVES;
        });
    }

    /// How many solves this thread took from memory so far.
    pub fn solve_hits() -> u64 {
        SOLVE_HITS.get()
    }

    pub(super) fn get(key: &Key) -> Option<Value> {
        if !ENABLED.get() {
            return None;
        }
        let found = TABLE.with_borrow_mut(|t| {
            let set = t.get_mut(key.set())?;
            match set {
                [Some((k, v)), _] if k == key => Some(*v),
                [_, Some((k, v))] if k == key => {
                    let v = *v;
                    // Hit in probation: promote, demoting the protected entry.
                    set.swap(0, 1);
                    Some(v)
                }
                _ => None,
            }
        });
        match found {
            Some(_) => HITS.set(HITS.get() + 1),
            None => MISSES.set(MISSES.get() + 1),
        }
        found
    }

    pub(super) fn put(key: Key, value: Value) {
        if !ENABLED.get() {
            return;
        }
        TABLE.with_borrow_mut(|t| {
            if t.is_empty() {
                t.resize(SETS, [None, None]);
            }
            t[key.set()][1] = Some((key, value));
        });
    }

    /// Runs `f` on this thread with the memo switched off (`false`: every evaluation is made
    /// afresh and nothing is remembered) or on, then restores the previous setting. For tests
    /// and benchmarks that compare the two.
    pub fn with_memo<R>(enabled: bool, f: impl FnOnce() -> R) -> R {
        let before = ENABLED.replace(enabled);
        let out = f();
        ENABLED.set(before);
        out
    }

    /// `(hits, misses)` of this thread's memo so far: lets a test check that the cached path
    /// was really taken.
    pub fn counts() -> (u64, u64) {
        (HITS.get(), MISSES.get())
    }

    /// Forgets every remembered evaluation of this thread (counts are kept).
    pub fn clear() {
        TABLE.with_borrow_mut(|t| t.clear());
        SOLVED.with_borrow_mut(|(ring, next)| {
            *ring = [None; SOLVES];
            *next = 0;
        });
    }
}

// ---------------------------------------------------------------------------------------------
// Outward limits (core version 2): certified bounds on binomial tails, and the outward search.
//
// A limit is accepted only when a *certified* upper bound on its tail probability is at most
// the level: the computed value plus an absolute bound on every evaluation error. The tail is
// evaluated independently of the continued fraction above, as a finite sum of binomial terms
// (from the term at k towards 0, each term from the previous one by an exact ratio), whose
// rounding errors have a simple bound: about 8 ulps per term summed, plus the errors of one
// log-density (Loader's saddle-point form, whose parts are bounded one by one below).

/// Unit roundoff of f64 (half an ulp of 1).
pub(crate) const UNIT: f64 = f64::EPSILON / 2.0;

/// Largest row count whose counts are exact as f64 and whose sums the certified tail accepts.
const MAX_EXACT_COUNT: u64 = 1 << 52;

/// Cap on the terms of one certified tail sum (about `10 sqrt(n)` are needed at most for the
/// levels met in practice; `n = 1e9` at 3 nats takes about 1e5).
const MAX_TAIL_TERMS: u64 = 1 << 24;

/// `stirlerr(z)` for z = 1..=15, to 20 digits (mpmath 1.3.0 at 40 digits:
/// `loggamma(z+1) - (z+1/2) ln z + z - ln sqrt(2 pi)`); index 0 is unused.
#[allow(clippy::excessive_precision)] // the 20 digits round to the nearest double
const STIRLERR_SMALL: [f64; 16] = [
    0.0,
    0.081_061_466_795_327_258,
    0.041_340_695_955_409_294,
    0.027_677_925_684_998_339,
    0.020_790_672_103_765_093,
    0.016_644_691_189_821_192,
    0.013_876_128_823_070_748,
    0.011_896_709_945_891_770,
    0.010_411_265_261_972_096,
    0.009_255_462_182_712_733,
    0.008_330_563_433_362_871,
    0.007_573_675_487_951_841,
    0.006_942_840_107_209_530,
    0.006_408_994_188_004_207,
    0.005_951_370_112_758_848,
    0.005_554_733_551_962_801,
];

/// `stirlerr(z)` for a whole number `z >= 1`, with an absolute error bound.
fn stirlerr_bounded(z: f64) -> (f64, f64) {
    if z <= 15.0 {
        let v = STIRLERR_SMALL[z as usize];
        (v, 2.0 * UNIT * v)
    } else {
        // Stirling's series is alternating with a remainder below its first omitted term,
        // 691 / (360360 z^11) < 2.3e-16 for z > 15; five terms at a few roundings each.
        let v = stirlerr(z);
        (v, 2.3e-16 + 16.0 * UNIT * v.abs())
    }
}

/// `bd0(x, m)` with an absolute error bound; `m` may carry a relative error of `2 UNIT` (it is a
/// count times a probability), which moves `bd0` by at most `|1 - x/m| 2 UNIT m`.
fn bd0_bounded(x: f64, m: f64) -> (f64, f64) {
    let e_in = 2.0 * UNIT * (m - x).abs();
    if (x - m).abs() < 0.1 * (x + m) {
        // Series with ratio v^2 < 0.01: every term has a relative error of a few units and the
        // sum stops when a term no longer changes it.
        let v = bd0(x, m);
        let first = (x - m) * (x - m) / (x + m);
        (v, e_in + 32.0 * UNIT * (first + v.abs()))
    } else {
        let r = x / m;
        let lr = r.ln();
        let v = x * lr + (m - x);
        (
            v,
            e_in + 4.0 * UNIT * (x * (1.0 + lr.abs()) + m + x + v.abs()),
        )
    }
}

/// `(ln p, ln q)` of a point, each from its small coordinate (which the callers hold exactly);
/// absolute errors at most `2 UNIT |value|`.
pub(crate) fn point_logs(p: Point) -> (f64, f64) {
    if p.x <= p.y {
        (p.x.ln(), (-p.x).ln_1p())
    } else {
        ((-p.y).ln_1p(), p.y.ln())
    }
}

/// `ln P(X = k)` for `X ~ Bin(n, p)` with an absolute error bound (`0 <= k <= n`, `p` inside
/// (0, 1)). Loader's form: `stirlerr(n) - stirlerr(k) - stirlerr(n-k) - bd0(k, np)
/// - bd0(n-k, nq) + ln sqrt(n / (2 pi k (n-k)))`.
fn ln_dbinom_bounded(n: f64, k: f64, p: Point) -> (f64, f64) {
    let (lp, lq) = point_logs(p);
    if k == 0.0 {
        let v = n * lq;
        return (v, 4.0 * UNIT * v.abs());
    }
    if k == n {
        let v = n * lp;
        return (v, 4.0 * UNIT * v.abs());
    }
    let (sn, esn) = stirlerr_bounded(n);
    let (sk, esk) = stirlerr_bounded(k);
    let (snk, esnk) = stirlerr_bounded(n - k);
    let (b1, eb1) = bd0_bounded(k, n * p.x);
    let (b2, eb2) = bd0_bounded(n - k, n * p.y);
    let (ln_n, ln_k, ln_nk) = (n.ln(), k.ln(), (n - k).ln());
    let h = 0.5 * (ln_n - ln_k - ln_nk) - LN_SQRT_2PI;
    let eh = 2.0 * UNIT * (ln_n.abs() + ln_k.abs() + ln_nk.abs() + 1.0);
    let v = sn - sk - snk - b1 - b2 + h;
    let sum_abs = sn.abs() + sk.abs() + snk.abs() + b1.abs() + b2.abs() + h.abs();
    (v, esn + esk + esnk + eb1 + eb2 + eh + 6.0 * UNIT * sum_abs)
}

/// A certified bound on a log tail probability at a point, and its slope.
#[derive(Debug, Clone, Copy)]
pub(crate) struct TailBound {
    /// At least the true `ln` of the tail probability (computed value plus its error bound).
    pub(crate) ln: f64,
    /// Derivative of the log tail with respect to the point's coordinate (a Newton hint only).
    pub(crate) slope: f64,
}

/// Certified upper bound on `ln P(X <= k)`, `X ~ Bin(n, p)`, by the finite sum of binomial
/// terms from `j = k` down (see the section note). The slope is `d ln P / dp`.
///
/// `None` when `n > 2^52` or the sum would need more than [`MAX_TAIL_TERMS`] terms; callers
/// then use the Chernoff (KL) bound instead.
pub(crate) fn ln_binom_cdf_bound(n: u64, k: u64, p: Point) -> Option<TailBound> {
    if n > MAX_EXACT_COUNT || k > n {
        return None;
    }
    if k == n || p.x <= 0.0 {
        return Some(TailBound {
            ln: 0.0,
            slope: 0.0,
        });
    }
    if p.y <= 0.0 {
        return Some(TailBound {
            ln: f64::NEG_INFINITY,
            slope: 0.0,
        });
    }
    let (nf, kf) = (n as f64, k as f64);
    let (ln_tk, e_tk) = ln_dbinom_bounded(nf, kf, p);
    // Ratios t_{j-1} / t_j = j q / ((n-j+1) p), each with a relative error below 5 UNIT; they
    // increase with j, so after the term of j the rest is at most term * rho / (1 - rho).
    let q_over_p = p.y / p.x;
    let (mut term, mut sum, mut terms) = (1.0f64, 1.0f64, 0u64);
    let mut rest = 0.0f64;
    // Below the mean the terms first grow (ratios above 1): rescale by 2^-600 (exact) so that
    // they never overflow, and carry the scale in `ln_scale`.
    let mut ln_scale = 0.0f64;
    const SCALE: f64 = 2.409_919_865_102_884e-181; // 2^-600
    let mut j = k;
    while j >= 1 {
        let jf = j as f64;
        let rho = jf / (nf - jf + 1.0) * q_over_p;
        term *= rho;
        sum += term;
        terms += 1;
        j -= 1;
        if sum > 1e150 {
            term *= SCALE;
            sum *= SCALE;
            ln_scale += 600.0 * std::f64::consts::LN_2;
        }
        if !(term.is_finite() && sum.is_finite()) || terms > MAX_TAIL_TERMS {
            return None;
        }
        let rho_up = rho * (1.0 + 8.0 * UNIT);
        if j >= 1 && rho_up < 1.0 {
            let r = term * rho_up / (1.0 - rho_up);
            if r <= sum * f64::EPSILON {
                rest = r;
                break;
            }
        }
    }
    // Every term and the running sum carry at most 8 (terms + 1) UNIT of relative error.
    let rel = 8.0 * (terms as f64 + 2.0) * UNIT;
    let total = (sum + rest) * (1.0 + rel) * (1.0 + 2.0 * UNIT);
    let ln_s = total.ln() + ln_scale;
    let e_s = 2.0 * UNIT * ln_s.abs() + UNIT * ln_scale;
    let ln = ln_tk + ln_s;
    let err = e_tk + e_s + 2.0 * UNIT * (ln_tk.abs() + ln_s.abs());
    Some(TailBound {
        ln: ln + err,
        slope: -(nf - kf) / (p.y * sum) * (-ln_scale).exp(),
    })
}

/// Certified upper bound on `ln P(X <= k | p)` at an upper limit `u`, or on `ln P(X >= k | p)`
/// at a lower limit (`upper = false`), by the binomial sum; the slope is per unit of `u`.
pub(crate) fn cp_tail_bound(n: u64, k: u64, u: f64, upper: bool) -> Option<TailBound> {
    if upper {
        ln_binom_cdf_bound(n, k, Point::from_x(u))
    } else {
        // P(X >= k | L) = P(n - X <= n - k | 1 - L): the rate of n - X is 1 - L.
        ln_binom_cdf_bound(n, n - k, Point::from_y(u)).map(|b| TailBound {
            ln: b.ln,
            slope: -b.slope,
        })
    }
}

/// Moves a limit outward from `start` until `bound(v).ln <= -t`: `up` for an upper limit (the
/// tail bound falls as `v` grows), else a lower one. The search steps outward from a Newton
/// estimate of the distance, doubling the step until the check holds, then bisects between the
/// last failing and the first passing point. The end of [0, 1] in the outward direction always
/// holds (it is the trivial limit). `None` when an evaluation fails.
pub(crate) fn widen<B>(start: f64, up: bool, t: f64, bound: B) -> Option<f64>
where
    B: Fn(f64) -> Option<TailBound>,
{
    let end = if up { 1.0 } else { 0.0 };
    let mut fail = start.clamp(0.0, 1.0);
    if fail == end || t.is_nan() {
        return Some(end);
    }
    let b0 = bound(fail)?;
    if b0.ln <= -t {
        return Some(fail);
    }
    let outward = |v: f64, step: f64| -> f64 {
        let w = if up { v + step } else { v - step };
        let w = if up {
            w.max(v.next_up())
        } else {
            w.min(v.next_down())
        };
        w.clamp(0.0, 1.0)
    };
    // Newton's distance to the certified root, doubled; the floor keeps a flat slope moving.
    let newton = 2.0 * (b0.ln + t) / b0.slope.abs();
    let floor = 1e-15 * fail.max(1e-300);
    let mut step = if newton.is_finite() {
        newton.max(floor)
    } else {
        floor
    };
    let mut pass = end;
    let mut extra = 0u32;
    for _ in 0..2200 {
        let cand = outward(fail, step);
        if cand == end {
            // The trivial limit holds; bisect back towards the last failing point (a flat log
            // tail, as at levels near 0, makes Newton's step overshoot).
            extra += 1;
            break;
        }
        if bound(cand)?.ln <= -t {
            pass = cand;
            break;
        }
        fail = cand;
        step *= 2.0;
        extra += 1;
    }
    // Bisection, only when the first Newton step fell short or overshot to the end (then the
    // bracket may be wide).
    if extra > 0 {
        for _ in 0..40 {
            let mid = 0.5 * (fail + pass);
            if mid == fail || mid == pass || (pass - fail).abs() <= 1e-6 * (pass - start).abs() {
                break;
            }
            if bound(mid)?.ln <= -t {
                pass = mid;
            } else {
                fail = mid;
            }
        }
    }
    Some(pass)
}

#[cfg(test)]
mod outward_tests {
    use super::*;

    /// The prefactor and the evaluation as written before the pair's constants were kept
    /// (every logarithm and Stirling error computed at each point).
    fn ln_beta_reg_inline(a: f64, b: f64, p: Point, precise: bool) -> Option<(f64, f64)> {
        let c = a + b;
        let bd0_inline = |x: f64, m: f64| {
            if (x - m).abs() < 0.1 * (x + m) {
                bd0(x, m)
            } else {
                x * (x.ln() - m.ln()) + m - x
            }
        };
        let pre = -bd0_inline(a, c * p.x) - bd0_inline(b, c * p.y) + stirlerr(c)
            - stirlerr(a)
            - stirlerr(b)
            + 0.5 * (a.ln() + b.ln() - c.ln())
            - LN_SQRT_2PI;
        if p.x < (a + 1.0) / (a + b + 2.0) {
            let cf = beta_cf(a, b, p.x, p.y, precise)?;
            Some((pre + cf.ln() - a.ln(), pre))
        } else {
            let cf = beta_cf(b, a, p.y, p.x, precise)?;
            let comp = pre + cf.ln() - b.ln();
            if comp >= 0.0 {
                return None;
            }
            Some((ln_one_minus_exp(comp), pre))
        }
    }

    #[test]
    fn kept_pair_constants_change_no_bit() {
        // Pairs from tiny to huge (both sides of the Stirling-series switch at 15, and of the
        // series/log switch in bd0), several points per pair and pairs interleaved, so that the
        // one-pair cache is both hit and replaced.
        let mut state = 0x2545_f491_4f6c_dd1du64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut pairs = Vec::new();
        for _ in 0..300 {
            let a = (10f64.powf(next() * 7.0)).round().max(1.0);
            let b = (10f64.powf(next() * 7.0)).round().max(1.0);
            pairs.push((a, b));
        }
        let mut compared = 0;
        for round in 0..3 {
            for &(a, b) in &pairs {
                for _ in 0..4 {
                    let u = next();
                    let p = if round % 2 == 0 {
                        Point::from_x(u.powf(4.0).max(1e-300))
                    } else {
                        Point::from_y(u.powf(4.0).max(1e-300))
                    };
                    for precise in [false, true] {
                        let kept = ln_beta_reg_eval(a, b, p, precise);
                        let inline = ln_beta_reg_inline(a, b, p, precise);
                        assert_eq!(
                            kept.map(|(f, g)| (f.to_bits(), g.to_bits())),
                            inline.map(|(f, g)| (f.to_bits(), g.to_bits())),
                            "a={a} b={b} x={} y={} precise={precise}",
                            p.x,
                            p.y
                        );
                        compared += 1;
                    }
                }
            }
        }
        assert_eq!(compared, 300 * 3 * 4 * 2);
    }

    #[test]
    fn remembered_evaluations_are_the_evaluations() {
        // A pool of points larger than the memo, drawn again and again in a scrambled order,
        // so that entries are inserted, promoted, demoted and evicted; every answer must be
        // bit for bit the direct evaluation.
        let mut state = 0x2545_f491_4f6c_dd1du64;
        let mut next = move || {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let pool: Vec<(f64, f64, Point, bool)> = (0..6000)
            .map(|i| {
                let a = (1.0 + 3000.0 * next()).floor();
                let b = (1.0 + 3000.0 * next()).floor();
                let s = next();
                let p = if i % 2 == 0 {
                    Point::from_x(s)
                } else {
                    Point::from_y(s)
                };
                (a, b, p, i % 3 != 0)
            })
            .collect();
        let bits = |v: Option<(f64, f64)>| v.map(|(f, g)| (f.to_bits(), g.to_bits()));
        let (hits0, _) = memo::counts();
        for round in 0..4 {
            for i in 0..pool.len() {
                // Some points recur often (the first 100), the rest now and then.
                let j = if i % 3 == 0 {
                    i % 100
                } else {
                    (i * 7919 + round * 31) % pool.len()
                };
                let (a, b, p, precise) = pool[j];
                assert_eq!(
                    bits(ln_beta_reg_with(a, b, p, precise)),
                    bits(ln_beta_reg_eval(a, b, p, precise)),
                    "a={a} b={b} p={p:?} precise={precise}"
                );
            }
        }
        assert!(memo::counts().0 > hits0, "the memo was never hit");
    }

    #[test]
    fn small_stirlerr_table_matches_the_formula() {
        for z in 1..=15u32 {
            let z = f64::from(z);
            let direct = ln_gamma(z + 1.0) - (z + 0.5) * z.ln() + z - LN_SQRT_2PI;
            assert!((direct - stirlerr_bounded(z).0).abs() < 1e-13, "z = {z}");
        }
    }

    #[test]
    fn binomial_tail_bound_is_at_least_the_exact_small_case() {
        // n = 5, k = 2, p = 0.3: P(X <= 2) = 0.83692 exactly (0.7^5 + 5*0.3*0.7^4 + 10*0.09*0.343).
        let exact = 0.7f64.powi(5) + 5.0 * 0.3 * 0.7f64.powi(4) + 10.0 * 0.09 * 0.343;
        let b = ln_binom_cdf_bound(5, 2, Point::from_x(0.3)).unwrap();
        assert!(b.ln >= exact.ln(), "{} < {}", b.ln, exact.ln());
        assert!(
            b.ln - exact.ln() < 1e-13,
            "bound too loose: {}",
            b.ln - exact.ln()
        );
        // k = 0: (1-p)^n.
        let b = ln_binom_cdf_bound(1000, 0, Point::from_x(1e-3)).unwrap();
        let exact = 1000.0 * (-1e-3f64).ln_1p();
        assert!(b.ln >= exact && b.ln - exact < 1e-12);
    }

    #[test]
    fn binomial_tail_bound_agrees_with_the_beta_function() {
        // P(X <= k | p) = I_{1-p}(n-k, k+1): two independent evaluations.
        for &(n, k, p) in &[
            (100u64, 3u64, 0.1f64),
            (4000, 2000, 0.53),
            (1_000_000, 200, 3e-4),
            (50, 49, 0.999_999),
        ] {
            let b = ln_binom_cdf_bound(n, k, Point::from_x(p)).unwrap();
            let (nf, kf) = (n as f64, k as f64);
            let (cf, _) = ln_beta_reg_with(nf - kf, kf + 1.0, Point::from_y(p), true).unwrap();
            assert!(
                b.ln >= cf - 1e-12 && b.ln - cf < 1e-9,
                "n={n} k={k} p={p}: {} vs {cf}",
                b.ln
            );
        }
    }
}
