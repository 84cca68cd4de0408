//! The daemon's operations on the store. Each operation runs on the database thread
//! ([`Db`]) and is one SQLite transaction: a query is validated, scored, charged and appended to
//! the ledger inside one `BEGIN IMMEDIATE` transaction, and its answer leaves only after commit.
//!
//! The engine keeps per-holdout caches (the public declaration, the parsed labels, and the
//! accountant replayed from the ledger). A cache is trusted only while the ledger head it was
//! built from is still the head, checked inside each write transaction, so another process
//! writing the same file cannot make it stale.

mod account;
mod clock;
mod compete;
mod create;
mod read;
mod records;
mod replay;
mod submit;
mod worker;

use std::collections::HashMap;
use std::sync::Arc;

use rusqlite::{OptionalExtension, params};

pub use account::{HoldoutPolicy, PolicyInput, Quote};
pub use clock::{Clock, FixedClock, SystemClock};
pub use compete::{
    Duplicate, Leaderboard, LeaderboardRow, Ranking, ranking_level, replay_comparison,
};
pub use create::{CreateRequest, FamilyRequest, TargetDecl};
pub use read::{HistoryItem, HoldoutView};
pub use records::{
    AnswerRecord, BudgetView, Comparison, RankedEntry, RefusalRecord, RoundRecord, SealedRecord,
};
pub use submit::{ModelPredictions, RawValues, Receipt, SubmitMode, SubmitOutcome, SubmitRequest};
pub use worker::Db;
// The offline audit replays ledgers with the daemon's own bookkeeping.
pub(crate) use account::Book;
pub(crate) use replay::{BudgetCheck, Problem, Replayer};
pub use replay::{CloseRecord, ReadRecord, Record};

use crate::error::{Error, Result};
use crate::metric::Labels;
use crate::store::Store;

/// The engine: the store plus caches derived from it.
pub struct Engine {
    store: Store,
    clock: Arc<dyn Clock>,
    holdouts: HashMap<String, Arc<Loaded>>,
    accountants: HashMap<String, (u64, account::Book)>,
}

impl std::fmt::Debug for Engine {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine")
            .field("cached_holdouts", &self.holdouts.len())
            .finish()
    }
}

/// A holdout's immutable facts, loaded once.
#[derive(Debug)]
pub(crate) struct Loaded {
    pub(crate) id: i64,
    pub(crate) name: String,
    pub(crate) description: String,
    pub(crate) created_at: String,
    pub(crate) policy: HoldoutPolicy,
    pub(crate) ids: Vec<String>,
    pub(crate) positions: HashMap<String, u32>,
    pub(crate) labels: Vec<Labels>,
    pub(crate) genesis_hash: String,
}

impl Engine {
    /// An engine over an open store with the given clock.
    pub fn new(store: Store, clock: Arc<dyn Clock>) -> Engine {
        Engine {
            store,
            clock,
            holdouts: HashMap::new(),
            accountants: HashMap::new(),
        }
    }

    /// The store, for operations outside the engine (bootstrap, tests).
    pub fn store(&mut self) -> &mut Store {
        &mut self.store
    }

    /// Current time from the injected clock.
    pub fn now(&self) -> chrono::DateTime<chrono::Utc> {
        self.clock.now()
    }

    /// Loads (or returns the cached) immutable facts of a holdout.
    pub(crate) fn loaded(&mut self, name: &str) -> Result<Arc<Loaded>> {
        if let Some(l) = self.holdouts.get(name) {
            return Ok(l.clone());
        }
        let loaded = Arc::new(create::load(self.store.conn(), name)?);
        self.holdouts.insert(name.to_string(), loaded.clone());
        Ok(loaded)
    }

    /// Whether a holdout is closed (read fresh: closing is a state change).
    pub(crate) fn closed_at(&mut self, id: i64) -> Result<Option<String>> {
        Ok(self
            .store
            .conn()
            .query_row("SELECT closed_at FROM holdouts WHERE id = ?1", [id], |r| {
                r.get::<_, Option<String>>(0)
            })
            .optional()?
            .flatten())
    }

    /// The accountant of a holdout replayed up to the current ledger head. `conn` must be the
    /// connection (or transaction) the caller reads the head with.
    pub(crate) fn book(&mut self, loaded: &Loaded) -> Result<account::Book> {
        let head: i64 = self.store.conn().query_row(
            "SELECT max(seq) FROM ledger WHERE chain = ?1",
            params![loaded.name],
            |r| r.get(0),
        )?;
        let head = head as u64;
        if let Some((seq, book)) = self.accountants.get(&loaded.name)
            && *seq == head
        {
            return Ok(book.clone());
        }
        let entries = crate::ledger::read_chain(self.store.conn(), &loaded.name)?;
        let book = account::Book::replay(&loaded.policy, &entries)?;
        self.accountants
            .insert(loaded.name.clone(), (head, book.clone()));
        Ok(book)
    }

    /// Stores an accountant state as of ledger head `seq` (after a commit).
    pub(crate) fn remember_book(&mut self, name: &str, seq: u64, book: account::Book) {
        self.accountants.insert(name.to_string(), (seq, book));
    }

    /// Ends a write begun with `BEGIN IMMEDIATE`: on success commits and remembers the
    /// accounting state as of the new ledger head; on failure rolls back and forgets the cached
    /// state, so the next call replays from the ledger.
    pub(crate) fn finish_write<T>(
        &mut self,
        holdout: &str,
        result: Result<(T, Option<(u64, account::Book)>)>,
    ) -> Result<T> {
        match result {
            Ok((out, book)) => {
                self.store.conn().execute_batch("COMMIT")?;
                if let Some((seq, book)) = book {
                    self.remember_book(holdout, seq, book);
                }
                Ok(out)
            }
            Err(e) => {
                let _ = self.store.conn().execute_batch("ROLLBACK");
                self.forget(holdout);
                Err(e)
            }
        }
    }

    /// Forgets cached state of a holdout (after a failed transaction).
    pub(crate) fn forget(&mut self, name: &str) {
        self.accountants.remove(name);
    }
}

/// Not found as an error for a holdout name.
pub(crate) fn unknown_holdout(name: &str) -> Error {
    Error::not_found("holdout", name)
}
