//! Operations commands: `backup` (online through the daemon, or offline on a database file)
//! and `restore`.

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use clap::Args;

use super::client::conn::{Conn, ServerArgs};
use crate::engine::{Engine, LOCAL_OPERATOR, SystemClock};
use crate::error::Error;
use crate::proto::v1::BackupRequest;
use crate::store::{Store, backup};

/// `holdout backup`.
#[derive(Debug, Args)]
pub struct BackupArgs {
    /// The file to write (must not exist). Online (without --db) it is a path on the daemon's
    /// machine, made absolute here against this directory when relative: the copy holds labels,
    /// salts and exact scores, so it is never sent over the network.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Back up this database file directly (offline: no daemon; stop the daemon or accept that
    /// the copy is of the moment it is taken). The file is migrated first if it is of an older
    /// schema (after its own automatic copy).
    #[arg(long, value_name = "PATH")]
    pub db: Option<PathBuf>,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout restore`.
#[derive(Debug, Args)]
pub struct RestoreArgs {
    /// The copy to restore (from `holdout backup`).
    pub file: PathBuf,
    /// The database file to write. An existing one is replaced only when every chain in it is
    /// a prefix of the copy's; stop the daemon first.
    #[arg(long, value_name = "PATH")]
    pub db: PathBuf,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
}

fn report(json: bool, what: &str, path: &str, v: &backup::Verified, at: Option<&str>) {
    if json {
        let mut o = serde_json::json!({
            "file": path,
            "bytes": v.bytes,
            "schema_version": v.schema_version,
            "holdouts": v.holdouts(),
            "entries": v.entries,
            "checks": "integrity_check ok, every chain verified, schema version known",
        });
        if let Some(at) = at {
            o["at"] = at.into();
        }
        println!("{o}");
    } else {
        println!(
            "{what} {path}: {} bytes, schema version {}, {} holdout chain(s), {} entries; \
             integrity check ok, every chain verified",
            v.bytes,
            v.schema_version,
            v.holdouts(),
            v.entries
        );
        println!("the copy holds the labels, salts and exact scores in clear: keep it owner-only");
    }
}

/// Runs `holdout backup`.
pub fn run_backup(args: BackupArgs) -> anyhow::Result<ExitCode> {
    match &args.db {
        Some(db) => {
            if !db.exists() {
                return Err(Error::not_found("database", db.display().to_string()).into());
            }
            if args.out.exists() {
                return Err(Error::AlreadyExists(format!(
                    "{} exists; a backup never overwrites a file",
                    args.out.display()
                ))
                .into());
            }
            let store =
                Store::open(db).with_context(|| format!("opening database {}", db.display()))?;
            let mut engine = Engine::new(store, Arc::new(SystemClock));
            engine.record_migration_backup()?;
            let (_, at) = engine.record_backup(
                LOCAL_OPERATOR,
                "",
                "offline",
                &args.out.display().to_string(),
            )?;
            let v = backup::copy_to(engine.store().conn(), &args.out)?;
            report(
                args.json,
                "backup written to",
                &args.out.display().to_string(),
                &v,
                Some(&at),
            );
            Ok(ExitCode::SUCCESS)
        }
        None => {
            let out = if args.out.is_absolute() {
                args.out.clone()
            } else {
                std::env::current_dir()?.join(&args.out)
            };
            let rt = tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()?;
            let result: anyhow::Result<ExitCode> = rt.block_on(async {
                let conn = Conn::open(&args.server).await?;
                let reply = conn
                    .ledger()
                    .backup(BackupRequest {
                        out: out.display().to_string(),
                    })
                    .await
                    .map_err(|e| conn.fail(e))?
                    .into_inner();
                let v = backup::Verified {
                    schema_version: reply.schema_version,
                    heads: Default::default(),
                    entries: reply.entries,
                    bytes: reply.bytes,
                };
                if args.json {
                    println!(
                        "{}",
                        serde_json::json!({
                            "file": reply.path,
                            "bytes": reply.bytes,
                            "schema_version": reply.schema_version,
                            "holdouts": reply.holdouts,
                            "entries": reply.entries,
                            "at": reply.at,
                            "checks": "integrity_check ok, every chain verified, schema version known",
                        })
                    );
                } else {
                    report(
                        false,
                        "backup written on the daemon's machine to",
                        &reply.path,
                        &v,
                        None,
                    );
                    println!("{} holdout chain(s) record it (at {})", reply.holdouts, reply.at);
                }
                Ok(ExitCode::SUCCESS)
            });
            Ok(result.unwrap_or_else(|err| {
                eprintln!("error: {}", super::client::conn::describe(&err));
                ExitCode::from(super::exit::code_for(&err))
            }))
        }
    }
}

/// Runs `holdout restore`.
pub fn run_restore(args: RestoreArgs) -> anyhow::Result<ExitCode> {
    let started = std::time::Instant::now();
    let r = backup::restore(&args.file, &args.db)?;
    let secs = started.elapsed().as_secs_f64();
    if args.json {
        println!(
            "{}",
            serde_json::json!({
                "db": args.db.display().to_string(),
                "from": args.file.display().to_string(),
                "replaced": r.replaced,
                "bytes": r.verified.bytes,
                "schema_version": r.verified.schema_version,
                "holdouts": r.verified.holdouts(),
                "entries": r.verified.entries,
                "seconds": secs,
            })
        );
    } else {
        report(
            false,
            "restored from",
            &args.file.display().to_string(),
            &r.verified,
            None,
        );
        println!(
            "{} {} in {secs:.2} s; start the daemon on it (a newer binary migrates it, after its own copy)",
            if r.replaced { "replaced" } else { "wrote" },
            args.db.display()
        );
    }
    Ok(ExitCode::SUCCESS)
}
