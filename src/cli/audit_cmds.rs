//! Audit commands: `export`, `checkpoint`, `certify` (talk to the daemon) and `audit` (offline,
//! no daemon): verify an export's chains, genesis, checkpoints and receipts, replay its
//! accounting, trace prediction files, and replay it under another policy.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
use clap::{Args, Subcommand};
use serde_json::{Value, json};

use super::client::conn::{Conn, ServerArgs};
use super::client::show;
use crate::audit::anchor::{self, Checkpoint};
use crate::audit::export::Export;
use crate::audit::{self, AuditOptions, LabelColumns, Receipt, Report, trace};
use crate::engine::AnswerRecord;
use crate::error::Error;
use crate::files::{self, TableSpec};
use crate::ledger::{self, Entry};
use crate::proto::v1::{CheckpointRequest, ExportRequest};

/// Exit code of an audit that found discrepancies.
pub const AUDIT_FAILED: u8 = 8;

/// What `holdout audit` checks and prints; shown in its `--help`.
pub const AUDIT_HELP: &str = "\
Checks, without the daemon: (1) the hash chains of the holdout and of @users, the genesis entry \
(policy rebuilt from its input, declaration, versions), the labels' digest with --labels, that \
the chain still holds every entry a --checkpoint or --receipt names (a rebuilt or truncated chain \
fails) and the checkpoint signatures; (2) replays every answer and refusal with the daemon's own \
accounting core and compares every charge, level, symbol, interval, code and budget field; \
(3) with --labels and --predictions, re-scores the prediction files found in the ledger; (4) \
that refusals and quotas follow from public facts (the decision is recomputed; no exact score \
in a refusal); (5) with --family, audits the other members' exports too and checks that the \
family's members agree on its total and that their shares sum to at most it. Every discrepancy is listed with its entry number and field. Exit 0 when clean, \
8 when anything was found, 2 for unreadable input.";

/// Audit commands.
#[derive(Debug, Subcommand)]
pub enum AuditCommand {
    /// Export a holdout's ledger as JSON Lines (auditor): every entry with salt and hashes, the
    /// policy, exact scores, refusals, reads and identity events; never labels. The export is
    /// itself recorded as a read.
    Export(ExportArgs),
    /// Write a checkpoint of a holdout's chain head, signed by the daemon's key. Keep it outside
    /// the daemon; `holdout audit --checkpoint` later proves the chain was not rebuilt or cut.
    Checkpoint(CheckpointArgs),
    /// Write a short certificate of one answer (auditor) that a model card can cite: the policy,
    /// the answer and interval, the guarantee and its assumptions, the receipt and a checkpoint.
    Certify(CertifyArgs),
    /// Audit a ledger export (or a database file with --db) offline. See --help.
    #[command(after_long_help = AUDIT_HELP)]
    Audit(Box<AuditArgs>),
}

/// `holdout export`.
#[derive(Debug, Args)]
pub struct ExportArgs {
    /// Holdout name.
    pub name: String,
    /// Where to write the export (must not exist).
    #[arg(long, value_name = "FILE.jsonl")]
    pub out: PathBuf,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout checkpoint`.
#[derive(Debug, Args)]
pub struct CheckpointArgs {
    /// Holdout name.
    pub name: String,
    /// Where to write the checkpoint (JSON); `-` for stdout.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout certify`.
#[derive(Debug, Args)]
pub struct CertifyArgs {
    /// Holdout name.
    pub name: String,
    /// Query number of the answer to certify.
    #[arg(long)]
    pub query: u64,
    /// Team, when each team has its own query numbers (isolated holdouts).
    #[arg(long)]
    pub team: Option<String>,
    /// Write the certificate here (JSON with --json, text otherwise) instead of stdout.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout audit`.
#[derive(Debug, Args)]
pub struct AuditArgs {
    /// The export (FILE.jsonl from `holdout export`), or with --db the holdout's NAME.
    pub source: String,
    /// Audit a database file (live or copied) instead of an export; opened read-only.
    #[arg(long, value_name = "PATH")]
    pub db: Option<PathBuf>,
    /// The labels file, to check the digest recorded at creation (and to re-score).
    #[arg(long, value_name = "FILE")]
    pub labels: Option<PathBuf>,
    /// Column of the row ids in --labels, --predictions and --find files.
    #[arg(long, default_value = "id")]
    pub id_column: String,
    /// Column of the predictions in --predictions and --find files.
    #[arg(long, default_value = "prediction")]
    pub prediction_column: String,
    /// A directory of prediction files: those the ledger scored are re-scored against --labels.
    #[arg(long, value_name = "DIR", requires = "labels")]
    pub predictions: Option<PathBuf>,
    /// A signed checkpoint the chain must extend (repeatable).
    #[arg(long = "checkpoint", value_name = "FILE")]
    pub checkpoints: Vec<PathBuf>,
    /// A receipt (or a whole `submit --json` answer) the chain must hold (repeatable).
    #[arg(long = "receipt", value_name = "FILE")]
    pub receipts: Vec<PathBuf>,
    /// Hex public key the checkpoints must be signed with.
    #[arg(long, value_name = "HEX")]
    pub public_key: Option<String>,
    /// Name the entries that scored this predictions file (repeatable); digests are over parsed
    /// values in row-id order, so float formatting and row order do not matter.
    #[arg(long = "find", value_name = "PREDICTIONS")]
    pub find: Vec<PathBuf>,
    /// Replay the same queries under this answer rule instead (e.g. rounded:0.05, threshold:0.2).
    #[arg(long, value_name = "RULE")]
    pub what_if_answers: Option<String>,
    /// Replay the same queries under this schedule instead (series, even:K).
    #[arg(long, value_name = "SCHEDULE")]
    pub what_if_schedule: Option<String>,
    /// Another member's export of this holdout's family (repeatable): each is audited too, and
    /// the members must agree on the family's total, each share must be the member's own delta,
    /// and the shares must sum to at most the total.
    #[arg(long = "family", value_name = "EXPORT")]
    pub family: Vec<PathBuf>,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// Runs an audit command.
pub fn run(cmd: AuditCommand) -> anyhow::Result<ExitCode> {
    match cmd {
        AuditCommand::Audit(args) => run_audit(&args),
        other => {
            let rt = tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()?;
            let result = rt.block_on(async move {
                match other {
                    AuditCommand::Export(a) => export(&a).await,
                    AuditCommand::Checkpoint(a) => checkpoint(&a).await,
                    AuditCommand::Certify(a) => certify(&a).await,
                    AuditCommand::Audit(_) => unreachable!("handled above"),
                }
            });
            // Printed here, as the client commands do: a status's own message, its exit code.
            Ok(result.unwrap_or_else(|err| {
                eprintln!("error: {}", super::client::conn::describe(&err));
                ExitCode::from(super::exit::code_for(&err))
            }))
        }
    }
}

async fn fetch_chain(conn: &Conn, chain: &str) -> anyhow::Result<Vec<Entry>> {
    let mut stream = conn
        .ledger()
        .export(ExportRequest {
            holdout: chain.to_string(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let mut entries = Vec::new();
    while let Some(e) = stream.message().await.map_err(|e| conn.fail(e))? {
        entries.push(Entry {
            chain: if e.chain.is_empty() {
                chain.to_string()
            } else {
                e.chain
            },
            seq: e.seq,
            kind: e.kind,
            body: e.body_json,
            salt: e.salt,
            prev_hash: e.prev_hash,
            hash: e.hash,
        });
    }
    Ok(entries)
}

async fn fetch_export(conn: &Conn, name: &str) -> anyhow::Result<Export> {
    let entries = fetch_chain(conn, name).await?;
    let users = fetch_chain(conn, ledger::USERS_CHAIN).await?;
    let at = crate::auth::rfc3339(chrono::Utc::now());
    Ok(Export::new(name, &at, entries, users))
}

async fn fetch_checkpoint(conn: &Conn, name: &str) -> anyhow::Result<Checkpoint> {
    let c = conn
        .ledger()
        .checkpoint(CheckpointRequest {
            holdout: name.to_string(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    // A daemon before format /2 leaves `format` empty and signs the holdout's head alone. The
    // identity head is kept only when the format signs it: an unknown format keeps its tag and
    // fails verification rather than being read as another.
    let format = match c.format.as_str() {
        "" => anchor::CHECKPOINT_FORMAT_V1.to_string(),
        _ => c.format,
    };
    let (users_seq, users_head_hash) = if format == anchor::CHECKPOINT_FORMAT {
        (Some(c.users_seq), Some(c.users_head_hash))
    } else {
        (None, None)
    };
    Ok(Checkpoint {
        format,
        holdout: c.holdout,
        seq: c.seq,
        head_hash: c.head_hash,
        users_seq,
        users_head_hash,
        at: c.at,
        public_key: c.public_key,
        signature: c.signature,
    })
}

async fn export(args: &ExportArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let ex = fetch_export(&conn, &args.name).await?;
    ex.write_file(&args.out)?;
    eprintln!(
        "exported {} entries of {} and {} identity events to {}",
        ex.entries.len(),
        args.name,
        ex.users.len(),
        args.out.display()
    );
    Ok(ExitCode::SUCCESS)
}

async fn checkpoint(args: &CheckpointArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let cp = fetch_checkpoint(&conn, &args.name).await?;
    cp.verify_signature().map_err(|why| {
        Error::Internal(format!("the daemon's checkpoint does not verify: {why}"))
    })?;
    if args.out == Path::new("-") {
        println!("{}", serde_json::to_string_pretty(&cp)?);
    } else {
        anchor::write(&args.out, &cp)?;
        eprintln!(
            "checkpoint of {} at entry {} written to {}",
            cp.holdout,
            cp.seq,
            args.out.display()
        );
    }
    Ok(ExitCode::SUCCESS)
}

async fn certify(args: &CertifyArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let ex = fetch_export(&conn, &args.name).await?;
    let cp = fetch_checkpoint(&conn, &args.name).await?;
    let mut findings = Vec::new();
    let (policy, _) = audit::check_genesis(&ex, &mut findings)
        .ok_or_else(|| Error::Internal("the genesis entry is unreadable".into()))?;
    let (entry, r): (u64, AnswerRecord) = trace::answers(&ex)
        .into_iter()
        .find(|(_, r)| r.query == args.query && args.team.as_ref().is_none_or(|t| *t == r.team))
        .ok_or_else(|| {
            Error::not_found("query", format!("{} of holdout {}", args.query, args.name))
        })?;
    let e = &ex.entries[entry as usize];
    let cert = json!({
        "certificate": "holdout-ledger-certificate/1",
        "holdout": args.name,
        "policy": {
            "delta": policy.input.delta, "schedule": policy.input.schedule,
            "answers": policy.input.answers, "tolerance": policy.input.tolerance,
            "sharing": policy.input.sharing, "rows": policy.core.rows,
        },
        "answer": {
            "query": r.query, "team": r.team, "target": r.target, "symbol": r.symbol,
            "interval": [r.lower, r.upper], "level_nats": r.level_nats, "delta_i": r.delta_i,
            "statement": r.statement, "digest": r.digest, "at": r.at,
        },
        "guarantee": policy.guarantee(),
        // The receipt names the entry by hash and never carries its salt: a certificate is
        // handed to people who may not read exact scores.
        "receipt": {"holdout": args.name, "query": r.query, "entry_hash": e.hash},
        "checkpoint": cp,
    });
    let text = if args.json {
        serde_json::to_string_pretty(&cert)? + "\n"
    } else {
        format!(
            "Certificate for holdout {name}, query {q} (team {team}, target {target})\n\
             answer     {sym}, interval {iv} at level ln(1/d) = {lvl:.3}\n\
             predictions digest {digest}, answered {at}\n\
             policy     delta {delta}, schedule {sched}, answers {ans}, {rows} rows\n\n\
             {guarantee}\n\n\
             receipt    {name} query {q} entry {hash}\n\
             checkpoint entry {cseq} hash {chash} at {cat}, key {key}, signature {sig}\n\
             Verify with: holdout audit EXPORT.jsonl --receipt RECEIPT --checkpoint CHECKPOINT\n",
            name = args.name,
            q = r.query,
            team = r.team,
            target = r.target,
            sym = r.symbol,
            iv = show::interval_text(r.lower, r.upper),
            lvl = r.level_nats,
            digest = r.digest,
            at = r.at,
            delta = policy.input.delta,
            sched = policy.input.schedule,
            ans = policy.input.answers,
            rows = policy.core.rows,
            guarantee = policy.guarantee(),
            hash = e.hash,
            cseq = cp.seq,
            chash = cp.head_hash,
            cat = cp.at,
            key = cp.public_key,
            sig = cp.signature,
        )
    };
    match &args.out {
        Some(p) => std::fs::write(p, text).with_context(|| format!("writing {}", p.display()))?,
        None => print!("{text}"),
    }
    Ok(ExitCode::SUCCESS)
}

/// Reads a database file read-only into an export of one holdout, with the labels it seals, or
/// what is wrong with them (a finding of the audit, not a reason to stop it).
fn from_db(
    path: &Path,
    name: &str,
) -> anyhow::Result<(Export, std::result::Result<LabelColumns, String>)> {
    let conn = rusqlite::Connection::open_with_flags(
        path,
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY | rusqlite::OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot open: {e}")))?;
    let entries = ledger::read_chain(&conn, name)?;
    if entries.is_empty() {
        return Err(Error::not_found("holdout", format!("{name} in {}", path.display())).into());
    }
    let users = ledger::read_chain(&conn, ledger::USERS_CHAIN)?;
    let id: i64 = conn.query_row("SELECT id FROM holdouts WHERE name = ?1", [name], |r| {
        r.get(0)
    })?;
    let mut stmt =
        conn.prepare("SELECT row_id FROM holdout_rows WHERE holdout_id = ?1 ORDER BY pos")?;
    let ids = stmt
        .query_map([id], |r| r.get::<_, String>(0))?
        .collect::<Result<Vec<_>, _>>()?;
    let mut stmt =
        conn.prepare("SELECT labels FROM sealed_labels WHERE holdout_id = ?1 ORDER BY target")?;
    let blobs = stmt
        .query_map([id], |r| r.get::<_, Vec<u8>>(0))?
        .collect::<Result<Vec<_>, _>>()?;
    let columns = blobs
        .iter()
        .enumerate()
        .map(|(t, b)| {
            serde_json::from_slice::<Vec<String>>(b).map_err(|e| {
                format!("the sealed labels of target {t} in the database are unreadable: {e}")
            })
        })
        .collect::<std::result::Result<Vec<_>, _>>();
    let at = crate::auth::rfc3339(chrono::Utc::now());
    Ok((
        Export::new(name, &at, entries, users),
        columns.map(|columns| LabelColumns { ids, columns }),
    ))
}

fn read_labels(path: &Path, id_column: &str, export: &Export) -> anyhow::Result<LabelColumns> {
    let mut scratch = Vec::new();
    let (policy, _) = audit::check_genesis(export, &mut scratch)
        .ok_or_else(|| Error::invalid("export", "the genesis entry is unreadable"))?;
    let cols: Vec<String> = policy.targets.iter().map(|t| t.column.clone()).collect();
    let table = files::read_table(
        path,
        &TableSpec::new(id_column, cols.iter().map(String::as_str)),
    )?;
    let ids = table.rows.iter().map(|r| r.id.clone()).collect();
    let columns = (0..cols.len())
        .map(|c| table.rows.iter().map(|r| r.values[c].clone()).collect())
        .collect();
    Ok(LabelColumns { ids, columns })
}

fn predictions_table(path: &Path, args: &AuditArgs) -> crate::error::Result<files::Table> {
    files::read_table(
        path,
        &TableSpec::new(&args.id_column, [args.prediction_column.as_str()]),
    )
}

fn run_audit(args: &AuditArgs) -> anyhow::Result<ExitCode> {
    let mut label_problem = None;
    let (export, db_labels) = match &args.db {
        Some(db) => {
            let (ex, labels) = from_db(db, &args.source)?;
            match labels {
                Ok(labels) => (ex, Some(labels)),
                Err(why) => {
                    label_problem = Some(why);
                    (ex, None)
                }
            }
        }
        None => (Export::read(Path::new(&args.source))?, None),
    };
    let labels = match &args.labels {
        Some(p) => Some(read_labels(p, &args.id_column, &export)?),
        None => db_labels,
    };
    let mut checkpoints = Vec::new();
    for p in &args.checkpoints {
        checkpoints.push((p.display().to_string(), Checkpoint::read(p)?));
    }
    let mut receipts = Vec::new();
    for p in &args.receipts {
        let text = std::fs::read_to_string(p)
            .map_err(|e| Error::invalid(p.display().to_string(), format!("cannot read: {e}")))?;
        let r = Receipt::from_json(&text)
            .map_err(|why| Error::invalid(p.display().to_string(), why))?;
        receipts.push((p.display().to_string(), r));
    }
    let total = export.entries.len() as u64;
    let bar = (std::io::stderr().is_terminal() && total > 20_000).then(|| {
        let b = indicatif::ProgressBar::new(total);
        b.set_style(
            indicatif::ProgressStyle::with_template(
                "replaying {bar:40} {pos}/{len} entries {per_sec}",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    });
    let mut tick = |n: u64| {
        if let Some(b) = &bar {
            b.set_position(n);
        }
    };
    let mut report = audit::audit(
        &export,
        AuditOptions {
            labels: labels.clone(),
            checkpoints,
            receipts,
            trusted_key: args.public_key.clone(),
            progress: Some(&mut tick),
        },
    );
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    if let Some(problem) = label_problem {
        report.findings.push(audit::Finding {
            chain: export.header.holdout.clone(),
            entry: None,
            field: "labels".into(),
            problem,
        });
    }
    let mut extra = serde_json::Map::new();
    let mut members = Vec::new();
    for p in &args.family {
        members.push((p.display().to_string(), Export::read(p)?));
    }
    let (family_findings, family) = audit::family::audit_members(&export, &members);
    report.findings.extend(family_findings);
    if !family.is_null() {
        extra.insert("family".into(), family);
    }
    let mut scratch = Vec::new();
    if let Some((policy, _)) = audit::check_genesis(&export, &mut scratch) {
        let mut found = Vec::new();
        for p in &args.find {
            let table = predictions_table(p, args)?;
            found.push(json!({"file": p.display().to_string(),
                              "entries": trace::find(&export, &policy, &table)}));
        }
        if !args.find.is_empty() {
            extra.insert("find".into(), Value::Array(found));
        }
        if let (Some(dir), Some(labels)) = (&args.predictions, &labels) {
            let mut rescored = Vec::new();
            let mut paths: Vec<PathBuf> = std::fs::read_dir(dir)
                .map_err(|e| {
                    Error::invalid(dir.display().to_string(), format!("cannot list: {e}"))
                })?
                .filter_map(|d| d.ok().map(|d| d.path()))
                .filter(|p| p.is_file())
                .collect();
            paths.sort();
            for p in paths {
                let Ok(table) = predictions_table(&p, args) else {
                    continue;
                };
                let file = p.display().to_string();
                let entries = trace::rescore(
                    &export,
                    &policy,
                    labels,
                    &file,
                    &table,
                    &mut report.findings,
                )?;
                rescored.push(json!({"file": file, "entries": entries}));
            }
            extra.insert("rescored".into(), Value::Array(rescored));
        }
        if args.what_if_answers.is_some() || args.what_if_schedule.is_some() {
            let w = trace::what_if(
                &policy,
                &export,
                args.what_if_answers.as_deref(),
                args.what_if_schedule.as_deref(),
            )?;
            extra.insert("what_if".into(), serde_json::to_value(w)?);
        }
    }
    if args.json {
        let mut v = serde_json::to_value(&report)?;
        if let Value::Object(m) = &mut v {
            m.insert("clean".into(), Value::Bool(report.clean()));
            m.extend(extra);
        }
        show::print_json(&v);
    } else {
        print_report(&report, &extra);
    }
    Ok(if report.clean() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(AUDIT_FAILED)
    })
}

fn print_report(report: &Report, extra: &serde_json::Map<String, Value>) {
    println!(
        "holdout {}: {} entries, {} answers, {} refusals, {} reads of exact scores, {} identity \
         events",
        report.holdout,
        report.entries,
        report.queries.len(),
        report.refusals,
        report.reads.len(),
        report.identity_events
    );
    println!("versions {}", report.versions);
    for c in &report.checkpoints {
        println!("checkpoint {c}");
    }
    for r in &report.receipts {
        println!("receipt    {r}");
    }
    if report.labels_checked {
        println!("labels     digest checked against the genesis entry");
    }
    println!(
        "\nentry  query  team          target      symbol            interval              ok"
    );
    for q in &report.queries {
        println!(
            "{:<6} {:<6} {:<13} {:<11} {:<17} [{}, {}]  {}",
            q.entry,
            q.query,
            q.team,
            q.target,
            q.symbol,
            show::num(q.lower),
            show::num(q.upper),
            if q.replayed { "yes" } else { "NO" }
        );
    }
    for (n, what) in &report.refusal_list {
        println!("refusal    entry {n}: {what}");
    }
    for (n, what) in &report.reads {
        println!("read       entry {n}: {what}");
    }
    if let Some(Value::Array(found)) = extra.get("find") {
        for f in found {
            let entries: Vec<String> = f["entries"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|m| {
                            format!(
                                "entry {} (query {}, {}, {})",
                                m["entry"], m["query"], m["team"], m["symbol"]
                            )
                        })
                        .collect()
                })
                .unwrap_or_default();
            if entries.is_empty() {
                println!(
                    "find       {}: scored by no entry",
                    f["file"].as_str().unwrap_or("")
                );
            } else {
                println!(
                    "find       {}: {}",
                    f["file"].as_str().unwrap_or(""),
                    entries.join("; ")
                );
            }
        }
    }
    if let Some(Value::Array(r)) = extra.get("rescored") {
        for f in r {
            println!(
                "rescored   {}: entries {}",
                f["file"].as_str().unwrap_or(""),
                f["entries"]
            );
        }
    }
    if let Some(Value::Array(w)) = extra.get("what_if") {
        println!(
            "\nwhat-if (same queries and exact losses, other policy; analysts' choices may have differed):"
        );
        for x in w {
            println!(
                "entry {:<6} {:<13} actual {:<32} would be {}",
                x["entry"],
                x["team"].as_str().unwrap_or(""),
                x["actual"].as_str().unwrap_or(""),
                x["would_be"].as_str().unwrap_or("")
            );
        }
    }
    if let Some(f) = extra.get("family") {
        for line in audit::family::text_lines(f) {
            println!("{line}");
        }
    }
    println!("\nwhat this audit cannot check:");
    for c in &report.cannot_check {
        println!("  - {c}");
    }
    if report.clean() {
        println!("\nclean: no discrepancies");
    } else {
        println!("\n{} discrepancies:", report.findings.len());
        for f in &report.findings {
            println!("  {f}");
        }
    }
}
