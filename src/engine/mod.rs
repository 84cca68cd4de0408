//! The daemon's operations on the store. Each operation runs on the database thread
//! ([`Db`]) and is one SQLite transaction: a query is validated, scored, charged and appended to
//! the ledger inside one `BEGIN IMMEDIATE` transaction, and its answer leaves only after commit.
//! Submissions queued together share that transaction (group commit, [`Db::call_batched`]):
//! each runs as a savepoint inside it, so each is still its own entry and a failing one is
//! undone alone, and every reply waits for the one commit.
//! There is one write path: `Engine::begin_write` / `Engine::end_write` (or
//! [`Engine::write`]) around `Engine::append`, the only code that appends to any chain.
//!
//! The engine keeps per-holdout caches (the public declaration, the parsed labels, and the
//! accountant replayed from the ledger). A cache is trusted only while the ledger head it was
//! built from is still the head, checked inside each write transaction, so another process
//! writing the same file cannot make it stale.

mod account;
mod clock;
mod compete;
mod create;
mod ops;
mod probe;
mod read;
mod reader;
mod records;
mod replay;
mod retention;
mod rows;
mod stored;
mod submit;
mod visibility;
mod withdraw;
mod worker;

use std::collections::HashMap;
use std::sync::Arc;

use rusqlite::{OptionalExtension, params};

pub use account::{DEFAULT_RANKING_SHARE, HoldoutPolicy, PolicyInput, Quote};
pub use clock::{Clock, FixedClock, SystemClock};
pub use compete::{
    Duplicate, Leaderboard, LeaderboardRow, Ranking, RoundStatus, RoundTeam, ranking_level,
    replay_comparison,
};
pub use create::{CreateHead, CreateRequest, FamilyRequest, TargetDecl};
pub use probe::{ProbeFlag, ProbeSettings};
pub(crate) use read::share_of;
pub use read::{Declared, HistoryItem, HoldoutView};
pub use records::{
    AnswerRecord, BudgetView, Comparison, CoreJson, RankedEntry, RefusalRecord, RoundRecord,
    SealedRecord,
};
pub(crate) use rows::REPEATED;
pub use rows::{NewRows, Sorted};
pub(crate) use stored::texts as stored_texts;
pub use submit::{ModelPredictions, RawValues, Receipt, SubmitMode, SubmitOutcome, SubmitRequest};
pub use visibility::{Scope, Visibility};
pub use worker::{BatchStats, DEFAULT_MAX_BATCH, Db};
// The offline audit replays ledgers with the daemon's own bookkeeping.
pub(crate) use account::Book;
pub use ops::LOCAL_OPERATOR;
pub use replay::{
    BackupRecord, ClassCountsRecord, CloseRecord, DropRecord, ReadRecord, Record, ShredRecord,
    WithdrawRecord, WithdrawRequestRecord,
};
pub(crate) use replay::{BudgetCheck, Problem, Replayer};
pub use retention::{MAX_KEEP_DAYS, Retention, Shredded, kept_files};
pub use withdraw::Withdrawal;

use crate::error::{Error, Result};
use crate::metric::Labels;
use crate::store::Store;

/// The engine: the store plus caches derived from it.
pub struct Engine {
    store: Store,
    clock: Arc<dyn Clock>,
    holdouts: HashMap<String, Arc<Loaded>>,
    accountants: HashMap<String, (u64, account::Book)>,
    /// Open writes, outermost first ([`Engine::begin_write`]): for each, the cached accounting
    /// state of every chain it appended to, as it was before (restored on rollback).
    writes: Vec<HashMap<String, Option<(u64, account::Book)>>>,
    /// Full replays of a chain done to rebuild a cached accounting state.
    replays: u64,
    /// Called after each commit that closed holdouts (an organizer's close, a sealed round's
    /// close at its deadline or by an organizer), with their names: the daemon signs their
    /// heads at once (`serve --checkpoint-dir`).
    on_close: Option<CloseHook>,
    /// Holdouts closed inside the open write, for `on_close` after it commits.
    closed: Vec<String>,
    /// Heavy-probing flags' state (`status` for organizers).
    probes: probe::Probes,
}

/// What runs after a close commits: the connection (no write open), the closed holdouts'
/// names and the time.
pub type CloseHook =
    Box<dyn FnMut(&rusqlite::Connection, &[String], chrono::DateTime<chrono::Utc>) + Send>;

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
    /// Row ids in the canonical order, and the row of each id (`rows::Rows`).
    pub(crate) rows: rows::Rows,
    /// Labels per target; empty once shredded (the holdout is closed then: nothing scores).
    pub(crate) labels: Vec<Labels>,
    pub(crate) genesis_hash: String,
    /// Days its prediction files are kept (`None`: digests only).
    pub(crate) keep_days: Option<u32>,
}

impl Engine {
    /// An engine over an open store with the given clock.
    pub fn new(store: Store, clock: Arc<dyn Clock>) -> Engine {
        Engine {
            store,
            clock,
            holdouts: HashMap::new(),
            accountants: HashMap::new(),
            writes: Vec::new(),
            replays: 0,
            on_close: None,
            closed: Vec::new(),
            probes: probe::Probes::default(),
        }
    }

    /// Sets the thresholds of the heavy-probing flags (`holdout serve --probe-*`).
    pub fn set_probe_settings(&mut self, settings: ProbeSettings) {
        self.probes.settings = settings;
    }

    /// The heavy-probing flags of a holdout that `caller` may see: every team's for
    /// organizers, custodians and auditors; an analyst's own team's only, and under
    /// `isolated` not its transcript share (see `engine::probe`).
    pub fn probe_flags(
        &mut self,
        caller: &crate::auth::Caller,
        name: &str,
    ) -> Result<Vec<ProbeFlag>> {
        use crate::auth::Role;
        let loaded = self.loaded(name)?;
        let head = self.probes.nats_head(name);
        let entries = crate::ledger::read_chain_after(self.store.conn(), name, head)?;
        self.probes.add_entries(name, &entries);
        let roster = match &loaded.policy.core.shares {
            crate::stats::schedule::Shares::Roster { analysts, .. } => analysts.len(),
            _ => 0,
        };
        let all = self.probes.flags(name, roster);
        let overseer = [Role::Organizer, Role::Custodian, Role::Auditor]
            .iter()
            .any(|r| caller.has(*r));
        if overseer {
            return Ok(all);
        }
        let isolated = loaded.policy.isolated();
        Ok(all
            .into_iter()
            .filter(|f| f.team == caller.team && !(isolated && f.kind == "transcript-share"))
            .collect())
    }

    /// The store, for operations outside the engine (bootstrap, tests).
    pub fn store(&mut self) -> &mut Store {
        &mut self.store
    }

    /// Runs `hook` after every commit that closed holdouts (see [`CloseHook`]).
    pub fn on_close(&mut self, hook: CloseHook) {
        self.on_close = Some(hook);
    }

    /// After a panic in a job: rolls back any open write and drops every cached accounting
    /// state (rebuilt from the ledger when next needed).
    pub(crate) fn recover_from_panic(&mut self) {
        if !self.writes.is_empty() {
            self.writes.clear();
            let _ = self.store.conn().execute_batch("ROLLBACK");
        }
        self.closed.clear();
        self.accountants.clear();
        self.holdouts.clear();
    }

    /// How many writes are open (0: none; 1: a transaction; more: savepoints inside it).
    pub(crate) fn write_depth(&self) -> usize {
        self.writes.len()
    }

    /// After a panic in a job that ran inside an enclosing write left open at `depth` (a group
    /// commit): rolls back the writes the job left open above `depth` (restoring the cached
    /// state each started from) and drops every cached accounting state and holdout (rebuilt
    /// from the ledger, inside the enclosing write, when next needed). The enclosing write
    /// stays open for the other jobs of its batch.
    pub(crate) fn recover_from_panic_to(&mut self, depth: usize) {
        while self.writes.len() > depth.max(1) {
            let _ = self.end_write::<()>(Err(Error::Internal("a job panicked".into())));
        }
        self.accountants.clear();
        self.holdouts.clear();
    }

    /// Notes that `name` was closed in the open write; the close hook runs after it commits.
    pub(crate) fn closed_in_write(&mut self, name: &str) {
        self.closed.push(name.to_string());
    }

    /// How many times a chain was replayed in full to rebuild its accounting state (at start,
    /// after a rollback, or when another process wrote the file). A read of exact scores, a
    /// close or an identity event never causes one.
    pub fn full_replays(&self) -> u64 {
        self.replays
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
        self.replays += 1;
        self.accountants
            .insert(loaded.name.clone(), (head, book.clone()));
        Ok(book)
    }

    /// Opens the one write path: an immediate transaction (taking the database's write lock
    /// first). Every append goes through [`Engine::append`] inside it; [`Engine::end_write`]
    /// commits or rolls back. A write opened inside another is a savepoint: a batch of queued
    /// answers runs each as its own nested write, so one that fails is undone alone and the
    /// others commit together.
    pub(crate) fn begin_write(&mut self) -> Result<()> {
        let depth = self.writes.len();
        if depth == 0 {
            self.store.conn().execute_batch("BEGIN IMMEDIATE")?;
        } else {
            self.store
                .conn()
                .execute_batch(&format!("SAVEPOINT write_{depth}"))?;
        }
        self.writes.push(HashMap::new());
        Ok(())
    }

    /// Ends the innermost open write: on success commits (or releases its savepoint; the cached
    /// accounting state staged by its appends is then the state as of the new heads); on any
    /// error, or if the commit fails, rolls it back and restores the cached state it started
    /// from.
    pub(crate) fn end_write<T>(&mut self, result: Result<T>) -> Result<T> {
        let Some(touched) = self.writes.pop() else {
            return Err(Error::Internal("no write is open".into()));
        };
        let depth = self.writes.len();
        let result = result.and_then(|out| {
            if depth == 0 {
                self.store.conn().execute_batch("COMMIT")?;
            } else {
                self.store
                    .conn()
                    .execute_batch(&format!("RELEASE write_{depth}"))?;
            }
            Ok(out)
        });
        if depth == 0 {
            let closed = std::mem::take(&mut self.closed);
            if result.is_ok() && !closed.is_empty() {
                let now = self.now();
                if let Some(hook) = self.on_close.as_mut() {
                    hook(self.store.conn(), &closed, now);
                }
            }
        }
        match &result {
            Ok(_) => {
                // The enclosing write restores, on its own rollback, what this one found.
                if let Some(parent) = self.writes.last_mut() {
                    for (chain, before) in touched {
                        parent.entry(chain).or_insert(before);
                    }
                }
            }
            Err(_) => {
                let _ = if depth == 0 {
                    self.store.conn().execute_batch("ROLLBACK")
                } else {
                    self.store
                        .conn()
                        .execute_batch(&format!("ROLLBACK TO write_{depth}; RELEASE write_{depth}"))
                };
                for (chain, before) in touched {
                    match before {
                        Some(state) => self.accountants.insert(chain, state),
                        None => self.accountants.remove(&chain),
                    };
                }
            }
        }
        result
    }

    /// Remembers, for the innermost open write, the cached state of `chain` before it changes.
    fn touch(&mut self, chain: &str) {
        let before = self.accountants.get(chain).cloned();
        if let Some(w) = self.writes.last_mut() {
            w.entry(chain.to_string()).or_insert(before);
        }
    }

    /// Ends a write whose body returns the accounting state after its last append (entry
    /// number and book): stages that state, then [`Engine::end_write`].
    pub(crate) fn finish_write<T>(
        &mut self,
        holdout: &str,
        result: Result<(T, Option<(u64, account::Book)>)>,
    ) -> Result<T> {
        let result = result.map(|(out, book)| {
            if let Some((seq, book)) = book {
                self.touch(holdout);
                self.accountants.insert(holdout.to_string(), (seq, book));
            }
            out
        });
        self.end_write(result)
    }

    /// Runs `f` inside one write (`Engine::begin_write` ... `Engine::end_write`). `f` may
    /// append several entries (a batch of queued answers: each its own entry, each coded after
    /// the one before it, since each append stages the book it leaves).
    pub fn write<T>(&mut self, f: impl FnOnce(&mut Engine) -> Result<T>) -> Result<T> {
        self.begin_write()?;
        let result = f(self);
        self.end_write(result)
    }

    /// The one place that appends to a ledger (any chain), inside the open write. `book` is the
    /// accounting state after this entry, when the entry moves it; entries that do not (reads,
    /// closes, identity events) keep a cached state valid by moving its head on, so a read of
    /// exact scores costs no replay.
    pub(crate) fn append(
        &mut self,
        chain: &str,
        kind: crate::ledger::Kind,
        body: &serde_json::Value,
        book: Option<account::Book>,
    ) -> Result<crate::ledger::Entry> {
        use crate::ledger::Kind;
        if self.writes.is_empty() {
            return Err(Error::Internal(format!(
                "a {kind} entry for {chain} was appended outside the write path"
            )));
        }
        let entry = crate::ledger::append(self.store.conn(), chain, kind, body)?;
        self.touch(chain);
        let keeps_state = matches!(
            kind,
            Kind::Read
                | Kind::Close
                | Kind::WithdrawRequest
                | Kind::Withdraw
                | Kind::Backup
                | Kind::PredictionsDropped
                | Kind::LabelsShredded
        ) || kind.is_identity();
        match book {
            Some(book) => {
                self.accountants
                    .insert(chain.to_string(), (entry.seq, book));
            }
            None => match self.accountants.get_mut(chain) {
                Some((seq, _)) if keeps_state && *seq + 1 == entry.seq => *seq = entry.seq,
                _ => {
                    self.accountants.remove(chain);
                }
            },
        }
        Ok(entry)
    }
}

/// What identity changes (src/auth.rs) need from a write: the connection for their own tables
/// and the one append path for their ledger events.
pub trait Append {
    /// The connection (inside the open write).
    fn conn(&mut self) -> &rusqlite::Connection;
    /// Appends an entry through the engine's one append path.
    fn append(
        &mut self,
        chain: &str,
        kind: crate::ledger::Kind,
        body: &serde_json::Value,
    ) -> Result<crate::ledger::Entry>;
}

impl Append for Engine {
    fn conn(&mut self) -> &rusqlite::Connection {
        self.store.conn()
    }

    fn append(
        &mut self,
        chain: &str,
        kind: crate::ledger::Kind,
        body: &serde_json::Value,
    ) -> Result<crate::ledger::Entry> {
        Engine::append(self, chain, kind, body, None)
    }
}

/// Not found as an error for a holdout name.
pub(crate) fn unknown_holdout(name: &str) -> Error {
    Error::not_found("holdout", name)
}
