//! Client commands: talk to a running daemon over gRPC (all but `split`, which is local).
//!
//! | command | module |
//! |---|---|
//! | `create` | [`create`] |
//! | `split` | [`split`] |
//! | `ids`, `validate`, `submit` | [`submit`] |
//! | `status`, `history`, `list`, `close`, `withdraw`, `shred`, `user ...`, `whoami` | [`admin`] |
//! | `leaderboard`, `ranking`, `duplicates` | [`compete`] |
//!
//! Every command prints people-readable text by default and one JSON document with `--json`.
//! Errors are printed as `error: MESSAGE` on stderr and mapped to the documented exit codes
//! ([`super::exit`]).

use std::process::ExitCode;

use clap::Subcommand;

use super::exit;

pub mod admin;
pub mod compete;
pub mod conn;
pub mod create;
pub mod plan;
pub mod report;
pub mod show;
pub mod split;
pub mod submit;

/// Rows per streamed chunk (labels and predictions).
pub const CHUNK_ROWS: usize = 8192;

/// What the guarantee rests on; shown in the help of `create` and `submit`.
pub const GUARANTEE_HELP: &str = "\
The guarantee is statistical. With probability at least 1 - DELTA over the draw of the holdout's \
labels, every interval the holdout reports, now or later, contains the mean loss its predictions \
would have on fresh labels for the same inputs. It rests on assumptions: the rows were drawn \
independently (i.i.d. for the true-risk reading); submissions are chosen without access to the \
labels except through released answers; the declared sharing assumption holds (shared: anyone \
may see every answer; isolated: each team sees only its own, and a team is one analyst); and the \
loss is the metric as defined (clipped, floored, rescaled).";

/// Client commands. The larger argument sets are boxed to keep the top-level enum small.
#[derive(Debug, Subcommand)]
pub enum ClientCommand {
    /// Create a holdout from a labels file (custodian): prints what the policy buys, then uploads.
    #[command(after_long_help = GUARANTEE_HELP)]
    Create(Box<create::CreateArgs>),
    /// Split a labelled file into row-disjoint files, one per future holdout (local, no daemon).
    #[command(after_long_help = split::SPLIT_HELP)]
    Split(Box<split::SplitArgs>),
    /// Write a predictions template (the holdout's row ids) and show its label domain.
    Ids(submit::IdsArgs),
    /// Check a predictions file against a holdout's declaration; charges nothing.
    Validate(Box<submit::ValidateArgs>),
    /// Submit predictions for scoring: one answer charged against the budget, or a refusal.
    #[command(after_long_help = GUARANTEE_HELP)]
    Submit(Box<submit::SubmitArgs>),
    /// A holdout's budget: spent, remaining, next half-width, queries left.
    Status(admin::StatusArgs),
    /// Released answers and refusals of a holdout, oldest first.
    History(admin::HistoryArgs),
    /// Charts of a holdout: the budget burn-down and every released interval, by team, with the
    /// guarantee under them; SVG, PNG or HTML by the extension of --out.
    Report(report::ReportArgs),
    /// Holdouts visible to you.
    List(admin::ListArgs),
    /// Close a holdout: it answers no more queries (organizer). Closing a sealed round answers
    /// every entry at once and ranks them.
    Close(admin::CloseArgs),
    /// Withdraw a holdout that released nothing, freeing its rows and labels for a new create
    /// (custodian and organizer: the first records a request, the other completes it; one call
    /// if you hold both roles). Refused once anything was answered or sealed.
    Withdraw(admin::WithdrawArgs),
    /// Shred a closed holdout's labels (custodian): they are deleted from the daemon's
    /// database, recorded in the ledger; the labels digest stays, so the chain still audits.
    /// Refused while the holdout is open.
    Shred(admin::ShredArgs),
    /// Each team's best: on a ladder its best so far with the interval for its best true
    /// error; under other rules its released answer with the lowest upper limit per target.
    Leaderboard(compete::BoardArgs),
    /// Sealed rounds, once closed: the ranking, with paired comparisons between neighbours.
    Ranking(compete::BoardArgs),
    /// Identical predictions submitted by different teams (organizers, auditors).
    Duplicates(compete::BoardArgs),
    /// Manage users and tokens (organizer; `rotate` for anyone).
    #[command(subcommand)]
    User(admin::UserCommand),
    /// Show whom your token belongs to.
    Whoami(admin::WhoamiArgs),
}

/// Runs a client command. Failures are printed here (`error: MESSAGE`) and turned into their
/// exit codes, so the returned error is only for a runtime that cannot start.
pub fn run(cmd: ClientCommand) -> anyhow::Result<ExitCode> {
    let result = match cmd {
        ClientCommand::Split(args) => split::run(&args),
        other => tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .map_err(anyhow::Error::from)
            .and_then(|rt| rt.block_on(dispatch(other))),
    };
    Ok(match result {
        Ok(code) => code,
        Err(err) => {
            eprintln!("error: {}", conn::describe(&err));
            ExitCode::from(exit::code_for(&err))
        }
    })
}

async fn dispatch(cmd: ClientCommand) -> anyhow::Result<ExitCode> {
    match cmd {
        ClientCommand::Create(args) => create::run(&args).await,
        ClientCommand::Split(args) => split::run(&args),
        ClientCommand::Ids(args) => submit::ids(&args).await,
        ClientCommand::Validate(args) => submit::validate(&args).await,
        ClientCommand::Submit(args) => submit::submit(&args).await,
        ClientCommand::Status(args) => admin::status(&args).await,
        ClientCommand::History(args) => admin::history(&args).await,
        ClientCommand::Report(args) => report::run(&args).await,
        ClientCommand::List(args) => admin::list(&args).await,
        ClientCommand::Close(args) => admin::close(&args).await,
        ClientCommand::Withdraw(args) => admin::withdraw(&args).await,
        ClientCommand::Shred(args) => admin::shred(&args).await,
        ClientCommand::Leaderboard(args) => compete::leaderboard(&args).await,
        ClientCommand::Ranking(args) => compete::ranking(&args).await,
        ClientCommand::Duplicates(args) => compete::duplicates(&args).await,
        ClientCommand::User(cmd) => admin::user(&cmd).await,
        ClientCommand::Whoami(args) => admin::whoami(&args).await,
    }
}

#[cfg(test)]
mod tests {
    use clap::Subcommand;

    use super::ClientCommand;

    #[test]
    fn the_command_line_is_consistent() {
        ClientCommand::augment_subcommands(clap::Command::new("holdout")).debug_assert();
    }

    #[test]
    fn flags_parse_as_documented() {
        let cmd = ClientCommand::augment_subcommands(clap::Command::new("holdout"));
        let m = cmd
            .clone()
            .try_get_matches_from([
                "holdout",
                "submit",
                "h",
                "--predictions",
                "a.csv",
                "b.csv",
                "--max-cost",
                "2",
            ])
            .expect("submit parses");
        let (name, sub) = m.subcommand().expect("subcommand");
        assert_eq!(name, "submit");
        let files: Vec<&std::path::PathBuf> = sub.get_many("predictions").expect("files").collect();
        assert_eq!(files.len(), 2);
        assert!(
            cmd.clone()
                .try_get_matches_from(["holdout", "create", "h", "--labels", "l.csv"])
                .is_err(),
            "create needs --metric or --target"
        );
        assert!(
            cmd.clone()
                .try_get_matches_from(["holdout", "ids", "h", "--json"])
                .is_err(),
            "ids --json needs --out"
        );
        assert!(
            cmd.try_get_matches_from(["holdout", "user", "add", "u", "--role", "owner"])
                .is_err(),
            "unknown role"
        );
    }
}
