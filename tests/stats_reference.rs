//! Clopper-Pearson limits against committed reference values.
//!
//! Source: tests/reference/clopper_pearson.json, produced by tests/reference/make_reference.py
//! with scipy 1.17.1 (`scipy.stats.beta.ppf` / `beta.isf`) and statsmodels 0.15.0
//! (`proportion_confint(method="beta")`); versions are recorded in the file itself.

use holdout_ledger::stats::interval::{Method, Sides, errors_interval};
use serde::Deserialize;

#[derive(Deserialize)]
struct Case {
    n: u64,
    k: u64,
    d: f64,
    sides: String,
    lower: f64,
    upper: f64,
}

#[derive(Deserialize)]
struct Reference {
    scipy: String,
    cases: Vec<Case>,
}

fn rel_err(got: f64, want: f64) -> f64 {
    if got == want {
        0.0
    } else {
        (got - want).abs() / want.abs().max(f64::MIN_POSITIVE)
    }
}

#[test]
fn clopper_pearson_matches_scipy_to_1e_9_relative() {
    let reference: Reference =
        serde_json::from_str(include_str!("reference/clopper_pearson.json")).unwrap();
    assert!(!reference.scipy.is_empty());
    assert!(reference.cases.len() >= 400);
    let mut worst = (0.0f64, String::new());
    for case in &reference.cases {
        let level = (1.0 / case.d).ln();
        let (lower, upper) = if case.sides == "two" {
            let ci = errors_interval(Method::Exact, case.n, case.k, level, Sides::Two).unwrap();
            (ci.lower, ci.upper)
        } else {
            let lo = errors_interval(Method::Exact, case.n, case.k, level, Sides::Lower).unwrap();
            let hi = errors_interval(Method::Exact, case.n, case.k, level, Sides::Upper).unwrap();
            (lo.lower, hi.upper)
        };
        for (what, got, want) in [("lower", lower, case.lower), ("upper", upper, case.upper)] {
            let e = rel_err(got, want);
            if e > worst.0 {
                worst = (
                    e,
                    format!(
                        "n={} k={} d={} {} {what}: got {got:e}, want {want:e}",
                        case.n, case.k, case.d, case.sides
                    ),
                );
            }
        }
    }
    println!("worst relative error: {:e} at {}", worst.0, worst.1);
    assert!(
        worst.0 <= 1e-9,
        "worst relative error {:e}: {}",
        worst.0,
        worst.1
    );
}
