//! Commands that work on a local database file: `serve` and `init`.

use std::fs::OpenOptions;
use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use clap::Args;

use crate::auth::{self, Role};
use crate::engine::{Db, Engine, SystemClock};
use crate::error::Error;
use crate::server::{DEFAULT_LISTEN, Limits, Tls, serve_with_limits as serve_on};
use crate::service::{DEFAULT_MAX_MESSAGE_BYTES, DEFAULT_MAX_STREAM_BYTES, Daemon, StreamLimits};
use crate::store::Store;

/// `holdout serve`.
#[derive(Debug, Args)]
pub struct ServeArgs {
    /// Read options from this TOML file (keys are these flags' names without dashes, e.g.
    /// `listen = "127.0.0.1:7361"`, `max-connections = 512`); unknown keys are refused.
    /// Precedence: flags, then environment variables, then the file, then defaults.
    #[arg(long, env = "HOLDOUT_CONFIG", value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Print the effective options and where each came from (flag, environment, file,
    /// default), then exit without serving.
    #[arg(long)]
    pub print_config: bool,
    /// Database file (created and migrated if needed). It holds the labels in clear: keep its
    /// permissions tight (new files are created readable by their owner only).
    #[arg(long, env = "HOLDOUT_DB", default_value = "holdout.db")]
    pub db: PathBuf,
    /// Address to listen on. Loopback by default; use a non-loopback address only behind TLS or
    /// a trusted network. Port 0 picks a free port (printed on stdout).
    #[arg(long, env = "HOLDOUT_LISTEN", default_value = DEFAULT_LISTEN)]
    pub listen: String,
    /// Log filter (tracing's env-filter syntax), e.g. `info` or `holdout_ledger=debug`.
    #[arg(long, env = "HOLDOUT_LOG", default_value = "info")]
    pub log: String,
    /// Write signed checkpoints of every holdout's chain head, each with the identity chain's
    /// head of the same moment, into this directory (`NAME-SEQ.checkpoint.json`, one per new
    /// head; `@users-SEQ.checkpoint.json` for the identity chain alone), at start and every
    /// --checkpoint-every seconds, when a sealed round closes at its deadline, and once more at
    /// shutdown; ship them elsewhere and pass them to `holdout audit --checkpoint`.
    #[arg(long, env = "HOLDOUT_CHECKPOINT_DIR", value_name = "DIR")]
    pub checkpoint_dir: Option<PathBuf>,
    /// TLS: the daemon's certificate chain (PEM). With --tls-key, every connection is TLS.
    #[arg(long, value_name = "FILE", requires = "tls_key")]
    pub tls_cert: Option<PathBuf>,
    /// TLS: the daemon's private key (PEM).
    #[arg(long, value_name = "FILE", requires = "tls_cert")]
    pub tls_key: Option<PathBuf>,
    /// Mutual TLS: clients must present a certificate issued by this CA (PEM).
    #[arg(long, value_name = "FILE", requires = "tls_cert")]
    pub tls_client_ca: Option<PathBuf>,
    /// Also serve the read-only web view on this address (off unless given): the holdouts, each
    /// one's status and burn-down chart, its leaderboard or ranking, each page also as JSON
    /// (`?format=json`). Visitors without a token see only what each holdout's leaderboard
    /// setting makes public; a token (HTTP Basic password, or `Authorization: Bearer`) shows
    /// what that user may see. TLS, the plaintext rule and the connection limits are the same
    /// as for --listen. Port 0 picks a free port (printed on stdout after the gRPC address).
    #[arg(long, value_name = "ADDR")]
    pub web: Option<String>,
    /// Accept a non-loopback --listen (or --web) address without TLS (--tls-cert): bearer tokens and
    /// predictions then cross the network in clear, so use this only on a trusted network or
    /// behind a TLS-terminating proxy on the same host.
    #[arg(long)]
    pub allow_plaintext_network: bool,
    /// Connections served at once; more wait to be accepted (each holds a file descriptor).
    #[arg(long, value_name = "N", default_value_t = 512,
          value_parser = clap::value_parser!(u64).range(1..=1_000_000))]
    pub max_connections: u64,
    /// Seconds a new connection may stay silent before it is closed (clients speak at once).
    #[arg(long, value_name = "SECS", default_value_t = 5,
          value_parser = clap::value_parser!(u64).range(1..=3600))]
    pub handshake_timeout: u64,
    /// Seconds a connection may stay silent after that (live clients answer the daemon's
    /// keepalive pings every 20 s, so only dead or idle peers are closed).
    #[arg(long, value_name = "SECS", default_value_t = 120,
          value_parser = clap::value_parser!(u64).range(30..=86_400))]
    pub idle_timeout: u64,
    /// Concurrent calls per connection.
    #[arg(long, value_name = "N", default_value_t = 64,
          value_parser = clap::value_parser!(u32).range(1..=10_000))]
    pub max_streams_per_connection: u32,
    /// Largest single gRPC message a client may send, in bytes (the client sends 8,192 rows a
    /// message, far less). Larger messages are refused before they are read.
    #[arg(long, value_name = "BYTES", default_value_t = DEFAULT_MAX_MESSAGE_BYTES as u64,
          value_parser = clap::value_parser!(u64).range(1024..=1 << 30))]
    pub max_message_bytes: u64,
    /// Bytes one submission (`submit`, every model of a batch) may stream to the daemon; a
    /// larger one is refused as soon as it passes the limit, having buffered no more than that.
    /// The default, 1 GiB, holds 10 million rows with 40-byte ids.
    #[arg(long, value_name = "BYTES", default_value_t = DEFAULT_MAX_STREAM_BYTES,
          value_parser = clap::value_parser!(u64).range(1024..))]
    pub max_submit_bytes: u64,
    /// Bytes one holdout creation (`create`: ids and labels) may stream to the daemon; refused
    /// as soon as it passes. The default, 1 GiB, holds 10 million rows with 40-byte ids.
    #[arg(long, value_name = "BYTES", default_value_t = DEFAULT_MAX_STREAM_BYTES,
          value_parser = clap::value_parser!(u64).range(1024..))]
    pub max_create_bytes: u64,
    /// Submissions committed together at most (group commit): answers and refusals queued while
    /// a transaction is open share the next one, each still its own ledger entry, each reply
    /// sent after that commit, so one fsync covers many answers. 1 turns group commit off.
    #[arg(long, value_name = "N", default_value_t = crate::engine::DEFAULT_MAX_BATCH as u64,
          value_parser = clap::value_parser!(u64).range(1..=4096))]
    pub max_batch: u64,
    /// Seconds between checkpoints with --checkpoint-dir.
    #[arg(long, value_name = "SECS", default_value_t = 3600, requires = "checkpoint_dir",
          value_parser = clap::value_parser!(u64).range(1..))]
    pub checkpoint_every: u64,
    /// Heavy probing: flag a team in `status` (for organizers) when the nats its answers
    /// released exceed this multiple of its fair share of the transcript.
    #[arg(long, value_name = "FACTOR", default_value_t = 2.0)]
    pub probe_share_factor: f64,
    /// Heavy probing: flag a team after this many consecutive submissions, each differing
    /// from the one before in under --probe-diff of rows.
    #[arg(long, value_name = "N", default_value_t = 5,
          value_parser = clap::value_parser!(u32).range(1..))]
    pub probe_run: u32,
    /// Heavy probing: the fraction of rows under which a submission counts as a
    /// near-duplicate of the team's previous one.
    #[arg(long, value_name = "FRACTION", default_value_t = 0.01)]
    pub probe_diff: f64,
    /// Budget alert: when a holdout's spent budget (per team under `isolated`) reaches this
    /// share of its delta, log it once (and run --alert-command).
    #[arg(long, value_name = "SHARE")]
    pub alert_share: Option<f64>,
    /// Budget alert: when the next answer's half-width comes within this margin of the
    /// tolerance, log it once (and run --alert-command).
    #[arg(long, value_name = "MARGIN")]
    pub alert_margin: Option<f64>,
    /// A program run (no shell, detached) on each alert, with the arguments KIND HOLDOUT TEAM
    /// SPENT DELTA NEXT_HALF_WIDTH TOLERANCE; KIND is budget-share or tolerance-margin.
    #[arg(long, value_name = "PROGRAM")]
    pub alert_command: Option<PathBuf>,
    /// Retention of prediction files for holdouts created without `create
    /// --keep-predictions`: keep each file (parsed, compressed) for DAYS days so an audit can
    /// re-score it; 0 keeps only its digest. Each holdout's genesis entry states the retention
    /// it got, so a later change of this default changes no existing holdout.
    #[arg(long, value_name = "DAYS", default_value_t = 0,
          value_parser = clap::value_parser!(u32).range(0..=crate::engine::MAX_KEEP_DAYS as i64))]
    pub keep_predictions_days: u32,
}

/// `holdout init`.
#[derive(Debug, Args)]
pub struct InitArgs {
    /// Database file to create.
    #[arg(long, env = "HOLDOUT_DB", default_value = "holdout.db")]
    pub db: PathBuf,
    /// Where to write the first user's token (created readable by its owner only; must not exist).
    #[arg(long)]
    pub token_out: PathBuf,
    /// Name of the first user, who gets the custodian and organizer roles.
    #[arg(long, default_value = "custodian")]
    pub name: String,
}

/// Runs the daemon until ctrl-c or SIGTERM.
pub fn serve(args: ServeArgs) -> anyhow::Result<ExitCode> {
    let effective = crate::config::resolve_from_process(args)?;
    if effective.args.print_config {
        print!("{}", effective.render());
        return Ok(ExitCode::SUCCESS);
    }
    let args = effective.args;
    if let Some(share) = args.alert_share
        && !(share > 0.0 && share <= 1.0)
    {
        return Err(Error::invalid("--alert-share", format!("{share} is not in (0, 1]")).into());
    }
    if let Some(margin) = args.alert_margin
        && !(margin >= 0.0 && margin.is_finite())
    {
        return Err(Error::invalid("--alert-margin", format!("{margin} is not >= 0")).into());
    }
    if args.alert_command.is_some() && args.alert_share.is_none() && args.alert_margin.is_none() {
        return Err(Error::invalid(
            "--alert-command",
            "give --alert-share or --alert-margin too (nothing would run it)",
        )
        .into());
    }
    let alerts = crate::alerts::AlertSettings {
        share: args.alert_share,
        margin: args.alert_margin,
        command: args.alert_command.clone(),
    };
    let filter = tracing_subscriber::EnvFilter::try_new(&args.log)
        .map_err(|e| Error::invalid("--log", e.to_string()))?;
    tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .init();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    let tls = match (&args.tls_cert, &args.tls_key) {
        (Some(cert), Some(key)) => {
            let read = |flag: &str, p: &PathBuf| {
                std::fs::read(p).map_err(|e| {
                    Error::invalid(
                        flag.to_string(),
                        format!("cannot read {}: {e}", p.display()),
                    )
                })
            };
            Some(Tls {
                cert_pem: read("--tls-cert", cert)?,
                key_pem: read("--tls-key", key)?,
                client_ca_pem: match &args.tls_client_ca {
                    Some(p) => Some(read("--tls-client-ca", p)?),
                    None => None,
                },
            })
        }
        _ => None,
    };
    let plaintext_ok = args.allow_plaintext_network || tls.is_some();
    check_listen("--listen", &args.listen, plaintext_ok)?;
    if let Some(web) = &args.web {
        check_listen("--web", web, plaintext_ok)?;
    }
    let web_tls = tls.as_ref().map(crate::web::tls_acceptor).transpose()?;
    runtime.block_on(async move {
        let mut store = match Store::open(&args.db) {
            Ok(store) => store,
            // A read-only directory fails already here (WAL needs files beside the database).
            Err(Error::Storage(rusqlite::Error::SqliteFailure(e, detail)))
                if e.code == rusqlite::ErrorCode::ReadOnly =>
            {
                let why = detail.unwrap_or_else(|| e.to_string());
                return Err(unwritable(&args.db, &why).into());
            }
            Err(e) => {
                return Err(anyhow::Error::new(e)
                    .context(format!("opening database {}", args.db.display())));
            }
        };
        check_writable(&mut store, &args.db)?;
        let mut engine = Engine::new(store, Arc::new(SystemClock));
        engine.record_migration_backup()?;
        if !(args.probe_share_factor > 0.0 && args.probe_diff > 0.0 && args.probe_diff < 1.0) {
            anyhow::bail!(
                "--probe-share-factor must be positive and --probe-diff lie in (0, 1); got {} \
                 and {}",
                args.probe_share_factor,
                args.probe_diff
            );
        }
        engine.set_probe_settings(crate::engine::ProbeSettings {
            share_factor: args.probe_share_factor,
            run: args.probe_run,
            diff: args.probe_diff,
            ..crate::engine::ProbeSettings::default()
        });
        if let Some(dir) = args.checkpoint_dir.clone() {
            std::fs::create_dir_all(&dir)
                .with_context(|| format!("creating --checkpoint-dir {}", dir.display()))?;
            // Every close (an organizer's, or a sealed round's at its deadline) is signed as soon
            // as it commits, not at the next tick.
            let dir = dir.clone();
            engine.on_close(Box::new(move |conn, closed, now| {
                let at = auth::rfc3339(now);
                match crate::audit::anchor::checkpoint_all(conn, &dir, &at) {
                    Ok(files) => {
                        for f in files {
                            tracing::info!(file = %f.display(), holdouts = ?closed, "wrote checkpoint after a close");
                        }
                    }
                    Err(e) => tracing::warn!(error = %e, "writing checkpoints after a close failed"),
                }
            }));
        }
        let db = Db::spawn_with(engine, args.max_batch as usize);
        if let Some(dir) = args.checkpoint_dir.clone() {
            tokio::spawn(write_checkpoints(db.clone(), dir, args.checkpoint_every));
        }
        // Sealed rounds close at their deadline even if nobody calls; a call that touches the
        // holdout closes it at once anyway (the deadline is a public fact either way).
        tokio::spawn(settle_deadlines(db.clone()));
        let listener = tokio::net::TcpListener::bind(&args.listen)
            .await
            .with_context(|| format!("listening on {}", args.listen))?;
        let addr = listener.local_addr()?;
        let web = match &args.web {
            Some(web) => Some(
                tokio::net::TcpListener::bind(web)
                    .await
                    .with_context(|| format!("listening on --web {web}"))?,
            ),
            None => None,
        };
        // Tests and scripts read this line to learn the port when they passed port 0.
        println!("listening on {addr}");
        if let Some(web) = &web {
            let scheme = if web_tls.is_some() { "https" } else { "http" };
            println!("web view on {scheme}://{}", web.local_addr()?);
        }
        std::io::stdout().flush()?;
        let limits = Limits {
            max_connections: args.max_connections as usize,
            handshake_timeout: std::time::Duration::from_secs(args.handshake_timeout),
            idle_timeout: std::time::Duration::from_secs(args.idle_timeout),
            max_streams: args.max_streams_per_connection,
            streams: StreamLimits {
                max_message_bytes: usize::try_from(args.max_message_bytes)
                    .unwrap_or(DEFAULT_MAX_MESSAGE_BYTES),
                max_submit_bytes: args.max_submit_bytes,
                max_create_bytes: args.max_create_bytes,
            },
        };
        // One signal stops both listeners.
        let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
        tokio::spawn(async move {
            shutdown_signal().await;
            let _ = stop_tx.send(true);
        });
        let stopped = |mut rx: tokio::sync::watch::Receiver<bool>| async move {
            let _ = rx.wait_for(|s| *s).await;
        };
        let web_task = web.map(|web| {
            let stop = stopped(stop_rx.clone());
            tokio::spawn(crate::web::serve_web(web, db.clone(), stop, limits, web_tls))
        });
        let daemon = Daemon::new(db.clone())
            .with_alerts(crate::alerts::Alerts::new(alerts))
            .with_default_retention(args.keep_predictions_days);
        serve_on(listener, daemon, stopped(stop_rx), limits, tls).await?;
        if let Some(task) = web_task {
            match task.await {
                Ok(Ok(())) => {}
                Ok(Err(e)) => tracing::warn!(error = %e, "the web view failed"),
                Err(e) => tracing::warn!(error = %e, "the web view's task failed"),
            }
        }
        // A last checkpoint of every head, so nothing appended since the last tick (a close,
        // the last answers) is left uncovered when the daemon stops.
        if let Some(dir) = args.checkpoint_dir.clone() {
            checkpoint_now(&db, dir).await;
        }
        Ok(ExitCode::SUCCESS)
    })
}

/// Refuses a non-loopback listen address without `--allow-plaintext-network` (tokens and
/// predictions would cross the network in clear), and warns when it is given.
fn check_listen(flag: &str, listen: &str, allowed: bool) -> anyhow::Result<()> {
    let host = listen
        .rsplit_once(':')
        .map(|(h, _)| h)
        .unwrap_or(listen)
        .trim_start_matches('[')
        .trim_end_matches(']');
    let loopback = host.eq_ignore_ascii_case("localhost")
        || host
            .parse::<std::net::IpAddr>()
            .map(|ip| ip.is_loopback())
            .unwrap_or(false);
    if loopback {
        return Ok(());
    }
    if !allowed {
        return Err(Error::invalid(
            flag,
            format!(
                "{listen} is not a loopback address and no --tls-cert/--tls-key was given: bearer \
                 tokens and predictions would cross the network in clear. Give the daemon a \
                 certificate, or pass --allow-plaintext-network on a trusted network"
            ),
        )
        .into());
    }
    tracing::warn!(
        %listen,
        "listening on a non-loopback address without TLS: tokens and predictions travel in clear"
    );
    eprintln!(
        "warning: listening on {listen} without TLS: bearer tokens and predictions travel in clear"
    );
    Ok(())
}

/// Fails at start, naming the file, when the database cannot be written (a read-only file or
/// file system), instead of failing every write later.
fn check_writable(store: &mut Store, path: &std::path::Path) -> anyhow::Result<()> {
    let conn = store.conn();
    let probe = conn.execute_batch("BEGIN IMMEDIATE").and_then(|()| {
        let v: i64 = conn.query_row("PRAGMA user_version", [], |r| r.get(0))?;
        conn.pragma_update(None, "user_version", v)
    });
    let _ = conn.execute_batch("ROLLBACK");
    let read_only = conn.is_readonly(rusqlite::MAIN_DB).unwrap_or(true);
    match probe {
        Ok(()) if !read_only => Ok(()),
        Ok(()) => Err(unwritable(path, "it is open read-only").into()),
        Err(e) => Err(unwritable(path, &e.to_string()).into()),
    }
}

/// The start-up error for a database the daemon cannot write.
fn unwritable(path: &std::path::Path, why: &str) -> Error {
    Error::invalid(
        "--db",
        format!(
            "{} cannot be written ({why}); the daemon must write its ledger: check the \
             permissions of the file, of its directory, and of its -wal and -shm files if any",
            path.display()
        ),
    )
}

/// Signs every holdout's head into `dir` now and every `secs` seconds, while the daemon runs.
async fn write_checkpoints(db: Db, dir: PathBuf, secs: u64) {
    let mut tick = tokio::time::interval(std::time::Duration::from_secs(secs));
    loop {
        tick.tick().await;
        checkpoint_now(&db, dir.clone()).await;
    }
}

/// Signs every holdout's head not yet signed (with the identity chain's head, format /2) and
/// the identity chain's own head into `dir`, logging what was written.
async fn checkpoint_now(db: &Db, dir: PathBuf) {
    let done = db
        .call(move |engine| {
            let at = auth::rfc3339(engine.now());
            crate::audit::anchor::checkpoint_all(engine.store().conn(), &dir, &at)
        })
        .await;
    match done {
        Ok(files) => {
            for f in files {
                tracing::info!(file = %f.display(), "wrote checkpoint");
            }
        }
        Err(e) => tracing::warn!(error = %e, "writing checkpoints failed"),
    }
}

async fn settle_deadlines(db: Db) {
    let mut tick = tokio::time::interval(std::time::Duration::from_secs(5));
    let mut n: u64 = 0;
    loop {
        tick.tick().await;
        // Kept prediction files past their holdout's retention go once a minute (each drop is
        // a ledger entry naming the files).
        if n.is_multiple_of(12) {
            match db.call(|engine| engine.drop_expired_predictions()).await {
                Ok(dropped) => {
                    for (name, files) in dropped {
                        tracing::info!(holdout = %name, files, "dropped kept prediction files past their retention");
                    }
                }
                Err(e) => tracing::warn!(error = %e, "dropping expired prediction files failed"),
            }
        }
        n += 1;
        match db.call(|engine| engine.settle_deadlines()).await {
            Ok(closed) => {
                for name in closed {
                    tracing::info!(holdout = %name, "sealed round closed at its deadline");
                }
            }
            Err(e) => tracing::warn!(error = %e, "closing rounds at their deadline failed"),
        }
    }
}

async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {},
        _ = term => {},
    }
}

/// Creates a database and its first user.
pub fn init(args: InitArgs) -> anyhow::Result<ExitCode> {
    let store =
        Store::open(&args.db).with_context(|| format!("opening database {}", args.db.display()))?;
    let mut engine = Engine::new(store, std::sync::Arc::new(crate::engine::SystemClock));
    engine.record_migration_backup()?;
    let users: i64 = engine
        .store()
        .conn()
        .query_row("SELECT count(*) FROM users", [], |r| r.get(0))?;
    if users > 0 {
        return Err(Error::FailedPrecondition(format!(
            "{} already has users; add more with `holdout user add`",
            args.db.display()
        ))
        .into());
    }
    let mut options = OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(0o600);
    }
    let mut file = options.open(&args.token_out).map_err(|e| {
        Error::invalid(
            "--token-out",
            format!(
                "cannot create {}: {e} (it must not exist yet)",
                args.token_out.display()
            ),
        )
    })?;
    // The token file is written and synced before the user's event commits: a token is never
    // lost for a user that exists.
    let (user, token) = engine.write(|w| {
        let (user, token) = auth::add_user(
            w,
            &args.name,
            &[Role::Custodian, Role::Organizer],
            None,
            "init",
            chrono::Utc::now(),
        )?;
        writeln!(file, "{token}")
            .and_then(|()| file.sync_all())
            .map_err(|e| Error::invalid("--token-out", format!("cannot write the token: {e}")))?;
        Ok((user, token))
    })?;
    let _ = token;
    eprintln!(
        "created {} with user {} (custodian, organizer); token written to {}",
        args.db.display(),
        user.name,
        args.token_out.display()
    );
    Ok(ExitCode::SUCCESS)
}
