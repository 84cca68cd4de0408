//! Competition commands: `leaderboard` (ladder holdouts; best per team under the other rules), `ranking` (sealed rounds, after the
//! close) and `duplicates` (organizers and auditors); and the reply to a sealed entry.
//!
//! Each prints text for people, one JSON object with `--json`, or CSV with `--csv` (one row per
//! team or entry, for spreadsheets; the guarantee is in the text and JSON forms).

use std::process::ExitCode;

use clap::Args;
use serde_json::{Value, json};

use super::conn::{Conn, ServerArgs};
use super::show::{self, num};
use crate::proto::v1::{
    DuplicatesRequest, Interval, LeaderboardRequest, LeaderboardResponse, RankingRequest,
    RankingResponse, SealedEntry,
};

/// `holdout leaderboard`, `holdout ranking`, `holdout duplicates`.
#[derive(Debug, Args)]
pub struct BoardArgs {
    /// Holdout name.
    pub name: String,
    /// Print one JSON object.
    #[arg(long, conflicts_with = "csv")]
    pub json: bool,
    /// Print CSV with a header row.
    #[arg(long)]
    pub csv: bool,
    /// State the holdout's guarantee and its assumptions in full after the table (without
    /// it, one line names them; `holdout status` and --json always carry them in full).
    #[arg(long)]
    pub guarantee: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

fn iv(i: Option<&Interval>) -> (f64, f64) {
    i.map_or((0.0, 1.0), |i| (i.lower, i.upper))
}

fn opt(x: Option<f64>) -> String {
    x.map(num).unwrap_or_else(|| "-".into())
}

/// An interval for people, followed for a regression target by the same in its own units
/// (`[0.12, 0.15] = mean absolute error 13 [12, 15]`).
fn in_units(units: &show::Units, target: &str, score: Option<f64>, lo: f64, hi: f64) -> String {
    let shown = show::interval_text(lo, hi);
    match units.text(target, score, lo, hi) {
        Some(u) => format!("{shown} = {u}"),
        None => shown,
    }
}

/// After a leaderboard or ranking: the holdout's guarantee in full with `--guarantee`, else
/// in one line (the table's statement above already gives the probability it holds with).
fn board_guarantee(guarantee: &str, args: &BoardArgs, delta: Option<f64>) -> String {
    if args.guarantee {
        format!("\n{guarantee}")
    } else {
        show::guarantee_brief(
            delta,
            "these intervals hold together with every other this holdout reports",
            &format!(
                "--guarantee or `holdout status {}`",
                show::safe_text(&args.name, 100)
            ),
        )
    }
}

fn csv_line(cells: &[String]) -> String {
    cells
        .iter()
        .map(|c| {
            if c.contains([',', '"', '\n']) {
                format!("\"{}\"", c.replace('"', "\"\""))
            } else {
                c.clone()
            }
        })
        .collect::<Vec<_>>()
        .join(",")
}

/// The score and limits of [`show::Units::json`] as three CSV cells (empty for a target
/// without units of its own).
fn units_cells(units: &Value) -> [String; 3] {
    ["score", "lower", "upper"]
        .map(|k| units[k].as_f64().map(|x| x.to_string()).unwrap_or_default())
}

/// Prints a ladder leaderboard, or the best per team under the other rules.
///
/// # Errors
/// Connection, permission and not-found failures.
pub async fn leaderboard(args: &BoardArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let b = conn
        .submissions()
        .leaderboard(LeaderboardRequest {
            holdout: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let info = conn.holdout_info(&args.name).await;
    let units = info
        .as_ref()
        .map_or_else(show::Units::default, |i| show::Units::of(&i.targets));
    let delta = info.and_then(|i| i.policy).map(|p| p.delta);
    if args.json {
        show::print_json(&leaderboard_json(&b, &units));
    } else if args.csv {
        println!(
            "rank,team,best,lower,upper,submissions,improvements,best_at,target,query,\
             units_best,units_lower,units_upper"
        );
        for r in &b.rows {
            let (lo, hi) = iv(r.interval.as_ref());
            let [ub, ul, uu] = units_cells(&units.json(&r.target, r.best, lo, hi));
            println!(
                "{}",
                csv_line(&[
                    r.rank.to_string(),
                    r.team.clone(),
                    r.best.map(|x| x.to_string()).unwrap_or_default(),
                    lo.to_string(),
                    hi.to_string(),
                    r.submissions.to_string(),
                    r.improvements.to_string(),
                    r.best_at.clone(),
                    r.target.clone(),
                    r.query.to_string(),
                    ub,
                    ul,
                    uu,
                ])
            );
        }
    } else {
        if b.kind == "best-per-team" {
            println!("best per team on {}", b.holdout);
        } else {
            println!("leaderboard of {} (target {})", b.holdout, b.target);
        }
        if b.own_team_only {
            println!("(only your team's row: this leaderboard is shown in full to organizers)");
        }
        println!("{}", leaderboard_table(&b, &units));
        println!(
            "\n{}\n{}",
            b.statement,
            board_guarantee(&b.guarantee, args, delta)
        );
    }
    Ok(ExitCode::SUCCESS)
}

/// Prints the final ranking of a closed sealed round.
///
/// # Errors
/// Connection, permission and not-found failures; a round that has not closed.
pub async fn ranking(args: &BoardArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let r = conn
        .submissions()
        .ranking(RankingRequest {
            holdout: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    // The comparison with the entry ranked just below, by ticket of the entry ahead.
    let below = |ticket: u64| r.comparisons.iter().find(|c| c.ahead == ticket);
    let info = conn.holdout_info(&args.name).await;
    let units = info
        .as_ref()
        .map_or_else(show::Units::default, |i| show::Units::of(&i.targets));
    let delta = info.and_then(|i| i.policy).map(|p| p.delta);
    if args.json {
        show::print_json(&ranking_json(&r, &units));
    } else if args.csv {
        println!(
            "rank,team,query,score,lower,upper,vs_next_lower,vs_next_upper,told_apart,\
             units_score,units_lower,units_upper"
        );
        for e in &r.entries {
            let (lo, hi) = iv(e.interval.as_ref());
            let [us, ul, uu] = units_cells(&units.json(&e.target, e.score, lo, hi));
            let (clo, chi, apart) =
                below(e.ticket).map_or((String::new(), String::new(), String::new()), |c| {
                    let (a, b) = iv(c.difference.as_ref());
                    (a.to_string(), b.to_string(), c.distinguishable.to_string())
                });
            println!(
                "{}",
                csv_line(&[
                    e.rank.to_string(),
                    e.team.clone(),
                    e.query.to_string(),
                    e.score.map(|x| x.to_string()).unwrap_or_default(),
                    lo.to_string(),
                    hi.to_string(),
                    clo,
                    chi,
                    apart,
                    us,
                    ul,
                    uu,
                ])
            );
        }
    } else {
        println!(
            "ranking of {} (closed {} by {})",
            r.holdout, r.closed_at, r.trigger
        );
        println!("{}", ranking_table(&r, &units));
        println!(
            "\n{}\n{}",
            r.statement,
            board_guarantee(&r.guarantee, args, delta)
        );
    }
    Ok(ExitCode::SUCCESS)
}

/// Prints prediction digests submitted by more than one team.
///
/// # Errors
/// Connection, permission and not-found failures.
pub async fn duplicates(args: &BoardArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let d = conn
        .submissions()
        .duplicates(DuplicatesRequest {
            holdout: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    if args.json {
        show::print_json(&json!({
            "holdout": d.holdout,
            "duplicates": d.duplicates.iter().map(|x| json!({
                "digest": x.digest,
                "teams": x.teams,
                "entries": x.entries.iter().map(|e| json!({
                    "entry": e.entry, "team": e.team, "user": e.user,
                })).collect::<Vec<Value>>(),
            })).collect::<Vec<Value>>(),
        }));
    } else if args.csv {
        println!("digest,entry,team,user");
        for x in &d.duplicates {
            for e in &x.entries {
                println!(
                    "{}",
                    csv_line(&[
                        x.digest.clone(),
                        e.entry.to_string(),
                        e.team.clone(),
                        e.user.clone()
                    ])
                );
            }
        }
    } else if d.duplicates.is_empty() {
        println!(
            "no identical predictions from different teams on {}",
            d.holdout
        );
    } else {
        println!(
            "{} sent by more than one team on {} (a team is one analyst: several accounts \
             of one team void the guarantee)",
            show::plural(
                d.duplicates.len() as u64,
                "prediction vector was",
                "prediction vectors were"
            ),
            d.holdout
        );
        for x in &d.duplicates {
            let entries: Vec<String> = x
                .entries
                .iter()
                .map(|e| format!("entry {} ({}, {})", e.entry, e.team, e.user))
                .collect();
            println!(
                "{}  teams {}: {}",
                x.digest,
                x.teams.join(", "),
                entries.join("; ")
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// A sealed entry's receipt as JSON.
pub fn sealed_json(e: &SealedEntry) -> Value {
    json!({
        "sealed": true,
        "target": e.target,
        "query": e.query,
        "ticket": e.ticket,
        "delta_i": e.delta_i,
        "level_nats": e.level_nats,
        "marked": e.marked,
        "replayed": e.replayed,
        "closes_at": e.closes_at,
        "digest": e.digest,
        "statement": e.statement,
        "receipt": show::receipt_json(e.receipt.as_ref()),
        "guarantee": e.guarantee,
    })
}

/// A sealed entry's receipt for people; the holdout's guarantee in one line unless `full`.
pub fn sealed_text(e: &SealedEntry, full: bool, delta: Option<f64>) -> String {
    // One number for a query everywhere: the reply, its receipt and the history all say
    // "query N" (per team under `isolated`); the position in the round stays in --json.
    let mut s = format!("sealed entry, query {} (target {})", e.query, e.target);
    if e.replayed {
        s.push_str(", already entered: nothing charged");
    }
    if e.marked {
        s.push_str(", marked as your team's selected entry");
    }
    s.push_str(&format!(
        "\nlevel      ln(1/d) = {} nats; share delta_i = {}",
        num(e.level_nats),
        num(e.delta_i)
    ));
    if let Some(r) = &e.receipt {
        s.push_str(&format!("\nreceipt    {}", show::receipt_text(r)));
    }
    s.push_str(&format!("\nstatement  {}", e.statement));
    s.push_str(&format!("\ndigest     {}", e.digest));
    if full && !e.guarantee.is_empty() {
        s.push_str("\n\n");
        s.push_str(&e.guarantee);
    } else if !e.guarantee.is_empty() {
        s.push_str(&format!(
            "\n{}",
            show::guarantee_brief(
                delta,
                "every interval this round reports at its close holds together with every \
                 other this holdout reports",
                "--guarantee or `holdout status`"
            )
        ));
    }
    s
}

/// A ladder leaderboard as one JSON object.
pub fn leaderboard_json(b: &LeaderboardResponse, units: &show::Units) -> Value {
    json!({
        "holdout": b.holdout,
        "target": b.target,
        "kind": b.kind,
        "own_team_only": b.own_team_only,
        "rows": b.rows.iter().map(|r| {
            let (lo, hi) = iv(r.interval.as_ref());
            json!({"rank": r.rank, "team": r.team, "target": r.target, "query": r.query,
                   "best": r.best, "lower": lo, "upper": hi,
                   "submissions": r.submissions, "improvements": r.improvements,
                   "best_at": r.best_at, "units": units.json(&r.target, r.best, lo, hi)})
        }).collect::<Vec<Value>>(),
        "statement": b.statement,
        "guarantee": b.guarantee,
    })
}

/// A leaderboard's rows as a table for people (without its statement and guarantee).
/// With `units`, rows of regression targets show their interval in the target's own units too.
pub fn leaderboard_table(b: &LeaderboardResponse, units: &show::Units) -> String {
    if b.kind == "best-per-team" {
        let rows: Vec<Vec<String>> = b
            .rows
            .iter()
            .map(|r| {
                let (lo, hi) = iv(r.interval.as_ref());
                vec![
                    r.target.clone(),
                    r.rank.to_string(),
                    r.team.clone(),
                    format!("query {}", r.query),
                    opt(r.best),
                    in_units(units, &r.target, r.best, lo, hi),
                    r.submissions.to_string(),
                ]
            })
            .collect();
        return show::table(
            &[
                "target",
                "rank",
                "team",
                "best answer",
                "score",
                "interval for its true error",
                "answered",
            ],
            &rows,
        );
    }
    let rows: Vec<Vec<String>> = b
        .rows
        .iter()
        .map(|r| {
            let (lo, hi) = iv(r.interval.as_ref());
            vec![
                if r.rank == 0 {
                    "-".to_string()
                } else {
                    r.rank.to_string()
                },
                r.team.clone(),
                opt(r.best),
                in_units(units, &r.target, r.best, lo, hi),
                r.submissions.to_string(),
                r.improvements.to_string(),
            ]
        })
        .collect();
    show::table(
        &[
            "rank",
            "team",
            "best",
            "best true error among its submissions",
            "answered",
            "new bests",
        ],
        &rows,
    )
}

/// A closed round's ranking as one JSON object.
pub fn ranking_json(r: &RankingResponse, units: &show::Units) -> Value {
    json!({
        "holdout": r.holdout,
        "closed_at": r.closed_at,
        "trigger": r.trigger,
        "entries": r.entries.iter().map(|e| {
            let (lo, hi) = iv(e.interval.as_ref());
            json!({"rank": e.rank, "team": e.team, "query": e.query, "ticket": e.ticket,
                   "score": e.score,
                   "lower": lo, "upper": hi, "digest": e.digest, "target": e.target,
                   "units": units.json(&e.target, e.score, lo, hi)})
        }).collect::<Vec<Value>>(),
        "comparisons": r.comparisons.iter().map(|c| {
            let (lo, hi) = iv(c.difference.as_ref());
            json!({"ahead": c.ahead, "behind": c.behind, "lower": lo, "upper": hi,
                   "level_nats": c.level_nats, "distinguishable": c.distinguishable,
                   "target": c.target,
                   "units": units.json(&c.target, None, lo, hi)})
        }).collect::<Vec<Value>>(),
        "statement": r.statement,
        "guarantee": r.guarantee,
    })
}

/// A closed round's ranking as a table for people: each entry, its interval and the paired
/// comparison with the entry ranked just below (without the statement and guarantee).
/// With `units`, entries of regression targets show their interval (and the comparison) in the
/// target's own units too.
pub fn ranking_table(r: &RankingResponse, units: &show::Units) -> String {
    // The comparison with the entry ranked just below, by ticket of the entry ahead.
    let below = |ticket: u64| r.comparisons.iter().find(|c| c.ahead == ticket);
    let rows: Vec<Vec<String>> = r
        .entries
        .iter()
        .map(|e| {
            let (lo, hi) = iv(e.interval.as_ref());
            let vs = below(e.ticket).map_or(String::new(), |c| {
                let (a, b) = iv(c.difference.as_ref());
                format!(
                    "{} {}",
                    in_units(units, &c.target, None, a, b),
                    if c.distinguishable {
                        "told apart"
                    } else {
                        "not told apart"
                    }
                )
            });
            vec![
                // Ranks count within a target (core 2 rounds name it).
                if e.target.is_empty() {
                    e.rank.to_string()
                } else {
                    format!("{} {}", e.target, e.rank)
                },
                e.team.clone(),
                opt(e.score),
                in_units(units, &e.target, e.score, lo, hi),
                vs,
            ]
        })
        .collect();
    show::table(
        &["rank", "team", "score", "interval", "minus the next rank"],
        &rows,
    )
}
