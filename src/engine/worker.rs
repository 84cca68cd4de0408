//! A dedicated thread that owns the engine and its SQLite connection.
//!
//! SQLite calls block (disk, fsync, the write lock), so they must not run on tokio's async
//! workers, where they would stall every other request. One thread owning the one connection
//! also serialises all writes in this process, which keeps the in-memory accounting state and
//! the ledger in step; `BEGIN IMMEDIATE` still guards against other processes.

use std::sync::mpsc;
use std::thread;

use tokio::sync::oneshot;

use super::Engine;
use crate::error::{Error, Result};

type Job = Box<dyn FnOnce(&mut Engine) + Send>;

/// A cloneable handle to the database thread.
#[derive(Debug, Clone)]
pub struct Db {
    jobs: mpsc::Sender<Job>,
}

impl Db {
    /// Moves `engine` to a new thread and returns the handle. The thread ends when every handle
    /// is dropped.
    pub fn spawn(mut engine: Engine) -> Db {
        let (jobs, rx) = mpsc::channel::<Job>();
        thread::Builder::new()
            .name("holdout-db".into())
            .spawn(move || {
                while let Ok(job) = rx.recv() {
                    job(&mut engine);
                }
            })
            .expect("spawn the database thread");
        Db { jobs }
    }

    /// Runs `f` on the database thread and waits for its result without blocking the runtime.
    pub async fn call<T, F>(&self, f: F) -> Result<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Engine) -> Result<T> + Send + 'static,
    {
        let (tx, rx) = oneshot::channel();
        self.jobs
            .send(Box::new(move |engine| {
                // A panic fails this call only: the open write (if any) is rolled back, cached
                // state is dropped (rebuilt from the ledger on the next call), and the thread
                // goes on serving.
                let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| f(engine)))
                    .unwrap_or_else(|panic| {
                        let what = panic
                            .downcast_ref::<&str>()
                            .map(|s| s.to_string())
                            .or_else(|| panic.downcast_ref::<String>().cloned())
                            .unwrap_or_else(|| "unknown cause".into());
                        tracing::error!(panic = %what, "a database job panicked; call failed");
                        engine.recover_from_panic();
                        Err(Error::Internal(
                            "the daemon failed on this call (logged); nothing from it was \
                             recorded"
                                .into(),
                        ))
                    });
                let _ = tx.send(out);
            }))
            .map_err(|_| Error::Internal("the database thread has stopped".into()))?;
        rx.await
            .map_err(|_| Error::Internal("the database thread dropped a job".into()))?
    }

    /// Whether the database thread answers within `within` (health checks).
    pub async fn ping(&self, within: std::time::Duration) -> bool {
        matches!(
            tokio::time::timeout(within, self.call(|_| Ok(()))).await,
            Ok(Ok(()))
        )
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
}
