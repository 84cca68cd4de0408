//! Audit commands: `export`, `checkpoint` (talk to the daemon), `certify` (offline from an
//! export and a checkpoint, or through the daemon) and `audit` (offline, no daemon): verify an
//! export's chains, genesis, checkpoints and receipts, replay its accounting, trace prediction
//! files, and replay it under another policy.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
use clap::{Args, Subcommand};
use serde_json::{Value, json};

use super::client::conn::{Conn, ServerArgs};
use super::client::show;
use crate::audit::anchor::{self, Checkpoint};
use crate::audit::certify::{self, Certified, Refused, Subject, Which};
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
(3) with --labels and --predictions, re-scores the prediction files found in the ledger, and \
with --labels (or --db) every kept prediction file the export carries (each also checked against \
its entry's digest; files dropped at the end of their retention and shredded labels are named); (4) \
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
    /// Write a short certificate of one answer that a model card can cite: the policy, the
    /// answer in words with its interval, the submission's note and digest, the guarantee and
    /// its assumptions, the receipt and a checkpoint. Offline from an export and a checkpoint
    /// (--export, --checkpoint; no daemon), or through the daemon (auditor role). Answers,
    /// free adoptions and sealed entries (with the round that answered them) are certified.
    Certify(CertifyArgs),
    /// Ask the daemon for a proof that the entry a receipt names is in the holdout's newest
    /// tree (and, with --since, that the newest checkpoint extends an older one); writes the
    /// proof, the signed checkpoint and the daemon's verifier key, for `holdout audit --proof`.
    Prove(ProveArgs),
    /// Audit a ledger export (or a database file with --db) offline. See --help.
    #[command(after_long_help = AUDIT_HELP)]
    Audit(Box<AuditArgs>),
    /// Test vectors of the Merkle tree code for independent implementations (one JSON object).
    #[command(hide = true)]
    MerkleVectors(MerkleVectorsArgs),
}

/// `holdout prove`.
#[derive(Debug, Args)]
pub struct ProveArgs {
    /// The receipt (or a whole `submit --json` answer) whose entry to prove.
    #[arg(long, value_name = "FILE", required_unless_present = "since")]
    pub receipt: Option<PathBuf>,
    /// An older format-3 checkpoint of the holdout: also prove that the newest extends it.
    #[arg(long, value_name = "CHECKPOINT")]
    pub since: Option<PathBuf>,
    /// Holdout name (when there is no --receipt to name it).
    #[arg(long, required_unless_present = "receipt")]
    pub holdout: Option<String>,
    /// Directory to write the files in (created if missing); files never replace others.
    #[arg(long, value_name = "DIR", default_value = ".")]
    pub out_dir: PathBuf,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout merkle-vectors`.
#[derive(Debug, Args)]
pub struct MerkleVectorsArgs {
    /// Largest tree size.
    #[arg(long, default_value_t = 64)]
    pub max_size: u64,
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
    /// Where to write the checkpoint; `-` for stdout. Format 3 (a signed note of the chain's
    /// Merkle tree) unless --json.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Write the older JSON checkpoint of the chain head (format /2 or /1), which `certify`
    /// reads, instead of format 3.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout certify`.
#[derive(Debug, Args)]
pub struct CertifyArgs {
    /// Holdout name (with --export it may be left out: the export names its holdout).
    #[arg(required_unless_present = "export")]
    pub name: Option<String>,
    /// Query number of the answer (or sealed entry) to certify, as the team's history shows it.
    #[arg(long, required_unless_present = "entry", conflicts_with = "entry")]
    pub query: Option<u64>,
    /// The entry to certify, by the hash its receipt names (an adoption has no query number of
    /// its own).
    #[arg(long, value_name = "HASH")]
    pub entry: Option<String>,
    /// Team, when each team has its own query numbers (isolated holdouts).
    #[arg(long, conflicts_with = "entry")]
    pub team: Option<String>,
    /// Certify offline, with no daemon, from this export (`holdout export`); needs
    /// --checkpoint, which must anchor the certified answer.
    #[arg(long, value_name = "FILE.jsonl", requires = "checkpoint")]
    pub export: Option<PathBuf>,
    /// The signed checkpoint of this holdout the certificate cites (with --export). It must
    /// verify, the export's chain must hold its head, and the answer must be at or before it.
    #[arg(long, value_name = "FILE", requires = "export")]
    pub checkpoint: Option<PathBuf>,
    /// Hex public key the checkpoint must be signed with.
    #[arg(long, value_name = "HEX")]
    pub public_key: Option<String>,
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
    /// The export (FILE.jsonl from `holdout export`), or with --db the holdout's NAME. Not
    /// needed with --proof or --consistency, which verify with nothing but their files.
    #[arg(required_unless_present_any = ["proof", "consistency"])]
    pub source: Option<String>,
    /// An inclusion proof (`holdout prove`): verify the one --receipt with it, one
    /// format-3 --checkpoint and --public-key, and nothing else (no export, no daemon).
    #[arg(long, value_name = "FILE", requires_all = ["public_key"], conflicts_with_all = ["source", "consistency"])]
    pub proof: Option<PathBuf>,
    /// A consistency proof (`holdout prove --since`): verify that the second --checkpoint
    /// (newer) extends the first (older), both format 3, with --public-key and nothing else.
    #[arg(long, value_name = "FILE", requires_all = ["public_key"], conflicts_with = "source")]
    pub consistency: Option<PathBuf>,
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
    /// The daemon's public key the checkpoints must be signed with: its verifier key string
    /// (`holdout-ledger+KEYID+BASE64`, printed by `holdout checkpoint` and `holdout prove`) or
    /// 64 hex digits. Format-3 checkpoints need it.
    #[arg(long, value_name = "KEY")]
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
        AuditCommand::Certify(args) if args.export.is_some() => certify_offline(&args),
        AuditCommand::MerkleVectors(args) => {
            println!("{}", ledger::merkle::vectors(args.max_size)?);
            Ok(ExitCode::SUCCESS)
        }
        other => {
            let rt = tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()?;
            let result = rt.block_on(async move {
                match other {
                    AuditCommand::Export(a) => export(&a).await,
                    AuditCommand::Checkpoint(a) => checkpoint(&a).await,
                    AuditCommand::Certify(a) => certify(&a).await,
                    AuditCommand::Prove(a) => prove(&a).await,
                    AuditCommand::Audit(_) | AuditCommand::MerkleVectors(_) => {
                        unreachable!("handled above")
                    }
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

/// A holdout's export (its chain and the identity chain) through the daemon (auditor role).
pub(crate) async fn fetch_export(conn: &Conn, name: &str) -> anyhow::Result<Export> {
    let entries = fetch_chain(conn, name).await?;
    let users = fetch_chain(conn, ledger::USERS_CHAIN).await?;
    let at = crate::auth::rfc3339(chrono::Utc::now());
    let ex = Export::new(name, &at, entries, users);
    // Kept prediction files, only when the genesis declares them (a daemon before retention
    // has no such call, and its holdouts keep none).
    let keeps = ex
        .entries
        .first()
        .and_then(|g| serde_json::from_str::<Value>(&g.body).ok())
        .and_then(|g| crate::engine::Retention::from_genesis(&g).ok())
        .is_some_and(|r| r.days().is_some());
    if !keeps {
        return Ok(ex);
    }
    let mut stream = conn
        .ledger()
        .kept_predictions(ExportRequest {
            holdout: name.to_string(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let mut kept = Vec::new();
    while let Some(k) = stream.message().await.map_err(|e| conn.fail(e))? {
        kept.push(crate::audit::kept::KeptFile {
            entry: k.entry,
            target: k.target,
            digest: k.digest,
            at: k.at,
            data: k.data,
        });
    }
    Ok(ex.with_kept(kept))
}

/// A signed checkpoint of a holdout's head through the daemon.
pub(crate) async fn fetch_checkpoint(conn: &Conn, name: &str) -> anyhow::Result<Checkpoint> {
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

/// Writes `text` to a new file; never replaces one.
fn write_new(path: &Path, text: &str) -> anyhow::Result<()> {
    use std::io::Write;
    let mut f = std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(path)
        .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot create: {e}")))?;
    f.write_all(text.as_bytes())
        .with_context(|| format!("writing {}", path.display()))?;
    Ok(())
}

async fn checkpoint(args: &CheckpointArgs) -> anyhow::Result<ExitCode> {
    if !args.json {
        return checkpoint_note(args).await;
    }
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

/// `holdout checkpoint` (format 3): the signed note, checked with the key the daemon names.
async fn checkpoint_note(args: &CheckpointArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let c = conn
        .ledger()
        .checkpoint(CheckpointRequest {
            holdout: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if c.note.is_empty() {
        return Err(Error::FailedPrecondition(
            "this daemon predates checkpoint format 3: use --json".into(),
        )
        .into());
    }
    let key = audit::note::parse_public_key(&c.verifier_key)
        .map_err(|why| Error::Internal(format!("the daemon's verifier key: {why}")))?;
    let note = audit::note::Note::verify(&c.note, &key).map_err(|why| {
        Error::Internal(format!("the daemon's checkpoint does not verify: {why}"))
    })?;
    if args.out == Path::new("-") {
        print!("{}", c.note);
    } else {
        write_new(&args.out, &c.note)?;
        eprintln!(
            "checkpoint of {} (tree of {} entries) written to {}",
            note.chain,
            note.size,
            args.out.display()
        );
    }
    eprintln!("verifier key: {}", c.verifier_key);
    Ok(ExitCode::SUCCESS)
}

/// `holdout prove`: proofs through the daemon, checked here, written for the offline audit.
async fn prove(args: &ProveArgs) -> anyhow::Result<ExitCode> {
    let receipt = match &args.receipt {
        None => None,
        Some(p) => Some(
            Receipt::from_json(&read_text(p)?)
                .map_err(|why| Error::invalid(p.display().to_string(), why))?,
        ),
    };
    let holdout = match (&receipt, &args.holdout) {
        (Some(r), Some(h)) if r.holdout != *h => {
            return Err(Error::invalid(
                "--holdout",
                format!("the receipt is of {}, not of {h}", r.holdout),
            )
            .into());
        }
        (Some(r), _) => r.holdout.clone(),
        (None, Some(h)) => h.clone(),
        (None, None) => {
            return Err(Error::invalid("--receipt", "give --receipt or --holdout").into());
        }
    };
    // The older checkpoint's size; its signature is checked once the daemon names its key.
    let since = match &args.since {
        None => None,
        Some(p) => Some((p, read_text(p)?)),
    };
    let first_size = match &since {
        None => 0,
        Some((p, text)) => text
            .lines()
            .nth(1)
            .and_then(|l| l.parse::<u64>().ok())
            .filter(|n| *n > 0)
            .ok_or_else(|| Error::invalid(p.display().to_string(), "not a format-3 checkpoint"))?,
    };
    let conn = Conn::open(&args.server).await?;
    let reply = conn
        .ledger()
        .prove(crate::proto::v1::ProveRequest {
            holdout: holdout.clone(),
            entry_hash: receipt
                .as_ref()
                .map(|r| r.entry_hash.clone())
                .unwrap_or_default(),
            first_size,
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let key = audit::note::parse_public_key(&reply.verifier_key)
        .map_err(|why| Error::Internal(format!("the daemon's verifier key: {why}")))?;
    let note = audit::note::Note::verify(&reply.checkpoint, &key).map_err(|why| {
        Error::Internal(format!("the daemon's checkpoint does not verify: {why}"))
    })?;
    std::fs::create_dir_all(&args.out_dir)
        .with_context(|| format!("creating {}", args.out_dir.display()))?;
    let mut written = Vec::new();
    let cp_path = args
        .out_dir
        .join(format!("{holdout}-{}.checkpoint", note.size));
    let key_path = args.out_dir.join("verifier.key");
    if let Some(r) = &receipt {
        audit::proofs::verify_receipt(
            &holdout,
            &r.entry_hash,
            &reply.inclusion_proof,
            &reply.checkpoint,
            &key,
        )
        .map_err(|why| Error::Internal(format!("the daemon's proof does not verify: {why}")))?;
    }
    if let Some((p, text)) = &since {
        audit::proofs::verify_extension(&reply.consistency_proof, text, &reply.checkpoint, &key)
            .map_err(|why| {
                Error::invalid(
                    p.display().to_string(),
                    format!("the newest checkpoint is not shown to extend it: {why}"),
                )
            })?;
    }
    if !cp_path.exists() {
        write_new(&cp_path, &reply.checkpoint)?;
        written.push(cp_path.clone());
    }
    match std::fs::read_to_string(&key_path) {
        Ok(k) if k.trim() == reply.verifier_key => {}
        Ok(_) => {
            return Err(Error::invalid(
                key_path.display().to_string(),
                "holds another key than the daemon's: use another --out-dir",
            )
            .into());
        }
        Err(_) => {
            write_new(&key_path, &(reply.verifier_key.clone() + "\n"))?;
            written.push(key_path.clone());
        }
    }
    if let Some(r) = &receipt {
        let p = args.out_dir.join(format!(
            "{holdout}-{}-in-{}.proof.json",
            &r.entry_hash[..r.entry_hash.len().min(16)],
            note.size
        ));
        write_new(&p, &reply.inclusion_proof)?;
        written.push(p);
    }
    if since.is_some() {
        let p = args.out_dir.join(format!(
            "{holdout}-{first_size}-to-{}.consistency.json",
            note.size
        ));
        write_new(&p, &reply.consistency_proof)?;
        written.push(p);
    }
    for p in &written {
        println!("{}", p.display());
    }
    eprintln!(
        "proved against the tree of {} entries of {holdout} signed at {}; verifier key: {}",
        note.size, note.time, reply.verifier_key
    );
    Ok(ExitCode::SUCCESS)
}

async fn certify(args: &CertifyArgs) -> anyhow::Result<ExitCode> {
    let name = args
        .name
        .clone()
        .ok_or_else(|| Error::invalid("NAME", "name the holdout, or certify from --export"))?;
    let conn = Conn::open(&args.server).await?;
    let ex = fetch_export(&conn, &name).await?;
    let cp = fetch_checkpoint(&conn, &name).await?;
    write_certificate(&ex, &cp, args)
}

/// `holdout certify --export FILE --checkpoint CP`: the same certificate from files alone.
fn certify_offline(args: &CertifyArgs) -> anyhow::Result<ExitCode> {
    let (Some(export), Some(checkpoint)) = (&args.export, &args.checkpoint) else {
        return Err(Error::invalid(
            "--export",
            "certifying offline needs --export and --checkpoint",
        )
        .into());
    };
    let ex = Export::read(export)?;
    if let Some(name) = &args.name
        && *name != ex.header.holdout
    {
        return Err(Error::invalid(
            export.display().to_string(),
            format!("an export of {}, not of {name}", ex.header.holdout),
        )
        .into());
    }
    let cp = Checkpoint::read(checkpoint)?;
    write_certificate(&ex, &cp, args)
}

/// Certifies the entry `args` names, anchored by `cp`, and writes the certificate. An export
/// the checkpoint does not anchor is a finding (exit 8), as in the audit.
fn write_certificate(ex: &Export, cp: &Checkpoint, args: &CertifyArgs) -> anyhow::Result<ExitCode> {
    let which = match (&args.entry, args.query) {
        (Some(hash), _) => Which::Entry(hash.clone()),
        (None, Some(query)) => Which::Query {
            query,
            team: args.team.clone(),
        },
        (None, None) => return Err(Error::invalid("--query", "give --query or --entry").into()),
    };
    let c = match certify::certify(ex, cp, &which, args.public_key.as_deref()) {
        Ok(c) => c,
        Err(Refused::Other(e)) => return Err(e.into()),
        Err(why @ Refused::Untrusted(_)) => {
            eprintln!("error: {why}");
            return Ok(ExitCode::from(AUDIT_FAILED));
        }
    };
    let text = if args.json {
        serde_json::to_string_pretty(&certificate_json(&c))? + "\n"
    } else {
        certificate_text(&c)
    };
    match &args.out {
        Some(p) => std::fs::write(p, text).with_context(|| format!("writing {}", p.display()))?,
        None => print!("{text}"),
    }
    Ok(ExitCode::SUCCESS)
}

/// Version of the certificate's JSON form. 2: every answer kind (`kind`), the answer in words,
/// the submission's note, the round of a sealed entry.
pub const CERTIFICATE_FORMAT: &str = "holdout-ledger-certificate/2";

/// The metric of the target an answer is about, as the policy names it.
fn metric_name(c: &Certified, target_index: usize) -> String {
    c.policy
        .targets
        .get(target_index)
        .map_or_else(|| "score".to_string(), |t| t.metric.to_string())
}

/// An answer in plain words, e.g. `error 0.12, between 0.1 and 0.14`: the released value (or
/// symbol) and the reported interval rounded outward as everywhere else it is shown.
fn in_words(c: &Certified, r: &AnswerRecord) -> String {
    let metric = metric_name(c, r.target_index);
    let iv = show::interval_text(r.lower, r.upper);
    let ends = iv.strip_prefix('[').and_then(|t| t.strip_suffix(']'));
    let between = match ends.and_then(|t| t.split_once(", ")) {
        Some((lo, hi)) => format!("between {lo} and {hi}"),
        None => format!("in {iv}"),
    };
    let target = if c.policy.targets.len() > 1 {
        format!("target {}: ", r.target)
    } else {
        String::new()
    };
    // A regression target's answer also in its own units (the ledger's figures are on [0, 1]).
    let between = match show::units_text(&metric, r.score, r.lower, r.upper) {
        Some(units) => format!("{between}; in the target's units, {units}"),
        None => between,
    };
    match r.score {
        Some(score) => {
            // The symbol ends with the released value as its grid writes it (0.10 on a 0.01
            // grid); other words in it (new-best, best=model-1) are said after the interval.
            let value = r
                .symbol
                .rsplit(' ')
                .next()
                .filter(|v| v.parse::<f64>().is_ok())
                .map_or_else(|| show::num(score), str::to_string);
            let released = if r.symbol == value {
                String::new()
            } else {
                format!(" (released as {})", r.symbol)
            };
            format!("{target}{metric} {value}, {between}{released}")
        }
        None => format!("{target}{metric}: {}, {between}", r.symbol),
    }
}

fn receipt_json(c: &Certified, hash: &str) -> Value {
    json!({"holdout": c.holdout, "query": c.query, "entry_hash": hash})
}

/// The certificate as JSON. It holds the certified team's own records only, without exact
/// losses, salts or the core's record; the whole object is also a receipt `holdout audit
/// --receipt` reads.
fn certificate_json(c: &Certified) -> Value {
    let p = &c.policy;
    let answer = c.answer().map(|r| {
        json!({
            "query": c.query, "team": r.team, "target": r.target,
            "metric": metric_name(c, r.target_index), "symbol": r.symbol, "score": r.score,
            "interval": [r.lower, r.upper], "interval_text": show::interval_text(r.lower, r.upper),
            "in_words": in_words(c, r), "level_nats": r.level_nats, "delta_i": r.delta_i,
            "units": show::units_json(&metric_name(c, r.target_index), r.score, r.lower, r.upper),
            "statement": r.statement, "digest": r.digest, "at": r.at, "models": r.models,
            "best_model": r.best_model,
            "best_model_name": r.best_model.and_then(|m| r.model_names.get(m as usize)),
        })
    });
    let (kind, submission, charge, round) = match &c.subject {
        Subject::Answer(r) => (
            "answer",
            json!({"team": r.team, "target": r.target, "note": r.note, "digest": r.digest,
                   "submitted_at": r.at}),
            json!({"charged": true, "delta_i": r.delta_i, "level_nats": r.level_nats,
                   "models": r.models}),
            Value::Null,
        ),
        Subject::Adoption(r) => (
            "adoption",
            json!({"team": r.team, "target": r.target, "note": r.note, "digest": r.digest,
                   "submitted_at": r.at}),
            json!({"charged": false, "delta_i": 0.0, "level_nats": r.level_nats}),
            Value::Null,
        ),
        Subject::Sealed { sealed, round, .. } => (
            "sealed",
            json!({"team": sealed.team, "target": sealed.target, "note": sealed.note,
                   "digest": sealed.digest, "submitted_at": sealed.at}),
            json!({"charged": true, "delta_i": sealed.delta_i, "level_nats": sealed.level_nats}),
            round.as_ref().map_or(Value::Null, |r| {
                json!({"entry_hash": r.entry_hash, "closed_at": r.at, "trigger": r.trigger,
                       "receipt": receipt_json(c, &r.entry_hash)})
            }),
        ),
    };
    json!({
        "certificate": CERTIFICATE_FORMAT,
        "holdout": c.holdout,
        "kind": kind,
        "status": status(c),
        "policy": {
            "delta": p.input.delta, "schedule": p.input.schedule,
            "answers": p.input.answers, "tolerance": p.input.tolerance,
            "sharing": p.input.sharing, "rows": p.core.rows, "core_version": p.core.core_version,
            "code_version": p.core.code_version,
        },
        "answer": answer,
        "charge": charge,
        "submission": submission,
        "guarantee": p.guarantee(),
        // The receipt names the entry by hash and never carries its salt: a certificate is
        // handed to people who may not read exact scores.
        "receipt": receipt_json(c, &c.entry_hash),
        "round": round,
        "checkpoint": c.checkpoint,
        "verify": "holdout audit EXPORT.jsonl --receipt THIS-CERTIFICATE.json --checkpoint CHECKPOINT.json",
    })
}

/// What kind of answer is certified, in one sentence.
fn status(c: &Certified) -> String {
    match &c.subject {
        Subject::Answer(_) => "a charged answer".into(),
        Subject::Adoption(_) => "a free adoption: this team sent a file another team's answer \
                                 had already placed below this team's best, so it was adopted \
                                 as this team's new best at no charge, at the level of that \
                                 answer"
            .into(),
        Subject::Sealed { round: Some(_), .. } => {
            "a sealed entry of a final round, charged when it was sealed and answered when the \
             round closed"
                .into()
        }
        Subject::Sealed {
            closed_after_checkpoint: true,
            ..
        } => "a sealed entry, unanswered as of the checkpoint: its round closed after the \
              checkpoint's head, so only its charge is certified (certify again with a later \
              checkpoint for its answer)"
            .into(),
        Subject::Sealed { .. } => "a sealed entry, not answered yet: its round has not closed, \
                                   so only its charge is certified"
            .into(),
    }
}

/// The certificate for people.
fn certificate_text(c: &Certified) -> String {
    let p = &c.policy;
    let cp = &c.checkpoint;
    let safe = |t: &str| show::safe_text(t, 200);
    let (target, note, digest, submitted) = match &c.subject {
        Subject::Answer(r) | Subject::Adoption(r) => (&r.target, &r.note, &r.digest, &r.at),
        Subject::Sealed { sealed, .. } => {
            (&sealed.target, &sealed.note, &sealed.digest, &sealed.at)
        }
    };
    let what = match &c.subject {
        Subject::Adoption(_) => "an adoption (no query number of its own)".to_string(),
        Subject::Sealed { .. } => format!("sealed entry, query {}", c.query),
        Subject::Answer(_) => format!("query {}", c.query),
    };
    let mut s = format!(
        "Certificate for holdout {}, {what} (team {}, target {})\n",
        safe(&c.holdout),
        safe(c.team()),
        safe(target)
    );
    s.push_str(&format!("kind        {}\n", status(c)));
    match c.answer() {
        Some(r) => {
            s.push_str(&format!("answer      {}\n", in_words(c, r)));
            s.push_str(&format!(
                "            interval {} at level ln(1/d) = {:.3} nats; answered {}\n",
                show::interval_text(r.lower, r.upper),
                r.level_nats,
                r.at
            ));
            if let Some(m) = r.best_model {
                let name = r.model_names.get(m as usize).map_or("", String::as_str);
                s.push_str(&format!("            best model {m} {}\n", safe(name)));
            }
            s.push_str(&format!("statement   {}\n", r.statement));
        }
        None => s.push_str("answer      none yet (sealed, unanswered)\n"),
    }
    match &c.subject {
        Subject::Answer(r) => s.push_str(&format!(
            "charge      share delta_i = {} per model ({} model{}), ln(1/d_i) = {:.3} nats\n",
            show::num(r.delta_i),
            r.models,
            if r.models == 1 { "" } else { "s" },
            r.level_nats
        )),
        Subject::Adoption(_) => s.push_str("charge      none (a free adoption)\n"),
        Subject::Sealed { sealed, .. } => s.push_str(&format!(
            "charge      share delta_i = {}, ln(1/d_i) = {:.3} nats, taken when sealed\n",
            show::num(sealed.delta_i),
            sealed.level_nats
        )),
    }
    s.push_str(&format!(
        "submission  note \"{}\", predictions digest {digest}, submitted {submitted}\n",
        safe(note)
    ));
    s.push_str(&format!(
        "policy      delta {}, schedule {}, answers {}, tolerance {}, sharing {}, {} rows\n\n",
        p.input.delta,
        p.input.schedule,
        p.input.answers,
        p.input.tolerance,
        p.input.sharing,
        p.core.rows
    ));
    s.push_str(&p.guarantee());
    s.push_str("\n\n");
    s.push_str(&format!("receipt     {}\n", receipt_json(c, &c.entry_hash)));
    if let Subject::Sealed { round: Some(r), .. } = &c.subject {
        s.push_str(&format!(
            "round       entry {} closed {} ({}); as a receipt: {}\n",
            r.entry_hash,
            r.at,
            r.trigger,
            receipt_json(c, &r.entry_hash)
        ));
    }
    s.push_str(&format!(
        "checkpoint  {} entry {} hash {} at {}, key {}, signature {}\n",
        safe(&cp.holdout),
        cp.seq,
        cp.head_hash,
        cp.at,
        cp.public_key,
        cp.signature
    ));
    s.push_str(
        "Verify with: holdout audit EXPORT.jsonl --checkpoint CHECKPOINT.json --receipt R.json \
         (R.json: the receipt line above, or this certificate in --json form)\n",
    );
    s
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
    let shredded: Option<String> = conn
        .query_row(
            "SELECT shredded_at FROM holdouts WHERE id = ?1",
            [id],
            |r| r.get(0),
        )
        .unwrap_or(None);
    // A database of a schema before retention (7) keeps no files.
    let kept = if crate::store::current_version(&conn)? >= 7 {
        crate::engine::kept_files(&conn, name)?
    } else {
        Vec::new()
    };
    let at = crate::auth::rfc3339(chrono::Utc::now());
    let export = Export::new(name, &at, entries, users).with_kept(kept);
    if shredded.is_some() {
        // Nothing to read: the audit says the labels were shredded and what that leaves
        // unchecked.
        return Ok((export, Err(String::new())));
    }
    let (ids, columns) = crate::engine::stored_texts(&conn, id)?;
    Ok((export, columns.map(|columns| LabelColumns { ids, columns })))
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

/// Reads a file for the offline proof checks; errors name it.
fn read_text(path: &Path) -> crate::error::Result<String> {
    std::fs::read_to_string(path)
        .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot read: {e}")))
}

/// `holdout audit --proof` and `--consistency`: verified with nothing but the files given.
fn run_proof_audit(args: &AuditArgs) -> anyhow::Result<ExitCode> {
    let key_text = args
        .public_key
        .as_deref()
        .ok_or_else(|| Error::invalid("--public-key", "proofs verify against the daemon's key"))?;
    let key =
        audit::proofs::public_key(key_text).map_err(|why| Error::invalid("--public-key", why))?;
    let outcome = if let Some(proof) = &args.proof {
        let [receipt] = args.receipts.as_slice() else {
            return Err(
                Error::invalid("--receipt", "give exactly one --receipt with --proof").into(),
            );
        };
        let [checkpoint] = args.checkpoints.as_slice() else {
            return Err(Error::invalid(
                "--checkpoint",
                "give exactly one --checkpoint with --proof",
            )
            .into());
        };
        let r = Receipt::from_json(&read_text(receipt)?)
            .map_err(|why| Error::invalid(receipt.display().to_string(), why))?;
        audit::proofs::verify_receipt(
            &r.holdout,
            &r.entry_hash,
            &read_text(proof)?,
            &read_text(checkpoint)?,
            &key,
        )
        .map(|(cp, p)| {
            json!({
                "verified": "inclusion",
                "holdout": cp.chain,
                "entry_hash": r.entry_hash,
                "leaf_index": p.leaf_index,
                "tree_size": cp.size,
                "checkpoint_time": cp.time,
                "summary": format!(
                    "receipt {} verified: entry {} of {} is in the tree of {} entries signed at {} \
                     by {key_text}",
                    receipt.display(), p.leaf_index, cp.chain, cp.size, cp.time
                ),
            })
        })
    } else {
        let proof = args
            .consistency
            .as_ref()
            .expect("clap requires --proof or --consistency");
        let [old, new] = args.checkpoints.as_slice() else {
            return Err(Error::invalid(
                "--checkpoint",
                "give two --checkpoint files with --consistency, the older first",
            )
            .into());
        };
        audit::proofs::verify_extension(
            &read_text(proof)?,
            &read_text(old)?,
            &read_text(new)?,
            &key,
        )
        .map(|(o, n)| {
            json!({
                "verified": "consistency",
                "holdout": n.chain,
                "first_size": o.size,
                "second_size": n.size,
                "summary": format!(
                    "{} extends {}: the tree of {} entries of {} at {} is the first {} \
                     entries of the tree at {}",
                    new.display(), old.display(), n.size, n.chain, n.time, o.size, o.time
                ),
            })
        })
    };
    match outcome {
        Ok(v) => {
            if args.json {
                println!("{}", serde_json::to_string_pretty(&v)?);
            } else {
                println!("{}", v["summary"].as_str().unwrap_or_default());
            }
            Ok(ExitCode::SUCCESS)
        }
        Err(why) => {
            if args.json {
                println!(
                    "{}",
                    serde_json::to_string_pretty(&json!({"verified": false, "problem": why}))?
                );
            }
            eprintln!("audit failed: {why}");
            Ok(ExitCode::from(AUDIT_FAILED))
        }
    }
}

fn run_audit(args: &AuditArgs) -> anyhow::Result<ExitCode> {
    if args.proof.is_some() || args.consistency.is_some() {
        return run_proof_audit(args);
    }
    let source = args
        .source
        .clone()
        .expect("clap requires the export without a proof");
    let mut label_problem = None;
    let (export, db_labels) = match &args.db {
        Some(db) => {
            let (ex, labels) = from_db(db, &source)?;
            match labels {
                Ok(labels) => (ex, Some(labels)),
                // Shredded labels: not a finding (the ledger records the shred).
                Err(why) if why.is_empty() => (ex, None),
                Err(why) => {
                    label_problem = Some(why);
                    (ex, None)
                }
            }
        }
        None => (Export::read(Path::new(&source))?, None),
    };
    let labels = match &args.labels {
        Some(p) => Some(read_labels(p, &args.id_column, &export)?),
        None => db_labels,
    };
    let mut checkpoints = Vec::new();
    let mut notes = Vec::new();
    for p in &args.checkpoints {
        let text = read_text(p)?;
        if audit::note::is_note(&text) {
            notes.push((p.display().to_string(), text));
        } else {
            checkpoints.push((p.display().to_string(), Checkpoint::read(p)?));
        }
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
            notes,
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

/// The retention lines of the audit's report: what was kept, dropped, shredded and re-scored.
fn print_retention(r: &audit::RetentionReport) {
    let list = |v: &[u64]| v.iter().map(u64::to_string).collect::<Vec<_>>().join(", ");
    let mut line = format!("retention  {}", r.declared);
    if !r.kept.is_empty() {
        line += &format!(
            "; {} kept file{} carried (entries {}), each checked against its digest",
            r.kept.len(),
            if r.kept.len() == 1 { "" } else { "s" },
            list(&r.kept)
        );
    }
    if !r.dropped.is_empty() {
        line += &format!(
            "; dropped at the end of the retention: entries {}",
            list(&r.dropped)
        );
    }
    println!("{line}");
    if let Some(s) = r.labels_shredded_at {
        println!("labels     shredded at entry {s} (the genesis entry keeps their digest)");
    }
    if !r.kept.is_empty() {
        match &r.not_rescored {
            None => println!(
                "rescored   {} kept file{} against the labels: every exact loss as recorded",
                r.rescored.len(),
                if r.rescored.len() == 1 { "" } else { "s" }
            ),
            Some(why) => println!(
                "rescored   {} of {} kept files: not the others ({why})",
                r.rescored.len(),
                r.kept.len()
            ),
        }
    }
}

fn print_report(report: &Report, extra: &serde_json::Map<String, Value>) {
    let n = |k: usize, one: &str, many: &str| show::plural(k as u64, one, many);
    println!(
        "holdout {}: {}, {}, {}, {}, {}, {} of exact scores, {}",
        report.holdout,
        n(report.entries as usize, "entry", "entries"),
        n(report.queries.len(), "answer", "answers"),
        n(report.sealed as usize, "sealed entry", "sealed entries"),
        n(report.rounds.len(), "round", "rounds"),
        n(report.refusals as usize, "refusal", "refusals"),
        n(report.reads.len(), "read", "reads"),
        n(
            report.identity_events as usize,
            "identity event",
            "identity events"
        ),
    );
    let checked: Vec<String> = report
        .checked
        .iter()
        .map(|(k, n)| format!("{n} {k}"))
        .collect();
    println!(
        "checked  {} (unchecked: {})",
        checked.join(", "),
        report.unchecked
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
    if let Some(r) = &report.retention {
        print_retention(r);
    }
    println!(
        "\nentry  query  team          target      symbol            interval              ok"
    );
    for q in &report.queries {
        println!(
            "{:<6} {:<6} {:<13} {:<11} {:<17} {}  {}",
            q.entry,
            q.query,
            q.team,
            q.target,
            q.symbol,
            // Outward, as every other view shows a limit (never rounded inward).
            show::interval_text(q.lower, q.upper),
            if q.replayed { "yes" } else { "NO" }
        );
    }
    for (n, answers, ranked) in &report.rounds {
        println!(
            "round      entry {n}: {answers} entries answered, {ranked} ranked; answers, ranking \
             and comparisons re-derived"
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
                            let team = m["team"].as_str().unwrap_or("");
                            let symbol = m["symbol"].as_str().unwrap_or("");
                            let kind = m["kind"].as_str().and_then(ledger::Kind::parse);
                            match (kind, m["round"].as_u64()) {
                                (Some(ledger::Kind::Sealed), Some(round)) => format!(
                                    "sealed entry {} (query {}, {team}), answered {symbol} by \
                                     the round at entry {round}",
                                    m["entry"], m["query"]
                                ),
                                (Some(ledger::Kind::Sealed), None) => format!(
                                    "sealed entry {} (query {}, {team}), its round not closed",
                                    m["entry"], m["query"]
                                ),
                                (Some(ledger::Kind::Adopt), _) => {
                                    format!("entry {} (adopted free, {team}, {symbol})", m["entry"])
                                }
                                _ => format!(
                                    "entry {} (query {}, {team}, {symbol})",
                                    m["entry"], m["query"]
                                ),
                            }
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
            let file = f["file"].as_str().unwrap_or("");
            match f["entries"].as_array() {
                Some(e) if !e.is_empty() => println!("rescored   {file}: entries {}", f["entries"]),
                _ => println!(
                    "rescored   {file}: matches no entry (not submitted, or changed since it was)"
                ),
            }
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
        println!("\nclean: no discrepancies, every entry checked");
    } else if report.findings.is_empty() {
        println!(
            "\nnot clean: {} entries could not be checked",
            report.unchecked
        );
    } else {
        println!("\n{} discrepancies:", report.findings.len());
        for f in &report.findings {
            println!("  {f}");
        }
    }
}
