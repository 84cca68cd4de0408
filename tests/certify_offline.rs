//! `holdout certify --export FILE --checkpoint CP` from files alone (no daemon: the server
//! address points at a port nothing listens on), for a charged answer, a sealed entry answered
//! by its round, a sealed entry not answered yet and a free adoption; checkpoints that do not
//! anchor the export are refused. And `holdout audit --find / --predictions` on sealed entries:
//! the round answer that scored them is named and its exact loss re-scored.
//!
//! Ledgers are written by the real engine in process (`audit_support::Generated`, invented
//! labels and predictions), then exported and checkpointed to files the binary reads.

mod audit_support;
mod common;

use std::path::Path;

use holdout_ledger::audit::anchor::{self, Checkpoint};
use holdout_ledger::audit::check_genesis;
use holdout_ledger::audit::export::Export;
use holdout_ledger::auth::Role;
use holdout_ledger::cli::client::show::interval_text;
use holdout_ledger::engine::{AnswerRecord, PolicyInput, SealedRecord, SubmitOutcome};
use holdout_ledger::ledger::{self, Kind};
use serde_json::Value;

use audit_support::Generated;
use common::{Run, dead_url, holdout, run};

/// Runs the binary with no daemon reachable.
fn offline(args: &[&str]) -> Run {
    let mut cmd = holdout();
    cmd.env("HOLDOUT_SERVER", dead_url());
    run(cmd, args)
}

fn write_export(dir: &Path, file: &str, ex: &Export) -> String {
    let p = dir.join(file);
    ex.write_file(&p).unwrap();
    p.display().to_string()
}

fn write_checkpoint(dir: &Path, file: &str, cp: &Checkpoint) -> String {
    let p = dir.join(file);
    anchor::write(&p, cp).unwrap();
    p.display().to_string()
}

fn write(dir: &Path, file: &str, text: &str) -> String {
    let p = dir.join(file);
    std::fs::write(&p, text).unwrap();
    p.display().to_string()
}

/// The certified answer in words, as the certificate must say it: the released value and the
/// reported interval rounded outward (`interval_text`).
fn expected_words(r: &AnswerRecord) -> (String, f64, f64) {
    let iv = interval_text(r.lower, r.upper);
    let (lo, hi) = iv
        .trim_start_matches('[')
        .trim_end_matches(']')
        .split_once(", ")
        .unwrap();
    let value = r.symbol.rsplit(' ').next().unwrap();
    let mut words = format!("error {value}, between {lo} and {hi}");
    if value != r.symbol {
        words.push_str(&format!(" (released as {})", r.symbol));
    }
    (words, lo.parse().unwrap(), hi.parse().unwrap())
}

/// Asserts a certificate (text or JSON) shows no exact loss, no salt, and nothing of another
/// team: its name, its users, its notes, its prediction digests.
#[track_caller]
fn assert_nothing_leaks(cert: &str, ex: &Export, own_team: &str, others: &[&str]) {
    assert!(!cert.contains("\"exact\""), "exact losses in\n{cert}");
    assert!(!cert.contains("\"salt\""), "a salt field in\n{cert}");
    assert!(!cert.contains("\"core\""), "the core's record in\n{cert}");
    for e in ex.entries.iter().chain(&ex.users) {
        assert!(
            !cert.contains(&e.salt),
            "salt of entry {} in\n{cert}",
            e.seq
        );
    }
    for other in others {
        assert!(!cert.contains(other), "{other:?} in\n{cert}");
    }
    for e in &ex.entries {
        let body: Value = serde_json::from_str(&e.body).unwrap();
        let mut records = vec![body.clone()];
        if let Some(a) = body["answers"].as_array() {
            records.extend(a.iter().cloned());
        }
        for r in records {
            let (Some(team), Some(digest)) = (r["team"].as_str(), r["digest"].as_str()) else {
                continue;
            };
            if team != own_team {
                assert!(
                    !cert.contains(digest),
                    "digest of {team}'s entry {} in\n{cert}",
                    e.seq
                );
                let note = r["note"].as_str().unwrap_or("");
                assert!(note.is_empty() || !cert.contains(note), "{team}'s note");
            }
        }
    }
}

fn answer_of(out: &SubmitOutcome) -> (AnswerRecord, String) {
    match out {
        SubmitOutcome::Answer {
            record, receipt, ..
        } => ((**record).clone(), receipt.entry_hash.clone()),
        other => panic!("not an answer: {other:?}"),
    }
}

fn sealed_of(out: &SubmitOutcome) -> (SealedRecord, String) {
    match out {
        SubmitOutcome::Sealed {
            record, receipt, ..
        } => ((**record).clone(), receipt.entry_hash.clone()),
        other => panic!("not a sealed entry: {other:?}"),
    }
}

fn guarantee(ex: &Export) -> String {
    let mut scratch = Vec::new();
    check_genesis(ex, &mut scratch).unwrap().0.guarantee()
}

#[test]
fn a_charged_answer_is_certified_from_the_export_and_checkpoint_alone() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let policy = PolicyInput {
        answers: "rounded:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("shelf", 400, policy, 2, 7);
    let p = g.predictions(85);
    g.submit_values(0, p, "team0 baseline");
    g.advance(60);
    let p = g.predictions(70);
    g.submit_values(1, p, "bravo private notes");
    g.advance(60);
    let p = g.predictions(92);
    let (record, hash) = answer_of(&g.submit_values(0, p, "team0 gradient boosting"));
    let cp = g.checkpoint();
    let ex = g.export();
    let export = write_export(d, "shelf.jsonl", &ex);
    let cpf = write_checkpoint(d, "shelf-cp.json", &cp);
    let q = record.query.to_string();

    let json = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
        "--json",
    ])
    .ok();
    let cert = json.json();
    let (words, lo, hi) = expected_words(&record);
    assert_eq!(cert["kind"], "answer");
    assert_eq!(cert["answer"]["in_words"], words.as_str());
    let score = record.score.unwrap();
    assert!(lo <= record.lower && record.upper <= hi && lo <= score && score <= hi);
    assert_eq!(cert["answer"]["query"], record.query);
    assert_eq!(cert["answer"]["team"], "team0");
    assert_eq!(cert["submission"]["note"], "team0 gradient boosting");
    assert_eq!(cert["submission"]["digest"], record.digest.as_str());
    assert_eq!(cert["charge"]["charged"], true);
    assert_eq!(cert["receipt"]["entry_hash"], hash.as_str());
    assert_eq!(cert["receipt"]["holdout"], "shelf");
    assert_eq!(cert["checkpoint"], serde_json::to_value(&cp).unwrap());
    assert_eq!(cert["guarantee"], guarantee(&ex).as_str());
    assert!(cert["round"].is_null());
    assert_nothing_leaks(
        &json.stdout,
        &ex,
        "team0",
        &["team1", "analyst1", "team0 baseline"],
    );

    // The text form says the same in plain words.
    let text = offline(&[
        "certify",
        "shelf",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
    ])
    .ok()
    .stdout;
    for part in [
        format!("answer      {words}"),
        record.digest.clone(),
        "note \"team0 gradient boosting\"".into(),
        hash.clone(),
        cp.head_hash.clone(),
        cp.signature.clone(),
        guarantee(&ex),
    ] {
        assert!(text.contains(&part), "{part:?} missing from\n{text}");
    }
    assert_nothing_leaks(
        &text,
        &ex,
        "team0",
        &["team1", "analyst1", "team0 baseline"],
    );

    // --out writes the same certificate; the certificate is itself a receipt the audit checks.
    let out = d.join("cert.json").display().to_string();
    offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
        "--json",
        "--out",
        &out,
    ])
    .ok();
    assert_eq!(std::fs::read_to_string(&out).unwrap(), json.stdout);
    let audit = offline(&[
        "audit",
        &export,
        "--receipt",
        &out,
        "--checkpoint",
        &cpf,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(audit["clean"], true, "{audit:#}");
    assert_eq!(audit["receipts"].as_array().unwrap().len(), 1);

    // A holdout name that is not the export's is refused.
    let wrong = offline(&[
        "certify",
        "other",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
    ])
    .code(2);
    assert!(wrong.stderr.contains("not of other"), "{}", wrong.stderr);
}

/// A sealed final round: three teams, team0 twice. Returns the engine, team0's second sealed
/// entry (record, receipt hash, predictions), and the checkpoint signed before the close.
fn sealed_round() -> (Generated, SealedRecord, String, Vec<String>, Checkpoint) {
    let policy = PolicyInput {
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("final", 400, policy, 3, 11);
    let mut mine = None;
    for (t, accuracy, note) in [
        (0, 70, "team0 first try"),
        (1, 80, "bravo ensemble"),
        (2, 90, "charlie tuned"),
        (0, 86, "team0 final model"),
    ] {
        g.advance(30);
        let preds = g.predictions(accuracy);
        let out = g.submit_values(t, preds.clone(), note);
        let (record, hash) = sealed_of(&out);
        if note == "team0 final model" {
            mine = Some((record, hash, preds));
        }
    }
    let before = g.checkpoint();
    let organizer = g.user("organizer", &[Role::Organizer], None);
    g.advance(30);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "deadline reached")
        .unwrap();
    let (record, hash, preds) = mine.unwrap();
    (g, record, hash, preds, before)
}

/// The round entry of an export, and the answer it gave the sealed entry of `team`/`query`
/// (with its place among the round's answers).
fn round_answer(ex: &Export, team: &str, query: u64) -> (ledger::Entry, AnswerRecord, usize) {
    let round = ex
        .entries
        .iter()
        .find(|e| e.kind() == Some(Kind::Round))
        .expect("a round entry")
        .clone();
    let body: Value = serde_json::from_str(&round.body).unwrap();
    let answers: Vec<AnswerRecord> = serde_json::from_value(body["answers"].clone()).unwrap();
    let k = answers
        .iter()
        .position(|a| a.team == team && a.query == query)
        .expect("the round answers the sealed entry");
    let a = answers[k].clone();
    (round, a, k)
}

#[test]
fn a_sealed_entry_is_certified_with_its_round_answer_or_as_unanswered() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (mut g, sealed, sealed_hash, _, before) = sealed_round();
    let cp = g.checkpoint();
    let ex = g.export();
    let export = write_export(d, "final.jsonl", &ex);
    let cpf = write_checkpoint(d, "final-cp.json", &cp);
    let (round, answer, _) = round_answer(&ex, "team0", sealed.query);
    let q = sealed.query.to_string();
    let others = ["team1", "team2", "analyst1", "analyst2", "team0 first try"];

    let json = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
        "--team",
        "team0",
        "--json",
    ])
    .ok();
    let cert = json.json();
    let (words, lo, hi) = expected_words(&answer);
    assert_eq!(cert["kind"], "sealed");
    assert_eq!(cert["answer"]["in_words"], words.as_str());
    let score = answer.score.unwrap();
    assert!(lo <= score && score <= hi);
    assert_eq!(cert["answer"]["query"], sealed.query);
    assert_eq!(cert["submission"]["note"], "team0 final model");
    assert_eq!(cert["submission"]["digest"], sealed.digest.as_str());
    assert_eq!(cert["receipt"]["entry_hash"], sealed_hash.as_str());
    assert_eq!(cert["round"]["entry_hash"], round.hash.as_str());
    assert_eq!(cert["round"]["receipt"]["entry_hash"], round.hash.as_str());
    assert_eq!(cert["charge"]["delta_i"], sealed.delta_i);
    assert_eq!(cert["checkpoint"], serde_json::to_value(&cp).unwrap());
    assert!(
        cert["status"]
            .as_str()
            .unwrap()
            .contains("answered when the round closed"),
        "{cert:#}"
    );
    assert_nothing_leaks(&json.stdout, &ex, "team0", &others);

    // Both receipts the certificate cites hold in the export.
    let rr = write(
        d,
        "round-receipt.json",
        &cert["round"]["receipt"].to_string(),
    );
    let cf = write(d, "cert.json", &json.stdout);
    let audit = offline(&[
        "audit",
        &export,
        "--receipt",
        &cf,
        "--receipt",
        &rr,
        "--checkpoint",
        &cpf,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(audit["clean"], true, "{audit:#}");

    let text = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        &q,
        "--team",
        "team0",
    ])
    .ok()
    .stdout;
    for part in [
        format!("answer      {words}"),
        sealed.digest.clone(),
        "note \"team0 final model\"".into(),
        sealed_hash.clone(),
        format!("round       entry {}", round.hash),
        cp.head_hash.clone(),
        guarantee(&ex),
    ] {
        assert!(text.contains(&part), "{part:?} missing from\n{text}");
    }
    assert_nothing_leaks(&text, &ex, "team0", &others);

    // A checkpoint signed before the close anchors the sealed entry but not its round: the
    // charge is certified, the answer is not.
    let cpb = write_checkpoint(d, "before-cp.json", &before);
    let early = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpb,
        "--query",
        &q,
        "--team",
        "team0",
        "--json",
    ])
    .ok();
    let cert = early.json();
    assert_eq!(cert["kind"], "sealed");
    assert!(cert["answer"].is_null(), "{cert:#}");
    assert!(cert["round"].is_null(), "{cert:#}");
    assert!(
        cert["status"]
            .as_str()
            .unwrap()
            .contains("unanswered as of the checkpoint"),
        "{cert:#}"
    );
    assert_eq!(cert["charge"]["charged"], true);
    assert_eq!(cert["charge"]["delta_i"], sealed.delta_i);
    assert_eq!(cert["charge"]["level_nats"], sealed.level_nats);
    assert_eq!(cert["receipt"]["entry_hash"], sealed_hash.as_str());
    assert!(!early.stdout.contains(&round.hash));
    assert!(!early.stdout.contains(&answer.symbol), "no answer shown");
    assert_nothing_leaks(&early.stdout, &ex, "team0", &others);

    // An export taken before the close: the round has not closed.
    let mut cut = ex.clone();
    cut.entries.truncate(before.seq as usize + 1);
    cut.header
        .chains
        .insert("final".into(), cut.entries.len() as u64);
    let cut_file = write_export(d, "before.jsonl", &cut);
    let text = offline(&[
        "certify",
        "--export",
        &cut_file,
        "--checkpoint",
        &cpb,
        "--query",
        &q,
        "--team",
        "team0",
    ])
    .ok()
    .stdout;
    assert!(
        text.contains("answer      none yet (sealed, unanswered)"),
        "{text}"
    );
    assert!(text.contains("its round has not closed"), "{text}");
    assert!(text.contains("share delta_i = "), "{text}");
}

#[test]
fn checkpoints_that_do_not_anchor_the_export_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let policy = PolicyInput {
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("shelf", 300, policy.clone(), 2, 3);
    let (first, _) = answer_of(&g.submit(0, 80));
    let early_cp = g.checkpoint();
    let early = g.export();
    g.advance(60);
    let (later, _) = answer_of(&g.submit(1, 75));
    let late_cp = g.checkpoint();
    let late = g.export();
    let early_file = write_export(d, "early.jsonl", &early);
    let late_file = write_export(d, "late.jsonl", &late);
    let certify = |export: &str, cp: &str, query: u64| {
        offline(&[
            "certify",
            "--export",
            export,
            "--checkpoint",
            cp,
            "--query",
            &query.to_string(),
        ])
    };

    // The checkpoint's head is not in the export (it was cut, or the checkpoint is newer).
    let late_cpf = write_checkpoint(d, "late-cp.json", &late_cp);
    let r = certify(&early_file, &late_cpf, first.query).code(8);
    assert!(
        r.stderr.contains("cannot be certified") && r.stderr.contains("truncated"),
        "{}",
        r.stderr
    );
    assert!(r.stdout.is_empty(), "no certificate: {}", r.stdout);

    // A chain rebuilt under the same name: a validly signed checkpoint of another chain.
    let mut other = Generated::new("shelf", 300, policy, 2, 4);
    other.submit(0, 80);
    other.advance(60);
    other.submit(1, 75);
    let other_cpf = write_checkpoint(d, "other-cp.json", &other.checkpoint());
    let r = certify(&late_file, &other_cpf, first.query).code(8);
    assert!(r.stderr.contains("rebuilt"), "{}", r.stderr);

    // A checkpoint whose signature does not match its fields.
    let mut forged = late_cp.clone();
    forged.at = "2030-01-01T00:00:00Z".into();
    let forged_cpf = write_checkpoint(d, "forged-cp.json", &forged);
    let r = certify(&late_file, &forged_cpf, first.query).code(8);
    assert!(r.stderr.contains("signature"), "{}", r.stderr);

    // A key other than the one pinned.
    let r = offline(&[
        "certify",
        "--export",
        &late_file,
        "--checkpoint",
        &late_cpf,
        "--query",
        &first.query.to_string(),
        "--public-key",
        &"ab".repeat(32),
    ])
    .code(8);
    assert!(r.stderr.contains("trusted key"), "{}", r.stderr);

    // An export whose certified entry was edited (the hash no longer matches its contents).
    let mut edited = late.clone();
    let e = edited
        .entries
        .iter_mut()
        .find(|e| e.kind() == Some(Kind::Answer))
        .unwrap();
    e.body = e.body.replace("\"note\":\"\"", "\"note\":\"edited\"");
    let edited_file = write_export(d, "edited.jsonl", &edited);
    let r = certify(&edited_file, &late_cpf, first.query).code(8);
    assert!(r.stderr.contains("hash does not match"), "{}", r.stderr);

    // An answer after the checkpoint's head is not anchored by it.
    let early_cpf = write_checkpoint(d, "early-cp.json", &early_cp);
    let r = certify(&late_file, &early_cpf, later.query).code(7);
    assert!(
        r.stderr.contains("after the checkpoint's head"),
        "{}",
        r.stderr
    );
    // The earlier one is, by either checkpoint.
    certify(&late_file, &early_cpf, first.query).ok();
    certify(&late_file, &late_cpf, first.query).ok();

    // No such query.
    let r = certify(&late_file, &late_cpf, 99).code(5);
    assert!(r.stderr.contains("not found"), "{}", r.stderr);
}

#[test]
fn a_free_adoption_is_certified_as_one() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let policy = PolicyInput {
        answers: "ladder:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("lad", 2000, policy, 2, 5);
    let good = g.predictions(90);
    g.submit_values(0, good.clone(), "alpha good file");
    g.advance(60);
    let worse = g.predictions(70);
    g.submit_values(1, worse, "team1 first");
    g.advance(60);
    // team1 sends team0's file: its released new best fixes team1's ladder, so it is adopted.
    let out = g.submit_values(1, good.clone(), "team1 took the shared file");
    let (record, hash) = answer_of(&out);
    let ex = g.export();
    let adopt = ex.entries.iter().find(|e| e.hash == hash).unwrap();
    assert_eq!(adopt.kind(), Some(Kind::Adopt), "the file was adopted");
    let export = write_export(d, "lad.jsonl", &ex);
    let cpf = write_checkpoint(d, "lad-cp.json", &g.checkpoint());

    let json = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--entry",
        &hash,
        "--json",
    ])
    .ok();
    let cert = json.json();
    assert_eq!(cert["kind"], "adoption");
    assert_eq!(cert["charge"]["charged"], false);
    assert!(
        cert["status"].as_str().unwrap().contains("free adoption"),
        "{cert:#}"
    );
    let (words, _, _) = expected_words(&record);
    assert!(words.contains("(released as new-best "), "{words}");
    assert_eq!(cert["answer"]["in_words"], words.as_str());
    assert_eq!(cert["receipt"]["entry_hash"], hash.as_str());
    assert_eq!(cert["submission"]["note"], "team1 took the shared file");
    assert_eq!(cert["submission"]["digest"], record.digest.as_str());
    // The digest is team1's own file (the same file team0 sent); nothing else of team0's.
    assert!(!json.stdout.contains("team0") && !json.stdout.contains("alpha good file"));
    assert!(!json.stdout.contains("\"exact\"") && !json.stdout.contains("\"salt\""));

    let text = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--entry",
        &hash,
    ])
    .ok()
    .stdout;
    assert!(
        text.contains("charge      none (a free adoption)"),
        "{text}"
    );
    assert!(
        text.contains("an adoption (no query number of its own) (team team1, target y)"),
        "{text}"
    );

    // --find names both entries the file has: team0's answer and team1's adoption.
    let file = write(d, "good.csv", &g.predictions_csv(&good));
    let found = offline(&["audit", &export, "--find", &file, "--json"])
        .ok()
        .json();
    let kinds: Vec<(&str, &str)> = found["find"][0]["entries"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| (m["kind"].as_str().unwrap(), m["team"].as_str().unwrap()))
        .collect();
    assert_eq!(kinds, [("answer", "team0"), ("adopt", "team1")]);
    assert!(text.contains(&format!("answer      {words}")), "{text}");
}

#[test]
fn find_and_predictions_name_and_rescore_sealed_entries() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (mut g, sealed, sealed_hash, preds, _) = sealed_round();
    let ex = g.export();
    let export = write_export(d, "final.jsonl", &ex);
    let (round, answer, k) = round_answer(&ex, "team0", sealed.query);
    let sealed_seq = ex
        .entries
        .iter()
        .find(|e| e.hash == sealed_hash)
        .unwrap()
        .seq;
    let labels = write(d, "labels.csv", &g.labels_csv());
    let subs = d.join("submitted");
    std::fs::create_dir(&subs).unwrap();
    let file = write(&subs, "final-model.csv", &g.predictions_csv(&preds));

    // --find names the sealed entry and the round answer that scored it.
    let found = offline(&["audit", &export, "--find", &file, "--json"])
        .ok()
        .json();
    let entries = found["find"][0]["entries"].as_array().unwrap();
    assert_eq!(entries.len(), 1, "{found:#}");
    assert_eq!(entries[0]["kind"], "sealed");
    assert_eq!(entries[0]["entry"], sealed_seq);
    assert_eq!(entries[0]["round"], round.seq);
    assert_eq!(entries[0]["symbol"], answer.symbol.as_str());
    assert_eq!(entries[0]["team"], "team0");
    let text = offline(&["audit", &export, "--find", &file]).ok().stdout;
    assert!(
        text.contains(&format!(
            "sealed entry {sealed_seq} (query {}, team0), answered {} by the round at entry {}",
            sealed.query, answer.symbol, round.seq
        )),
        "{text}"
    );

    // --predictions re-scores it against the labels: the round's exact loss agrees. A file
    // changed after it was submitted matches no entry and is reported as such.
    let mut changed = preds.clone();
    changed[0] = if changed[0] == "1" { "0" } else { "1" }.into();
    let changed_file = write(&subs, "changed.csv", &g.predictions_csv(&changed));
    let dir_arg = subs.display().to_string();
    let r = offline(&[
        "audit",
        &export,
        "--labels",
        &labels,
        "--predictions",
        &dir_arg,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(r["clean"], true, "{r:#}");
    let rescored = r["rescored"].as_array().unwrap();
    let of = |f: &str| {
        rescored
            .iter()
            .find(|x| x["file"] == f)
            .unwrap_or_else(|| panic!("{f} in {r:#}"))["entries"]
            .clone()
    };
    assert_eq!(of(&file), serde_json::json!([sealed_seq]));
    assert_eq!(of(&changed_file), serde_json::json!([]));
    let text = offline(&[
        "audit",
        &export,
        "--labels",
        &labels,
        "--predictions",
        &dir_arg,
    ])
    .ok()
    .stdout;
    assert!(
        text.contains(&format!("rescored   {changed_file}: matches no entry")),
        "{text}"
    );

    // A round whose recorded exact loss for that entry is not the file's: the re-score names
    // the round entry and the answer in it, even with the chain rebuilt around the change.
    let mut crafted = ex.clone();
    let pos = round.seq as usize;
    let mut body: Value = serde_json::from_str(&crafted.entries[pos].body).unwrap();
    let exact = &mut body["answers"][k]["exact"][0];
    let errors = exact["errors"].as_u64().unwrap();
    exact["errors"] = Value::from(errors + 1);
    exact["sum"] = Value::from((errors + 1) as f64);
    crafted.entries[pos].body = ledger::canonical_json(&body);
    for i in pos..crafted.entries.len() {
        let prev = crafted.entries[i - 1].hash.clone();
        let e = &mut crafted.entries[i];
        e.prev_hash = prev;
        e.hash = ledger::Encoding::V2.hash(e).unwrap();
    }
    let crafted_file = write_export(d, "crafted.jsonl", &crafted);
    let r = offline(&[
        "audit",
        &crafted_file,
        "--labels",
        &labels,
        "--predictions",
        &dir_arg,
        "--json",
    ])
    .code(8)
    .json();
    let field = format!("answers[{k}].exact[0]");
    assert!(
        r["findings"].as_array().unwrap().iter().any(|f| {
            f["entry"] == round.seq
                && f["field"] == field.as_str()
                && f["problem"]
                    .as_str()
                    .unwrap()
                    .contains(&format!("for the sealed entry {sealed_seq}"))
        }),
        "{r:#}"
    );
}

#[test]
fn the_released_fixture_certifies_offline() {
    // The v0.1.0 ledger (core 1) certifies from its files as a new one does.
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/ledgers");
    let export = dir.join("v0.1.0.export.jsonl").display().to_string();
    let cp = dir.join("v0.1.0.checkpoint.json").display().to_string();
    let ex = Export::read(Path::new(&export)).unwrap();
    let (hash, record) = ex
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Answer))
        .map(|e| {
            let r: AnswerRecord = serde_json::from_str(&e.body).unwrap();
            (e.hash.clone(), r)
        })
        .find(|(_, r)| r.query == 1)
        .expect("query 1 in the fixture");
    let cert = offline(&[
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cp,
        "--query",
        "1",
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(cert["kind"], "answer");
    assert_eq!(cert["policy"]["core_version"], 1);
    // The fixture predates code versions: its genesis has none, which reads as version 1.
    assert_eq!(cert["policy"]["code_version"], 1);
    assert_eq!(cert["receipt"]["entry_hash"], hash.as_str());
    assert_eq!(
        cert["answer"]["in_words"],
        expected_words(&record).0.as_str()
    );
}

#[test]
fn isolated_query_numbers_need_the_team() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let policy = PolicyInput {
        tolerance: 0.3,
        sharing: "isolated".into(),
        shares: "on-arrival".into(),
        ..PolicyInput::default()
    };
    let mut g = Generated::new("iso", 300, policy, 2, 9);
    g.submit(0, 80);
    g.advance(60);
    let (theirs, hash) = answer_of(&g.submit(1, 75));
    assert_eq!(theirs.query, 1, "each team numbers its own queries");
    let export = write_export(d, "iso.jsonl", &g.export());
    let cpf = write_checkpoint(d, "iso-cp.json", &g.checkpoint());
    let base = [
        "certify",
        "--export",
        &export,
        "--checkpoint",
        &cpf,
        "--query",
        "1",
    ];
    let r = offline(&base).code(2);
    assert!(r.stderr.contains("pass --team"), "{}", r.stderr);
    let mut args = base.to_vec();
    args.extend(["--team", "team1", "--json"]);
    let cert = offline(&args).ok().json();
    assert_eq!(cert["answer"]["team"], "team1");
    assert_eq!(cert["receipt"]["entry_hash"], hash.as_str());
}
