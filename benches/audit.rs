//! The offline audit on a 100,000-entry ledger written by the real engine: chain verification
//! alone, parsing the export file, and the whole audit (chains, genesis, replay of every
//! answer through the daemon's accounting core). Target: >= 100,000 entries per second.
//!
//! Two ledgers are measured in one run: `refusal_heavy` (tolerance 0.1: answers until the
//! tolerance is reached, refusals after, as a long-lived holdout's ledger looks) and
//! `all_answers` (tolerance 1.0: every entry an answer, each with its interval, code and
//! forecast to re-derive). `AUDIT_BENCH_TOLERANCE` measures one ledger at that tolerance
//! instead; `AUDIT_BENCH_ENTRIES` overrides the size (e.g. 20000 for a quick look);
//! `AUDIT_BENCH_SAVE=DIR` also writes each generated export to `DIR`, to profile
//! `holdout audit FILE` on it without generating it again.
//!
//! Every audit iteration starts with an empty memo of Beta evaluations on the calling thread
//! (`stats::beta::memo::clear`), so the figures are those of a fresh `holdout audit` process,
//! not of a memo warmed by the previous iteration (the replay's worker threads are new for
//! every audit anyway).

#[path = "../tests/audit_support/mod.rs"]
mod audit_support;

use std::hint::black_box;
use std::time::Instant;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::engine::PolicyInput;
use holdout_ledger::ledger::{self, Kind};
use holdout_ledger::stats::beta::memo;

/// The allocator of the `holdout` binary (see `src/main.rs`), so that the figures are those of
/// `holdout audit`.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn ledger_of(entries: usize, tolerance: f64) -> Export {
    let started = Instant::now();
    // Four teams submit in turn to a 2,000-row holdout under an open-ended series schedule.
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance,
        ..PolicyInput::default()
    };
    let mut g = audit_support::Generated::new("bench", 2000, policy, 4, 42);
    let mut i = 0;
    // Genesis, then one recorded answer or refusal per submission (every file here is new).
    let mut recorded = 1;
    while recorded < entries {
        g.submit(i % 4, 55 + (i % 40) as u64);
        recorded += 1;
        i += 1;
        if i % 97 == 0 {
            g.advance(1);
        }
    }
    let ex = g.export();
    assert_eq!(
        ex.entries.len(),
        entries,
        "every submission should be recorded"
    );
    let answers = ex
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Answer))
        .count();
    let refusals = ex
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Refusal))
        .count();
    eprintln!(
        "generated {} entries ({answers} answers, {refusals} refusals) in {:.1} s",
        ex.entries.len(),
        started.elapsed().as_secs_f64()
    );
    ex
}

/// A fresh audit: the calling thread's memo emptied first (see the module documentation).
fn cold_audit(ex: &Export) -> holdout_ledger::audit::Report {
    memo::clear();
    audit(ex, AuditOptions::default())
}

fn bench_ledger(c: &mut Criterion, label: &str, n: usize, tolerance: f64) {
    let ex = ledger_of(n, tolerance);
    let mut bytes = Vec::new();
    ex.write_to(&mut bytes).expect("write the export");
    if let Ok(dir) = std::env::var("AUDIT_BENCH_SAVE") {
        // For profiling the audit alone (`holdout audit FILE` under a profiler), without
        // generating the ledger again.
        let path = std::path::Path::new(&dir).join(format!("audit-bench-{label}-{n}.jsonl"));
        std::fs::write(&path, &bytes).expect("save the export");
        eprintln!("saved {}", path.display());
    }
    assert!(cold_audit(&ex).clean());

    let mut group = c.benchmark_group(format!("audit_{label}"));
    group.sample_size(10);
    group.throughput(Throughput::Elements(ex.entries.len() as u64));
    group.bench_function("verify_chain", |b| {
        b.iter(|| black_box(ledger::verify_chain(black_box(&ex.entries))))
    });
    group.bench_function("parse_export", |b| {
        b.iter(|| black_box(Export::parse("bench.jsonl", black_box(&bytes[..])).unwrap()))
    });
    group.bench_function("full_audit", |b| {
        b.iter(|| black_box(cold_audit(black_box(&ex))))
    });
    group.bench_function("parse_and_full_audit", |b| {
        b.iter(|| {
            let ex = Export::parse("bench.jsonl", black_box(&bytes[..])).unwrap();
            black_box(cold_audit(&ex))
        })
    });
    group.finish();
}

fn bench(c: &mut Criterion) {
    let n: usize = std::env::var("AUDIT_BENCH_ENTRIES")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(100_000);
    let one: Option<f64> = std::env::var("AUDIT_BENCH_TOLERANCE")
        .ok()
        .and_then(|s| s.parse().ok());
    match one {
        Some(tolerance) => bench_ledger(c, &format!("tolerance_{tolerance}"), n, tolerance),
        None => {
            bench_ledger(c, "refusal_heavy", n, 0.1);
            bench_ledger(c, "all_answers", n, 1.0);
        }
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
