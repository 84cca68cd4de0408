//! The command line: one binary, `holdout`, for the daemon, the local tools and the client.
//!
//! `main` parses with [`Cli`] and calls [`run`]; every command returns its exit code.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

pub mod audit_cmds;
pub mod client;
pub mod demo;
pub mod exit;
pub mod local;
pub mod ops;
pub mod stats_cmds;

/// Exit codes, documented in `--help` and the README.
pub const EXIT_CODES_HELP: &str = "\
Exit codes:
  0  answered (or the command succeeded)
  1  internal error (a bug, or storage failure)
  2  bad input (arguments, files, policy); nothing was charged or recorded
  3  refused: budget spent, past tolerance, quota, or --max-cost; recorded, charged nothing
  4  authentication or permission failure
  5  not found (holdout, target, user)
  6  cannot reach the daemon
  7  not possible in the current state (closed holdout, request id reused with other predictions)
  8  audit found discrepancies (each is listed with its entry number and field)
  9  submit --require-pass: the threshold answer was `fail` (recorded and printed)
  10 outcome unknown: the connection broke after the request was sent; the daemon may have
     recorded it. Retry with the same file (and the same --request-id if you gave one): the same
     file from the same team is never charged twice";

/// holdout-ledger: shared holdout sets whose reported scores stay trustworthy under reuse.
///
/// The daemon keeps the labels sealed, scores every prediction file itself, charges each answer
/// against a union-bound confidence budget, and records every query, answer and refusal in a
/// hash-chained ledger. The guarantee is statistical: it assumes i.i.d. rows, no access to the
/// labels except through released answers, and the declared sharing assumption.
#[derive(Debug, Parser)]
#[command(name = "holdout", version, after_help = EXIT_CODES_HELP)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Every command.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the main job end to end on a temporary database: an invented holdout, three squads
    /// submitting models, answers with intervals, a refusal once the set is spent, and a verified
    /// ledger.
    Demo(demo::DemoArgs),
    /// Run the daemon on a database (loopback only unless --listen says otherwise).
    Serve(local::ServeArgs),
    /// Create a database and its first custodian-and-organizer user; writes the token to a file.
    Init(local::InitArgs),
    /// Write a consistent, checked copy of the whole database: through the running daemon
    /// (custodian; the file is written on the daemon's machine), or offline with --db. Each
    /// holdout's chain records the backup. The copy holds the labels in clear.
    Backup(ops::BackupArgs),
    /// Restore a copy from `holdout backup` to a database file (daemon stopped): refused when
    /// the copy fails its checks or the database holds entries the copy lacks.
    Restore(ops::RestoreArgs),
    /// Print the interval that holds with probability at least 1 - DELTA for one score (offline).
    Bound(stats_cmds::BoundArgs),
    /// How many queries a policy affords, or how many rows K queries need (offline).
    Plan(stats_cmds::PlanArgs),
    /// Client commands (talk to a running daemon).
    #[command(flatten)]
    Client(client::ClientCommand),
    /// Audit commands: export, checkpoint, certify, and the offline audit.
    #[command(flatten)]
    Audit(audit_cmds::AuditCommand),
}

/// Runs a parsed command line.
pub fn run(cli: Cli) -> ExitCode {
    let result = match cli.command {
        Command::Demo(args) => demo::run(args),
        Command::Serve(args) => local::serve(args),
        Command::Init(args) => local::init(args),
        Command::Backup(args) => ops::run_backup(args),
        Command::Restore(args) => ops::run_restore(args),
        Command::Bound(args) => stats_cmds::run_bound(&args),
        Command::Plan(args) => stats_cmds::run_plan(&args),
        Command::Client(cmd) => client::run(cmd),
        Command::Audit(cmd) => audit_cmds::run(cmd),
    };
    match result {
        Ok(code) => code,
        Err(err) => {
            let code = exit::code_for(&err);
            eprintln!("error: {err:#}");
            ExitCode::from(code)
        }
    }
}
