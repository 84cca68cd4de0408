//! Confidence intervals for one query: `n` rows, a loss in [0, 1], a level `d` given as
//! `level_nats = ln(1/d)` (DESIGN 3).
//!
//! * [`Method::Exact`]: Clopper-Pearson for 0-1 loss. Lower limit `BetaInv(a; k, n-k+1)`, upper
//!   limit from the upper tail directly (`1 - BetaInv(a; n-k, k+1)` computed on the small side),
//!   with `a = d/2` two-sided and `a = d` one-sided. Solved in log space with
//!   [`ln_incomplete_beta`](super::beta::ln_incomplete_beta); where a limit is not representable
//!   (below the normal range of f64), the KL limit at the same level is used instead, which
//!   always contains the Clopper-Pearson one, so the result stays valid.
//! * [`Method::Kl`]: KL (Chernoff) inversion, `kl(mean || q) = ln(1/a) / n`, any loss in [0, 1].
//! * [`Method::Hoeffding`]: `mean -+ sqrt(ln(1/a) / (2n))`, clamped to [0, 1].
//!
//! Every function here is deterministic: the same inputs give bit-identical outputs on the same
//! build and platform (the audit relies on it).
//!
//! ```
//! use holdout_ledger::stats::interval::{errors_interval, Method, Sides};
//! // 30 errors in 1000 rows at d = 0.05, two-sided (scipy 1.17.1 beta.ppf(0.025, 30, 971) and
//! // beta.isf(0.025, 31, 970) give 0.0203305, 0.0425514).
//! let ci = errors_interval(Method::Exact, 1000, 30, (1.0f64 / 0.05).ln(), Sides::Two).unwrap();
//! assert!((ci.lower - 0.0203305).abs() < 1e-7 && (ci.upper - 0.0425514).abs() < 1e-7);
//! ```

use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

use super::beta::{
    Point, UNIT, cp_tail_bound, solve_ln_beta_reg, solve_ln_beta_reg_from,
    solve_ln_beta_reg_newton, solve_ln_beta_reg_with, widen,
};
use super::kl;

/// How the limits are rounded; the holdout's accounting core version decides.
///
/// ```
/// use holdout_ledger::stats::interval::{errors_interval_with, Method, Rounding, Sides};
/// // n = 1, k = 0, one-sided at 30 nats: the upper limit must leave a tail of at most e^-30,
/// // so 1 - U <= e^-30 = 9.3576e-14 (rounded to nearest, core 1 gave 1 - U = 9.3592e-14).
/// let ci = errors_interval_with(Rounding::Outward, Method::Exact, 1, 0, 30.0, Sides::Upper)
///     .unwrap();
/// assert!(1.0 - ci.upper <= (-30.0f64).exp());
/// ```
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Rounding {
    /// Core version 1: limits as solved, rounded to nearest; kept so that ledgers recorded
    /// before core version 2 replay bit for bit. Some of its limits are narrower than exact.
    Nearest,
    /// Core version 2: every limit is verified against its tail condition with an absolute
    /// margin that bounds every evaluation error, and moved outward until it holds.
    Outward,
    /// Core version 3: as [`Rounding::Outward`], with each Clopper-Pearson limit searched
    /// from a closed-form guess of it instead of from the ends of `(0, 1)` (a handful of
    /// evaluations instead of dozens; the same limits to within about `1e-14` relative, and
    /// certified the same way, but not always the same last bits, hence a version of its own).
    OutwardFromGuess,
    /// Core version 4: as [`Rounding::OutwardFromGuess`], with each Clopper-Pearson root
    /// found by Newton's method from the same guess and stopped at the first step below
    /// `1e-7` relative (the point that step leads to is within about `1e-14` of the root),
    /// then certified and moved outward the same way: about half the evaluations of core
    /// version 3, the same limits to within about `1e-12` relative.
    OutwardNewton,
}

impl Rounding {
    /// The rounding of a holdout whose policy records `core_version`.
    pub fn for_core(core_version: u32) -> Rounding {
        match core_version {
            0 | 1 => Rounding::Nearest,
            2 => Rounding::Outward,
            3 => Rounding::OutwardFromGuess,
            _ => Rounding::OutwardNewton,
        }
    }

    /// Whether limits are certified and moved outward (core version 2 and later).
    pub fn is_outward(self) -> bool {
        self != Rounding::Nearest
    }
}

/// How an interval is computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    /// Clopper-Pearson (exact binomial); 0-1 loss only.
    Exact,
    /// KL (Chernoff) inversion; any loss in [0, 1].
    Kl,
    /// Hoeffding; any loss in [0, 1].
    Hoeffding,
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Method::Exact => "exact",
            Method::Kl => "kl",
            Method::Hoeffding => "hoeffding",
        })
    }
}

impl FromStr for Method {
    type Err = IntervalError;
    fn from_str(s: &str) -> Result<Method, IntervalError> {
        match s.trim().to_ascii_lowercase().as_str() {
            "exact" | "clopper-pearson" => Ok(Method::Exact),
            "kl" => Ok(Method::Kl),
            "hoeffding" => Ok(Method::Hoeffding),
            _ => Err(IntervalError::UnknownMethod(s.to_string())),
        }
    }
}

/// Which limits an interval has.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Sides {
    /// Both limits, the level split evenly between the two tails.
    Two,
    /// A one-sided upper bound at the full level; the lower limit is 0.
    Upper,
    /// A one-sided lower bound at the full level; the upper limit is 1.
    Lower,
}

/// A closed interval inside [0, 1].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Interval {
    /// Lower limit.
    pub lower: f64,
    /// Upper limit.
    pub upper: f64,
}

impl Interval {
    /// The trivial interval [0, 1], which certifies nothing.
    pub const FULL: Interval = Interval {
        lower: 0.0,
        upper: 1.0,
    };

    /// Half of the width.
    pub fn half_width(&self) -> f64 {
        0.5 * (self.upper - self.lower)
    }

    /// Whether `value` lies in the closed interval.
    pub fn contains(&self, value: f64) -> bool {
        self.lower <= value && value <= self.upper
    }
}

/// Bad input to an interval computation.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum IntervalError {
    /// No rows.
    #[error("the number of rows must be at least 1")]
    NoRows,
    /// More errors than rows.
    #[error("{errors} errors is more than the {rows} rows")]
    ErrorsExceedRows {
        /// Errors given.
        errors: u64,
        /// Rows given.
        rows: u64,
    },
    /// A level that is not a positive number of nats.
    #[error("level must be ln(1/d) > 0 nats (d in (0, 1)), got {0}")]
    BadLevel(f64),
    /// A mean loss outside [0, 1].
    #[error("mean loss must lie in [0, 1], got {0}")]
    MeanOutOfRange(f64),
    /// Clopper-Pearson asked for a non-binary loss.
    #[error(
        "method 'exact' (Clopper-Pearson) needs a 0-1 loss (an error count); use 'kl' or 'hoeffding' for other losses"
    )]
    ExactNeedsBinary,
    /// Unknown method name.
    #[error("unknown method '{0}': expected exact, kl or hoeffding")]
    UnknownMethod(String),
}

fn check(n: u64, level_nats: f64) -> Result<(), IntervalError> {
    if n == 0 {
        return Err(IntervalError::NoRows);
    }
    if level_nats.is_nan() || level_nats <= 0.0 {
        return Err(IntervalError::BadLevel(level_nats));
    }
    Ok(())
}

/// Nats of one tail: `ln(1/a)` with `a = d/2` (two-sided) or `a = d` (one-sided).
fn tail_nats(level_nats: f64, sides: Sides) -> f64 {
    match sides {
        Sides::Two => level_nats + std::f64::consts::LN_2,
        Sides::Upper | Sides::Lower => level_nats,
    }
}

/// Clopper-Pearson lower limit for `k` errors, tail `exp(-tail)`.
fn cp_lower(n: u64, k: u64, tail: f64) -> f64 {
    let nf = n as f64;
    if k == 0 || tail.is_infinite() {
        return 0.0;
    }
    if k == n {
        // P(X >= n | p) = p^n = a.
        return (-tail / nf).exp();
    }
    let kf = k as f64;
    solve_ln_beta_reg(kf, nf - kf + 1.0, -tail)
        .map(|p| p.x)
        .unwrap_or_else(|| kl::lower(kf / nf, tail / nf))
}

/// Clopper-Pearson upper limit for `k` errors, tail `exp(-tail)`.
fn cp_upper(n: u64, k: u64, tail: f64) -> f64 {
    let nf = n as f64;
    if k == n || tail.is_infinite() {
        return 1.0;
    }
    if k == 0 {
        // P(X <= 0 | p) = (1-p)^n = a.
        return -(-tail / nf).exp_m1();
    }
    let kf = k as f64;
    // P(X <= k | p) = I_{1-p}(n-k, k+1); the root's y is the upper limit.
    solve_ln_beta_reg(nf - kf, kf + 1.0, -tail)
        .map(|p| p.y)
        .unwrap_or_else(|| kl::upper(kf / nf, tail / nf))
}

/// The Clopper-Pearson root of an outward limit: by Newton from a guess (core version 4),
/// searched from a guess (core version 3) or from the ends of `(0, 1)` (core version 2).
fn solve_outward(a: f64, b: f64, target: f64, rounding: Rounding) -> Option<Point> {
    match rounding {
        Rounding::OutwardNewton => solve_ln_beta_reg_newton(a, b, target),
        Rounding::OutwardFromGuess => solve_ln_beta_reg_from(a, b, target),
        Rounding::Outward | Rounding::Nearest => solve_ln_beta_reg_with(a, b, target, true),
    }
}

/// The tail in nats rounded up: the float sum `level + ln 2` and the constant `ln 2` each
/// carry at most half an ulp, so a few units of relative margin cover both.
fn tail_up(tail: f64) -> f64 {
    tail + tail.abs() * 4.0 * UNIT + f64::MIN_POSITIVE
}

/// Outward Clopper-Pearson lower limit (core version 2): solved at the rounded-up tail, then
/// certified by the binomial sum (or, where the sum is out of reach, replaced by the certified
/// KL limit, which contains it); the trivial limit 0 when nothing can be certified.
fn cp_lower_outward(n: u64, k: u64, tail: f64, rounding: Rounding) -> f64 {
    let nf = n as f64;
    if k == 0 || tail.is_infinite() {
        return 0.0;
    }
    let t = tail_up(tail);
    let kf = k as f64;
    let cand = if k == n {
        (-t / nf).exp()
    } else {
        solve_outward(kf, nf - kf + 1.0, -t, rounding)
            .map(|p| p.x)
            .unwrap_or_else(|| kl::lower(kf / nf, t / nf))
    };
    widen(cand, false, t, |v| cp_tail_bound(n, k, v, false))
        .unwrap_or_else(|| kl::lower_outward(kf / nf, nf, t))
}

/// Outward Clopper-Pearson upper limit, as [`cp_lower_outward`].
fn cp_upper_outward(n: u64, k: u64, tail: f64, rounding: Rounding) -> f64 {
    let nf = n as f64;
    if k == n || tail.is_infinite() {
        return 1.0;
    }
    let t = tail_up(tail);
    let kf = k as f64;
    let cand = if k == 0 {
        -(-t / nf).exp_m1()
    } else {
        solve_outward(nf - kf, kf + 1.0, -t, rounding)
            .map(|p| p.y)
            .unwrap_or_else(|| kl::upper(kf / nf, t / nf))
    };
    widen(cand, true, t, |v| cp_tail_bound(n, k, v, true))
        .unwrap_or_else(|| kl::upper_outward(kf / nf, nf, t))
}

/// Outward KL or Hoeffding limits for means in `[lo, hi]` (core version 2). The ends of the
/// range are widened by one ulp (a cell's ends are computed in floats); Hoeffding's half-width
/// is rounded up and so are the additions.
fn mean_limits_outward(method: Method, n: u64, lo: f64, hi: f64, tail: f64) -> (f64, f64) {
    let nf = n as f64;
    let t = tail_up(tail);
    let lo = if lo > 0.0 {
        lo.next_down().max(0.0)
    } else {
        0.0
    };
    let hi = if hi < 1.0 { hi.next_up().min(1.0) } else { 1.0 };
    match method {
        Method::Hoeffding => {
            let h = (t / (2.0 * nf)).sqrt() * (1.0 + 4.0 * UNIT);
            let l = lo - h;
            let u = hi + h;
            let l = if l > 0.0 { l.next_down() } else { 0.0 };
            let u = if u < 1.0 { u.next_up() } else { 1.0 };
            (l.max(0.0), u.min(1.0))
        }
        Method::Kl | Method::Exact => (kl::lower_outward(lo, nf, t), kl::upper_outward(hi, nf, t)),
    }
}

fn mean_limits(method: Method, n: u64, lo: f64, hi: f64, tail: f64) -> (f64, f64) {
    let nf = n as f64;
    match method {
        Method::Hoeffding => {
            let h = (tail / (2.0 * nf)).sqrt();
            ((lo - h).max(0.0), (hi + h).min(1.0))
        }
        // Exact is excluded by the callers; KL serves both.
        Method::Kl | Method::Exact => (kl::lower(lo, tail / nf), kl::upper(hi, tail / nf)),
    }
}

fn assemble(sides: Sides, lower: impl FnOnce() -> f64, upper: impl FnOnce() -> f64) -> Interval {
    let (lower, upper) = match sides {
        Sides::Two => (lower(), upper()),
        Sides::Upper => (0.0, upper()),
        Sides::Lower => (lower(), 1.0),
    };
    Interval {
        lower: lower.clamp(0.0, 1.0),
        upper: upper.clamp(0.0, 1.0),
    }
}

/// Interval for the error rate of a 0-1 loss with `k` errors in `n` rows.
///
/// # Failure
/// `k > n`, `n = 0`, or a level that is not positive.
///
/// # Example
/// ```
/// use holdout_ledger::stats::interval::{errors_interval, Method, Sides};
/// // Zero errors, one-sided at d = 0.05: 1 - 0.05^(1/1000) = 0.0029912 (rule of three: 3/n).
/// let ci = errors_interval(Method::Exact, 1000, 0, (20.0f64).ln(), Sides::Upper).unwrap();
/// assert!((ci.upper - 0.0029912).abs() < 1e-7);
/// // Hoeffding at n = 1000, d = 0.05 two-sided: half-width sqrt(ln 40 / 2000) = 0.04295.
/// let h = errors_interval(Method::Hoeffding, 1000, 500, (20.0f64).ln(), Sides::Two).unwrap();
/// assert!((h.half_width() - 0.04295).abs() < 5e-6);
/// ```
pub fn errors_interval(
    method: Method,
    n: u64,
    k: u64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    errors_range_interval(method, n, k, k, level_nats, sides)
}

/// [`errors_interval`] with the rounding of a core version ([`Rounding::Outward`] for new
/// holdouts; [`errors_interval`] itself is [`Rounding::Nearest`], core version 1).
pub fn errors_interval_with(
    rounding: Rounding,
    method: Method,
    n: u64,
    k: u64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    errors_range_interval_with(rounding, method, n, k, k, level_nats, sides)
}

/// The worst case over error counts `k_lo..=k_hi`: the lower limit at `k_lo`, the upper at
/// `k_hi` (both limits increase in `k`). This is the interval of a released rounded cell.
pub fn errors_range_interval(
    method: Method,
    n: u64,
    k_lo: u64,
    k_hi: u64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    errors_range_interval_with(Rounding::Nearest, method, n, k_lo, k_hi, level_nats, sides)
}

/// [`errors_range_interval`] with the rounding of a core version.
///
/// When a [`shared`] table is installed on the calling thread, a result another thread
/// computed for exactly these arguments is taken from it (see [`shared`]).
pub fn errors_range_interval_with(
    rounding: Rounding,
    method: Method,
    n: u64,
    k_lo: u64,
    k_hi: u64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    shared::through(
        shared::Key {
            rounding,
            method,
            n,
            k_lo,
            k_hi,
            level_bits: level_nats.to_bits(),
            sides,
        },
        || errors_range_interval_eval(rounding, method, n, k_lo, k_hi, level_nats, sides),
    )
}

/// [`errors_range_interval_with`], computed here.
fn errors_range_interval_eval(
    rounding: Rounding,
    method: Method,
    n: u64,
    k_lo: u64,
    k_hi: u64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    check(n, level_nats)?;
    for k in [k_lo, k_hi] {
        if k > n {
            return Err(IntervalError::ErrorsExceedRows { errors: k, rows: n });
        }
    }
    let (k_lo, k_hi) = (k_lo.min(k_hi), k_lo.max(k_hi));
    let tail = tail_nats(level_nats, sides);
    let outward = rounding.is_outward();
    Ok(match method {
        Method::Exact if outward => assemble(
            sides,
            || cp_lower_outward(n, k_lo, tail, rounding),
            || cp_upper_outward(n, k_hi, tail, rounding),
        ),
        Method::Exact => assemble(
            sides,
            || cp_lower(n, k_lo, tail),
            || cp_upper(n, k_hi, tail),
        ),
        Method::Kl | Method::Hoeffding => {
            let nf = n as f64;
            let (lo, hi) = (k_lo as f64 / nf, k_hi as f64 / nf);
            let (lo, hi) = if outward {
                mean_limits_outward(method, n, lo, hi, tail)
            } else {
                mean_limits(method, n, lo, hi, tail)
            };
            assemble(sides, || lo, || hi)
        }
    })
}

/// Intervals computed ahead on one thread and taken on another: the offline audit computes,
/// on the thread that parses the ledger's entries, the intervals the replay will ask for
/// (each answer's reported cell and the widest cell at its level, from the levels the entries
/// record), while the replay runs on its own thread.
///
/// An entry is keyed by every argument of [`errors_range_interval_with`] (the level by its
/// bits), and the value is what that function computes for them, so taking it changes no
/// number: a level an entry records falsely only names intervals nobody asks for. A thread
/// that [`fills`](shared::Role::Fill) the table stores what it computes; a thread that
/// [`takes`](shared::Role::Take) removes what it finds (each is asked for about once) and computes
/// the rest itself, storing nothing. Threads without a table are unaffected.
pub mod shared {
    use super::{Interval, IntervalError, Method, Rounding, Sides};
    use std::cell::RefCell;
    use std::collections::HashMap;
    use std::hash::{BuildHasherDefault, Hasher};
    use std::sync::{Arc, Mutex};

    /// The arguments of one interval.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
    pub(super) struct Key {
        pub(super) rounding: Rounding,
        pub(super) method: Method,
        pub(super) n: u64,
        pub(super) k_lo: u64,
        pub(super) k_hi: u64,
        pub(super) level_bits: u64,
        pub(super) sides: Sides,
    }

    /// A multiply-and-fold hasher for [`Key`]: its fields are small integers and one
    /// level's bits, and the table is private to one audit, so a keyed hash buys nothing
    /// here and SipHash was a twentieth of the replay thread's instructions.
    #[derive(Debug, Default, Clone, Copy)]
    pub(super) struct KeyHasher(u64);

    impl Hasher for KeyHasher {
        fn finish(&self) -> u64 {
            let h = self.0;
            (h ^ (h >> 32)).wrapping_mul(0x9E37_79B9_7F4A_7C15)
        }
        fn write(&mut self, bytes: &[u8]) {
            for &b in bytes {
                self.write_u64(u64::from(b));
            }
        }
        fn write_u8(&mut self, v: u8) {
            self.write_u64(u64::from(v));
        }
        fn write_u64(&mut self, v: u64) {
            self.0 = (self.0.rotate_left(5) ^ v).wrapping_mul(0x517C_C1B7_2722_0A95);
        }
        fn write_usize(&mut self, v: usize) {
            self.write_u64(v as u64);
        }
        fn write_isize(&mut self, v: isize) {
            self.write_u64(v as u64);
        }
    }

    type Map = HashMap<Key, Result<Interval, IntervalError>, BuildHasherDefault<KeyHasher>>;

    /// Intervals computed ahead, shared between threads.
    #[derive(Debug, Default)]
    pub struct Table {
        map: Mutex<Map>,
    }

    impl Table {
        /// Intervals stored and not taken yet.
        pub fn len(&self) -> usize {
            self.map.lock().map_or(0, |m| m.len())
        }

        /// Whether nothing is stored.
        pub fn is_empty(&self) -> bool {
            self.len() == 0
        }
    }

    /// What a thread does with the table installed on it.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum Role {
        /// Store every interval computed.
        Fill,
        /// Take (and remove) intervals found; compute the others without storing them.
        Take,
    }

    thread_local! {
        static INSTALLED: RefCell<Option<(Arc<Table>, Role)>> = const { RefCell::new(None) };
    }

    /// Runs `f` with `table` installed on this thread in `role`, then restores what was
    /// installed before.
    pub fn with<R>(table: Arc<Table>, role: Role, f: impl FnOnce() -> R) -> R {
        struct Restore(Option<(Arc<Table>, Role)>);
        impl Drop for Restore {
            fn drop(&mut self) {
                let before = self.0.take();
                INSTALLED.with_borrow_mut(|t| *t = before);
            }
        }
        let _restore = Restore(INSTALLED.with_borrow_mut(|t| t.replace((table, role))));
        f()
    }

    pub(super) fn through(
        key: Key,
        eval: impl FnOnce() -> Result<Interval, IntervalError>,
    ) -> Result<Interval, IntervalError> {
        // Borrowed, not cloned (an `Arc` clone per interval is two atomic operations on a
        // line both threads touch); `eval` never installs a table, so the borrow is safe.
        INSTALLED.with_borrow(|t| {
            let Some((table, role)) = t else {
                return eval();
            };
            match role {
                Role::Take => {
                    let found = table.map.lock().ok().and_then(|mut m| m.remove(&key));
                    found.unwrap_or_else(eval)
                }
                Role::Fill => {
                    let v = eval();
                    if let Ok(mut m) = table.map.lock() {
                        m.insert(key, v.clone());
                    }
                    v
                }
            }
        })
    }
}

/// Interval for a mean loss in [0, 1] over `n` rows (KL or Hoeffding; Exact is an error).
///
/// ```
/// use holdout_ledger::stats::interval::{mean_interval, Method, Sides};
/// let kl = mean_interval(Method::Kl, 1000, 0.1, (20.0f64).ln(), Sides::Two).unwrap();
/// let h = mean_interval(Method::Hoeffding, 1000, 0.1, (20.0f64).ln(), Sides::Two).unwrap();
/// // Away from 1/2 the KL interval is much tighter than Hoeffding's.
/// assert!(kl.upper - kl.lower < 0.6 * (h.upper - h.lower));
/// ```
pub fn mean_interval(
    method: Method,
    n: u64,
    mean: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    mean_range_interval(method, n, mean, mean, level_nats, sides)
}

/// [`mean_interval`] with the rounding of a core version.
pub fn mean_interval_with(
    rounding: Rounding,
    method: Method,
    n: u64,
    mean: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    mean_range_interval_with(rounding, method, n, mean, mean, level_nats, sides)
}

/// The worst case over means in `[lo, hi]`: the lower limit at `lo`, the upper at `hi`.
pub fn mean_range_interval(
    method: Method,
    n: u64,
    lo: f64,
    hi: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    mean_range_interval_with(Rounding::Nearest, method, n, lo, hi, level_nats, sides)
}

/// [`mean_range_interval`] with the rounding of a core version.
pub fn mean_range_interval_with(
    rounding: Rounding,
    method: Method,
    n: u64,
    lo: f64,
    hi: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, IntervalError> {
    check(n, level_nats)?;
    if method == Method::Exact {
        return Err(IntervalError::ExactNeedsBinary);
    }
    for m in [lo, hi] {
        if !(0.0..=1.0).contains(&m) {
            return Err(IntervalError::MeanOutOfRange(m));
        }
    }
    let tail = tail_nats(level_nats, sides);
    let (l, u) = match rounding {
        Rounding::Outward | Rounding::OutwardFromGuess | Rounding::OutwardNewton => {
            mean_limits_outward(method, n, lo.min(hi), lo.max(hi), tail)
        }
        Rounding::Nearest => mean_limits(method, n, lo.min(hi), lo.max(hi), tail),
    };
    Ok(assemble(sides, || l, || u))
}

/// The worst-case (widest) half-width a query of `n` rows can get at this level: the interval
/// at mean 1/2 (`k = n/2`, rounded down, for Clopper-Pearson). Two-sided: half the width;
/// one-sided upper: `upper - 1/2`.
pub fn reference_half_width(
    method: Method,
    n: u64,
    reference_mean: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<f64, IntervalError> {
    reference_half_width_with(
        Rounding::Nearest,
        method,
        n,
        reference_mean,
        level_nats,
        sides,
    )
}

/// [`reference_half_width`] with the rounding of a core version.
pub fn reference_half_width_with(
    rounding: Rounding,
    method: Method,
    n: u64,
    reference_mean: f64,
    level_nats: f64,
    sides: Sides,
) -> Result<f64, IntervalError> {
    let nf = n.max(1) as f64;
    let ci = match method {
        Method::Exact => {
            let k = ((reference_mean.clamp(0.0, 1.0) * nf).round() as u64).min(n);
            let ci = errors_interval_with(rounding, method, n, k, level_nats, sides)?;
            return Ok(spread(ci, k as f64 / nf, sides));
        }
        _ => mean_interval_with(rounding, method, n, reference_mean, level_nats, sides)?,
    };
    Ok(spread(ci, reference_mean, sides))
}

fn spread(ci: Interval, center: f64, sides: Sides) -> f64 {
    match sides {
        Sides::Two => ci.half_width(),
        Sides::Upper => ci.upper - center,
        Sides::Lower => center - ci.lower,
    }
}

/// Limits as decimal text with `decimals` digits after the point, rounded outward: the lower
/// limit down (floor) and the upper limit up (ceiling), so that the shown interval contains the
/// computed one. `decimals` is capped at 30.
///
/// ```
/// use holdout_ledger::stats::interval::display_outward;
/// assert_eq!(display_outward(0.0203305, 0.0425514, 4), ("0.0203".into(), "0.0426".into()));
/// // A limit that is exactly a shown decimal stays as it is; signs are handled.
/// assert_eq!(display_outward(-0.25, 0.5, 2), ("-0.25".into(), "0.50".into()));
/// assert_eq!(display_outward(-0.00001, 1.0, 3), ("-0.001".into(), "1.000".into()));
/// ```
pub fn display_outward(lower: f64, upper: f64, decimals: usize) -> (String, String) {
    (
        decimal_directed(lower, decimals, false),
        decimal_directed(upper, decimals, true),
    )
}

/// `x` with `decimals` digits, rounded up (`up`) or down, from its exact decimal expansion.
fn decimal_directed(x: f64, decimals: usize, up: bool) -> String {
    let decimals = decimals.min(30);
    if !x.is_finite() {
        return format!("{x}");
    }
    // Every f64 has a finite decimal expansion with at most 1074 digits after the point.
    let exact = format!("{:.1100}", x.abs());
    let (int_part, frac) = exact.split_once('.').unwrap_or((&exact, ""));
    let kept = &frac[..decimals];
    let rest_nonzero = frac[decimals..].bytes().any(|b| b != b'0');
    // Magnitude rounding: away from zero when rounding up a positive or down a negative.
    let negative = x < 0.0;
    let away = rest_nonzero && (up != negative);
    let mut digits: Vec<u8> = int_part.bytes().chain(kept.bytes()).collect();
    if away {
        let mut i = digits.len();
        loop {
            if i == 0 {
                digits.insert(0, b'1');
                break;
            }
            i -= 1;
            if digits[i] == b'9' {
                digits[i] = b'0';
            } else {
                digits[i] += 1;
                break;
            }
        }
    }
    let split = digits.len() - decimals;
    let (ip, fp) = digits.split_at(split);
    let ip = String::from_utf8_lossy(ip);
    let fp = String::from_utf8_lossy(fp);
    let zero = digits.iter().all(|&b| b == b'0');
    let sign = if negative && !zero { "-" } else { "" };
    if decimals == 0 {
        format!("{sign}{ip}")
    } else {
        format!("{sign}{ip}.{fp}")
    }
}

#[cfg(test)]
mod display_tests {
    use super::*;

    #[test]
    fn display_rounds_outward_and_contains_the_limits() {
        assert_eq!(display_outward(0.1, 0.1, 1), ("0.1".into(), "0.2".into()));
        // 0.1 is slightly above 1/10 as a double: its floor at 1 digit is 0.1, its ceiling 0.2.
        assert_eq!(
            display_outward(0.0, 1.0, 6),
            ("0.000000".into(), "1.000000".into())
        );
        assert_eq!(display_outward(0.9999995, 0.99999951, 6).1, "1.000000");
        assert_eq!(
            display_outward(1e-300, 1e-300, 3),
            ("0.000".into(), "0.001".into())
        );
        assert_eq!(
            display_outward(-1e-300, -1e-300, 3),
            ("-0.001".into(), "0.000".into())
        );
        assert_eq!(display_outward(0.5, 0.5, 0), ("0".into(), "1".into()));
        for &(l, u) in &[
            (0.0203305, 0.0425514),
            (0.123456789, 0.987654321),
            (-0.3, 0.7),
        ] {
            for d in 0..10 {
                let (ls, us) = display_outward(l, u, d);
                let (lv, uv): (f64, f64) = (ls.parse().unwrap(), us.parse().unwrap());
                assert!(lv <= l && uv >= u, "{l} {u} {d}: {ls} {us}");
            }
        }
    }
}

#[cfg(test)]
mod shared_tests {
    use super::*;
    use std::sync::Arc;

    fn bits(r: Result<Interval, IntervalError>) -> Option<(u64, u64)> {
        r.ok().map(|ci| (ci.lower.to_bits(), ci.upper.to_bits()))
    }

    #[test]
    fn intervals_filled_on_one_thread_are_taken_bit_for_bit_on_another() {
        let levels = [3.0, 47.25, 1234.5, 20_000.125];
        let direct: Vec<_> = levels
            .iter()
            .map(|&l| {
                bits(errors_range_interval_with(
                    Rounding::Outward,
                    Method::Exact,
                    2000,
                    990,
                    1009,
                    l,
                    Sides::Two,
                ))
            })
            .collect();
        let table = Arc::new(shared::Table::default());
        let fill = table.clone();
        std::thread::spawn(move || {
            shared::with(fill, shared::Role::Fill, || {
                for &l in &levels[..2] {
                    let _ = errors_range_interval_with(
                        Rounding::Outward,
                        Method::Exact,
                        2000,
                        990,
                        1009,
                        l,
                        Sides::Two,
                    );
                }
            })
        })
        .join()
        .unwrap();
        assert_eq!(table.len(), 2, "the filling thread stores what it computes");
        let taken: Vec<_> = shared::with(table.clone(), shared::Role::Take, || {
            levels
                .iter()
                .map(|&l| {
                    bits(errors_range_interval_with(
                        Rounding::Outward,
                        Method::Exact,
                        2000,
                        990,
                        1009,
                        l,
                        Sides::Two,
                    ))
                })
                .collect()
        });
        assert_eq!(taken, direct, "taken and computed intervals differ");
        assert!(
            table.is_empty(),
            "the taking thread removes what it takes and stores nothing"
        );
    }
}

#[cfg(test)]
mod from_guess_tests {
    use super::*;
    use crate::stats::beta::{evaluations, memo};

    /// Compares the limits of two roundings over a grid of `n` (1 to 1,000,000), counts at the
    /// ends and inside, the given levels and every side, with the memo off: every limit of
    /// `new` within `rel` (relative) of `old`'s. Returns the number of cases, the evaluations
    /// each took, and the largest relative difference.
    fn compare_limits(
        old: Rounding,
        new: Rounding,
        levels: &[f64],
        rel: f64,
    ) -> (u32, u64, u64, f64) {
        let (mut cases, mut evals_old, mut evals_new, mut worst) = (0u32, 0u64, 0u64, 0.0f64);
        for &n in &[1u64, 2, 7, 30, 250, 2000, 20_000, 1_000_000] {
            let ks = [
                0,
                1,
                2,
                n / 20,
                n / 3,
                n / 2,
                n - n / 10,
                n.saturating_sub(1),
                n,
            ];
            for &k in &ks {
                let k = k.min(n);
                for &level in levels {
                    for sides in [Sides::Two, Sides::Upper, Sides::Lower] {
                        let (a, b) = memo::with_memo(false, || {
                            let interval = |r| {
                                errors_range_interval_with(r, Method::Exact, n, k, k, level, sides)
                                    .unwrap()
                            };
                            let e0 = evaluations();
                            let a = interval(old);
                            let e1 = evaluations();
                            let b = interval(new);
                            evals_old += e1 - e0;
                            evals_new += evaluations() - e1;
                            (a, b)
                        });
                        for (x, y) in [(a.lower, b.lower), (a.upper, b.upper)] {
                            let scale = x.abs().max(y.abs()).max(1e-300);
                            worst = worst.max((x - y).abs() / scale);
                            assert!(
                                (x - y).abs() <= rel * scale,
                                "n {n} k {k} level {level} {sides:?}: {old:?} {x:e} {new:?} {y:e}"
                            );
                        }
                        cases += 1;
                    }
                }
            }
        }
        (cases, evals_old, evals_new, worst)
    }

    /// Core version 3 searches each Clopper-Pearson limit from a guess: the limits agree with
    /// core version 2's (which the reference tests check against scipy) to within the
    /// search's tolerance, they are still certified (the same outward step follows), and the
    /// searches take far fewer evaluations.
    #[test]
    fn limits_from_a_guess_match_version_2_with_fewer_evaluations() {
        let (cases, evals_2, evals_3, _) = compare_limits(
            Rounding::Outward,
            Rounding::OutwardFromGuess,
            &[0.5, 3.0, 7.3, 20.0, 60.0, 400.0],
            1e-11,
        );
        assert!(cases > 1000);
        assert!(
            evals_3 * 3 < evals_2,
            "the guessed searches should take under a third of the evaluations: {evals_3} vs {evals_2}"
        );
    }

    /// Core version 4 stops each root's Newton search at the first small step and leaves the
    /// rest to the certification: its limits agree with core version 3's to within `1e-8`
    /// relative (both are certified outward; the largest difference over this grid, about
    /// `5e-9`, is at a limit near `1e-27`), and the searches take at most 90 % of core
    /// version 3's evaluations over this grid with the memo off (86 %: many of its cases are
    /// the ends, where nothing is searched; see the next test for realistic counts).
    #[test]
    fn newton_limits_match_version_3_with_fewer_evaluations() {
        let (cases, evals_3, evals_4, worst) = compare_limits(
            Rounding::OutwardFromGuess,
            Rounding::OutwardNewton,
            &[0.5, 3.0, 7.3, 14.2, 20.0, 60.0, 400.0],
            1e-8,
        );
        assert!(cases > 1000);
        assert!(
            evals_4 * 10 <= evals_3 * 9,
            "the Newton searches should take at most 90 % of the evaluations: {evals_4} vs {evals_3}"
        );
        eprintln!(
            "evaluations: core 3 {evals_3}, core 4 {evals_4}; largest relative difference {worst:e}"
        );
    }

    /// At the counts of the audit benchmark (2,000 rows, the widest cells around 1,000 errors,
    /// levels rising from answer to answer) and with the memo on, as an audit runs, core
    /// version 4 takes about half of core version 3's evaluations.
    #[test]
    fn newton_limits_halve_the_evaluations_at_realistic_counts() {
        let mut evals = [0u64; 2];
        for (slot, rounding) in [Rounding::OutwardFromGuess, Rounding::OutwardNewton]
            .into_iter()
            .enumerate()
        {
            memo::clear();
            let e0 = evaluations();
            for i in 0..400 {
                let level = 10.0 + 0.037 * i as f64;
                for k in 995..1000u64 {
                    errors_range_interval_with(
                        rounding,
                        Method::Exact,
                        2000,
                        k,
                        k + 20,
                        level,
                        Sides::Two,
                    )
                    .unwrap();
                }
            }
            evals[slot] = evaluations() - e0;
        }
        let [evals_3, evals_4] = evals;
        assert!(
            evals_4 * 10 <= evals_3 * 6,
            "core 4 should take at most 60 % of core 3's evaluations here: {evals_4} vs {evals_3}"
        );
        eprintln!("evaluations at n = 2000: core 3 {evals_3}, core 4 {evals_4}");
    }

    /// The guess is certified like any other candidate: at the limit the binomial tail is at
    /// most the level (checked here with the independent certified bound of the tail).
    #[test]
    fn limits_from_a_guess_keep_their_tail_condition() {
        use crate::stats::beta::cp_tail_bound;
        for rounding in [Rounding::OutwardFromGuess, Rounding::OutwardNewton] {
            for &n in &[10u64, 2000, 100_000] {
                for &k in &[1, n / 10, n / 2, n - 1] {
                    for &level in &[3.0, 20.0] {
                        let ci = errors_range_interval_with(
                            rounding,
                            Method::Exact,
                            n,
                            k,
                            k,
                            level,
                            Sides::Two,
                        )
                        .unwrap();
                        let tail = tail_nats(level, Sides::Two);
                        let lo = cp_tail_bound(n, k, ci.lower, false).unwrap();
                        let hi = cp_tail_bound(n, k, ci.upper, true).unwrap();
                        assert!(
                            lo.ln <= -tail,
                            "n {n} k {k}: lower tail {} > {}",
                            lo.ln,
                            -tail
                        );
                        assert!(
                            hi.ln <= -tail,
                            "n {n} k {k}: upper tail {} > {}",
                            hi.ln,
                            -tail
                        );
                    }
                }
            }
        }
    }
}
