//! Code versions in the ledger: a holdout created today records code version 2 in its
//! genesis policy and audits clean; the audit re-derives every answer's code with the version
//! the genesis records, so a genesis relabelled to version 1 (or with the field removed, which
//! reads as version 1), hashes recomputed, is caught at the first answer whose code differs.

mod audit_support;

use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, Report, audit};
use serde_json::Value;

use audit_support::{edit_body, rehash, small};

fn plain(export: &Export) -> Report {
    audit(export, AuditOptions::default())
}

/// A change to a genesis body.
type Edit = Box<dyn Fn(&mut Value)>;

fn genesis(export: &Export) -> Value {
    serde_json::from_str(&export.entries[0].body).unwrap()
}

#[test]
fn a_version_2_holdout_records_its_code_and_audits_clean() {
    let mut g = small(21);
    let ex = g.export();
    assert_eq!(genesis(&ex)["policy"]["core"]["code_version"], 2);
    let report = plain(&ex);
    assert!(report.clean(), "{:#?}", report.findings);
    assert!(report.queries.iter().all(|q| q.replayed));
    // The third answer is team 0's second: coded relative to its first cell, so it costs
    // less than the uniform ln(101) whenever the cell moved by under 4.
    let third: Value =
        serde_json::from_str(&ex.entries[g.answer_entries[2] as usize].body).unwrap();
    let code = third["code_nats"].as_f64().unwrap();
    assert!(code > 0.0 && code <= 202f64.ln(), "{code}");
    assert!((code - 101f64.ln()).abs() > 1e-9, "{code}");
}

#[test]
fn a_genesis_relabelled_to_version_1_is_caught_by_the_audit() {
    let mut g = small(22);
    let ex = g.export();
    let relabel: [(&str, Edit); 2] = [
        (
            "set to 1",
            Box::new(|v: &mut Value| v["policy"]["core"]["code_version"] = 1.into()),
        ),
        (
            "removed",
            Box::new(|v: &mut Value| {
                v["policy"]["core"]
                    .as_object_mut()
                    .unwrap()
                    .remove("code_version");
            }),
        ),
    ];
    for (what, edit) in relabel {
        let mut t = ex.clone();
        edit_body(&mut t.entries[0], |v| edit(v));
        rehash(&mut t.entries, 0);
        let report = plain(&t);
        assert!(!report.clean(), "code_version {what}: audited clean");
        // Each team's first answer is uniform under both versions; team 0's second answer
        // (the third) is where the codes part.
        let k = g.answer_entries[2];
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(k) && f.field == "code_nats"),
            "code_version {what}: no code_nats finding at entry {k}: {:#?}",
            report.findings
        );
        assert!(
            report.findings.iter().all(|f| f.field != "chain"),
            "the relabelled chain should link"
        );
    }
}

#[test]
fn an_unknown_code_version_is_named() {
    let mut g = small(23);
    let mut t = g.export();
    edit_body(&mut t.entries[0], |v| {
        v["policy"]["core"]["code_version"] = 9.into()
    });
    rehash(&mut t.entries, 0);
    let report = plain(&t);
    assert!(
        report.findings.iter().any(|f| f.entry == Some(0)
            && (f.field.contains("code_version") || f.problem.contains("code_version"))),
        "{:#?}",
        report.findings
    );
}
