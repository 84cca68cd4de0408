//! Verifiable receipts end to end through the real binary (issue 19): a team submits and keeps
//! its receipt, more entries are appended, `holdout prove` writes a proof, a format-3
//! checkpoint and the verifier key, and `holdout audit --proof` verifies the receipt with those
//! files alone (no export, no daemon); `--consistency` shows a later checkpoint extends an
//! earlier one; tampered files fail with a clear message and exit 8; the export-based audit
//! checks format-3 checkpoints against the tree rebuilt from the export.

mod common;

use std::path::Path;

use common::{Daemon, Parts, holdout, run};
use serde_json::Value;

fn create(d: &Daemon) {
    create_named(d, "shelf", &[]);
}

/// Rows of holdout `name`: its own ids (one set of rows gets one budget).
fn parts_of(name: &str) -> Parts {
    let mut parts = Parts::new(400);
    let shift = name.len();
    let defects: Vec<String> = parts.rows.iter().map(|r| r.1.clone()).collect();
    for (i, r) in parts.rows.iter_mut().enumerate() {
        r.0 = format!("{name}-{}", r.0);
        r.1 = defects[(i + shift) % defects.len()].clone();
    }
    parts
}

fn create_named(d: &Daemon, name: &str, extra: &[&str]) {
    let labels = d.write(&format!("{name}-labels.csv"), &parts_of(name).labels_csv());
    let mut args = vec![
        "create",
        name,
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--tolerance",
        "0.4",
        "--description",
        "invented inspection data",
        "--json",
    ];
    args.extend_from_slice(extra);
    d.admin(&args).ok();
}

fn submit(d: &Daemon, token: &str, i: usize) -> Value {
    let f = d.write(
        &format!("p{i}.csv"),
        &parts_of("shelf").defect_predictions(3 + i, 0),
    );
    d.run(token, &["submit", "shelf", "--predictions", &f, "--json"])
        .ok()
        .json()
}

/// The files `holdout prove` printed, by suffix.
fn written(stdout: &str, suffix: &str) -> String {
    stdout
        .lines()
        .find(|l| l.ends_with(suffix))
        .unwrap_or_else(|| panic!("no {suffix} in {stdout}"))
        .to_string()
}

fn offline(args: &[&str]) -> common::Run {
    // No --server, no --token: nothing but the files.
    run(holdout(), args)
}

fn flip_char(s: &str, at: usize) -> String {
    let mut b = s.as_bytes().to_vec();
    b[at] = if b[at] == b'a' { b'b' } else { b'a' };
    String::from_utf8(b).unwrap()
}

#[test]
fn a_team_proves_its_receipt_with_only_receipt_proof_checkpoint_and_key() {
    let d = Daemon::start();
    create(&d);
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let bob = d.add_user("bob", &["analyst"], Some("red"));
    let answer = submit(&d, &alice, 0);
    let receipt = d.write("receipt.json", &answer.to_string());
    let entry_hash = answer["receipt"]["entry_hash"]
        .as_str()
        .unwrap_or_else(|| panic!("no receipt in {answer}"))
        .to_string();

    // An early format-3 checkpoint, taken by the team itself.
    let early = d.path("early.checkpoint").display().to_string();
    let out = d
        .run(&alice, &["checkpoint", "shelf", "--out", &early])
        .ok();
    assert!(
        out.stderr.contains("verifier key: holdout-ledger+"),
        "{}",
        out.stderr
    );
    let early_text = std::fs::read_to_string(&early).unwrap();
    assert!(
        early_text.starts_with("holdout-ledger/shelf\n"),
        "{early_text}"
    );
    // An analyst is not given the identity chain's tree.
    assert!(!early_text.contains("\nusers "), "{early_text}");

    // Later, more entries from both teams.
    for i in 1..4 {
        submit(&d, if i % 2 == 0 { &alice } else { &bob }, i);
    }

    let dir = d.path("proofs");
    let dir_s = dir.display().to_string();
    let proved = d
        .run(
            &alice,
            &[
                "prove",
                "--receipt",
                &receipt,
                "--since",
                &early,
                "--out-dir",
                &dir_s,
            ],
        )
        .ok();
    let proof = written(&proved.stdout, ".proof.json");
    let consistency = written(&proved.stdout, ".consistency.json");
    let checkpoint = written(&proved.stdout, ".checkpoint");
    let key = std::fs::read_to_string(dir.join("verifier.key"))
        .unwrap()
        .trim()
        .to_string();
    assert!(key.starts_with("holdout-ledger+"), "{key}");

    // The proof holds hashes, sizes and indices only: exactly these keys, these types.
    let p: Value = serde_json::from_str(&std::fs::read_to_string(&proof).unwrap()).unwrap();
    let keys: Vec<&String> = p.as_object().unwrap().keys().collect();
    assert_eq!(keys, ["inclusion_path", "leaf_index", "tree_size"], "{p}");
    assert!(p["leaf_index"].is_u64() && p["tree_size"].is_u64(), "{p}");
    let path = p["inclusion_path"].as_array().unwrap();
    assert!(!path.is_empty());
    for h in path {
        let h = h.as_str().unwrap();
        assert!(
            h.len() == 64
                && h.bytes()
                    .all(|b| b.is_ascii_hexdigit() && !b.is_ascii_uppercase()),
            "{h}"
        );
    }
    let c: Value = serde_json::from_str(&std::fs::read_to_string(&consistency).unwrap()).unwrap();
    let keys: Vec<&String> = c.as_object().unwrap().keys().collect();
    assert_eq!(
        keys,
        ["consistency_path", "first_size", "second_size"],
        "{c}"
    );
    assert!(c["first_size"].is_u64() && c["second_size"].is_u64(), "{c}");
    assert!(
        c["consistency_path"]
            .as_array()
            .unwrap()
            .iter()
            .all(|h| h.as_str().is_some_and(|h| h.len() == 64))
    );
    assert!(c["first_size"].as_u64() < c["second_size"].as_u64());

    // The daemon's whole reply holds nothing of the entry: no salt, no body, no kind.
    let all = [&proof, &consistency, &checkpoint]
        .iter()
        .map(|f| std::fs::read_to_string(f).unwrap())
        .collect::<String>();
    for word in ["salt", "answer", "\"kind\"", "score", "blue", "alice"] {
        assert!(!all.contains(word), "{word} in the proof files: {all}");
    }

    // Offline: receipt + proof + checkpoint + key, nothing else.
    let ok = offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &proof,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
    ])
    .ok();
    assert!(ok.stdout.contains("verified"), "{}", ok.stdout);
    let ok = offline(&[
        "audit",
        "--consistency",
        &consistency,
        "--checkpoint",
        &early,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(ok["verified"], "consistency");

    // Tampered receipt, proof, checkpoint, key: exit 8, a message naming what failed.
    let bad_receipt = d.write(
        "bad-receipt.json",
        &answer
            .to_string()
            .replace(&entry_hash, &flip_char(&entry_hash, 10)),
    );
    let out = offline(&[
        "audit",
        "--receipt",
        &bad_receipt,
        "--proof",
        &proof,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
    ])
    .code(8);
    assert!(
        out.stderr.contains("proof:") && out.stderr.contains("root"),
        "{}",
        out.stderr
    );

    let proof_text = std::fs::read_to_string(&proof).unwrap();
    let first_hash = path[0].as_str().unwrap();
    let bad_proof = d.write(
        "bad.proof.json",
        &proof_text.replace(first_hash, &flip_char(first_hash, 0)),
    );
    let out = offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &bad_proof,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
    ])
    .code(8);
    assert!(out.stderr.contains("proof:"), "{}", out.stderr);
    let mut moved = p.clone();
    moved["leaf_index"] = Value::from(p["leaf_index"].as_u64().unwrap() + 1);
    let moved = d.write("moved.proof.json", &moved.to_string());
    offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &moved,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
    ])
    .code(8);
    let mut extra = p.clone();
    extra["salt"] = Value::from("00");
    let extra = d.write("extra.proof.json", &extra.to_string());
    let out = offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &extra,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &key,
    ])
    .code(8);
    assert!(out.stderr.contains("unknown field"), "{}", out.stderr);

    let cp_text = std::fs::read_to_string(&checkpoint).unwrap();
    let size_line = cp_text.lines().nth(1).unwrap();
    let bigger = (size_line.parse::<u64>().unwrap() + 1).to_string();
    let bad_cp = d.write(
        "bad.checkpoint",
        &cp_text.replacen(&format!("\n{size_line}\n"), &format!("\n{bigger}\n"), 1),
    );
    let out = offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &proof,
        "--checkpoint",
        &bad_cp,
        "--public-key",
        &key,
    ])
    .code(8);
    assert!(
        out.stderr
            .contains("checkpoint: the signature does not match"),
        "{}",
        out.stderr
    );
    let other_key = "holdout-ledger+00000000+AQ".to_string() + &"A".repeat(42);
    offline(&[
        "audit",
        "--receipt",
        &receipt,
        "--proof",
        &proof,
        "--checkpoint",
        &checkpoint,
        "--public-key",
        &other_key,
    ])
    .code(2);
    // The checkpoints swapped: the older does not extend the newer.
    offline(&[
        "audit",
        "--consistency",
        &consistency,
        "--checkpoint",
        &checkpoint,
        "--checkpoint",
        &early,
        "--public-key",
        &key,
    ])
    .code(8);

    // The export-based audit checks format-3 checkpoints against the tree it rebuilds.
    let auditor = d.add_user("audrey", &["auditor"], None);
    let export = d.path("shelf.jsonl").display().to_string();
    d.run(&auditor, &["export", "shelf", "--out", &export]).ok();
    let auditor_cp = d.path("auditor.checkpoint").display().to_string();
    d.run(&auditor, &["checkpoint", "shelf", "--out", &auditor_cp])
        .ok();
    assert!(
        std::fs::read_to_string(&auditor_cp)
            .unwrap()
            .contains("\nusers ")
    );
    let clean = offline(&[
        "audit",
        &export,
        "--checkpoint",
        &early,
        "--checkpoint",
        &checkpoint,
        "--checkpoint",
        &auditor_cp,
        "--public-key",
        &key,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(clean["findings"].as_array().unwrap().len(), 0, "{clean}");
    // Without the key, a format-3 checkpoint is not an anchor.
    let out = offline(&["audit", &export, "--checkpoint", &checkpoint]).code(8);
    assert!(out.stdout.contains("--public-key") || out.stderr.contains("--public-key"));
    // A checkpoint of a longer tree than the export holds: truncated.
    let mut ex_lines: Vec<String> = std::fs::read_to_string(&export)
        .unwrap()
        .lines()
        .map(String::from)
        .collect();
    let drop_at = ex_lines
        .iter()
        .rposition(|l| l.contains("\"chain\":\"shelf\""))
        .unwrap();
    ex_lines.remove(drop_at);
    let short = d.write("short.jsonl", &(ex_lines.join("\n") + "\n"));
    let out = offline(&[
        "audit",
        &short,
        "--checkpoint",
        &auditor_cp,
        "--public-key",
        &key,
        "--json",
    ])
    .code(8)
    .json();
    assert!(out.to_string().contains("truncated"), "{out}");
    assert!(Path::new(&early).exists());
}

/// Who may ask for proofs: the same callers as for a checkpoint (an isolated holdout's tree size
/// counts every team's entries; the identity chain's only for the roles that manage it); an
/// entry of another chain, or a size past the tree, is refused.
#[test]
fn proofs_follow_the_checkpoint_rules() {
    let d = Daemon::start();
    create_named(
        &d,
        "bench",
        &["--sharing", "isolated", "--shares", "roster:blue,red"],
    );
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let auditor = d.add_user("audrey", &["auditor"], None);
    let f = d.write("b.csv", &parts_of("bench").defect_predictions(5, 0));
    let answer = d
        .run(&alice, &["submit", "bench", "--predictions", &f, "--json"])
        .ok()
        .json();
    let receipt = d.write("receipt.json", &answer.to_string());
    let dir = d.path("p").display().to_string();

    let out = d
        .run(
            &alice,
            &[
                "prove",
                "--holdout",
                "shelf",
                "--receipt",
                &receipt,
                "--out-dir",
                &dir,
            ],
        )
        .code(2);
    assert!(
        out.stderr.contains("the receipt is of bench"),
        "{}",
        out.stderr
    );
    let out = d
        .run(&alice, &["prove", "--receipt", &receipt, "--out-dir", &dir])
        .code(4);
    assert!(out.stderr.contains("isolated"), "{}", out.stderr);
    // The auditor may, and gets the identity tree in the checkpoint.
    let proved = d
        .run(
            &auditor,
            &["prove", "--receipt", &receipt, "--out-dir", &dir],
        )
        .ok();
    let cp_file = written(&proved.stdout, ".checkpoint");
    let cp = std::fs::read_to_string(&cp_file).unwrap();
    assert!(
        cp.starts_with("holdout-ledger/bench\n") && cp.contains("\nusers "),
        "{cp}"
    );
    // The identity chain: not for analysts.
    d.run(
        &alice,
        &[
            "prove",
            "--holdout",
            "@users",
            "--since",
            &cp_file,
            "--out-dir",
            &dir,
        ],
    )
    .code(4);
    // A hash the chain does not hold: not found.
    let hash = answer["receipt"]["entry_hash"].as_str().unwrap();
    let forged = d.write(
        "forged.json",
        &answer.to_string().replace(hash, &"ab".repeat(32)),
    );
    let out = d
        .run(
            &auditor,
            &["prove", "--receipt", &forged, "--out-dir", &dir],
        )
        .code(5);
    assert!(
        out.stderr.contains("not found") || out.stderr.contains("no entry"),
        "{}",
        out.stderr
    );
}

#[test]
fn merkle_vectors_cover_every_size_index_and_pair() {
    let out = run(holdout(), &["merkle-vectors", "--max-size", "8"])
        .ok()
        .json();
    assert_eq!(out["leaves"].as_array().unwrap().len(), 8);
    assert_eq!(out["roots"].as_array().unwrap().len(), 8);
    assert_eq!(out["inclusion"].as_array().unwrap().len(), 36);
    assert_eq!(out["consistency"].as_array().unwrap().len(), 36);
    // Hidden from --help.
    let help = run(holdout(), &["--help"]).ok();
    assert!(!help.stdout.contains("merkle-vectors"), "{}", help.stdout);
}
