//! Compatibility: ledgers written by each released version are kept under
//! `tests/fixtures/ledgers/` (export, labels, a signed checkpoint), and every later version must
//! audit them clean. Regenerate this version's fixture with
//! `cargo test --test audit_fixture -- --ignored write_` (never overwrite an older one): an open
//! holdout (`vX.Y.Z`) and, from 0.2.0, a closed sealed round with a daily quota
//! (`vX.Y.Z-round`).

mod audit_support;

use std::path::{Path, PathBuf};

use holdout_ledger::audit::anchor::{self, Checkpoint};
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, LabelColumns, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::PolicyInput;
use holdout_ledger::files::{TableSpec, read_table};

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/ledgers")
}

#[test]
#[ignore = "writes this version's fixture; run by hand at release time"]
fn write_fixture() {
    let version = env!("CARGO_PKG_VERSION");
    let file = |what: &str| dir().join(format!("v{version}.{what}"));
    let export_path = file("export.jsonl");
    assert!(
        !export_path.exists(),
        "{} exists: fixtures of a released version are never rewritten",
        export_path.display()
    );
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.2,
        daily_quota: 3,
        ..PolicyInput::default()
    };
    let mut g = audit_support::Generated::new("fixture", 250, policy, 2, 2026);
    // Answers from two teams, a quota refusal, then tolerance refusals, then a close.
    for q in 0..4 {
        g.advance(600);
        g.submit(0, 60 + 8 * q);
    }
    for q in 0..12 {
        g.advance(3600 * 5);
        g.submit(q % 2, 70);
    }
    let organizer = g.user("olga", &[Role::Organizer], None);
    g.advance(60);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "fixture complete")
        .unwrap();
    let ex = g.export();
    let kinds: Vec<&str> = ex.entries.iter().map(|e| e.kind.as_str()).collect();
    assert!(kinds.contains(&"answer") && kinds.contains(&"refusal") && kinds.contains(&"close"));
    ex.write_file(&export_path).unwrap();
    let mut csv = String::from("id,label\n");
    for (id, l) in g.ids.iter().zip(&g.labels) {
        csv.push_str(&format!("{id},{l}\n"));
    }
    std::fs::write(file("labels.csv"), csv).unwrap();
    anchor::write(&file("checkpoint.json"), &g.checkpoint()).unwrap();
}

#[test]
#[ignore = "writes this version's sealed-round fixture; run by hand at release time"]
fn write_round_fixture() {
    let version = env!("CARGO_PKG_VERSION");
    let file = |what: &str| dir().join(format!("v{version}-round.{what}"));
    let export_path = file("export.jsonl");
    assert!(
        !export_path.exists(),
        "{} exists: fixtures of a released version are never rewritten",
        export_path.display()
    );
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        daily_quota: 2,
        ..PolicyInput::default()
    };
    let mut g = audit_support::Generated::new("round-fixture", 300, policy, 3, 2027);
    // Three teams; team 0 sends a third entry the same day (refused for the quota).
    for (t, accuracy) in [(0, 70), (1, 80), (2, 88), (0, 74), (0, 76), (1, 82)] {
        g.advance(900);
        g.submit(t, accuracy);
    }
    let organizer = g.user("olga", &[Role::Organizer], None);
    g.advance(60);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "round complete")
        .unwrap();
    let ex = g.export();
    let kinds: Vec<&str> = ex.entries.iter().map(|e| e.kind.as_str()).collect();
    assert!(kinds.contains(&"sealed") && kinds.contains(&"refusal") && kinds.contains(&"round"));
    ex.write_file(&export_path).unwrap();
    let mut csv = String::from("id,label\n");
    for (id, l) in g.ids.iter().zip(&g.labels) {
        csv.push_str(&format!("{id},{l}\n"));
    }
    std::fs::write(file("labels.csv"), csv).unwrap();
    anchor::write(&file("checkpoint.json"), &g.checkpoint()).unwrap();
}

#[test]
fn every_committed_fixture_audits_clean() {
    let mut seen = 0;
    for entry in std::fs::read_dir(dir()).unwrap() {
        let path = entry.unwrap().path();
        let file = path.file_name().unwrap().to_string_lossy().to_string();
        let Some(stem) = file.strip_suffix(".export.jsonl") else {
            continue;
        };
        seen += 1;
        let ex = Export::read(&path).unwrap();
        let labels_path = dir().join(format!("{stem}.labels.csv"));
        let table = read_table(&labels_path, &TableSpec::new("id", ["label"])).unwrap();
        let labels = LabelColumns {
            ids: table.rows.iter().map(|r| r.id.clone()).collect(),
            columns: vec![table.rows.iter().map(|r| r.values[0].clone()).collect()],
        };
        let cp = Checkpoint::read(&dir().join(format!("{stem}.checkpoint.json"))).unwrap();
        let report = audit(
            &ex,
            AuditOptions {
                labels: Some(labels),
                checkpoints: vec![(format!("{stem}.checkpoint.json"), cp)],
                ..AuditOptions::default()
            },
        );
        assert!(report.clean(), "{file}: {:#?}", report.findings);
        assert!(!report.queries.is_empty() && report.refusals > 0, "{file}");
        assert!(report.queries.iter().all(|q| q.replayed), "{file}");
        // And a changed fixture fails: the check can fail.
        let mut changed = ex.clone();
        let k = report.queries[0].entry as usize;
        changed.entries[k].body = changed.entries[k]
            .body
            .replacen("\"lower\":", "\"lower\": ", 1);
        assert!(!audit(&changed, AuditOptions::default()).clean(), "{file}");
    }
    assert!(seen >= 1, "no ledger fixture in {}", dir().display());
}
