//! A dedicated thread that owns the engine and its SQLite connection.
//!
//! SQLite calls block (disk, fsync, the write lock), so they must not run on tokio's async
//! workers, where they would stall every other request. One thread owning the one connection
//! also serialises all writes in this process, which keeps the in-memory accounting state and
//! the ledger in step; `BEGIN IMMEDIATE` still guards against other processes.
//!
//! **Group commit.** Jobs sent with [`Db::call_batched`] (submissions: answers and refusals)
//! that are queued together share one transaction: the thread takes every such job waiting in
//! the queue (at most [`Db::spawn_with`]'s `max_batch`), opens one outer write, runs each job in
//! turn (each job's own write is then a savepoint, so each answer is its own ledger entry, coded
//! after the one before it, and a job that fails is undone alone), commits once, and only then
//! sends each caller its result. If that commit fails, every caller of the batch gets an error
//! and the cached accounting state is restored, so nothing is acknowledged that is not durable.
//! One fsync then covers the whole batch instead of one per answer. Other jobs (reads,
//! identity changes, creates, closes) found in the queue run after the batch, in their order:
//! they were queued concurrently with it, so either order is one the callers could see.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc;
use std::thread;

use tokio::sync::oneshot;

use super::Engine;
use super::reader::AuthReader;
use crate::error::{Error, Result};

/// A job run on its own.
type Alone = Box<dyn FnOnce(&mut Engine) + Send>;
/// What a batched job leaves to do once its batch has committed (or failed to): send its
/// caller the result, or the batch's error (`Some`) instead.
type Deliver = Box<dyn FnOnce(Option<&str>) + Send>;
/// A job that may share its transaction with other queued ones.
type Batched = Box<dyn FnOnce(&mut Engine) -> Deliver + Send>;

enum Job {
    Alone(Alone),
    Batched(Batched),
}

/// The default largest number of queued submissions committed together.
pub const DEFAULT_MAX_BATCH: usize = 64;

/// Counts of the database thread's group commits (for the load bench and tests).
#[derive(Debug, Default)]
struct Counters {
    /// Transactions that held two or more batched jobs.
    batches: AtomicU64,
    /// Batched jobs run inside such transactions.
    batched_jobs: AtomicU64,
    /// Batched jobs run alone (nothing else was queued, or group commit is off).
    alone_jobs: AtomicU64,
    /// The largest batch so far.
    largest: AtomicU64,
    /// Batches whose commit failed.
    failed_commits: AtomicU64,
}

/// A snapshot of the group-commit counters.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct BatchStats {
    /// Transactions that held two or more batched jobs.
    pub batches: u64,
    /// Batched jobs committed (or rolled back) inside such transactions.
    pub batched_jobs: u64,
    /// Batched jobs that ran in a transaction of their own.
    pub alone_jobs: u64,
    /// The largest batch.
    pub largest: u64,
    /// Batches whose commit failed (every caller of such a batch got an error).
    pub failed_commits: u64,
}

/// A cloneable handle to the database thread.
#[derive(Debug, Clone)]
pub struct Db {
    jobs: mpsc::Sender<Job>,
    counters: Arc<Counters>,
    /// Authentication on a read-only connection of its own (`None` for an in-memory database).
    auth: Option<AuthReader>,
}

/// The message of a panic payload.
fn panic_message(panic: &(dyn std::any::Any + Send)) -> String {
    panic
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| panic.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "unknown cause".into())
}

/// What a caller whose job panicked gets.
fn panicked() -> Error {
    Error::Internal(
        "the daemon failed on this call (logged); nothing from it was \
         recorded"
            .into(),
    )
}

impl Db {
    /// Moves `engine` to a new thread and returns the handle, with group commit on
    /// ([`DEFAULT_MAX_BATCH`]). The thread ends when every handle is dropped.
    pub fn spawn(engine: Engine) -> Db {
        Db::spawn_with(engine, DEFAULT_MAX_BATCH)
    }

    /// As [`Db::spawn`], committing at most `max_batch` queued submissions together; 1 turns
    /// group commit off (one transaction, and one fsync, per submission).
    pub fn spawn_with(mut engine: Engine, max_batch: usize) -> Db {
        let max_batch = max_batch.max(1);
        let auth = engine.store().reader().and_then(AuthReader::spawn);
        let (jobs, rx) = mpsc::channel::<Job>();
        let counters = Arc::new(Counters::default());
        let seen = counters.clone();
        thread::Builder::new()
            .name("holdout-db".into())
            .spawn(move || {
                let mut deferred: Vec<Alone> = Vec::new();
                while let Ok(job) = rx.recv() {
                    let first = match job {
                        Job::Alone(job) => {
                            job(&mut engine);
                            continue;
                        }
                        Job::Batched(job) => job,
                    };
                    // Take every submission already queued (up to the cap); other jobs found on
                    // the way run after the batch, in their order.
                    let mut batch = vec![first];
                    while batch.len() < max_batch {
                        match rx.try_recv() {
                            Ok(Job::Batched(job)) => batch.push(job),
                            Ok(Job::Alone(job)) => deferred.push(job),
                            Err(_) => break,
                        }
                    }
                    run_batch(&mut engine, batch, &seen);
                    for job in deferred.drain(..) {
                        job(&mut engine);
                    }
                }
            })
            .expect("spawn the database thread");
        Db {
            jobs,
            counters,
            auth,
        }
    }

    /// The live user a bearer token belongs to. Read on the authentication connection when
    /// there is one (it never waits behind a commit, and sees every committed revocation),
    /// else on the database thread.
    ///
    /// # Failure
    /// [`Error::Unauthenticated`] for an unknown or revoked token; storage failures.
    pub async fn authenticate(&self, token: String) -> Result<crate::auth::Caller> {
        if let Some(reader) = &self.auth
            && let Some(out) = reader.authenticate(token.clone()).await
        {
            return out;
        }
        self.call(move |engine| crate::auth::authenticate(engine.store().conn(), &token))
            .await
    }

    /// Whether authentication is served off the database thread (a file database).
    pub fn authenticates_apart(&self) -> bool {
        self.auth.is_some()
    }

    /// The group-commit counters so far.
    pub fn batch_stats(&self) -> BatchStats {
        let c = &self.counters;
        BatchStats {
            batches: c.batches.load(Ordering::Relaxed),
            batched_jobs: c.batched_jobs.load(Ordering::Relaxed),
            alone_jobs: c.alone_jobs.load(Ordering::Relaxed),
            largest: c.largest.load(Ordering::Relaxed),
            failed_commits: c.failed_commits.load(Ordering::Relaxed),
        }
    }

    /// Runs `f` on the database thread and waits for its result without blocking the runtime.
    pub async fn call<T, F>(&self, f: F) -> Result<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Engine) -> Result<T> + Send + 'static,
    {
        let (tx, rx) = oneshot::channel();
        self.jobs
            .send(Job::Alone(Box::new(move |engine| {
                // A panic fails this call only: the open write (if any) is rolled back, cached
                // state is dropped (rebuilt from the ledger on the next call), and the thread
                // goes on serving.
                let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| f(engine)))
                    .unwrap_or_else(|panic| {
                        let what = panic_message(&*panic);
                        tracing::error!(panic = %what, "a database job panicked; call failed");
                        engine.recover_from_panic();
                        Err(panicked())
                    });
                let _ = tx.send(out);
            })))
            .map_err(|_| Error::Internal("the database thread has stopped".into()))?;
        rx.await
            .map_err(|_| Error::Internal("the database thread dropped a job".into()))?
    }

    /// Runs `f` on the database thread, possibly in one transaction with other queued
    /// submissions (group commit, see the module documentation), and waits for its result,
    /// which is sent only after that transaction committed. The job is queued when this is
    /// called, before the returned future is first polled.
    ///
    /// `f` must write only through the engine's write path (`Engine::write`, whose writes nest
    /// as savepoints), so that its failure undoes its own writes alone. A failed commit of the
    /// batch fails `f`'s call whatever `f` returned.
    pub fn call_batched<T, F>(&self, f: F) -> impl Future<Output = Result<T>> + Send + use<T, F>
    where
        T: Send + 'static,
        F: FnOnce(&mut Engine) -> Result<T> + Send + 'static,
    {
        let (tx, rx) = oneshot::channel();
        let sent = self
            .jobs
            .send(Job::Batched(Box::new(move |engine| {
                let depth = engine.write_depth();
                let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| f(engine)))
                    .unwrap_or_else(|panic| {
                        let what = panic_message(&*panic);
                        tracing::error!(panic = %what, "a database job panicked; call failed");
                        if depth == 0 {
                            engine.recover_from_panic();
                        } else {
                            // Undo this job's open writes only; the batch goes on.
                            engine.recover_from_panic_to(depth);
                        }
                        Err(panicked())
                    });
                // A job must close every write it opened; one left open (a bug) would swallow
                // the batch's commit, so it is undone here and its caller told so.
                let out = if depth > 0 && engine.write_depth() > depth {
                    tracing::error!("a batched job left a write open; it was rolled back");
                    engine.recover_from_panic_to(depth);
                    Err(panicked())
                } else {
                    out
                };
                Box::new(move |failed: Option<&str>| {
                    let out = match failed {
                        None => out,
                        Some(why) => Err(Error::Internal(why.to_string())),
                    };
                    let _ = tx.send(out);
                })
            })))
            .map_err(|_| Error::Internal("the database thread has stopped".into()));
        async move {
            sent?;
            rx.await
                .map_err(|_| Error::Internal("the database thread dropped a job".into()))?
        }
    }

    /// Whether the database thread answers within `within` (health checks).
    pub async fn ping(&self, within: std::time::Duration) -> bool {
        matches!(
            tokio::time::timeout(within, self.call(|_| Ok(()))).await,
            Ok(Ok(()))
        )
    }
}

/// Runs batched jobs: alone when there is one (or the outer transaction cannot be opened),
/// else in one outer write committed once, each caller answered after that commit.
fn run_batch(engine: &mut Engine, batch: Vec<Batched>, counters: &Counters) {
    let size = batch.len() as u64;
    if batch.len() == 1 {
        counters.alone_jobs.fetch_add(1, Ordering::Relaxed);
        for job in batch {
            job(engine)(None);
        }
        return;
    }
    if let Err(e) = engine.begin_write() {
        // The write lock could not be taken (another process holds it past the busy
        // timeout): each job tries on its own, as without group commit.
        tracing::warn!(error = %e, "could not open a group commit; running its jobs one by one");
        counters.alone_jobs.fetch_add(size, Ordering::Relaxed);
        for job in batch {
            job(engine)(None);
        }
        return;
    }
    let delivers: Vec<Deliver> = batch.into_iter().map(|job| job(engine)).collect();
    let committed = engine.end_write(Ok(()));
    counters.batches.fetch_add(1, Ordering::Relaxed);
    counters.batched_jobs.fetch_add(size, Ordering::Relaxed);
    counters.largest.fetch_max(size, Ordering::Relaxed);
    match committed {
        Ok(()) => {
            for deliver in delivers {
                deliver(None);
            }
        }
        Err(e) => {
            counters.failed_commits.fetch_add(1, Ordering::Relaxed);
            // Storage details stay in the log, as for any storage failure.
            tracing::error!(error = %e, jobs = size, "a group commit failed; nothing from it was recorded");
            let why = "the commit of this submission failed (logged); nothing from it was \
                       recorded";
            for deliver in delivers {
                deliver(Some(why));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use super::*;
    use crate::engine::SystemClock;
    use crate::ledger::{self, Kind};
    use crate::store::Store;

    #[tokio::test]
    async fn a_panic_fails_that_call_only_and_rolls_its_write_back() {
        let db = Db::spawn(Engine::new(
            Store::open_in_memory().unwrap(),
            Arc::new(SystemClock),
        ));
        // A job that panics in the middle of a write, after appending.
        let failed = db
            .call(|engine| -> Result<()> {
                engine.write(|e| {
                    e.append(
                        "scratch",
                        Kind::Read,
                        &serde_json::json!({"by": "t", "what": "probe", "at": "x"}),
                        None,
                    )?;
                    panic!("injected failure");
                })
            })
            .await;
        match failed {
            Err(Error::Internal(msg)) => assert!(msg.contains("nothing from it"), "{msg}"),
            other => panic!("a panicking job must fail with Internal, got {other:?}"),
        }
        // The thread still serves, and the write was rolled back.
        let chain = db
            .call(|engine| ledger::read_chain(engine.store().conn(), "scratch"))
            .await
            .unwrap();
        assert!(
            chain.is_empty(),
            "the panicked write left {} entries",
            chain.len()
        );
        // A new write works (no transaction was left open).
        db.call(|engine| {
            engine.write(|e| {
                e.append(
                    "scratch",
                    Kind::Read,
                    &serde_json::json!({"by": "t", "what": "after", "at": "x"}),
                    None,
                )
            })
        })
        .await
        .unwrap();
        assert!(db.ping(std::time::Duration::from_secs(5)).await);
    }
    #[tokio::test]
    async fn authentication_does_not_wait_for_the_database_thread_and_sees_each_revocation() {
        use crate::auth::{Role, add_user, revoke_user, rotate_token};
        let dir = tempfile::tempdir().unwrap();
        let db = Db::spawn(Engine::new(
            Store::open(&dir.path().join("h.db")).unwrap(),
            Arc::new(SystemClock),
        ));
        assert!(db.authenticates_apart());
        let now = chrono::Utc::now();
        let (_, token) = db
            .call(move |e| e.write(|w| add_user(w, "ana", &[Role::Analyst], None, "root", now)))
            .await
            .unwrap();
        // A user added by a committed write authenticates on the very next call.
        assert_eq!(db.authenticate(token.clone()).await.unwrap().name, "ana");

        // Hold the database thread: authentication must still answer.
        let (release, wait) = std::sync::mpsc::channel::<()>();
        let (started, running) = oneshot::channel::<()>();
        let holder = db.clone();
        let held = tokio::spawn(async move {
            holder
                .call(move |_| {
                    let _ = started.send(());
                    let _ = wait.recv();
                    Ok(())
                })
                .await
        });
        running.await.unwrap();
        let apart = tokio::time::timeout(
            std::time::Duration::from_secs(10),
            db.authenticate(token.clone()),
        )
        .await
        .expect("authentication waited for the busy database thread");
        assert_eq!(apart.unwrap().name, "ana");
        release.send(()).unwrap();
        held.await.unwrap().unwrap();

        // A rotated token is refused on the very next call, the new one accepted.
        let rotated = db
            .call(move |e| e.write(|w| rotate_token(w, "ana", now)))
            .await
            .unwrap();
        assert!(matches!(
            db.authenticate(token).await,
            Err(Error::Unauthenticated(_))
        ));
        assert_eq!(db.authenticate(rotated.clone()).await.unwrap().name, "ana");
        // A revoked user's token is refused on the very next call.
        db.call(move |e| e.write(|w| revoke_user(w, "ana", "root", now)))
            .await
            .unwrap();
        assert!(matches!(
            db.authenticate(rotated).await,
            Err(Error::Unauthenticated(_))
        ));
    }

    #[tokio::test]
    async fn an_in_memory_database_authenticates_on_the_database_thread() {
        use crate::auth::{Role, add_user};
        let db = Db::spawn(Engine::new(
            Store::open_in_memory().unwrap(),
            Arc::new(SystemClock),
        ));
        assert!(!db.authenticates_apart());
        let now = chrono::Utc::now();
        let (_, token) = db
            .call(move |e| e.write(|w| add_user(w, "bo", &[Role::Analyst], None, "root", now)))
            .await
            .unwrap();
        assert_eq!(db.authenticate(token).await.unwrap().name, "bo");
        assert!(matches!(
            db.authenticate("nope".into()).await,
            Err(Error::Unauthenticated(_))
        ));
    }

    /// A job that appends one `read` entry to `scratch` noting `what`, in its own write.
    fn note(what: &'static str) -> impl FnOnce(&mut Engine) -> Result<()> + Send + 'static {
        move |engine: &mut Engine| {
            engine.write(|e| {
                e.append(
                    "scratch",
                    Kind::Read,
                    &serde_json::json!({"by": "t", "what": what, "at": "x"}),
                    None,
                )?;
                Ok(())
            })
        }
    }

    #[tokio::test]
    async fn a_panic_in_a_batch_undoes_that_job_alone_and_the_batch_commits() {
        let db = Db::spawn(Engine::new(
            Store::open_in_memory().unwrap(),
            Arc::new(SystemClock),
        ));
        // Hold the thread until the whole batch is queued.
        let (release, wait) = std::sync::mpsc::channel::<()>();
        let (started, running) = oneshot::channel::<()>();
        let holder = db.clone();
        tokio::spawn(async move {
            holder
                .call(move |_| {
                    let _ = started.send(());
                    let _ = wait.recv();
                    Ok(())
                })
                .await
        });
        running.await.unwrap();
        let first = db.call_batched(note("first"));
        let broken = db.call_batched(|engine: &mut Engine| -> Result<()> {
            engine.write(|e| {
                e.append(
                    "scratch",
                    Kind::Read,
                    &serde_json::json!({"by": "t", "what": "broken", "at": "x"}),
                    None,
                )?;
                // A savepoint of its own left open by the panic, too.
                e.begin_write()?;
                panic!("injected failure in a batch");
            })
        });
        // A job that returns with a write of its own still open (a bug): undone, and its
        // caller told so; it must not swallow the batch's commit.
        let unclosed = db.call_batched(|engine: &mut Engine| -> Result<()> {
            engine.begin_write()?;
            engine.append(
                "scratch",
                Kind::Read,
                &serde_json::json!({"by": "t", "what": "unclosed", "at": "x"}),
                None,
            )?;
            Ok(())
        });
        let last = db.call_batched(note("last"));
        release.send(()).unwrap();
        first.await.unwrap();
        match broken.await {
            Err(Error::Internal(msg)) => assert!(msg.contains("nothing from it"), "{msg}"),
            other => panic!("a panicking job must fail with Internal, got {other:?}"),
        }
        match unclosed.await {
            Err(Error::Internal(msg)) => assert!(msg.contains("nothing from it"), "{msg}"),
            other => panic!("a job that left a write open must fail, got {other:?}"),
        }
        last.await.unwrap();
        let stats = db.batch_stats();
        assert_eq!((stats.batches, stats.largest), (1, 4), "{stats:?}");
        let chain = db
            .call(|engine| ledger::read_chain(engine.store().conn(), "scratch"))
            .await
            .unwrap();
        let what: Vec<String> = chain
            .iter()
            .map(|e| {
                serde_json::from_str::<serde_json::Value>(&e.body).unwrap()["what"].to_string()
            })
            .collect();
        assert_eq!(what, ["\"first\"", "\"last\""]);
        assert!(ledger::verify_chain(&chain).is_empty());
        // No write was left open: a lone write commits.
        db.call(note("after")).await.unwrap();
        assert!(
            db.call(|engine| Ok(engine.write_depth())).await.unwrap() == 0,
            "a write was left open"
        );
    }
}
