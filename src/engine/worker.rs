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
            .send(Box::new(move |store| {
                let _ = tx.send(f(store));
            }))
            .map_err(|_| Error::Internal("the database thread has stopped".into()))?;
        rx.await
            .map_err(|_| Error::Internal("the database thread dropped a job".into()))?
    }
}
