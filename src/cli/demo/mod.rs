//! `holdout demo`: why the tool exists and what it does, end to end, in one process on a
//! temporary SQLite database.
//!
//! The scenario is invented: the Kestrel Parcel Cooperative keeps labelled shipments (was the
//! parcel late?) and three squads of analysts build models to predict lateness. One squad is
//! careful, one iterates on the answers it gets, one runs the classic overfitting attack
//! (files of coin flips, keep the ones that scored well, submit their majority vote). The demo
//! shows what a plain scorer would have claimed for the attack and what the ledger says, the
//! refusal once the shared holdout is spent, a ladder leaderboard, a sealed final round closed
//! and ranked, and an offline audit of every holdout's export against a signed checkpoint.
//!
//! The daemon runs in-process on a loopback port; everything else goes through the real gRPC
//! services, as the command-line client would. The demo knows each shipment's chance of being
//! late (it invented it), so it can print what no holdout can: each file's true error.

pub mod rpc;
pub mod world;

use std::process::ExitCode;
use std::sync::Arc;
use std::time::Instant;

use anyhow::{Context, bail};
use clap::Args;
use serde_json::{Value, json};

use self::rpc::Reply;
use self::world::{Mix, Model, Shipments};
use super::client::conn::Conn;
use super::client::{compete, show};
use crate::audit::{self, AuditOptions, LabelColumns};
use crate::auth::{self, Role};
use crate::engine::{Db, Engine, SystemClock};
use crate::error::Error;
use crate::proto::v1::{self as pb, CloseHoldoutRequest, LeaderboardRequest, RankingRequest};
use crate::service::Daemon;
use crate::stats::interval::{Method, Sides, display_outward, errors_interval};
use crate::store::Store;

/// `holdout demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Keep the demo database at this path (it holds the invented labels) instead of a
    /// temporary directory removed at the end.
    #[arg(long)]
    pub keep_db: Option<std::path::PathBuf>,
    /// Rows in each of the three invented, row-disjoint holdouts (at least 1,000).
    #[arg(long, default_value_t = 4_000)]
    pub rows: usize,
    /// Print the whole transcript as one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    /// Instead of running the story, write the invented world's files into this directory (a
    /// new or empty one) for the README's tour, then stop: two row-disjoint labelled files of
    /// 10,000 shipments each (`feedback-labels.csv`, `final-labels.csv`, columns `id,label`)
    /// and, for each, five prediction files of the squads' models (`feedback/*.csv`,
    /// `final/*.csv`, columns `id,prediction`).
    #[arg(long, value_name = "DIR", conflicts_with_all = ["keep_db", "json"])]
    pub write_files: Option<std::path::PathBuf>,
}

/// The seed of the invented world.
const SEED: u64 = 2026;
/// Files of coin flips the attacker sends to the plain scorer.
const PLAIN_PROBES: usize = 200;
/// Coin-flip files the attacker sends to the ledger before submitting their vote.
const LEDGER_PROBES: usize = 3;
/// Every holdout's tolerance (half-width beyond which it refuses).
const TOLERANCE: f64 = 0.1;

/// Runs the demo.
pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(demo(args))
}

/// Text for people, unless `--json` (then only the transcript object is printed, at the end).
struct Out {
    json: bool,
}

impl Out {
    fn say(&self, text: impl AsRef<str>) {
        if !self.json {
            println!("{}", text.as_ref());
        }
    }
}

/// An analyst of one squad, connected to the daemon.
struct Squad {
    user: &'static str,
    team: &'static str,
    conn: Conn,
}

fn policy(answers: &str) -> pb::Policy {
    pb::Policy {
        delta: 0.05,
        schedule: "series".into(),
        answers: answers.into(),
        tolerance: TOLERANCE,
        sharing: "shared".into(),
        tolerance_reference: "worst-case".into(),
        shares: "none".into(),
        ..Default::default()
    }
}

/// Three decimals, rounded outward for an interval.
fn iv3(lower: f64, upper: f64) -> String {
    let (lo, hi) = display_outward(lower, upper, 3);
    format!("[{lo}, {hi}]")
}

fn interval(a: &pb::Answer) -> (f64, f64) {
    a.interval
        .as_ref()
        .map_or((0.0, 1.0), |i| (i.lower, i.upper))
}

async fn demo(args: DemoArgs) -> anyhow::Result<ExitCode> {
    if let Some(dir) = &args.write_files {
        return write_files(dir);
    }
    if args.rows < 1_000 {
        return Err(Error::invalid(
            "--rows",
            format!("must be at least 1000, got {}", args.rows),
        )
        .into());
    }
    let started = Instant::now();
    let out = Out { json: args.json };
    let dir = tempfile::tempdir()?;
    let path = args
        .keep_db
        .clone()
        .unwrap_or_else(|| dir.path().join("demo.db"));
    if args.keep_db.is_some() && path.exists() {
        return Err(Error::invalid(
            "--keep-db",
            format!(
                "{} exists; give a new path (the demo never overwrites a database)",
                path.display()
            ),
        )
        .into());
    }

    // People: a custodian who is also the organizer, an auditor, three analysts.
    let mut engine = Engine::new(Store::open(&path)?, Arc::new(SystemClock));
    let (ada, oskar, analysts) = engine.write(|w| {
        let now = chrono::Utc::now();
        let roles = [Role::Custodian, Role::Organizer];
        let (_, ada) = auth::add_user(w, "ada", &roles, None, "demo", now)?;
        let (_, oskar) = auth::add_user(w, "oskar", &[Role::Auditor], None, "demo", now)?;
        let mut analysts = Vec::new();
        for (user, team) in [
            ("ines", "north-squad"),
            ("tomasz", "harbor-squad"),
            ("mira", "lantern"),
        ] {
            let (_, token) = auth::add_user(w, user, &[Role::Analyst], Some(team), "demo", now)?;
            analysts.push((user, team, token));
        }
        Ok((ada, oskar, analysts))
    })?;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let addr = listener.local_addr()?;
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(crate::server::serve(
        listener,
        Daemon::new(Db::spawn(engine)),
        async {
            let _ = stopped.await;
        },
    ));
    let ada = Conn::open(&rpc::server(addr, &ada)).await?;
    let oskar = Conn::open(&rpc::server(addr, &oskar)).await?;
    let mut squads = Vec::new();
    for (user, team, token) in analysts {
        let conn = Conn::open(&rpc::server(addr, &token)).await?;
        squads.push(Squad { user, team, conn });
    }

    let n = args.rows;
    let shared = Shipments::draw(0, n, SEED);
    let board = Shipments::draw(n as u64, n, SEED);
    let fin = Shipments::draw(2 * n as u64, n, SEED);
    out.say(format!(
        "holdout-ledger demo: the Kestrel Parcel Cooperative (an invented scenario)\n\
         Three squads predict which parcels will be late. {} invented shipments are split into \
         three row-disjoint holdouts of {n} rows.\ndaemon on {addr}, database {}\n",
        3 * n,
        path.display()
    ));

    // 1. The attack against a plain scorer.
    let (kept, plain_claim, plain_truth) =
        world::attack_plain_scorer(&shared, PLAIN_PROBES, SEED ^ 0xA77AC);
    // What the plain scorer would print beside its number: an exact 95 % interval for one
    // file (Clopper-Pearson), as if the vote had been chosen without looking at these rows.
    let errors = (plain_claim * n as f64).round() as u64;
    let naive = errors_interval(Method::Exact, n as u64, errors, 20f64.ln(), Sides::Two)
        .map_err(|e| anyhow::anyhow!("the one-file interval: {e:?}"))?;
    let naive_covers = naive.lower <= plain_truth && plain_truth <= naive.upper;
    out.say(format!(
        "1. Why: the overfitting attack against a plain scorer\n   \
         mira (lantern) sends {PLAIN_PROBES} files of coin flips to a scorer that prints each \
         file's exact error on the {n} rows,\n   keeps the {kept} that scored below 0.5 and \
         submits their majority vote.\n   \
         the plain scorer says the vote's error is {plain_claim:.3}, with the usual one-file 95 % \
         interval {}.\n   \
         its true error (fresh labels for the same shipments) is {plain_truth:.3}: the score \
         flatters it by {:.3}{}.\n",
        iv3(naive.lower, naive.upper),
        plain_truth - plain_claim,
        if naive_covers {
            ""
        } else {
            ", and the interval misses it: the vote was chosen by looking at these very rows"
        }
    ));

    // 2. The same squads on a ledger holdout.
    let info = rpc::create(
        &ada,
        "parcel-lateness",
        policy("rounded:0.01"),
        &shared,
        "Invented shipments of the Kestrel Parcel Cooperative (feedback holdout)",
        10,
    )
    .await?;
    out.say(format!(
        "2. The same three squads on holdout-ledger\n   \
         ada (custodian) sealed \"parcel-lateness\": {} rows, delta 0.05, answers rounded to \
         0.01, refuses past +-{TOLERANCE}; genesis {}.\n   \
         Columns: the released answer and its interval; what a plain scorer would print \
         (computed by the demo from\n   its own copy of the labels; the daemon never shows it); \
         the true error.\n",
        info.rows,
        &info.genesis_hash[..16]
    ));
    out.say(format!(
        "   {:<3} {:<22} {:<28} {:>6}  {:<16} {:>6}  {:>6}",
        "#", "who", "file", "answer", "interval", "plain", "true"
    ));
    let shared_run = shared_rounds(&out, &squads, &shared).await?;
    let attack = json!({
        "plain_scorer": {"files": PLAIN_PROBES, "kept": kept, "claimed_error": plain_claim,
                         "one_file_interval": [naive.lower, naive.upper],
                         "true_error": plain_truth},
        "ledger": shared_run.vote.as_ref().map(|(a, truth)| {
            let (lo, hi) = interval(a);
            json!({"probes": LEDGER_PROBES, "answer": a.symbol, "lower": lo, "upper": hi,
                   "true_error": truth, "covers_true_error": lo <= *truth && *truth <= hi})
        }),
    });
    match &shared_run.vote {
        Some((a, truth)) => {
            let (lo, hi) = interval(a);
            if a.replayed {
                out.say(
                    "   (* the same file as an earlier query: the ledger replays its answer and \
                     charges nothing)",
                );
            }
            out.say(format!(
                "\n   lantern's attack, side by side:\n   \
                 plain scorer, {PLAIN_PROBES} exact scores:    claims {plain_claim:.3}, true \
                 error {plain_truth:.3}\n   \
                 holdout-ledger, {LEDGER_PROBES} rounded answers: {} in {}, true error \
                 {truth:.3} ({})\n   \
                 Every answer was charged, so the probes ran the shared set down for everyone; \
                 none of them bought a misleading number.\n",
                a.symbol,
                iv3(lo, hi),
                if lo <= *truth && *truth <= hi {
                    "inside the interval"
                } else {
                    "outside the interval: one of the rare failures delta allows"
                }
            ));
        }
        None => out.say(
            "\n   lantern's vote was refused before it could be answered: the set was spent.\n",
        ),
    }

    // 3. A ladder leaderboard.
    rpc::create(
        &ada,
        "weekly-board",
        policy("ladder:0.01"),
        &board,
        "Invented shipments of the Kestrel Parcel Cooperative (leaderboard holdout)",
        10,
    )
    .await?;
    out.say(format!(
        "3. A ladder leaderboard (\"weekly-board\", another {n} rows: the Ladder mechanism \
         releases only new bests)"
    ));
    let board_submissions = ladder_rounds(&squads, &board).await?;
    let lb = ada
        .submissions()
        .leaderboard(LeaderboardRequest {
            holdout: "weekly-board".into(),
        })
        .await?
        .into_inner();
    out.say(format!(
        "   {board_submissions} submissions, answered or refused:\n{}\n   {}\n",
        indent(&compete::leaderboard_table(&lb, &show::Units::default())),
        lb.statement
    ));

    // 4. A sealed final round.
    rpc::create(
        &ada,
        "final-round",
        policy("sealed:0.001"),
        &fin,
        "Invented shipments of the Kestrel Parcel Cooperative (final round)",
        3,
    )
    .await?;
    out.say(
        "4. A final round (\"final-round\", sealed: nothing about any entry is released before \
         the close)",
    );
    let entries = final_entries(&out, &squads, &fin).await?;
    ada.holdouts()
        .close_holdout(CloseHoldoutRequest {
            name: "final-round".into(),
            reason: "the round is over".into(),
        })
        .await?;
    let ranking = ada
        .submissions()
        .ranking(RankingRequest {
            holdout: "final-round".into(),
        })
        .await?
        .into_inner();
    out.say(format!(
        "   ada (organizer) closed the round: every entry answered at once and ranked.\n{}\n   {}\n",
        indent(&compete::ranking_table(&ranking, &show::Units::default())),
        ranking.statement
    ));

    // 5. The audit.
    out.say(
        "5. The audit: oskar (auditor) exports each holdout and a signed checkpoint, then \
         replays them offline",
    );
    let mut audits = Vec::new();
    let mut all_clean = true;
    for (name, s) in [
        ("parcel-lateness", &shared),
        ("weekly-board", &board),
        ("final-round", &fin),
    ] {
        let export = crate::cli::audit_cmds::fetch_export(&oskar, name).await?;
        let checkpoint = crate::cli::audit_cmds::fetch_checkpoint(&oskar, name).await?;
        let report = audit::audit(
            &export,
            AuditOptions {
                labels: Some(LabelColumns {
                    ids: s.ids.clone(),
                    columns: vec![s.labels()],
                }),
                checkpoints: vec![(format!("{name} checkpoint"), checkpoint)],
                ..Default::default()
            },
        );
        let clean = report.clean();
        all_clean &= clean;
        let kinds: Vec<String> = report
            .checked
            .iter()
            .map(|(k, v)| format!("{v} {k}"))
            .collect();
        out.say(format!(
            "   {name:<16} {}: {} entries re-derived ({}), labels digest and checkpoint checked",
            if clean { "clean" } else { "FINDINGS" },
            report.entries,
            kinds.join(", ")
        ));
        for f in &report.findings {
            out.say(format!("     finding: {f:?}"));
        }
        audits.push(
            json!({"holdout": name, "clean": clean, "entries": report.entries,
                           "checked": report.checked, "unchecked": report.unchecked,
                           "findings": report.findings.len()}),
        );
    }

    let _ = stop.send(());
    server.await??;
    let seconds = started.elapsed().as_secs_f64();
    out.say(format!(
        "\nWhat every interval above means (each holdout at its own delta 0.05; the three \
         together hold at once with probability at least 0.85, by the union bound):\n{}\n\n\
         demo finished in {seconds:.1} s; {}",
        info.guarantee,
        match &args.keep_db {
            Some(p) => format!("the database is kept at {}", p.display()),
            None => "nothing was left behind (--keep-db PATH keeps the database)".into(),
        }
    ));
    if args.json {
        super::client::show::print_json(&json!({
            "scenario": "the Kestrel Parcel Cooperative (invented)",
            "rows_per_holdout": n,
            "attack": attack,
            "shared": {"holdout": "parcel-lateness", "queries": shared_run.rows,
                       "refusal": shared_run.refusal},
            "leaderboard": compete::leaderboard_json(&lb, &show::Units::default()),
            "final_round": {"entries": entries, "ranking": compete::ranking_json(&ranking, &show::Units::default())},
            "audits": audits,
            "guarantee": info.guarantee,
            "seconds": seconds,
        }));
    }
    Ok(if all_clean {
        ExitCode::SUCCESS
    } else {
        ExitCode::FAILURE
    })
}

fn indent(text: &str) -> String {
    text.lines()
        .map(|l| format!("   {l}"))
        .collect::<Vec<_>>()
        .join("\n")
}

/// What happened on the shared holdout.
struct SharedRun {
    /// One JSON object per answered query.
    rows: Vec<Value>,
    /// The refusal, when one came.
    refusal: Option<Value>,
    /// The attacker's vote: its answer and its true error.
    vote: Option<(pb::Answer, f64)>,
}

/// Round after round, each squad submits one file, until the shared holdout refuses.
async fn shared_rounds(out: &Out, squads: &[Squad], s: &Shipments) -> anyhow::Result<SharedRun> {
    let mut rng = Mix(SEED ^ 0x5EED);
    // north-squad: a better model each time (better features, not better luck).
    let careful = [2.6, 2.0, 1.6, 1.3, 1.1, 0.9, 0.8, 0.7, 0.6, 0.5];
    // harbor-squad: tweaks its model and keeps a tweak when the released answer improved.
    let mut adaptive = Model {
        noise: 1.6,
        shift: 0.5,
        seed: 202,
    };
    let mut adaptive_best = f64::INFINITY;
    // lantern: coin flips, kept when the answer is 0.50 or below, then their majority vote.
    let mut probes: Vec<(Vec<bool>, f64)> = Vec::new();
    let mut run = SharedRun {
        rows: Vec::new(),
        refusal: None,
        vote: None,
    };
    for round in 0..40 {
        for (i, squad) in squads.iter().enumerate() {
            let mut tried = None;
            let (file, says_late) = match i {
                0 => {
                    let noise = careful[round.min(careful.len() - 1)];
                    let m = Model {
                        noise,
                        shift: 0.0,
                        seed: 101 + round as u64,
                    };
                    (
                        format!("model v{} (noise {noise})", round + 1),
                        m.predict(s),
                    )
                }
                1 => {
                    let m = if round == 0 {
                        adaptive
                    } else {
                        Model {
                            noise: adaptive.noise * (0.9 + 0.15 * rng.unit()),
                            shift: adaptive.shift + 0.5 * (rng.unit() - 0.5),
                            seed: adaptive.seed,
                        }
                    };
                    tried = Some(m);
                    (format!("tweak {}", round + 1), m.predict(s))
                }
                _ if round == LEDGER_PROBES && run.vote.is_none() => {
                    let kept: Vec<Vec<bool>> = probes
                        .iter()
                        .filter(|(_, answer)| *answer <= 0.5)
                        .map(|(f, _)| f.clone())
                        .collect();
                    let vote = if kept.is_empty() {
                        // Nothing scored below 0.5: the best-scoring probe stands in.
                        probes
                            .iter()
                            .min_by(|a, b| a.1.total_cmp(&b.1))
                            .map(|(f, _)| f.clone())
                            .unwrap_or_default()
                    } else {
                        world::majority(&kept)
                    };
                    (format!("vote of {} kept probes", kept.len()), vote)
                }
                _ => (
                    format!("coin flips {}", probes.len() + 1),
                    world::coin_flips(&mut rng, s.len()),
                ),
            };
            let is_vote = file.starts_with("vote");
            let truth = s.true_error(&says_late);
            let plain = s.plain_error(&says_late);
            let note = format!("{} {file}", squad.team);
            match rpc::submit(&squad.conn, "parcel-lateness", s, &says_late, &note, false).await? {
                Reply::Answer(a) => {
                    let (lo, hi) = interval(&a);
                    let value: f64 = a.symbol.parse().unwrap_or(f64::NAN);
                    let query = if a.replayed {
                        format!("{}*", a.query)
                    } else {
                        a.query.to_string()
                    };
                    out.say(format!(
                        "   {:<3} {:<22} {:<28} {:>6}  {:<16} {:>6.3}  {:>6.3}",
                        query,
                        format!("{} ({})", squad.user, squad.team),
                        file,
                        a.symbol,
                        iv3(lo, hi),
                        plain,
                        truth
                    ));
                    run.rows
                        .push(json!({"query": a.query, "replayed": a.replayed,
                        "user": squad.user,
                        "team": squad.team, "file": file, "answer": a.symbol, "lower": lo,
                        "upper": hi, "plain_error": plain, "true_error": truth}));
                    match i {
                        1 if value < adaptive_best => {
                            adaptive_best = value;
                            adaptive = tried.unwrap_or(adaptive);
                        }
                        2 if is_vote => run.vote = Some((a, truth)),
                        2 => probes.push((says_late, value)),
                        _ => {}
                    }
                }
                Reply::Refusal(r) => {
                    out.say(format!(
                        "\n   {} ({}) was refused, charged nothing: {}",
                        squad.user, squad.team, r.message
                    ));
                    run.refusal = Some(json!({"user": squad.user, "team": squad.team,
                        "reason": r.reason, "message": r.message}));
                    return Ok(run);
                }
                Reply::Sealed(_) => bail!("a rounded holdout replied with a sealed entry"),
            }
        }
    }
    Ok(run)
}

/// Four rounds on the ladder holdout; returns how many files were submitted.
async fn ladder_rounds(squads: &[Squad], s: &Shipments) -> anyhow::Result<usize> {
    let mut rng = Mix(SEED ^ 0x1ADDE);
    let mut submitted = 0;
    for round in 0..4u64 {
        for (i, squad) in squads.iter().enumerate() {
            let says_late = match i {
                0 => Model {
                    noise: [2.0, 1.4, 1.0, 0.7][round as usize],
                    shift: 0.0,
                    seed: 301 + round,
                }
                .predict(s),
                1 => Model {
                    noise: 1.2,
                    shift: 0.4 * (rng.unit() - 0.5),
                    seed: 401,
                }
                .predict(s),
                _ => world::coin_flips(&mut rng, s.len()),
            };
            let note = format!("{} week {}", squad.team, round + 1);
            match rpc::submit(&squad.conn, "weekly-board", s, &says_late, &note, false).await? {
                Reply::Answer(_) | Reply::Refusal(_) => submitted += 1,
                Reply::Sealed(_) => bail!("a ladder holdout replied with a sealed entry"),
            }
        }
    }
    Ok(submitted)
}

/// Each squad enters one file into the sealed round.
async fn final_entries(out: &Out, squads: &[Squad], s: &Shipments) -> anyhow::Result<Vec<Value>> {
    let mut rng = Mix(SEED ^ 0xF1AA1);
    let mut entries = Vec::new();
    for (i, squad) in squads.iter().enumerate() {
        let (file, says_late) = match i {
            0 => (
                "its best model",
                Model {
                    noise: 0.6,
                    shift: 0.0,
                    seed: 501,
                }
                .predict(s),
            ),
            1 => (
                "its tuned model",
                Model {
                    noise: 1.0,
                    shift: 0.1,
                    seed: 502,
                }
                .predict(s),
            ),
            // Lantern's lookup tables cover other rows: on these it can only guess.
            _ => ("coin flips", world::coin_flips(&mut rng, s.len())),
        };
        let truth = s.true_error(&says_late);
        let note = format!("{} final: {file}", squad.team);
        match rpc::submit(&squad.conn, "final-round", s, &says_late, &note, true).await? {
            Reply::Sealed(e) => {
                out.say(format!(
                    "   {} ({}) entered {file}: sealed entry, query {}, nothing released (true error \
                     {truth:.3}, known to the demo only)",
                    squad.user, squad.team, e.query
                ));
                entries.push(json!({"user": squad.user, "team": squad.team, "file": file,
                                    "query": e.query, "true_error": truth}));
            }
            Reply::Refusal(r) => bail!("the final round refused an entry: {}", r.message),
            Reply::Answer(_) => bail!("a sealed round answered before its close"),
        }
    }
    Ok(entries)
}

/// Shipments in each of the tour's two labelled files.
const TOUR_ROWS: usize = 10_000;

/// The tour's prediction files: name, what made it, and the model.
const TOUR_MODELS: [(&str, &str, Model); 5] = [
    (
        "north-v1.csv",
        "north-squad's first model",
        Model {
            noise: 2.6,
            shift: 0.0,
            seed: 11,
        },
    ),
    (
        "north-v2.csv",
        "north-squad's better model",
        Model {
            noise: 1.4,
            shift: 0.0,
            seed: 12,
        },
    ),
    (
        "harbor-v1.csv",
        "harbor-squad's first model",
        Model {
            noise: 2.0,
            shift: 0.6,
            seed: 21,
        },
    ),
    (
        "harbor-v2.csv",
        "harbor-squad's tuned model",
        Model {
            noise: 1.9,
            shift: 0.1,
            seed: 21,
        },
    ),
    (
        "lantern-v1.csv",
        "lantern's model",
        Model {
            noise: 3.2,
            shift: -0.3,
            seed: 31,
        },
    ),
];

/// `demo --write-files DIR`: the invented world's files for the README's tour.
fn write_files(dir: &std::path::Path) -> anyhow::Result<ExitCode> {
    if dir.exists() && std::fs::read_dir(dir)?.next().is_some() {
        return Err(Error::invalid(
            "--write-files",
            format!(
                "{} is not empty; name a new or empty directory (nothing was written)",
                dir.display()
            ),
        )
        .into());
    }
    let write = |path: &std::path::Path, ids: &[String], column: &str, classes: &[String]| {
        let mut text = String::with_capacity(24 * classes.len());
        text.push_str("id,");
        text.push_str(column);
        text.push('\n');
        for (id, c) in ids.iter().zip(classes) {
            text.push_str(id);
            text.push(',');
            text.push_str(c);
            text.push('\n');
        }
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)
                .with_context(|| format!("creating {}", parent.display()))?;
        }
        std::fs::write(path, text).with_context(|| format!("writing {}", path.display()))
    };
    println!(
        "the Kestrel Parcel Cooperative's invented shipments (was the parcel late?); every name \
         and number is made up:"
    );
    // Two row-disjoint sets of shipments: one for day-to-day feedback, one for a final round.
    for (part, first) in [("feedback", 0), ("final", TOUR_ROWS as u64)] {
        let world = Shipments::draw(first, TOUR_ROWS, SEED);
        let labels = dir.join(format!("{part}-labels.csv"));
        write(&labels, &world.ids, "label", &world.labels())?;
        println!(
            "  {}  {} labelled shipments (id,label: late or on-time), for the custodian",
            labels.display(),
            world.len()
        );
        for (name, what, model) in TOUR_MODELS {
            let path = dir.join(part).join(name);
            write(
                &path,
                &world.ids,
                "prediction",
                &world::classes(&model.predict(&world)),
            )?;
            println!("  {}  {what} (id,prediction)", path.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}
