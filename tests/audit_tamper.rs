//! The offline audit on ledgers written by the real engine: a clean export verifies, and every
//! kind of tampering, truncation, rebuilding and crafted accounting is found and named.

mod audit_support;

use holdout_ledger::audit::anchor::Checkpoint;
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, Finding, Receipt, Released, Report, audit};
use holdout_ledger::engine::SubmitOutcome;
use holdout_ledger::ledger::{self, Entry};
use serde_json::Value;

use audit_support::{Generated, small};

fn run(export: &Export, opts: AuditOptions<'_>) -> Report {
    audit(export, opts)
}

fn plain(export: &Export) -> Report {
    run(export, AuditOptions::default())
}

fn names(report: &Report, entry: u64) -> bool {
    report.findings.iter().any(|f| f.entry == Some(entry))
}

/// Recomputes links and hashes from position `from` on, as someone rebuilding a chain would.
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

#[test]
fn a_clean_export_verifies_with_labels_checkpoint_and_receipts() {
    let mut g = small(1);
    let cp = g.checkpoint();
    let ex = g.export();
    assert!(ex.entries.iter().any(|e| e.kind == "answer"));
    let receipt = {
        let e = &ex.entries[g.answer_entries[0] as usize];
        receipt_of(&g.name, e)
    };
    let report = run(
        &ex,
        AuditOptions {
            labels: Some(g.label_columns()),
            checkpoints: vec![("cp".into(), cp.clone())],
            notes: Vec::new(),
            receipts: vec![("r".into(), receipt)],
            trusted_key: Some(cp.public_key.clone()),
            progress: None,
        },
    );
    assert!(report.clean(), "{:#?}", report.findings);
    assert!(report.labels_checked);
    assert_eq!(report.queries.len(), g.answer_entries.len());
    assert!(report.queries.iter().all(|q| q.replayed));
    assert_eq!(report.identity_events, 4);
}

#[test]
fn wrong_labels_fail_the_genesis_digest() {
    let mut g = small(2);
    let ex = g.export();
    let mut labels = g.label_columns();
    labels.columns[0][7] = if labels.columns[0][7] == "1" {
        "0"
    } else {
        "1"
    }
    .into();
    let report = run(
        &ex,
        AuditOptions {
            labels: Some(labels),
            ..AuditOptions::default()
        },
    );
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(0) && f.field == "labels_sha256"),
        "{:#?}",
        report.findings
    );
}

#[test]
fn changing_any_field_of_any_entry_is_named() {
    let mut g = small(3);
    let ex = g.export();
    let n = ex.entries.len();
    for i in 0..n {
        for field in ["seq", "kind", "body", "salt", "prev_hash", "hash", "chain"] {
            let mut t = ex.clone();
            let e = &mut t.entries[i];
            match field {
                "seq" => e.seq += 100,
                "kind" => e.kind.push('x'),
                "body" => e.body = e.body.replacen(':', ": ", 1),
                "salt" => e.salt = format!("{:0>32}", "1"),
                "prev_hash" => e.prev_hash = "f".repeat(64),
                "hash" => e.hash = "e".repeat(64),
                _ => e.chain.push('x'),
            }
            let report = plain(&t);
            assert!(
                names(&report, i as u64),
                "changing {field} of entry {i} was not named: {:#?}",
                report.findings
            );
        }
    }
    // The identity chain is verified too.
    let mut t = ex.clone();
    t.users[1].body = t.users[1].body.replacen(':', ": ", 1);
    let report = plain(&t);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.chain == ledger::USERS_CHAIN && f.entry == Some(1)),
        "{:#?}",
        report.findings
    );
}

#[test]
fn deleting_inserting_reordering_are_named() {
    let mut g = small(4);
    let ex = g.export();
    let k = 3;

    let mut deleted = ex.clone();
    deleted.entries.remove(k);
    assert!(names(&plain(&deleted), k as u64));

    let mut inserted = ex.clone();
    let copy = inserted.entries[k].clone();
    inserted.entries.insert(k, copy);
    assert!(names(&plain(&inserted), k as u64 + 1));

    let mut swapped = ex.clone();
    swapped.entries.swap(2, 4);
    let r = plain(&swapped);
    assert!(names(&r, 2) && names(&r, 4), "{:#?}", r.findings);
}

#[test]
fn truncation_is_caught_by_a_checkpoint_and_a_receipt() {
    let mut g = small(5);
    let cp = g.checkpoint();
    let ex = g.export();
    let mut cut = ex.clone();
    cut.entries.truncate(ex.entries.len() - 2);
    cut.header
        .chains
        .insert(g.name.clone(), cut.entries.len() as u64);
    // Without an anchor, a cut chain is still a valid chain.
    assert!(plain(&cut).clean(), "{:#?}", plain(&cut).findings);
    let last = ex.entries.last().unwrap();
    let receipt = receipt_of(&g.name, last);
    let report = run(
        &cut,
        AuditOptions {
            checkpoints: vec![("head.json".into(), cp.clone())],
            receipts: vec![("answer.json".into(), receipt)],
            ..AuditOptions::default()
        },
    );
    let f: Vec<&Finding> = report.findings.iter().collect();
    assert!(
        f.iter().any(|f| f.field.contains("checkpoint head.json")
            && f.problem.contains("truncated")
            && f.entry == Some(cp.seq)),
        "{f:#?}"
    );
    assert!(
        f.iter()
            .any(|f| f.field.contains("receipt answer.json") && f.problem.contains("truncated")),
        "{f:#?}"
    );
}

#[test]
fn a_rebuilt_chain_that_omits_one_query_fails_against_an_earlier_checkpoint() {
    let mut g = small(6);
    let early = g.checkpoint();
    g.advance(60);
    g.submit(0, 90);
    let mut ex = g.export();
    // Rebuild: drop the second answer, re-link and re-hash everything after it.
    let k = g.answer_entries[1] as usize;
    ex.entries.remove(k);
    rehash(&mut ex.entries, k);
    ex.header
        .chains
        .insert(g.name.clone(), ex.entries.len() as u64);
    let chain_only: Vec<_> = plain(&ex)
        .findings
        .into_iter()
        .filter(|f| f.field == "chain")
        .collect();
    assert!(
        chain_only.is_empty(),
        "the rebuilt chain links: {chain_only:#?}"
    );
    let report = run(
        &ex,
        AuditOptions {
            checkpoints: vec![("early.json".into(), early.clone())],
            ..AuditOptions::default()
        },
    );
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field.ends_with("head_hash") && f.entry == Some(early.seq)),
        "{:#?}",
        report.findings
    );
}

#[test]
fn a_crafted_interval_charge_or_budget_is_caught_by_the_replay() {
    let mut g = small(7);
    let ex = g.export();
    let k = g.answer_entries[2] as usize;
    for (field, edit) in [
        (
            "lower",
            Box::new(|v: &mut Value| v["lower"] = (v["lower"].as_f64().unwrap() + 0.01).into())
                as Box<dyn Fn(&mut Value)>,
        ),
        (
            "upper",
            Box::new(|v: &mut Value| v["upper"] = (v["upper"].as_f64().unwrap() - 0.02).into()),
        ),
        (
            "level_nats",
            Box::new(|v: &mut Value| {
                v["level_nats"] = (v["level_nats"].as_f64().unwrap() - 0.5).into()
            }),
        ),
        (
            "code_nats",
            Box::new(|v: &mut Value| v["code_nats"] = 0.0.into()),
        ),
        (
            "budget.spent",
            Box::new(|v: &mut Value| v["budget"]["spent"] = 0.001.into()),
        ),
        (
            "symbol",
            Box::new(|v: &mut Value| v["symbol"] = "0.01".into()),
        ),
    ] {
        let mut t = ex.clone();
        edit_body(&mut t.entries[k], |v| edit(v));
        rehash(&mut t.entries, k);
        let report = plain(&t);
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(k as u64) && f.field == field),
            "a crafted {field} at entry {k} was not caught: {:#?}",
            report.findings
        );
        assert!(
            report.findings.iter().all(|f| f.field != "chain"),
            "the crafted chain should link"
        );
    }
    // Exact losses that do not give the released symbol.
    let mut t = ex.clone();
    edit_body(&mut t.entries[k], |v| {
        let s = v["exact"][0]["sum"].as_f64().unwrap();
        v["exact"][0]["sum"] = (s + 40.0).into();
        v["exact"][0]["errors"] = ((s + 40.0) as u64).into();
    });
    rehash(&mut t.entries, k);
    assert!(names(&plain(&t), k as u64));
}

/// The core's own record is compared as canonical text with what the core computes again: a
/// value changed inside it, a field added or one removed (hashes recomputed) is named "core",
/// and the same record re-encoded canonically is not a finding.
#[test]
fn a_crafted_core_record_is_named() {
    let mut g = small(7);
    let ex = g.export();
    let k = g.answer_entries[3] as usize;
    type Edit = Box<dyn Fn(&mut Value)>;
    let edits: [(&str, Edit); 4] = [
        (
            "a value inside it",
            Box::new(|v: &mut Value| {
                let q = v["core"]["queries_left"].as_u64().unwrap();
                v["core"]["queries_left"] = (q + 1).into()
            }),
        ),
        (
            "a nested value",
            Box::new(|v: &mut Value| {
                let l = v["core"]["transcript_nats"].as_f64().unwrap();
                v["core"]["transcript_nats"] = (l * (1.0 + 1e-15)).into()
            }),
        ),
        (
            "an added field",
            Box::new(|v: &mut Value| v["core"]["extra"] = true.into()),
        ),
        (
            "a removed field",
            Box::new(|v: &mut Value| {
                v["core"].as_object_mut().unwrap().remove("statement");
            }),
        ),
    ];
    for (what, edit) in edits {
        let mut t = ex.clone();
        edit_body(&mut t.entries[k], |v| edit(v));
        assert_ne!(
            t.entries[k].body, ex.entries[k].body,
            "{what}: the edit changed nothing"
        );
        rehash(&mut t.entries, k);
        let report = plain(&t);
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(k as u64) && f.field == "core"),
            "{what} in the core record at entry {k} was not named: {:#?}",
            report.findings
        );
    }
    // Parsed and written again canonically: the same text, so the same (clean) audit.
    let mut t = ex.clone();
    edit_body(&mut t.entries[k], |_| {});
    assert_eq!(t.entries[k].body, ex.entries[k].body);
    assert!(plain(&t).clean());
}

#[test]
fn refusals_are_recomputed_from_public_facts() {
    // Past the tolerance everything is refused; the refusal must follow from the public state.
    let mut g = small(8);
    let mut refused = None;
    for _ in 0..40 {
        g.advance(30);
        if let SubmitOutcome::Refusal {
            receipt: Some(r), ..
        } = g.submit(1, 70)
        {
            refused = Some(seq_of(&mut g, &r.entry_hash) as usize);
            break;
        }
    }
    let k = refused.expect("the holdout refuses past its tolerance");
    let ex = g.export();
    assert!(plain(&ex).clean(), "{:#?}", plain(&ex).findings);
    assert!(plain(&ex).refusals >= 1);
    // Every refusal is listed with its entry, team and reason, not only counted.
    let listed = plain(&ex).refusal_list;
    assert_eq!(listed.len() as u64, plain(&ex).refusals);
    assert!(
        listed
            .iter()
            .any(|(entry, what)| *entry == k as u64 && what.contains("team")),
        "{listed:?}"
    );

    // A refusal carrying a score.
    let mut t = ex.clone();
    edit_body(&mut t.entries[k], |v| v["score"] = 0.31.into());
    rehash(&mut t.entries, k);
    assert!(
        plain(&t)
            .findings
            .iter()
            .any(|f| f.entry == Some(k as u64) && f.field == "score")
    );

    // A refusal showing a budget the public state did not have.
    let mut t = ex.clone();
    edit_body(&mut t.entries[k], |v| {
        v["budget"]["refused"] = (v["budget"]["refused"].as_u64().unwrap() + 5).into()
    });
    rehash(&mut t.entries, k);
    assert!(
        plain(&t)
            .findings
            .iter()
            .any(|f| f.entry == Some(k as u64) && f.field == "budget.refused")
    );

    // A refusal for a reason the public state does not give.
    let mut t = ex.clone();
    edit_body(&mut t.entries[k], |v| v["reason"] = "quota".into());
    rehash(&mut t.entries, k);
    assert!(
        plain(&t)
            .findings
            .iter()
            .any(|f| f.entry == Some(k as u64) && f.field == "reason")
    );

    // An early answer turned into a refusal: the public state then would have answered.
    let a = g.answer_entries[0] as usize;
    let mut t = ex.clone();
    t.entries[a].kind = "refusal".into();
    t.entries[a].body = t.entries[k].body.clone();
    rehash(&mut t.entries, a);
    assert!(names(&plain(&t), a as u64));
}

#[test]
fn receipts_verify_and_forgeries_do_not() {
    let mut g = small(9);
    let ex = g.export();
    let e = &ex.entries[g.answer_entries[1] as usize];
    let good = receipt_of(&g.name, e);
    let check = |r: Receipt| {
        run(
            &ex,
            AuditOptions {
                receipts: vec![("r.json".into(), r)],
                ..AuditOptions::default()
            },
        )
    };
    assert!(check(good.clone()).clean());
    let mut forged = good.clone();
    let mut emptied = e.clone();
    emptied.body = "{}".into();
    forged.entry_hash = ledger::Encoding::V2.hash(&emptied).unwrap();
    assert!(!check(forged).clean());
    let mut other_query = good.clone();
    other_query.query += 1;
    assert!(!check(other_query).clean());
    // A receipt that came with its answer: the released symbol and interval must be the entry's.
    let body: serde_json::Value = serde_json::from_str(&e.body).unwrap();
    let released = Released {
        target: body["target"].as_str().unwrap().into(),
        symbol: body["symbol"].as_str().unwrap().into(),
        lower: body["lower"].as_f64().unwrap(),
        upper: body["upper"].as_f64().unwrap(),
    };
    let with_answer = Receipt {
        released: Some(released.clone()),
        ..good.clone()
    };
    assert!(check(with_answer.clone()).clean());
    let mut narrower = with_answer.clone();
    narrower.released.as_mut().unwrap().upper -= 1e-9;
    assert!(!check(narrower).clean());
    // 0.1.0 receipts also carried the entry's number and salt: still checked when present.
    let old_style = Receipt {
        entry: Some(e.seq),
        salt: Some(e.salt.clone()),
        ..good.clone()
    };
    assert!(check(old_style.clone()).clean());
    let mut other_salt = old_style.clone();
    other_salt.salt = Some("00".repeat(16));
    assert!(!check(other_salt).clean());
    let mut moved = old_style;
    moved.entry = Some(e.seq + 1);
    assert!(!check(moved).clean());
}

/// The receipt the daemon hands out for an entry: holdout, the team's query number, the hash.
fn receipt_of(holdout: &str, e: &Entry) -> Receipt {
    let body: serde_json::Value = serde_json::from_str(&e.body).unwrap();
    Receipt {
        holdout: holdout.into(),
        entry_hash: e.hash.clone(),
        query: body["query"].as_u64().unwrap_or(0),
        entry: None,
        salt: None,
        released: None,
    }
}

fn seq_of(g: &mut Generated, hash: &str) -> u64 {
    g.engine
        .store()
        .conn()
        .query_row("SELECT seq FROM ledger WHERE hash = ?1", [hash], |r| {
            r.get::<_, i64>(0)
        })
        .unwrap() as u64
}

#[test]
fn checkpoint_signatures_are_checked() {
    let mut g = small(10);
    let cp = g.checkpoint();
    let ex = g.export();
    let with = |cp: Checkpoint, key: Option<String>| {
        run(
            &ex,
            AuditOptions {
                checkpoints: vec![("cp.json".into(), cp)],
                trusted_key: key,
                ..AuditOptions::default()
            },
        )
    };
    assert!(with(cp.clone(), None).clean());
    let mut bad = cp.clone();
    bad.at = "2030-01-01T00:00:00Z".into();
    assert!(
        with(bad, None)
            .findings
            .iter()
            .any(|f| f.field.ends_with("signature"))
    );
    assert!(
        with(cp, Some("ab".repeat(32)))
            .findings
            .iter()
            .any(|f| f.field.ends_with("public_key"))
    );
}

#[test]
fn the_export_file_round_trips_and_names_bad_lines() {
    let mut g: Generated = small(11);
    let ex = g.export();
    let mut buf = Vec::new();
    ex.write_to(&mut buf).unwrap();
    let back = Export::parse("x.jsonl", &buf[..]).unwrap();
    assert_eq!(back.entries, ex.entries);
    assert_eq!(back.users, ex.users);
    assert!(plain(&back).clean());
    let text = String::from_utf8(buf).unwrap();
    let broken: String = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 3 {
                "{not json".to_string()
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n");
    let err = Export::parse("x.jsonl", broken.as_bytes()).unwrap_err();
    assert!(err.to_string().contains("x.jsonl:4"), "{err}");
    let other = text.replacen("holdout-ledger-export/1", "holdout-ledger-export/9", 1);
    let err = Export::parse("y.jsonl", other.as_bytes()).unwrap_err();
    assert!(
        err.to_string().contains("y.jsonl:1") && err.to_string().contains("export/9"),
        "{err}"
    );
}

/// The identity chain is anchored too: a checkpoint of `@users` catches a rewritten team and a
/// deleted identity chain, however carefully the hashes were recomputed.
#[test]
fn an_identity_checkpoint_catches_rewritten_or_deleted_identities() {
    let mut g = small(11);
    let at = holdout_ledger::auth::rfc3339(g.engine.now());
    let cp = holdout_ledger::audit::anchor::checkpoint(
        g.engine.store().conn(),
        ledger::USERS_CHAIN,
        &at,
    )
    .unwrap();
    assert_eq!(cp.holdout, ledger::USERS_CHAIN);
    let ex = g.export();
    assert!(ex.users.len() >= 2, "the generator adds users");
    let with_cp = |ex: &Export| {
        run(
            ex,
            AuditOptions {
                checkpoints: vec![("users.json".into(), cp.clone())],
                ..AuditOptions::default()
            },
        )
    };
    let clean = with_cp(&ex);
    assert!(clean.clean(), "{:#?}", clean.findings);
    assert_eq!(clean.checkpoints.len(), 1);

    // A user's team rewritten, every later hash recomputed: the chain verifies on its own, the
    // checkpoint does not.
    let mut moved = ex.clone();
    let i = moved
        .users
        .iter()
        .position(|e| e.body.contains("\"team\":\""))
        .expect("a user with a team");
    edit_body(&mut moved.users[i], |v| {
        v["team"] = Value::from("another-team")
    });
    rehash(&mut moved.users, i);
    let report = with_cp(&moved);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field.contains("checkpoint users.json") && f.field.contains("head_hash")),
        "{:#?}",
        report.findings
    );

    // Every identity event deleted.
    let mut gone = ex.clone();
    gone.users.clear();
    gone.header.chains.insert(ledger::USERS_CHAIN.into(), 0);
    let report = with_cp(&gone);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field.contains("checkpoint users.json") && f.problem.contains("truncated")),
        "{:#?}",
        report.findings
    );
}
