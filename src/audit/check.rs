//! The offline audit of one export: the hash chains, the genesis entry, checkpoints, receipts,
//! the labels' digest, and the replay; collected into one [`Report`].

use serde::{Deserialize, Serialize};
use serde_json::Value;
use sha2::{Digest, Sha256};

use super::anchor::Checkpoint;
use super::export::Export;
use super::replay::{QuerySummary, replay};
use super::{CANNOT_CHECK, Finding};
use crate::engine::{HoldoutPolicy, Record};
use crate::ledger::{self, Entry};
use crate::stats::interval::shared;

/// A receipt as `holdout submit --json` prints it (inside `receipt`) or on its own. It names
/// its entry by hash; receipts written by 0.1.0 also carry the entry's number and salt, which
/// are checked when present.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Receipt {
    /// Holdout.
    pub holdout: String,
    /// Entry hash.
    pub entry_hash: String,
    /// The team's query number (0 for a refusal, or when the receipt does not say).
    #[serde(default)]
    pub query: u64,
    /// Entry number (0.1.0 receipts only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub entry: Option<u64>,
    /// Entry salt (0.1.0 receipts only; later receipts never carry it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub salt: Option<String>,
    /// What the answer released, when the receipt came with it (a whole `submit --json`
    /// answer): checked against the entry.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub released: Option<Released>,
}

/// The released part of an answer, as its holder kept it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Released {
    /// Target.
    pub target: String,
    /// Symbol.
    pub symbol: String,
    /// Interval, lower end.
    pub lower: f64,
    /// Interval, upper end.
    pub upper: f64,
}

impl Receipt {
    /// Reads a receipt from JSON text: the receipt object, or any object holding one under
    /// `receipt` (a whole `submit --json` answer, whose released symbol and interval are kept
    /// to be checked against the entry).
    pub fn from_json(text: &str) -> std::result::Result<Receipt, String> {
        let v: Value = serde_json::from_str(text).map_err(|e| format!("not JSON: {e}"))?;
        let (obj, released) = if v.get("receipt").is_some_and(Value::is_object) {
            let released = match (&v["symbol"], &v["lower"], &v["upper"]) {
                (Value::String(symbol), Value::Number(lo), Value::Number(hi)) => Some(Released {
                    target: v["target"].as_str().unwrap_or_default().to_string(),
                    symbol: symbol.clone(),
                    lower: lo.as_f64().unwrap_or(f64::NAN),
                    upper: hi.as_f64().unwrap_or(f64::NAN),
                }),
                _ => None,
            };
            (v["receipt"].clone(), released)
        } else {
            (v, None)
        };
        let mut r: Receipt =
            serde_json::from_value(obj).map_err(|e| format!("not a receipt: {e}"))?;
        if r.released.is_none() {
            r.released = released;
        }
        Ok(r)
    }
}

/// Labels given to the audit: row ids and one column per target, as in the labels file.
#[derive(Debug, Clone)]
pub struct LabelColumns {
    /// Row ids, any order.
    pub ids: Vec<String>,
    /// One column per target, aligned with `ids`.
    pub columns: Vec<Vec<String>>,
}

/// What to check beyond the export itself.
#[derive(Default)]
pub struct AuditOptions<'a> {
    /// Labels, to check the genesis digests.
    pub labels: Option<LabelColumns>,
    /// Checkpoints (with the file each came from).
    pub checkpoints: Vec<(String, Checkpoint)>,
    /// Format-3 checkpoints (signed notes; with the file each came from), checked against the
    /// tree rebuilt from the export; they need `trusted_key`.
    pub notes: Vec<(String, String)>,
    /// Receipts (with the file each came from).
    pub receipts: Vec<(String, Receipt)>,
    /// Public key the checkpoints must be signed with, when the auditor knows it: 64 hex
    /// digits or a verifier key string (`holdout-ledger+KEYID+BASE64`).
    pub trusted_key: Option<String>,
    /// Called with entries done, for a progress bar.
    pub progress: Option<&'a mut dyn FnMut(u64)>,
}

/// The result of an audit.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Holdout.
    pub holdout: String,
    /// Entries in the holdout's chain.
    pub entries: u64,
    /// Entries in the identity chain.
    pub identity_events: u64,
    /// Answers, adoptions, sealed entries and round answers whose user and team were checked
    /// against the identity chain (each must name a user added at or before it, not revoked
    /// before it, in that team).
    pub identity_checked: u64,
    /// Versions recorded in the genesis entry.
    pub versions: Value,
    /// Answered queries, in order.
    pub queries: Vec<QuerySummary>,
    /// Entries checked, per kind (both chains).
    pub checked: std::collections::BTreeMap<String, u64>,
    /// Entries that could not be checked (a kind this binary does not know, an unreadable
    /// body). The audit is never clean while this is above 0.
    pub unchecked: u64,
    /// Sealed entries (each answered by a round, or still waiting for one).
    pub sealed: u64,
    /// Rounds closed: (entry, answers, ranked entries); each re-derived in full.
    pub rounds: Vec<(u64, u64, u64)>,
    /// Refusals.
    pub refusals: u64,
    /// Each refusal (entry, who and why), every one re-decided by the replay.
    pub refusal_list: Vec<(u64, String)>,
    /// Reads of exact scores (entry, description).
    pub reads: Vec<(u64, String)>,
    /// Checkpoints checked (file, entry, key).
    pub checkpoints: Vec<String>,
    /// Receipts checked.
    pub receipts: Vec<String>,
    /// Whether the labels' digest was checked.
    pub labels_checked: bool,
    /// Every discrepancy.
    pub findings: Vec<Finding>,
    /// What the audit cannot check.
    pub cannot_check: Vec<String>,
    /// Kept prediction files, drops, shredded labels and re-scores (`None` when the genesis
    /// is unreadable).
    pub retention: Option<super::retention::RetentionReport>,
}

impl Report {
    /// Whether nothing was found.
    pub fn clean(&self) -> bool {
        self.findings.is_empty() && self.unchecked == 0
    }
}

fn whole(chain: &str, field: &str, problem: String) -> Finding {
    Finding {
        chain: chain.into(),
        entry: None,
        field: field.into(),
        problem,
    }
}

fn at(chain: &str, entry: u64, field: &str, problem: String) -> Finding {
    Finding {
        chain: chain.into(),
        entry: Some(entry),
        field: field.into(),
        problem,
    }
}

fn chain_faults(chain: &str, entries: &[Entry], out: &mut Vec<Finding>) {
    for f in ledger::verify_chain(entries) {
        out.push(at(chain, f.seq, "chain", f.problem));
    }
    for (pos, e) in entries.iter().enumerate() {
        if e.chain != chain {
            out.push(at(
                chain,
                pos as u64,
                "chain",
                format!("entry belongs to chain {:?}", e.chain),
            ));
        }
    }
}

/// SHA-256 of the labels the way the daemon records it at creation: rows in id order, per
/// target `target\nMETRIC\n` then each trimmed label on its own line.
pub fn labels_digest(policy: &HoldoutPolicy, labels: &LabelColumns) -> (String, String) {
    let mut order: Vec<usize> = (0..labels.ids.len()).collect();
    order.sort_by(|&a, &b| labels.ids[a].trim().cmp(labels.ids[b].trim()));
    let mut h = Sha256::new();
    for (t, col) in policy.targets.iter().zip(&labels.columns) {
        h.update(format!("target\n{}\n", t.metric).as_bytes());
        for &i in &order {
            h.update(col[i].trim().as_bytes());
            h.update(b"\n");
        }
    }
    let mut ids = Sha256::new();
    for &i in &order {
        ids.update(labels.ids[i].trim().as_bytes());
        ids.update(b"\n");
    }
    (hex::encode(h.finalize()), hex::encode(ids.finalize()))
}

/// Reads the policy recorded in a genesis entry, checking the entry's own fields.
pub fn genesis_policy(export: &Export, out: &mut Vec<Finding>) -> Option<(HoldoutPolicy, Value)> {
    let chain = export.header.holdout.as_str();
    let Some(g) = export.entries.first() else {
        out.push(whole(chain, "entries", "the export has no entries".into()));
        return None;
    };
    if g.kind() != Some(ledger::Kind::Genesis) {
        out.push(at(
            chain,
            g.seq,
            "kind",
            format!("the first entry is {:?}, not genesis", g.kind),
        ));
    }
    let body: Value = match serde_json::from_str(&g.body) {
        Ok(v) => v,
        Err(e) => {
            out.push(at(chain, g.seq, "body", format!("not JSON: {e}")));
            return None;
        }
    };
    if body["holdout"].as_str() != Some(chain) {
        out.push(at(
            chain,
            g.seq,
            "holdout",
            format!("genesis names {}, the export {chain}", body["holdout"]),
        ));
    }
    let policy: HoldoutPolicy = match serde_json::from_value(body["policy"].clone()) {
        Ok(p) => p,
        Err(e) => {
            out.push(at(chain, g.seq, "policy", format!("unreadable: {e}")));
            return None;
        }
    };
    if body["rows"].as_u64() != Some(policy.core.rows) {
        out.push(at(
            chain,
            g.seq,
            "rows",
            format!(
                "{} rows, the policy says {}",
                body["rows"], policy.core.rows
            ),
        ));
    }
    // The input builds today's core version; the recorded one is checked against the
    // genesis `versions.core` below, so compare the rest.
    let rebuilt = HoldoutPolicy::build(&policy.input, policy.targets.clone(), policy.core.rows)
        .map(|mut p| {
            p.core.core_version = policy.core.core_version;
            p.core.code_version = policy.core.code_version;
            p
        });
    match rebuilt {
        Ok(rebuilt) if rebuilt == policy => {}
        Ok(_) => out.push(at(
            chain,
            g.seq,
            "policy",
            "the recorded core policy is not what its recorded input builds".into(),
        )),
        Err(e) => out.push(at(
            chain,
            g.seq,
            "policy",
            format!("does not validate: {e}"),
        )),
    }
    let declared = &body["declaration"]["targets"];
    if serde_json::to_value(&policy.targets).ok().as_ref() != Some(declared) {
        out.push(at(
            chain,
            g.seq,
            "declaration.targets",
            "differ from the policy's targets".into(),
        ));
    }
    let versions = body["versions"].clone();
    if versions["encoding"]
        .as_str()
        .and_then(ledger::Encoding::parse)
        .is_none()
    {
        out.push(at(
            chain,
            g.seq,
            "versions.encoding",
            format!(
                "{}; this binary verifies {} and {}",
                versions["encoding"],
                ledger::ENCODING_V1,
                ledger::ENCODING_V2
            ),
        ));
    }
    let core = versions["core"]
        .as_str()
        .and_then(|v| v.parse::<u32>().ok());
    match core {
        Some(v) if crate::stats::KNOWN_CORES.contains(&v) => {
            if v != policy.core.core_version {
                out.push(at(
                    chain,
                    g.seq,
                    "versions.core",
                    format!(
                        "{v}, but the recorded policy says core {}",
                        policy.core.core_version
                    ),
                ));
            }
        }
        _ => out.push(at(
            chain,
            g.seq,
            "versions.core",
            format!(
                "{}; this binary replays cores {:?}: use the matching release to replay",
                versions["core"],
                crate::stats::KNOWN_CORES
            ),
        )),
    }
    Some((policy, body))
}

/// What is wrong with a checkpoint as an anchor of this export, as (field, problem) pairs; empty
/// when its signature verifies (with `trusted_key` when given) and the chain it names (the
/// holdout's or `@users`) still has entry `seq` with hash `head_hash`. A `holdout` problem means
/// the checkpoint anchors neither chain of the export. The audit and `certify` both use it.
pub fn checkpoint_problems(
    export: &Export,
    cp: &Checkpoint,
    trusted_key: Option<&str>,
) -> Vec<(&'static str, String)> {
    let chain = export.header.holdout.as_str();
    let mut out = Vec::new();
    if let Err(why) = cp.verify_signature() {
        out.push(("signature", why));
    }
    if let Some(k) = trusted_key
        && super::note::parse_public_key(k).map(|k| hex::encode(k.to_bytes()))
            != Ok(cp.public_key.to_ascii_lowercase())
    {
        out.push((
            "public_key",
            format!("signed by {}, not the trusted key {k}", cp.public_key),
        ));
    }
    // A checkpoint anchors the holdout's chain or the identity chain the export carries.
    let entries = if cp.holdout == chain {
        &export.entries
    } else if cp.holdout == ledger::USERS_CHAIN {
        &export.users
    } else {
        out.push((
            "holdout",
            format!("checkpoint of {}, export of {chain}", cp.holdout),
        ));
        return out;
    };
    match entries.get(cp.seq as usize) {
        None => out.push((
            "seq",
            format!(
                "the checkpoint anchors entry {} of {} but that chain ends at entry {}: \
                 truncated",
                cp.seq,
                cp.holdout,
                entries.len() as i64 - 1
            ),
        )),
        Some(e) if e.hash != cp.head_hash || e.seq != cp.seq => out.push((
            "head_hash",
            format!(
                "entry {} has hash {}, the checkpoint signed {}: the chain was rebuilt or \
                 changed",
                cp.seq, e.hash, cp.head_hash
            ),
        )),
        Some(_) => {}
    }
    out
}

/// Format-3 checkpoints: each against the tree rebuilt from the export, root at its size.
fn check_notes(export: &Export, opts: &AuditOptions<'_>, report: &mut Report) {
    let key = opts
        .trusted_key
        .as_deref()
        .map(super::note::parse_public_key);
    for (file, text) in &opts.notes {
        let key = match &key {
            Some(Err(why)) => {
                report.findings.push(whole(
                    &export.header.holdout,
                    &format!("checkpoint {file}: public_key"),
                    why.clone(),
                ));
                continue;
            }
            Some(Ok(k)) => Some(k),
            None => None,
        };
        let (note, problems) = super::proofs::note_problems(export, text, key);
        for (chain, field, problem) in problems {
            report.findings.push(Finding {
                chain,
                entry: None,
                field: format!("checkpoint {file}: {field}"),
                problem,
            });
        }
        if let Some(n) = note {
            report.checkpoints.push(match n.users {
                Some((u, _)) => format!(
                    "{file}: tree of {} entries and {} tree of {u} at {} (format 3)",
                    n.size,
                    ledger::USERS_CHAIN,
                    n.time
                ),
                None => format!(
                    "{file}: tree of {} entries at {} (format 3)",
                    n.size, n.time
                ),
            });
        }
    }
}

fn check_checkpoints(export: &Export, opts: &AuditOptions<'_>, report: &mut Report) {
    let chain = export.header.holdout.as_str();
    for (file, cp) in &opts.checkpoints {
        let problems = checkpoint_problems(export, cp, opts.trusted_key.as_deref());
        let foreign = problems.iter().any(|(field, _)| *field == "holdout");
        for (field, problem) in problems {
            report.findings.push(Finding {
                chain: chain.into(),
                entry: Some(cp.seq),
                field: format!("checkpoint {file}: {field}"),
                problem,
            });
        }
        if !foreign {
            report.checkpoints.push(match cp.users_head() {
                Some(u) => format!(
                    "{file}: entry {} and {} entry {} at {} (key {})",
                    cp.seq,
                    ledger::USERS_CHAIN,
                    u.seq,
                    cp.at,
                    cp.public_key
                ),
                None => format!(
                    "{file}: entry {} at {} (key {})",
                    cp.seq, cp.at, cp.public_key
                ),
            });
        }
        // Format /2 also anchors the identity chain's head of the same moment: a rewritten
        // (hashes recomputed) or deleted identity chain no longer has that entry.
        if let Some(u) = cp.users_head() {
            let mut g = |field: &str, problem: String| {
                report.findings.push(Finding {
                    chain: ledger::USERS_CHAIN.into(),
                    entry: Some(u.seq),
                    field: format!("checkpoint {file}: {field}"),
                    problem,
                })
            };
            match export.users.get(u.seq as usize) {
                None => g(
                    "users_seq",
                    format!(
                        "the checkpoint anchors entry {} of {} but the export's {} ends at \
                         entry {}: truncated or deleted identity events",
                        u.seq,
                        ledger::USERS_CHAIN,
                        ledger::USERS_CHAIN,
                        export.users.len() as i64 - 1
                    ),
                ),
                Some(e) if e.hash != u.hash || e.seq != u.seq => g(
                    "users_head_hash",
                    format!(
                        "{} entry {} has hash {}, the checkpoint signed {}: the identity chain \
                         was rebuilt or changed",
                        ledger::USERS_CHAIN,
                        u.seq,
                        e.hash,
                        u.hash
                    ),
                ),
                Some(_) => {}
            }
        }
    }
    let keys: std::collections::BTreeSet<&str> = opts
        .checkpoints
        .iter()
        .map(|(_, c)| c.public_key.as_str())
        .collect();
    if keys.len() > 1 && opts.trusted_key.is_none() {
        report.findings.push(whole(
            chain,
            "checkpoints",
            format!(
                "signed by {} different keys; pass --public-key to say which is the daemon's",
                keys.len()
            ),
        ));
    }
}

fn check_receipts(export: &Export, opts: &AuditOptions<'_>, report: &mut Report) {
    let chain = export.header.holdout.as_str();
    for (file, r) in &opts.receipts {
        let found = export.entries.iter().find(|e| e.hash == r.entry_hash);
        let mut f = |field: &str, problem: String| {
            report.findings.push(Finding {
                chain: chain.into(),
                entry: found.map(|e| e.seq),
                field: format!("receipt {file}: {field}"),
                problem,
            })
        };
        if r.holdout != chain {
            f(
                "holdout",
                format!("receipt of {}, export of {chain}", r.holdout),
            );
            continue;
        }
        let Some(e) = found else {
            f(
                "entry_hash",
                format!(
                    "no entry of this export has hash {}: the ledger was truncated or rewritten \
                     after the receipt was issued",
                    r.entry_hash
                ),
            );
            report.receipts.push(format!("{file}: not found"));
            continue;
        };
        let again = ledger::Encoding::of_chain(&export.entries).hash(e);
        if again.as_deref() != Some(r.entry_hash.as_str()) {
            f(
                "entry_hash",
                "does not match the entry's contents as exported".into(),
            );
        }
        if let Some(seq) = r.entry
            && seq != e.seq
        {
            f(
                "entry",
                format!(
                    "the receipt says entry {seq}, the hash is entry {}'s",
                    e.seq
                ),
            );
        }
        if let Some(salt) = &r.salt
            && *salt != e.salt
        {
            f("salt", "differs from the entry's salt".into());
        }
        for problem in receipt_body_problems(e, r) {
            f("answer", problem);
        }
        report
            .receipts
            .push(format!("{file}: entry {} ({})", e.seq, e.kind));
    }
}

/// Compares what a receipt says was released with the entry it names: the query number, and
/// the symbol and interval when the receipt came with its answer.
fn receipt_body_problems(e: &Entry, r: &Receipt) -> Vec<String> {
    let mut out = Vec::new();
    let Ok(body) = serde_json::from_str::<Value>(&e.body) else {
        return vec!["the entry's body is not JSON".into()];
    };
    // A closed round's entry holds every answer of the round: find the receipt's among them.
    let candidates: Vec<&Value> = match body.get("answers").and_then(Value::as_array) {
        Some(answers) if e.kind() == Some(ledger::Kind::Round) => answers.iter().collect(),
        _ => vec![&body],
    };
    let matches_query = |a: &&Value| r.query == 0 || a["query"].as_u64() == Some(r.query);
    let chosen: Vec<&Value> = candidates.iter().copied().filter(matches_query).collect();
    if chosen.is_empty() {
        out.push(format!(
            "the receipt says query {}, the entry records {}",
            r.query,
            candidates
                .iter()
                .filter_map(|a| a["query"].as_u64())
                .map(|q| q.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ));
        return out;
    }
    if let Some(rel) = &r.released {
        let agrees = |a: &&Value| {
            a["symbol"].as_str() == Some(rel.symbol.as_str())
                && a["lower"].as_f64().map(f64::to_bits) == Some(rel.lower.to_bits())
                && a["upper"].as_f64().map(f64::to_bits) == Some(rel.upper.to_bits())
                && (rel.target.is_empty() || a["target"].as_str() == Some(rel.target.as_str()))
        };
        if !chosen.iter().any(agrees) {
            out.push(format!(
                "the receipt's answer ({} [{}, {}]) is not what the entry records",
                rel.symbol, rel.lower, rel.upper
            ));
        }
    }
    out
}

/// Audits an export: every check, every discrepancy.
pub fn audit(export: &Export, mut opts: AuditOptions<'_>) -> Report {
    let chain = export.header.holdout.clone();
    let mut report = Report {
        holdout: chain.clone(),
        entries: export.entries.len() as u64,
        identity_events: export.users.len() as u64,
        identity_checked: 0,
        versions: Value::Null,
        queries: Vec::new(),
        checked: Default::default(),
        unchecked: 0,
        sealed: 0,
        rounds: Vec::new(),
        refusals: 0,
        refusal_list: Vec::new(),
        reads: Vec::new(),
        checkpoints: Vec::new(),
        receipts: Vec::new(),
        labels_checked: false,
        findings: Vec::new(),
        cannot_check: CANNOT_CHECK.iter().map(|s| s.to_string()).collect(),
        retention: None,
    };
    for (line, other) in &export.foreign {
        report.findings.push(whole(
            other,
            "chain",
            format!("line {line} belongs to neither this holdout nor @users"),
        ));
    }
    for (name, count) in &export.header.chains {
        let have = if *name == chain {
            export.entries.len()
        } else if name == ledger::USERS_CHAIN {
            export.users.len()
        } else {
            0
        } as u64;
        if have != *count {
            report.findings.push(whole(
                name,
                "header.chains",
                format!("the header announces {count} entries, the file holds {have}"),
            ));
        }
    }
    // The chains' links and hashes, and the parsing of the entries with the identity
    // cross-check, need nothing the replay computes: they run on two other threads while this
    // one replays (the replay takes the parsed records in order through a bounded channel), and
    // their findings take their places in the report as if everything had run in order.
    let head = std::mem::take(&mut report.findings);
    let (chains, identities, mid) = std::thread::scope(|scope| {
        let hashes = scope.spawn(|| {
            let mut found = Vec::new();
            chain_faults(&chain, &export.entries, &mut found);
            chain_faults(ledger::USERS_CHAIN, &export.users, &mut found);
            found
        });
        let (tx, rx) = std::sync::mpsc::sync_channel(PARSED_CHUNKS);
        let ahead = std::sync::Arc::new(shared::Table::default());
        let fill = ahead.clone();
        let (back, spent) = std::sync::mpsc::channel();
        let parser = scope.spawn(move || {
            shared::with(fill, shared::Role::Fill, || {
                parse_and_check_identities(export, tx, spent)
            })
        });
        let mid = shared::with(ahead, shared::Role::Take, || {
            audit_in_order(export, &mut opts, &mut report, rx, back)
        });
        let identities = parser
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        let chains = hashes
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        (chains, identities, mid)
    });
    let tail = std::mem::take(&mut report.findings);
    report.identity_checked = identities.checked;
    report.findings = head;
    report.findings.extend(chains);
    report.findings.extend(mid);
    report.findings.extend(identities.findings);
    report.findings.extend(tail);
    super::retention::check(export, opts.labels.as_ref(), &mut report);
    report
}

/// Entries parsed per message to the replay, and messages in flight.
const PARSED_CHUNK: usize = 256;
const PARSED_CHUNKS: usize = 32;

/// Parsed records of the holdout's entries after the genesis, in order, in chunks.
type Parsed = Vec<Result<Record, String>>;

/// Parses every entry of the holdout's chain once ([`Record::parse`]), checks the identities
/// of those that name a user on the way, computes ahead the intervals the replay will ask for
/// ([`compute_ahead`]), and sends the records after the genesis to the replay through `tx`.
/// When the replay does not run (or stops taking them), only the entries the identity check
/// needs are parsed from then on.
///
/// Records the replay is done with come back through `spent` and are dropped here, on the
/// thread whose allocator made them (freeing them on the replay's thread cost more than the
/// replay itself on refusal-heavy ledgers).
fn parse_and_check_identities(
    export: &Export,
    tx: std::sync::mpsc::SyncSender<Parsed>,
    spent: std::sync::mpsc::Receiver<Vec<Record>>,
) -> super::identity::IdentityCheck {
    use super::identity::Checker;
    let mut checker = Checker::new(export);
    // The policy as the replay will read it (its findings are the replay thread's to report).
    let policy = genesis_policy(export, &mut Vec::new()).map(|(p, _)| p);
    let mut tx = Some(tx);
    let mut chunk = Vec::with_capacity(PARSED_CHUNK);
    for (i, e) in export.entries.iter().enumerate() {
        while let Ok(done) = spent.try_recv() {
            drop(done);
        }
        let Some(to) = tx.as_ref().filter(|_| i > 0) else {
            if Checker::wants(e) {
                checker.entry(e, Record::parse(e).ok().as_ref());
            }
            continue;
        };
        let rec = Record::parse(e);
        checker.entry(e, rec.as_ref().ok());
        if let (Some(policy), Ok(Record::Answer(r))) = (&policy, &rec) {
            compute_ahead(policy, r, e.seq);
        }
        chunk.push(rec);
        if chunk.len() == PARSED_CHUNK
            && to
                .send(std::mem::replace(
                    &mut chunk,
                    Vec::with_capacity(PARSED_CHUNK),
                ))
                .is_err()
        {
            tx = None;
        }
    }
    if let Some(to) = tx
        && !chunk.is_empty()
    {
        let _ = to.send(chunk);
    }
    // Until the replay is done (or does not run).
    for done in spent {
        drop(done);
    }
    checker.finish()
}

/// The parsing thread computes the widest cell ahead for one answer in this many; the replay's
/// thread computes the others. Measured with callgrind (`holdout audit` on the bench's 4,000-entry
/// all-answer ledger of core 3, `AUDIT_BENCH_SAVE`): one in eight left the replay's thread at
/// 262M instructions and the parsing thread at 234M; one in five gives 248M and 250M.
const WIDEST_AHEAD_EVERY: u64 = 5;

/// Computes, on the parsing thread with a [`shared`] table filling, the intervals the replay
/// of answer `r` (entry `seq`) will ask for if `r` records its level truly: under a rounded
/// rule the interval of the cell `r`'s exact errors fall in, and, for one entry in
/// [`WIDEST_AHEAD_EVERY`] (the replay's thread computes the rest itself, so that the two
/// threads share the work), under
/// core 2 with the tolerance judged at the worst case, the widest cell at `r`'s level (what
/// the forecast of the answer before it computes for its next level, and what the quote of `r`
/// is judged on). Whatever `r` records, the replay recomputes what it does not find, so a
/// false record changes no finding.
fn compute_ahead(policy: &HoldoutPolicy, r: &crate::engine::AnswerRecord, seq: u64) {
    use crate::stats::interval::{Method, Rounding, Sides};
    use crate::stats::policy::ToleranceReference;
    use crate::stats::rules::Rule;
    let core = &policy.core;
    let (Some(t), Some(grid)) = (core.targets.get(r.target_index), core.rule.grid(core.rows))
    else {
        return;
    };
    if !(t.binary && r.level_nats.is_finite() && r.level_nats > 0.0) {
        return;
    }
    let rounding = Rounding::for_core(core.core_version);
    if seq.is_multiple_of(WIDEST_AHEAD_EVERY)
        && core.core_version >= 2
        && core.tolerance_reference == ToleranceReference::WorstCase
    {
        let _ = grid.widest_half_width(core.rows, true, t.method, r.level_nats, rounding);
    }
    let errors = r
        .exact
        .as_ref()
        .and_then(|l| l.first())
        .and_then(|l| l.errors);
    if let (Rule::Rounded(_), Some(k)) = (core.rule, errors)
        && k <= core.rows
        && t.method == Method::Exact
    {
        let j = grid.cell_of_errors(core.rows, k);
        let _ = grid.interval(
            j,
            core.rows,
            true,
            t.method,
            r.level_nats,
            Sides::Two,
            rounding,
        );
    }
}

/// The checks of [`audit`] that follow the chain checks, in order, on the calling thread:
/// identity events' kinds, checkpoints, receipts, then (after the identity cross-check, which
/// runs on another thread) the genesis, the labels and the replay. Returns the findings made
/// before the identity cross-check's place; those after it are left in `report.findings`.
fn audit_in_order(
    export: &Export,
    opts: &mut AuditOptions<'_>,
    report: &mut Report,
    parsed: std::sync::mpsc::Receiver<Parsed>,
    spent: std::sync::mpsc::Sender<Vec<Record>>,
) -> Vec<Finding> {
    let chain = export.header.holdout.clone();
    for e in &export.users {
        // Identity events are checked by their links and hashes (above) and by the answers
        // that name their users; here, that each is an identity event with a readable body.
        match Record::parse(e) {
            Ok(r) if r.kind().is_identity() => {
                *report.checked.entry(r.kind().as_str().into()).or_default() += 1
            }
            other => {
                report.unchecked += 1;
                let why = match other {
                    Err(why) => why,
                    Ok(r) => format!("a {} entry is not an identity event", r.kind()),
                };
                report
                    .findings
                    .push(at(ledger::USERS_CHAIN, e.seq, "kind", why));
            }
        }
    }
    check_checkpoints(export, opts, report);
    check_notes(export, opts, report);
    check_receipts(export, opts, report);
    let mid = std::mem::take(&mut report.findings);
    let Some((policy, genesis)) = genesis_policy(export, &mut report.findings) else {
        return mid;
    };
    report.versions = genesis["versions"].clone();
    if let Some(labels) = &opts.labels {
        report.labels_checked = true;
        if labels.columns.len() != policy.targets.len() {
            report.findings.push(at(
                &chain,
                0,
                "labels_sha256",
                format!(
                    "{} label columns given, the holdout has {} targets",
                    labels.columns.len(),
                    policy.targets.len()
                ),
            ));
        } else {
            let (digest, ids) = labels_digest(&policy, labels);
            if genesis["labels_sha256"].as_str() != Some(digest.as_str()) {
                report.findings.push(at(
                    &chain,
                    0,
                    "labels_sha256",
                    "the labels given do not have the digest recorded at creation".into(),
                ));
            }
            if genesis["declaration"]["row_ids_sha256"].as_str() != Some(ids.as_str()) {
                report.findings.push(at(
                    &chain,
                    0,
                    "declaration.row_ids_sha256",
                    "the row ids given do not have the digest recorded at creation".into(),
                ));
            }
        }
    }
    let mut noop = |_: u64| {};
    let progress: &mut dyn FnMut(u64) = match opts.progress.take() {
        Some(p) => p,
        None => &mut noop,
    };
    let mut done = Vec::with_capacity(PARSED_CHUNK);
    let mut give_back = |rec: Record| {
        done.push(rec);
        if done.len() == PARSED_CHUNK {
            // If the parsing thread is gone, the records are dropped here.
            let _ = spent.send(std::mem::replace(
                &mut done,
                Vec::with_capacity(PARSED_CHUNK),
            ));
        }
    };
    let r = replay(
        &policy,
        &export.entries,
        &mut parsed.into_iter().flatten(),
        &mut give_back,
        progress,
    );
    let _ = spent.send(done);
    report.findings.extend(r.findings);
    report.queries = r.queries;
    for (kind, n) in r.checked {
        *report.checked.entry(kind).or_default() += n;
    }
    report.unchecked += r.unchecked;
    report.sealed = r.sealed;
    report.rounds = r.rounds;
    report.refusals = r.refusals;
    report.refusal_list = r.refusal_list;
    report.reads = r.reads;
    mid
}
