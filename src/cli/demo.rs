//! `holdout demo`: the main job end to end, in one process, on a temporary SQLite database.
//!
//! The scenario is invented: the Kestrel Parcel Cooperative keeps 20,000 labelled shipments
//! (was the parcel late?) as a sealed holdout, and three squads of analysts submit models to it.
//! The daemon runs in-process on a loopback port; everything else goes through the real gRPC
//! services, exactly as the command-line client would.

use std::process::ExitCode;
use std::sync::Arc;

use anyhow::{Context, bail};
use clap::Args;

use super::client::conn::{Conn, ServerArgs};
use crate::auth::{self, Role};
use crate::engine::{Db, Engine, SystemClock};
use crate::ledger;
use crate::proto::v1::{
    self as pb, CreateHoldoutChunk, HoldoutSpec, LabelColumn, LabelRows, SubmitChunk, SubmitHeader,
    create_holdout_chunk, submit_chunk, submit_response::Outcome,
};
use crate::service::Daemon;
use crate::store::Store;

/// `holdout demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Keep the demo database at this path instead of a temporary directory.
    #[arg(long)]
    pub keep_db: Option<std::path::PathBuf>,
    /// Rows in the invented holdout.
    #[arg(long, default_value_t = 20_000)]
    pub rows: usize,
}

/// A tiny deterministic generator (splitmix64), so the demo prints the same story every run.
struct Mix(u64);

impl Mix {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

fn conn(addr: std::net::SocketAddr, token: &str) -> ServerArgs {
    ServerArgs {
        server: format!("http://{addr}"),
        token: Some(token.to_string()),
        ca: None,
        client_cert: None,
        client_key: None,
    }
}

/// Runs the demo.
pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(demo(args))
}

async fn demo(args: DemoArgs) -> anyhow::Result<ExitCode> {
    if args.rows < 100 {
        bail!("--rows must be at least 100");
    }
    let dir = tempfile::tempdir()?;
    let path = args
        .keep_db
        .clone()
        .unwrap_or_else(|| dir.path().join("demo.db"));
    let mut engine = Engine::new(Store::open(&path)?, Arc::new(SystemClock));
    let (custodian_token, squads) = engine.write(|w| {
        let now = chrono::Utc::now();
        let (_, custodian) = auth::add_user(
            w,
            "ada-custodian",
            &[Role::Custodian, Role::Organizer],
            None,
            "demo",
            now,
        )?;
        let mut squads = Vec::new();
        for (user, team) in [
            ("ines", "north-squad"),
            ("tomasz", "harbor-squad"),
            ("mira", "lantern"),
        ] {
            let (_, token) = auth::add_user(w, user, &[Role::Analyst], Some(team), "demo", now)?;
            squads.push((user, team, token));
        }
        Ok((custodian, squads))
    })?;
    let db = Db::spawn(engine);
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let addr = listener.local_addr()?;
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(crate::server::serve(listener, Daemon::new(db), async {
        let _ = stopped.await;
    }));

    println!("holdout-ledger demo: the Kestrel Parcel Cooperative (an invented scenario)");
    println!("daemon on {addr}, database {}\n", path.display());

    // The sealed labels: was each shipment late? About 30 % were.
    let mut rng = Mix(2026);
    let n = args.rows;
    let ids: Vec<String> = (0..n).map(|i| format!("shp-{i:06}")).collect();
    let late: Vec<bool> = (0..n).map(|_| rng.unit() < 0.3).collect();
    let labels: Vec<String> = late
        .iter()
        .map(|l| if *l { "late" } else { "on-time" }.to_string())
        .collect();

    let policy = pb::Policy {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.05,
        sharing: "shared".into(),
        tolerance_reference: "worst-case".into(),
        shares: "none".into(),
        daily_quota: 0,
        canonical_json: String::new(),
        ..Default::default()
    };
    let mut holdouts = Conn::open(&conn(addr, &custodian_token)).await?.holdouts();
    let mut chunks = vec![CreateHoldoutChunk {
        part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
            name: "parcel-lateness".into(),
            policy: Some(policy),
            targets: vec![pb::Target {
                name: "late".into(),
                column: "label".into(),
                metric: "error".into(),
                method: "exact".into(),
                classes: vec!["late".into(), "on-time".into()],
            }],
            description: "Invented shipments of the Kestrel Parcel Cooperative, 2026".into(),
            ..Default::default()
        })),
    }];
    for (id_part, label_part) in ids.chunks(8192).zip(labels.chunks(8192)) {
        chunks.push(CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                ids: id_part.to_vec(),
                columns: vec![LabelColumn {
                    values: label_part.to_vec(),
                }],
            })),
        });
    }
    let info = holdouts
        .create_holdout(tokio_stream::iter(chunks))
        .await?
        .into_inner();
    println!(
        "Ada (custodian) sealed holdout {:?}: {} rows, delta 0.05, series schedule, answers \
         rounded to 0.01, tolerance +-0.05.",
        info.name, info.rows
    );
    println!("genesis entry {}\n", &info.genesis_hash[..16]);

    // Each squad submits models; each model is right on a row with its own accuracy.
    let accuracies = [0.70, 0.72, 0.74, 0.75, 0.77, 0.78, 0.79, 0.80, 0.81, 0.82];
    let mut query = 0usize;
    let mut refused = false;
    'outer: for round in 0..20 {
        for (user, team, token) in &squads {
            let accuracy = accuracies[(round + query) % accuracies.len()];
            let preds: Vec<String> = late
                .iter()
                .map(|l| {
                    let right = rng.unit() < accuracy;
                    let says_late = if right { *l } else { !*l };
                    if says_late { "late" } else { "on-time" }.to_string()
                })
                .collect();
            let mut client = Conn::open(&conn(addr, token)).await?.submissions();
            let mut chunks = vec![SubmitChunk {
                part: Some(submit_chunk::Part::Header(SubmitHeader {
                    holdout: "parcel-lateness".into(),
                    mode: pb::SubmitMode::Answer as i32,
                    note: format!("{team} model {}", round + 1),
                    ..Default::default()
                })),
            }];
            for (id_part, p_part) in ids.chunks(8192).zip(preds.chunks(8192)) {
                chunks.push(SubmitChunk {
                    part: Some(submit_chunk::Part::Predictions(pb::PredictionChunk {
                        model: 0,
                        ids: id_part.to_vec(),
                        classes: p_part.to_vec(),
                        values: Vec::new(),
                    })),
                });
            }
            let reply = client
                .submit(tokio_stream::iter(chunks))
                .await?
                .into_inner();
            query += 1;
            match reply.outcome {
                Some(Outcome::Answer(a)) => {
                    let iv = a.interval.unwrap_or_default();
                    let b = a.budget.unwrap_or_default();
                    println!(
                        "#{:<2} {user:<7}({team:<12}) error {:<5} in {:<16}  level {:>6.2} nats  \
                         transcript {:>5.1} nats  next +-{:.3}",
                        a.query,
                        a.symbol,
                        super::client::show::interval_text(iv.lower, iv.upper),
                        a.level_nats,
                        b.transcript_nats,
                        b.next_half_width
                    );
                }
                Some(Outcome::Refusal(r)) => {
                    println!("\n{user} ({team}) was refused: {}", r.message);
                    refused = true;
                    break 'outer;
                }
                other => bail!("unexpected reply {other:?}"),
            }
        }
    }
    if !refused {
        println!("\n(the budget was not exhausted within the demo's submissions)");
    }

    // Close the server and check the ledger as an auditor would.
    let _ = stop.send(());
    server.await??;
    let mut store = Store::open(&path)?;
    let chain = ledger::read_chain(store.conn(), "parcel-lateness")?;
    let faults = ledger::verify_chain(&chain);
    println!(
        "\nThe ledger holds {} entries (genesis, answers, refusal); hash chain {}.",
        chain.len(),
        if faults.is_empty() {
            "verified"
        } else {
            "BROKEN"
        }
    );
    println!("\nWhat every interval above means:\n{}", info.guarantee);
    Ok(if faults.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::FAILURE
    })
}
