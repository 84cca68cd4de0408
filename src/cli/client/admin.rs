//! Reading a holdout's state and managing users: `status`, `history`, `list`, `close`, `user`,
//! `whoami`.

use std::process::ExitCode;

use clap::{Args, Subcommand, ValueEnum};
use serde_json::json;
use tokio_stream::StreamExt;

use super::conn::{Conn, ServerArgs};
use super::show;
use crate::proto::v1::{
    AddUserRequest, CloseHoldoutRequest, HistoryRequest, ListHoldoutsRequest, ListUsersRequest,
    RevokeUserRequest, RotateTokenRequest, ShredLabelsRequest, StatusRequest, WhoAmIRequest,
    WithdrawHoldoutRequest,
};

/// `holdout status`.
#[derive(Debug, Args)]
pub struct StatusArgs {
    /// Holdout name.
    pub name: String,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout history`.
#[derive(Debug, Args)]
#[command(
    after_long_help = "With --json the output is JSON Lines: one object per released \
event, oldest first, with keys entry, kind, team, at, note, answer (or null), refusal (or null) \
and exact_scores."
)]
pub struct HistoryArgs {
    /// Holdout name.
    pub name: String,
    /// Include exact scores (auditors; organizers once the holdout is closed). Each such read is
    /// recorded in the ledger.
    #[arg(long)]
    pub exact: bool,
    /// Print JSON Lines, one object per event.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout list`.
#[derive(Debug, Args)]
pub struct ListArgs {
    /// Include closed holdouts.
    #[arg(long)]
    pub all: bool,
    /// Print one JSON array.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout close`.
#[derive(Debug, Args)]
pub struct CloseArgs {
    /// Holdout name.
    pub name: String,
    /// Why it is closed (recorded in the ledger).
    #[arg(long, default_value = "")]
    pub reason: String,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout withdraw`.
#[derive(Debug, Args)]
pub struct WithdrawArgs {
    /// Holdout name.
    pub name: String,
    /// Why it is withdrawn (recorded in the ledger).
    #[arg(long, default_value = "")]
    pub reason: String,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout shred`.
#[derive(Debug, Args)]
pub struct ShredArgs {
    /// Holdout name (closed).
    pub name: String,
    /// Why the labels are shredded (recorded in the ledger).
    #[arg(long, default_value = "")]
    pub reason: String,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout whoami`.
#[derive(Debug, Args)]
pub struct WhoamiArgs {
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// A role a user can hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Role {
    /// Uploads labels and creates holdouts.
    Custodian,
    /// Manages users and policies, closes holdouts.
    Organizer,
    /// Submits predictions (as a member of a team).
    Analyst,
    /// Reads and exports the full ledger.
    Auditor,
}

impl Role {
    fn as_str(self) -> &'static str {
        match self {
            Role::Custodian => "custodian",
            Role::Organizer => "organizer",
            Role::Analyst => "analyst",
            Role::Auditor => "auditor",
        }
    }
}

/// `holdout user ...`.
#[derive(Debug, Subcommand)]
pub enum UserCommand {
    /// Add a user and print their token once (only its hash is stored).
    Add(UserAddArgs),
    /// List users (never their tokens).
    List(UserListArgs),
    /// Revoke a user's tokens.
    Revoke(UserRevokeArgs),
    /// Replace your own token; the old one stops working. Prints the new token once.
    Rotate(UserListArgs),
}

/// `holdout user add`.
#[derive(Debug, Args)]
pub struct UserAddArgs {
    /// User name: letters, digits, '-', '_' and '.'.
    pub name: String,
    /// Roles to grant (repeat the flag or separate with commas).
    #[arg(long = "role", value_enum, required = true, value_delimiter = ',')]
    pub roles: Vec<Role>,
    /// Team (the accounting identity of analysts); default: a team of one named after the user.
    #[arg(long, default_value = "")]
    pub team: String,
    /// Print one JSON object with the key `token`.
    #[arg(long)]
    pub json: bool,
    /// Write the token to this file (created, readable by its owner only; it must not exist
    /// yet) instead of printing it.
    #[arg(long, value_name = "FILE")]
    pub token_out: Option<std::path::PathBuf>,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout user list` and `holdout user rotate`.
#[derive(Debug, Args)]
pub struct UserListArgs {
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout user revoke`.
#[derive(Debug, Args)]
pub struct UserRevokeArgs {
    /// User name.
    pub name: String,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// Prints a holdout's budget position.
///
/// # Errors
/// Connection, permission and not-found failures.
pub async fn status(args: &StatusArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let s = conn
        .submissions()
        .get_status(StatusRequest {
            holdout: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let budget = s.budget.unwrap_or_default();
    if args.json {
        show::print_json(&json!({
            "holdout": s.holdout,
            "budget": show::budget_json(&budget),
            "budget_of": s.budget_of,
            "no_share": s.no_share,
            "policy": s.policy.as_ref().map_or(serde_json::Value::Null, show::policy_json),
            "guarantee": s.guarantee,
            "flags": s.flags.iter().map(|f| json!({
                "team": f.team,
                "kind": f.kind,
                "detail": f.detail,
            })).collect::<Vec<_>>(),
            "alerts": s.alerts.iter().map(|a| json!({
                "team": a.team,
                "kind": a.kind,
                "detail": a.detail,
            })).collect::<Vec<_>>(),
            "round": s.round.as_ref().map_or(serde_json::Value::Null, |r| json!({
                "closed": r.closed,
                "own_team_only": r.own_team_only,
                "teams": r.teams.iter().map(|t| json!({
                    "team": t.team, "target": t.target, "entries": t.entries,
                    "selected": t.selected, "marked": t.marked,
                })).collect::<Vec<_>>(),
                "not_submitted": r.not_submitted,
            })),
        }));
    } else {
        println!("holdout    {}", s.holdout);
        if let Some(p) = &s.policy {
            println!("policy     {}", show::policy_text(p));
        }
        let delta = s.policy.as_ref().map_or(budget.delta, |p| p.delta);
        println!(
            "{}",
            show::budget_of_text(&budget, &s.budget_of, s.no_share, delta)
        );
        if let Some(r) = &s.round {
            println!("{}", round_text(r));
        }
        for f in &s.flags {
            println!(
                "flag       {} ({}): {}",
                show::safe_text(&f.team, 100),
                f.kind,
                f.detail
            );
        }
        for a in &s.alerts {
            let team = if a.team.is_empty() {
                String::new()
            } else {
                format!(" team {}", show::safe_text(&a.team, 100))
            };
            println!("alert      {}{team}: {}", a.kind, a.detail);
        }
        if !s.guarantee.is_empty() {
            println!("\n{}", s.guarantee);
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// A sealed round's entries per team for people: counts and selected entries only.
fn round_text(r: &crate::proto::v1::SealedRoundStatus) -> String {
    let entries: u64 = r.teams.iter().map(|t| t.entries).sum();
    let mut out = format!(
        "round      {}, {} from {}{}",
        if r.closed { "closed" } else { "open" },
        show::plural(entries, "entry", "entries"),
        show::plural(
            r.teams
                .iter()
                .map(|t| t.team.as_str())
                .collect::<std::collections::BTreeSet<_>>()
                .len() as u64,
            "team",
            "teams"
        ),
        if r.own_team_only {
            " (your team's only)"
        } else {
            ""
        }
    );
    if !r.closed {
        out.push_str("; scores are sealed until the close");
    }
    if !r.teams.is_empty() {
        let rows: Vec<Vec<String>> = r
            .teams
            .iter()
            .map(|t| {
                vec![
                    show::safe_text(&t.team, 100),
                    t.target.clone(),
                    t.entries.to_string(),
                    format!(
                        "query {} ({})",
                        t.selected,
                        if t.marked { "marked" } else { "latest" }
                    ),
                ]
            })
            .collect();
        out.push('\n');
        out.push_str(&show::table(
            &["team", "target", "entries", "selected entry"],
            &rows,
        ));
    }
    if !r.not_submitted.is_empty() {
        out.push_str(&format!(
            "\nno entry yet: {}",
            r.not_submitted
                .iter()
                .map(|t| show::safe_text(t, 100))
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    out
}

/// Prints a holdout's released events.
///
/// # Errors
/// Connection, permission and not-found failures.
pub async fn history(args: &HistoryArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let mut stream = conn
        .submissions()
        .history(HistoryRequest {
            holdout: args.name.clone(),
            exact: args.exact,
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let units = conn.units(&args.name).await;
    let mut rows = Vec::new();
    while let Some(entry) = stream.next().await {
        let entry = entry.map_err(|e| conn.fail(e))?;
        if args.json {
            show::print_json(&show::history_json(&entry, &units));
        } else {
            rows.push(show::history_row(&entry, args.exact, &units));
        }
    }
    if !args.json {
        let mut header = vec!["entry", "at", "team", "query", "released", "interval"];
        if args.exact {
            header.push("exact");
        }
        header.push("note");
        if rows.is_empty() {
            println!("no answers or refusals yet");
        } else {
            println!("{}", show::table(&header, &rows));
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Lists holdouts.
///
/// # Errors
/// Connection and permission failures.
pub async fn list(args: &ListArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let reply = conn
        .holdouts()
        .list_holdouts(ListHoldoutsRequest {
            include_closed: args.all,
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if args.json {
        let all: Vec<_> = reply.holdouts.iter().map(show::holdout_json).collect();
        show::print_json(&json!(all));
        return Ok(ExitCode::SUCCESS);
    }
    if reply.holdouts.is_empty() {
        println!("no holdouts");
        return Ok(ExitCode::SUCCESS);
    }
    let rows: Vec<Vec<String>> = reply
        .holdouts
        .iter()
        .map(|h| {
            let b = h.budget.clone().unwrap_or_default();
            let targets: Vec<String> = h
                .targets
                .iter()
                .map(|t| format!("{}:{}", t.name, t.metric))
                .collect();
            vec![
                h.name.clone(),
                h.rows.to_string(),
                targets.join(" "),
                if !h.withdrawn_at.is_empty() {
                    "withdrawn"
                } else if h.open {
                    "open"
                } else {
                    "closed"
                }
                .to_string(),
                b.answered.to_string(),
                show::num(b.remaining),
                show::queries_left_text(b.queries_left),
                h.description.clone(),
            ]
        })
        .collect();
    println!(
        "{}",
        show::table(
            &[
                "name",
                "rows",
                "targets",
                "state",
                "answered",
                "remaining",
                "queries left",
                "description"
            ],
            &rows
        )
    );
    Ok(ExitCode::SUCCESS)
}

/// Closes a holdout.
///
/// # Errors
/// Connection, permission, not-found and state failures.
pub async fn close(args: &CloseArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let info = conn
        .holdouts()
        .close_holdout(CloseHoldoutRequest {
            name: args.name.clone(),
            reason: args.reason.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if args.json {
        show::print_json(&show::holdout_json(&info));
    } else {
        println!("closed {}\n{}", info.name, show::holdout_text_brief(&info));
    }
    Ok(ExitCode::SUCCESS)
}

/// Withdraws a holdout that released nothing (or records this role's request).
///
/// # Errors
/// Connection, permission, not-found and state failures (anything released: exit 7).
pub async fn withdraw(args: &WithdrawArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let reply = conn
        .holdouts()
        .withdraw_holdout(WithdrawHoldoutRequest {
            name: args.name.clone(),
            reason: args.reason.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let info = reply.holdout.unwrap_or_default();
    if args.json {
        show::print_json(&json!({
            "completed": reply.completed,
            "message": reply.message,
            "holdout": show::holdout_json(&info),
        }));
    } else {
        println!("{}", reply.message);
    }
    Ok(ExitCode::SUCCESS)
}

/// Shreds a closed holdout's labels (custodian).
///
/// # Errors
/// Connection, permission and not-found failures; an open holdout (exit 7).
pub async fn shred(args: &ShredArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let reply = conn
        .holdouts()
        .shred_labels(ShredLabelsRequest {
            name: args.name.clone(),
            reason: args.reason.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if args.json {
        show::print_json(&json!({
            "message": reply.message,
            "entry": reply.entry,
        }));
    } else {
        println!("{}", reply.message);
    }
    Ok(ExitCode::SUCCESS)
}

/// Runs a `user` subcommand.
///
/// # Errors
/// Connection, permission and not-found failures.
pub async fn user(cmd: &UserCommand) -> anyhow::Result<ExitCode> {
    match cmd {
        UserCommand::Add(args) => {
            // The file is made before the user exists, so a path that cannot be written costs
            // no user whose token nobody has.
            let mut file = args.token_out.as_deref().map(token_file).transpose()?;
            let added = async {
                let conn = Conn::open(&args.server).await?;
                let reply = conn
                    .users()
                    .add_user(AddUserRequest {
                        name: args.name.clone(),
                        roles: args.roles.iter().map(|r| r.as_str().to_string()).collect(),
                        team: args.team.clone(),
                    })
                    .await
                    .map_err(|e| conn.fail(e))?
                    .into_inner();
                anyhow::Ok(reply)
            }
            .await;
            let reply = match added {
                Ok(reply) => reply,
                Err(e) => {
                    // No user was added: the empty file made for its token goes too, so that
                    // the same command can be run again once the daemon answers.
                    if let (Some(f), Some(path)) = (file.take(), &args.token_out) {
                        drop(f);
                        let _ = std::fs::remove_file(path);
                    }
                    return Err(e);
                }
            };
            match (&mut file, &args.token_out) {
                (Some(f), Some(path)) => {
                    use std::io::Write;
                    if let Err(e) = writeln!(f, "{}", reply.token).and_then(|()| f.sync_all()) {
                        // The user exists now: the token must not be lost.
                        eprintln!("error: cannot write {}: {e}", path.display());
                        print_token(args.json, reply.user.as_ref(), &reply.token);
                        return Ok(ExitCode::from(1));
                    }
                    let user = reply.user.clone().unwrap_or_default();
                    if args.json {
                        show::print_json(&json!({
                            "user": show::user_json(&user),
                            "token_file": path.display().to_string(),
                        }));
                    } else {
                        eprintln!(
                            "added {} (roles {}, team {}); token written to {}",
                            user.name,
                            user.roles.join(","),
                            user.team,
                            path.display()
                        );
                    }
                }
                _ => print_token(args.json, reply.user.as_ref(), &reply.token),
            }
        }
        UserCommand::List(args) => {
            let conn = Conn::open(&args.server).await?;
            let reply = conn
                .users()
                .list_users(ListUsersRequest {})
                .await
                .map_err(|e| conn.fail(e))?
                .into_inner();
            if args.json {
                let all: Vec<_> = reply.users.iter().map(show::user_json).collect();
                show::print_json(&json!(all));
            } else {
                let rows: Vec<_> = reply.users.iter().map(show::user_row).collect();
                println!(
                    "{}",
                    show::table(&["name", "roles", "team", "created", "state"], &rows)
                );
            }
        }
        UserCommand::Revoke(args) => {
            let conn = Conn::open(&args.server).await?;
            let u = conn
                .users()
                .revoke_user(RevokeUserRequest {
                    name: args.name.clone(),
                })
                .await
                .map_err(|e| conn.fail(e))?
                .into_inner();
            if args.json {
                show::print_json(&show::user_json(&u));
            } else {
                println!("revoked {}: its tokens no longer work", u.name);
            }
        }
        UserCommand::Rotate(args) => {
            let conn = Conn::open(&args.server).await?;
            let reply = conn
                .users()
                .rotate_token(RotateTokenRequest {})
                .await
                .map_err(|e| conn.fail(e))?
                .into_inner();
            print_token(args.json, reply.user.as_ref(), &reply.token);
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Creates a new file for a token, readable by its owner only.
fn token_file(path: &std::path::Path) -> anyhow::Result<std::fs::File> {
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(0o600);
    }
    options.open(path).map_err(|e| {
        crate::error::Error::invalid(
            "--token-out",
            format!(
                "cannot create {}: {e} (it must not exist yet)",
                path.display()
            ),
        )
        .into()
    })
}

fn print_token(json: bool, user: Option<&crate::proto::v1::UserInfo>, token: &str) {
    let user = user.cloned().unwrap_or_default();
    if json {
        show::print_json(&json!({ "user": show::user_json(&user), "token": token }));
    } else {
        eprintln!(
            "token for {} (roles {}, team {}); store it now, it is not shown again:",
            user.name,
            user.roles.join(","),
            user.team
        );
        println!("{token}");
    }
}

/// Prints whom the token belongs to.
///
/// # Errors
/// Connection and authentication failures.
pub async fn whoami(args: &WhoamiArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let u = conn
        .users()
        .who_am_i(WhoAmIRequest {})
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if args.json {
        show::print_json(&show::user_json(&u));
    } else {
        println!(
            "{}",
            show::table(
                &["name", "roles", "team", "created", "state"],
                &[show::user_row(&u)]
            )
        );
    }
    Ok(ExitCode::SUCCESS)
}
