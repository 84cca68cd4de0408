//! Load generator: durable answers per second through the real gRPC daemon.
//!
//! Starts the daemon in this process (the same `Db`, services and `serve_with_limits` as
//! `holdout serve`) on 127.0.0.1 port 0 over a fresh database file (`synchronous = FULL`,
//! WAL), creates a holdout of n rows (binary `error` target, `series` schedule, `threshold:0.5`
//! answers, tolerance 0.5, created with the affordability check of `create --expect-answers`),
//! adds one analyst per client, then drives N concurrent gRPC clients (each its own connection,
//! the crate's generated tonic client) that submit distinct prediction files back to back. A
//! reply counts when the daemon sent it, which it does only after the answer's commit. At the
//! end the ledger is read back: every counted answer must be in the chain, which must verify.
//!
//! Each mode (`HOLDOUT_LOAD_BATCHES`, default `1,64`: group commit off, then on with batches of
//! at most 64) runs on its own fresh database in the same process, one after the other.
//!
//! Environment: `HOLDOUT_LOAD_CLIENTS` (N, default 32), `HOLDOUT_LOAD_SECS` (seconds per mode,
//! default 10), `HOLDOUT_LOAD_ANSWERS` (stop each mode after this many replies instead),
//! `HOLDOUT_LOAD_ROWS` (n, default 1000), `HOLDOUT_LOAD_BATCHES`, `HOLDOUT_LOAD_PATH` (`grpc`,
//! the default, or `db`: call the database thread directly as the Submit RPC does, without gRPC
//! or authentication), `HOLDOUT_LOAD_RULE` (the answer rule, default `threshold:0.5`;
//! `rounded:0.01` affords only 2,888 answers at n = 1,000), `HOLDOUT_LOAD_DIR` (where the
//! database files go; default the system temp directory, which must be a real disk for the
//! fsync to mean anything).
//!
//! ```sh
//! cargo bench --bench load
//! HOLDOUT_LOAD_CLIENTS=64 HOLDOUT_LOAD_SECS=20 cargo bench --bench load
//! ```

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Db, Engine, ModelPredictions, PolicyInput, RawValues, SubmitMode, SubmitOutcome,
    SubmitRequest, SystemClock, TargetDecl,
};
use holdout_ledger::ledger;
use holdout_ledger::proto::v1::{
    self as pb, PredictionChunk, SubmitChunk, SubmitHeader, submissions_client::SubmissionsClient,
    submit_chunk, submit_response::Outcome,
};
use holdout_ledger::server::{Limits, serve_with_limits};
use holdout_ledger::service::Daemon;
use holdout_ledger::store::Store;

const HOLDOUT: &str = "load";

fn env_num(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(v) => v
            .trim()
            .parse()
            .unwrap_or_else(|_| panic!("{name} must be a whole number, got {v:?}")),
        Err(_) => default,
    }
}

/// The invented labels: row i is "x" when i is a multiple of 4, else "y".
fn truth(i: usize) -> &'static str {
    if i.is_multiple_of(4) { "x" } else { "y" }
}

fn other(label: &str) -> &'static str {
    if label == "x" { "y" } else { "x" }
}

/// A prediction file unique to `k`: wrong on rows 100..200, and on row b (b < 32) for every
/// bit b set in k, so distinct k give distinct files (an identical file would be answered again
/// from the ledger, free, and not be a new durable answer).
fn predictions(rows: usize, k: u64) -> Vec<String> {
    (0..rows)
        .map(|i| {
            let flip = (100..200).contains(&i) || (i < 32 && (k >> i) & 1 == 1);
            let t = truth(i);
            if flip { other(t) } else { t }.to_string()
        })
        .collect()
}

struct Mode {
    max_batch: usize,
    answers: u64,
    refusals: u64,
    errors: u64,
    elapsed: Duration,
    latencies: Vec<Duration>,
    stats: holdout_ledger::engine::BatchStats,
    entries: usize,
    /// CPU used during the measured window (the process's threads, the database thread).
    cpu: Cpu,
}

/// On-CPU time used between two snapshots, in ns: by all of this process's threads, and by the
/// database thread(s).
#[derive(Debug, Clone, Copy, Default)]
struct Cpu {
    all: u64,
    db: u64,
    /// ns the database thread(s) waited runnable for a core (another process had it).
    db_waiting: u64,
}

/// On-CPU ns of each live thread of this process, by thread id, from
/// `/proc/self/task/*/schedstat` (Linux; empty elsewhere), and whether it is a database thread.
fn threads() -> std::collections::HashMap<String, (u64, u64, bool)> {
    let mut out = std::collections::HashMap::new();
    let Ok(tasks) = std::fs::read_dir("/proc/self/task") else {
        return out;
    };
    for task in tasks.flatten() {
        let p = task.path();
        let Ok(stat) = std::fs::read_to_string(p.join("schedstat")) else {
            continue;
        };
        let mut fields = stat
            .split_whitespace()
            .map(|v| v.parse::<u64>().unwrap_or(0));
        let (run, waiting) = (fields.next().unwrap_or(0), fields.next().unwrap_or(0));
        let db = std::fs::read_to_string(p.join("comm")).is_ok_and(|c| c.trim() == "holdout-db");
        out.insert(
            task.file_name().to_string_lossy().into_owned(),
            (run, waiting, db),
        );
    }
    out
}

/// CPU used since `before` by the threads alive now (a thread that ended in between is not
/// counted; one that started is counted from its start).
fn cpu_since(before: &std::collections::HashMap<String, (u64, u64, bool)>) -> Cpu {
    let mut out = Cpu::default();
    for (tid, (run, waiting, db)) in threads() {
        let (run0, waiting0) = before.get(&tid).map_or((0, 0), |b| (b.0, b.1));
        let used = run.saturating_sub(run0);
        out.all += used;
        if db {
            out.db += used;
            out.db_waiting += waiting.saturating_sub(waiting0);
        }
    }
    out
}

fn percentile(sorted: &[Duration], p: f64) -> Duration {
    if sorted.is_empty() {
        return Duration::ZERO;
    }
    let rank = ((p / 100.0) * sorted.len() as f64).ceil() as usize;
    sorted[rank.clamp(1, sorted.len()) - 1]
}

/// The interceptor that adds a client's bearer token.
type Auth = Box<dyn FnMut(tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> + Send>;
type Grpc = SubmissionsClient<
    tonic::service::interceptor::InterceptedService<tonic::transport::Channel, Auth>,
>;

/// A client: a gRPC connection to the daemon, or (`HOLDOUT_LOAD_PATH=db`) a direct caller of
/// the database thread, as the Submit RPC calls it, without gRPC or authentication.
enum Client {
    Grpc(Grpc),
    Direct { db: Db, caller: Caller },
}

enum Reply {
    Answer,
    Refusal,
    Other(String),
}

impl Client {
    async fn submit(&mut self, ids: Vec<String>, classes: Vec<String>) -> Result<Reply, String> {
        match self {
            Client::Grpc(client) => {
                let chunks = vec![
                    SubmitChunk {
                        part: Some(submit_chunk::Part::Header(SubmitHeader {
                            holdout: HOLDOUT.into(),
                            mode: pb::SubmitMode::Answer as i32,
                            ..Default::default()
                        })),
                    },
                    SubmitChunk {
                        part: Some(submit_chunk::Part::Predictions(PredictionChunk {
                            model: 0,
                            ids,
                            classes,
                            values: vec![],
                            ..Default::default()
                        })),
                    },
                ];
                let reply = client
                    .submit(tokio_stream::iter(chunks))
                    .await
                    .map_err(|e| e.to_string())?;
                Ok(match reply.into_inner().outcome {
                    Some(Outcome::Answer(a)) if !a.replayed => Reply::Answer,
                    Some(Outcome::Refusal(_)) => Reply::Refusal,
                    other => Reply::Other(format!("{other:?}")),
                })
            }
            Client::Direct { db, caller } => {
                let caller = caller.clone();
                let req = SubmitRequest {
                    holdout: HOLDOUT.into(),
                    target: String::new(),
                    mode: SubmitMode::Answer,
                    request_id: None,
                    note: String::new(),
                    max_cost_nats: None,
                    model_names: vec![],
                    models: vec![ModelPredictions {
                        ids,
                        values: RawValues::Classes(classes),
                    }],
                    mark_final: false,
                };
                let out = db
                    .call_batched(move |e| e.submit(&caller, req))
                    .await
                    .map_err(|e| e.to_string())?;
                Ok(match out {
                    SubmitOutcome::Answer {
                        replayed: false, ..
                    } => Reply::Answer,
                    SubmitOutcome::Refusal {
                        receipt: Some(_), ..
                    } => Reply::Refusal,
                    other => Reply::Other(format!("{other:?}")),
                })
            }
        }
    }
}

/// What every mode of a run shares.
struct Settings {
    clients: usize,
    rows: usize,
    secs: u64,
    fixed: Option<u64>,
    rule: String,
    direct: bool,
    dir: std::path::PathBuf,
}

async fn run_mode(max_batch: usize, set: &Settings) -> Mode {
    let Settings {
        clients,
        rows,
        secs,
        fixed,
        ref rule,
        direct,
        ref dir,
    } = *set;
    let tmp = tempfile::Builder::new()
        .prefix("holdout-load-")
        .tempdir_in(dir)
        .expect("temp dir");
    let store = Store::open(&tmp.path().join("load.db")).expect("open the database");
    let mut engine = Engine::new(store, Arc::new(SystemClock));
    let now = engine.now();
    // Users: a custodian (creates the holdout) and one analyst per client, each its own team.
    let tokens: Vec<String> = engine
        .write(|w| {
            auth::add_user(w, "custodian", &[Role::Custodian], None, "load", now)?;
            (0..clients)
                .map(|c| {
                    let team = format!("team-{c}");
                    auth::add_user(
                        w,
                        &format!("analyst-{c}"),
                        &[Role::Analyst],
                        Some(&team),
                        "load",
                        now,
                    )
                    .map(|(_, token)| token)
                })
                .collect()
        })
        .expect("add users");
    let custodian = Caller {
        name: "custodian".into(),
        roles: vec![Role::Custodian],
        team: String::new(),
    };
    // The holdout must afford every submission of the run (the check of `create
    // --expect-answers`); a timed run asks for 100,000.
    let expect = fixed.unwrap_or(100_000).min(u64::from(u32::MAX)) as u32;
    engine
        .create_expecting(
            &custodian,
            CreateRequest {
                name: HOLDOUT.into(),
                description: "load generator".into(),
                policy: PolicyInput {
                    delta: 0.05,
                    schedule: "series".into(),
                    answers: rule.into(),
                    tolerance: 0.5,
                    ..PolicyInput::default()
                },
                targets: vec![TargetDecl {
                    name: "y".into(),
                    column: "label".into(),
                    metric: "error".parse().unwrap(),
                    method: String::new(),
                    classes: vec!["x".into(), "y".into()],
                }],
                ids: (0..rows).map(|i| format!("row-{i:07}")).collect(),
                columns: vec![(0..rows).map(|i| truth(i).to_string()).collect()],
            },
            None,
            expect,
        )
        .expect("create the holdout");

    let db = Db::spawn_with(engine, max_batch);
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let url = format!("http://{}", listener.local_addr().unwrap());
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(serve_with_limits(
        listener,
        Daemon::new(db.clone()),
        async {
            let _ = stopped.await;
        },
        Limits::default(),
        None,
    ));

    // Connect every client before the clock starts.
    let mut conns = Vec::new();
    for token in &tokens {
        let channel = tonic::transport::Endpoint::from_shared(url.clone())
            .unwrap()
            .tcp_nodelay(true)
            .connect()
            .await
            .expect("connect");
        let bearer: tonic::metadata::MetadataValue<_> = format!("Bearer {token}").parse().unwrap();
        let auth: Auth = Box::new(move |mut r: tonic::Request<()>| {
            r.metadata_mut().insert("authorization", bearer.clone());
            Ok(r)
        });
        conns.push(SubmissionsClient::with_interceptor(channel, auth));
    }
    let clients: Vec<Client> = if direct {
        (0..clients)
            .map(|c| Client::Direct {
                db: db.clone(),
                caller: Caller {
                    name: format!("analyst-{c}"),
                    roles: vec![Role::Analyst],
                    team: format!("team-{c}"),
                },
            })
            .collect()
    } else {
        conns.into_iter().map(Client::Grpc).collect()
    };
    let issued = Arc::new(AtomicU64::new(0));
    let cpu_before = threads();
    let start = Instant::now();
    let deadline = start + Duration::from_secs(secs);
    let mut tasks = Vec::new();
    for (c, mut client) in clients.into_iter().enumerate() {
        let issued = issued.clone();
        let all_ids: Vec<String> = (0..rows).map(|i| format!("row-{i:07}")).collect();
        tasks.push(tokio::spawn(async move {
            let (mut answers, mut refusals, mut errors) = (0u64, 0u64, 0u64);
            let mut latencies = Vec::new();
            loop {
                let k = issued.fetch_add(1, Ordering::Relaxed);
                match fixed {
                    Some(total) if k >= total => break,
                    None if Instant::now() >= deadline => break,
                    _ => {}
                }
                // Unique per (client, round): k is unique across clients.
                let ids = all_ids.clone();
                let classes = predictions(rows, k);
                let t0 = Instant::now();
                let reply = client.submit(ids, classes).await;
                latencies.push(t0.elapsed());
                match reply {
                    Ok(Reply::Answer) => answers += 1,
                    Ok(Reply::Refusal) => refusals += 1,
                    Ok(Reply::Other(other)) => panic!("client {c}: unexpected reply {other}"),
                    Err(e) => {
                        errors += 1;
                        if errors <= 3 {
                            eprintln!("client {c}: {e}");
                        }
                    }
                }
            }
            (answers, refusals, errors, latencies)
        }));
    }
    let (mut answers, mut refusals, mut errors) = (0, 0, 0);
    let mut latencies = Vec::new();
    for t in tasks {
        let (a, r, e, l) = t.await.expect("client task");
        answers += a;
        refusals += r;
        errors += e;
        latencies.extend(l);
    }
    let elapsed = start.elapsed();
    let cpu_used = cpu_since(&cpu_before);
    latencies.sort();

    // Every reply counted was committed: the chain holds them all and verifies.
    let chain = db
        .call(|e| ledger::read_chain(e.store().conn(), HOLDOUT))
        .await
        .expect("read the chain");
    let faults = ledger::verify_chain(&chain);
    assert!(faults.is_empty(), "the chain does not verify: {faults:?}");
    let in_chain = |kind: &str| chain.iter().filter(|e| e.kind == kind).count() as u64;
    assert_eq!(
        in_chain("answer"),
        answers,
        "answers acknowledged vs in the ledger"
    );
    assert_eq!(
        in_chain("refusal"),
        refusals,
        "refusals acknowledged vs in the ledger"
    );
    let stats = db.batch_stats();
    let _ = stop.send(());
    let _ = server.await;
    Mode {
        max_batch,
        answers,
        refusals,
        errors,
        elapsed,
        latencies,
        stats,
        entries: chain.len(),
        cpu: cpu_used,
    }
}

fn main() {
    let clients = env_num("HOLDOUT_LOAD_CLIENTS", 32).max(1) as usize;
    let secs = env_num("HOLDOUT_LOAD_SECS", 10).max(1);
    let rows = env_num("HOLDOUT_LOAD_ROWS", 1000).max(1) as usize;
    let fixed = std::env::var("HOLDOUT_LOAD_ANSWERS")
        .ok()
        .map(|_| env_num("HOLDOUT_LOAD_ANSWERS", 0));
    let batches: Vec<usize> = std::env::var("HOLDOUT_LOAD_BATCHES")
        .unwrap_or_else(|_| "1,64".into())
        .split(',')
        .map(|b| {
            b.trim()
                .parse::<usize>()
                .unwrap_or_else(|_| panic!("HOLDOUT_LOAD_BATCHES: {b:?} is not a batch size"))
                .max(1)
        })
        .collect();
    let direct = match std::env::var("HOLDOUT_LOAD_PATH").as_deref() {
        Err(_) | Ok("grpc") => false,
        Ok("db") => true,
        Ok(other) => panic!("HOLDOUT_LOAD_PATH is grpc (default) or db, got {other:?}"),
    };
    let rule = std::env::var("HOLDOUT_LOAD_RULE").unwrap_or_else(|_| "threshold:0.5".into());
    let dir = std::env::var_os("HOLDOUT_LOAD_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(std::env::temp_dir);
    let settings = Settings {
        clients,
        rows,
        secs,
        fixed,
        rule: rule.clone(),
        direct,
        dir: dir.clone(),
    };
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .expect("runtime");
    println!(
        "load: n = {rows} rows, answers {rule}, {clients} concurrent {} clients, {}, \
         database in {} (synchronous = FULL, WAL), {} cores",
        if direct {
            "database-thread (no gRPC)"
        } else {
            "gRPC"
        },
        match fixed {
            Some(t) => format!("{t} submissions per mode"),
            None => format!("{secs} s per mode"),
        },
        dir.display(),
        std::thread::available_parallelism().map_or(0, |n| n.get()),
    );
    println!(
        "{:>9} {:>8} {:>8} {:>6} {:>8} {:>10} {:>9} {:>9} {:>8} {:>8}",
        "max-batch",
        "answers",
        "refusals",
        "errors",
        "secs",
        "answers/s",
        "p50 ms",
        "p99 ms",
        "batches",
        "mean"
    );
    let mut rates = Vec::new();
    for &max_batch in &batches {
        let m = runtime.block_on(run_mode(max_batch, &settings));
        let rate = m.answers as f64 / m.elapsed.as_secs_f64();
        let mean = if m.stats.batches == 0 {
            1.0
        } else {
            m.stats.batched_jobs as f64 / m.stats.batches as f64
        };
        println!(
            "{:>9} {:>8} {:>8} {:>6} {:>8.2} {:>10.1} {:>9.1} {:>9.1} {:>8} {:>8.1}",
            m.max_batch,
            m.answers,
            m.refusals,
            m.errors,
            m.elapsed.as_secs_f64(),
            rate,
            percentile(&m.latencies, 50.0).as_secs_f64() * 1e3,
            percentile(&m.latencies, 99.0).as_secs_f64() * 1e3,
            m.stats.batches,
            mean,
        );
        println!(
            "          ledger: {} entries, chain verifies, every acknowledged answer and refusal \
             is in it; largest batch {}, {} submissions committed alone",
            m.entries, m.stats.largest, m.stats.alone_jobs
        );
        let per = |ns: u64| ns as f64 / 1e6 / m.answers.max(1) as f64;
        println!(
            "          cpu per answer: {:.3} ms in the whole process (daemon and clients), {:.3} ms \
             on the database thread; the process ran on {:.2} cores on average; the database \
             thread waited runnable for a core {:.0}% of the run",
            per(m.cpu.all),
            per(m.cpu.db),
            m.cpu.all as f64 / m.elapsed.as_nanos().max(1) as f64,
            100.0 * m.cpu.db_waiting as f64 / m.elapsed.as_nanos().max(1) as f64,
        );
        rates.push((max_batch, rate));
    }
    if let (Some(first), Some(last)) = (rates.first(), rates.last())
        && rates.len() > 1
        && first.1 > 0.0
    {
        println!(
            "durable answers/s: max-batch {} -> {}: {:.1} -> {:.1} ({:.2}x)",
            first.0,
            last.0,
            first.1,
            last.1,
            last.1 / first.1
        );
    }
}
