//! Interval computation at ordinary and extreme levels (`ln(1/d)` = 3, 30, 700, 5000 nats),
//! n from 1e3 to 1e6, rounded to nearest (core version 1) and outward (core version 2), and
//! one full quote + answer of the accountant.

use criterion::{BenchmarkId, Criterion, criterion_group, criterion_main};
use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
use holdout_ledger::stats::interval::{Method, Rounding, Sides, errors_interval_with};
use holdout_ledger::stats::policy::Policy;
use std::hint::black_box;

fn intervals(c: &mut Criterion) {
    // Core version 1 (rounded to nearest) and core version 2 (verified, moved outward).
    let runs = [
        (Method::Exact, Rounding::Nearest, "exact"),
        (Method::Exact, Rounding::Outward, "exact-outward"),
        (Method::Kl, Rounding::Nearest, "kl"),
        (Method::Kl, Rounding::Outward, "kl-outward"),
        (Method::Hoeffding, Rounding::Nearest, "hoeffding"),
    ];
    for (method, rounding, label) in runs {
        let mut group = c.benchmark_group(format!("interval/{label}"));
        for n in [1_000u64, 100_000, 1_000_000] {
            for level in [3.0f64, 30.0, 700.0, 5000.0] {
                let k = n / 5;
                group.bench_with_input(
                    BenchmarkId::new(format!("n={n}"), format!("nats={level}")),
                    &(n, k, level),
                    |b, &(n, k, level)| {
                        b.iter(|| {
                            errors_interval_with(
                                rounding,
                                method,
                                black_box(n),
                                black_box(k),
                                level,
                                Sides::Two,
                            )
                        })
                    },
                );
            }
        }
        group.finish();
    }
}

fn accountant(c: &mut Criterion) {
    let policy: Policy = serde_json::from_str(
        r#"{"delta": 0.05, "schedule": "series", "rule": "rounded:0.01", "tolerance": 0.05,
            "rows": 100000, "targets": [{"name": "y", "binary": true, "method": "exact"}], "core_version": 2}"#,
    )
    .expect("valid policy");
    let acc = Accountant::new(policy).expect("valid policy");
    let req = QueryRequest {
        analyst: "a".into(),
        target: 0,
        models: 1,
    };
    c.bench_function("accountant/quote+answer n=1e5", |b| {
        b.iter(|| {
            let mut acc = acc.clone();
            let charge = acc.quote(&req).expect("fits");
            acc.answer(&req, &charge, &[Outcome::Errors(black_box(21_234))])
        })
    });
}

criterion_group!(benches, intervals, accountant);
criterion_main!(benches);
