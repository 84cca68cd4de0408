//! The audit re-derives every answer's interval from the policy and the released symbol; it
//! never takes the recorded interval as given. A forger who holds the database can rewrite an
//! answer after the last checkpoint and rebuild every hash downstream (the checkpoint still
//! verifies: it names an earlier entry), so only the re-derivation can catch a changed
//! interval. Here the interval is changed, made consistent with the core's own record inside
//! the entry, the chain is rehashed, and the audit must name that entry's `lower`/`upper`.
//!
//! The ledger is long enough (dozens of answers at the same row count) that the interval
//! computations run warm in the per-thread memo of Beta evaluations (`stats::beta::memo`), so a
//! memo that answered for the wrong level would show here as a missed forgery.

mod audit_support;

use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, Report, audit};
use holdout_ledger::engine::PolicyInput;
use holdout_ledger::ledger::{self, Entry};
use serde_json::Value;

use audit_support::Generated;

/// Recomputes links and hashes from position `from` on, as someone rebuilding a chain would
/// (as in `tests/audit_tamper.rs`).
fn rehash(entries: &mut [Entry], from: usize) {
    for i in from..entries.len() {
        let prev = if i == 0 {
            ledger::ZERO_HASH.to_string()
        } else {
            entries[i - 1].hash.clone()
        };
        let e = &mut entries[i];
        e.seq = i as u64;
        e.prev_hash = prev;
        e.hash = ledger::Encoding::V2.hash(e).unwrap();
    }
}

fn edit_body(e: &mut Entry, f: impl FnOnce(&mut Value)) {
    let mut v: Value = serde_json::from_str(&e.body).unwrap();
    f(&mut v);
    e.body = ledger::canonical_json(&v);
}

fn body(e: &Entry) -> Value {
    serde_json::from_str(&e.body).unwrap()
}

/// Sets the interval of an answer entry everywhere the entry states it: the record's
/// `lower`/`upper` and the core's own record (`core.interval`), so that the entry agrees
/// with itself and only a recomputation can tell.
fn set_interval(e: &mut Entry, lower: f64, upper: f64) {
    edit_body(e, |v| {
        v["lower"] = lower.into();
        v["upper"] = upper.into();
        v["core"]["interval"]["lower"] = lower.into();
        v["core"]["interval"]["upper"] = upper.into();
    });
}

struct Ledger {
    export: Export,
    checkpoint: holdout_ledger::audit::anchor::Checkpoint,
    /// Answer entries written after the checkpoint.
    after: Vec<usize>,
}

/// Four teams, 2,000 rows, 24 answers, a checkpoint, then 24 more answers (few enough that the
/// last intervals are still far from [0, 1]).
fn ledger() -> Ledger {
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 1.0,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("rederived", 2000, policy, 4, 11);
    for i in 0..24 {
        g.advance(30);
        g.submit(i % 4, 60 + (i % 7) as u64 * 5);
    }
    let checkpoint = g.checkpoint();
    let before = g.answer_entries.len();
    for i in 0..24 {
        g.advance(30);
        g.submit(i % 4, 60 + (i % 7) as u64 * 5);
    }
    let after: Vec<usize> = g.answer_entries[before..]
        .iter()
        .map(|&s| s as usize)
        .collect();
    assert_eq!(
        after.len(),
        24,
        "every submission after the checkpoint is answered"
    );
    Ledger {
        export: g.export(),
        checkpoint,
        after,
    }
}

fn audited(l: &Ledger, export: &Export) -> Report {
    audit(
        export,
        AuditOptions {
            checkpoints: vec![("cp.json".into(), l.checkpoint.clone())],
            trusted_key: Some(l.checkpoint.public_key.clone()),
            ..AuditOptions::default()
        },
    )
}

/// The forged export still links and still matches the checkpoint; the replay alone names the
/// entry, at the changed fields, and the entry is not counted as replayed.
fn assert_named(report: &Report, k: usize, fields: &[&str], what: &str) {
    assert!(
        report
            .findings
            .iter()
            .all(|f| f.field != "chain" && !f.field.contains("checkpoint")),
        "{what}: the rebuilt chain should link and match the earlier checkpoint: {:#?}",
        report.findings
    );
    assert_eq!(
        report.checkpoints.len(),
        1,
        "{what}: the checkpoint was checked"
    );
    for field in fields {
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(k as u64) && f.field == *field),
            "{what}: entry {k}'s {field} was not named: {:#?}",
            report.findings
        );
    }
    let q = report
        .queries
        .iter()
        .find(|q| q.entry == k as u64)
        .expect("the entry is listed as a query");
    assert!(!q.replayed, "{what}: entry {k} is counted as replayed");
}

#[test]
fn the_untouched_ledger_audits_clean_with_its_checkpoint() {
    let l = ledger();
    let report = audited(&l, &l.export);
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.checkpoints.len(), 1);
    assert!(report.queries.iter().all(|q| q.replayed));
    let ck = l.checkpoint.seq as usize;
    assert!(l.after.iter().all(|&k| k > ck));
}

#[test]
fn a_widened_or_narrowed_interval_after_the_checkpoint_is_named() {
    let l = ledger();
    let ck = l.checkpoint.seq as usize;
    // The last answer, and one in the middle of the part after the checkpoint.
    for &k in [l.after[l.after.len() - 1], l.after[11]].iter() {
        assert!(k > ck);
        let v = body(&l.export.entries[k]);
        let (lo, hi) = (v["lower"].as_f64().unwrap(), v["upper"].as_f64().unwrap());
        assert!(0.0 < lo && lo < hi && hi < 1.0, "entry {k}: [{lo}, {hi}]");
        for (what, lower, upper, fields) in [
            (
                "narrowed",
                lo + 0.25 * (hi - lo),
                hi - 0.25 * (hi - lo),
                &["lower", "upper"][..],
            ),
            (
                "widened",
                lo * 0.5,
                hi + 0.5 * (1.0 - hi),
                &["lower", "upper"],
            ),
            // The smallest possible change: one ulp on one side.
            ("lower one ulp up", lo.next_up(), hi, &["lower"]),
            ("upper one ulp down", lo, hi.next_down(), &["upper"]),
        ] {
            let mut forged = l.export.clone();
            set_interval(&mut forged.entries[k], lower, upper);
            rehash(&mut forged.entries, k);
            assert_ne!(forged.entries[k].hash, l.export.entries[k].hash);
            let report = audited(&l, &forged);
            assert_named(&report, k, fields, &format!("{what} at entry {k}"));
        }
    }
}

#[test]
fn an_interval_copied_from_another_answer_with_the_same_symbol_is_named() {
    // A forger's most plausible interval for a released cell is the one another answer with
    // the same cell was given: right for that answer's level, wrong for this one's.
    let l = ledger();
    let entries = &l.export.entries;
    let mut copied = 0;
    for &k in &l.after {
        let v = body(&entries[k]);
        let source = (1..k).rev().find(|&j| {
            let w = body(&entries[j]);
            entries[j].kind == "answer"
                && w["symbol"] == v["symbol"]
                && (w["lower"] != v["lower"] || w["upper"] != v["upper"])
        });
        let Some(j) = source else { continue };
        let w = body(&entries[j]);
        let (lower, upper) = (w["lower"].as_f64().unwrap(), w["upper"].as_f64().unwrap());
        let mut fields = Vec::new();
        if lower.to_bits() != v["lower"].as_f64().unwrap().to_bits() {
            fields.push("lower");
        }
        if upper.to_bits() != v["upper"].as_f64().unwrap().to_bits() {
            fields.push("upper");
        }
        let mut forged = l.export.clone();
        set_interval(&mut forged.entries[k], lower, upper);
        rehash(&mut forged.entries, k);
        let report = audited(&l, &forged);
        assert_named(
            &report,
            k,
            &fields,
            &format!("entry {k} given entry {j}'s interval"),
        );
        copied += 1;
        if copied == 3 {
            break;
        }
    }
    assert_eq!(copied, 3, "the ledger should repeat released cells");
}
