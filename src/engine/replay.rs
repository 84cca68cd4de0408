//! The one replay of a holdout's chain. Each entry is parsed once into a typed [`Record`] (one
//! variant per [`Kind`]), and one step ([`Replayer::step`]) is the only place that knows what
//! each kind means: it moves the accounting state on and compares every recorded field with what
//! the state computes again. The daemon rebuilds its state with it and stops at the first
//! problem ([`Book::replay`]); the offline audit runs the same step and collects every problem.
//!
//! Daily quotas are counted here too (answers and sealed entries per team and UTC day), so the
//! daemon and the audit cannot count them differently.

use std::collections::HashMap;

use serde::{Deserialize, Serialize};
use serde_json::Value;

use super::account::{Book, HoldoutPolicy, RefusalReason};
use super::compete;
use super::records::{AnswerRecord, BudgetView, RefusalRecord, RoundRecord, SealedRecord};
use crate::error::{Error, Result};
use crate::ledger::{Entry, Kind};
use crate::stats::interval::Rounding;

/// The body of a `class-counts` entry: a target's class counts released as a coded symbol of
/// their own (DESIGN 4.8), to the whole holdout under `shared` and to `team` under `isolated`,
/// just before the first answer that needs them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClassCountsRecord {
    /// Holdout.
    pub holdout: String,
    /// Target name.
    pub target: String,
    /// Target index in the policy.
    pub target_index: usize,
    /// The team whose query needed them (their transcript pays under `isolated`).
    pub team: String,
    /// The declared classes, in order.
    pub classes: Vec<String>,
    /// Rows of each class, in the order of `classes`: the released symbol.
    pub counts: Vec<u64>,
    /// `-ln p(counts)` = `ln C(n + C - 1, C - 1)`, added to the transcript.
    pub code_nats: f64,
    /// The transcript's cost after the release.
    pub transcript_nats: f64,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `close` entry (an open holdout closed by an organizer).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CloseRecord {
    /// Who closed it.
    pub by: String,
    /// Why.
    pub reason: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `read` entry: someone read exact scores (history with exact losses, export).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReadRecord {
    /// Who read.
    pub by: String,
    /// Their roles then.
    #[serde(default)]
    pub roles: String,
    /// What was read.
    pub what: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `withdraw-request` entry: one of the two roles a withdrawal needs asked for it
/// (the custodian or the organizer; the other completes it with a `withdraw` entry).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WithdrawRequestRecord {
    /// Who asked.
    pub by: String,
    /// The withdrawal roles they held (`custodian`, `organizer`).
    pub roles: Vec<String>,
    /// Why.
    pub reason: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `withdraw` entry: a holdout that released nothing withdrawn by its custodian
/// and its organizer together (one user holding both roles, or a request and its completion).
/// Its rows and labels are then free for a new holdout.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WithdrawRecord {
    /// Who asked first (the completer itself when one user holds both roles).
    pub requested_by: String,
    /// The withdrawal roles the requester held.
    pub requested_roles: Vec<String>,
    /// When the request was made (the withdrawal's own time when made in one call).
    pub requested_at: String,
    /// Who completed it.
    pub by: String,
    /// The withdrawal roles the completer held.
    pub roles: Vec<String>,
    /// Why (the completer's reason, else the request's).
    pub reason: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

impl WithdrawRecord {
    /// Whether the requester and the completer together held the custodian and organizer
    /// roles.
    pub fn both_roles(&self) -> bool {
        let has = |role: &str| {
            self.roles.iter().any(|r| r == role) || self.requested_roles.iter().any(|r| r == role)
        };
        has("custodian") && has("organizer")
    }
}

/// The body of a `backup` entry: a copy of the whole database (labels, salts and exact scores
/// included) was taken. Written in every holdout's chain just before the copy, so the copy
/// holds it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BackupRecord {
    /// Who took it (a user name online; `(local file access)` offline or automatically).
    pub by: String,
    /// Their roles then (empty offline).
    #[serde(default)]
    pub roles: String,
    /// How: `online`, `offline`, or `before migration from schema N to M`.
    pub how: String,
    /// The file written (a path on the daemon's machine).
    pub file: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `predictions-dropped` entry: kept prediction files older than the holdout's
/// retention were deleted from the store (written by the daemon's retention sweep).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DropRecord {
    /// The answer and sealed entries whose kept files were dropped, in order.
    pub entries: Vec<u64>,
    /// The retention declared in the genesis entry, days.
    pub days: u32,
    /// When, RFC 3339 UTC (the engine's clock).
    pub at: String,
}

/// The body of a `labels-shredded` entry: the custodian deleted a closed holdout's labels (and
/// the per-row losses of its sealed entries, which follow from them) from the store. The
/// genesis entry keeps the labels' digest, so a copy of the labels can still be checked
/// against it. Kept prediction files stay until their retention ends: they hold nothing of the
/// labels, and with the custodian's copy of the labels they can still be re-scored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShredRecord {
    /// Who shredded them.
    pub by: String,
    /// Their roles then.
    pub roles: String,
    /// The labels digest of the genesis entry (what a copy must match).
    pub labels_sha256: String,
    /// Why.
    pub reason: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// A ledger entry's body, parsed once by its kind.
#[derive(Debug, Clone)]
pub enum Record {
    /// The declaration and policy (checked by the audit's genesis check).
    Genesis(Box<Value>),
    /// A charged answer.
    Answer(Box<AnswerRecord>),
    /// A free adoption of another team's answer (core 2 ladder under `shared`).
    Adopt(Box<AnswerRecord>),
    /// A refusal; the raw body is kept to check that it carries nothing score-like.
    Refusal(Box<RefusalRecord>, Box<Value>),
    /// A sealed entry of a final round.
    Sealed(Box<SealedRecord>),
    /// The close of a sealed round.
    Round(Box<RoundRecord>),
    /// The close of an open holdout.
    Close(CloseRecord),
    /// A read of exact scores.
    Read(ReadRecord),
    /// A request to withdraw a holdout that released nothing.
    WithdrawRequest(WithdrawRequestRecord),
    /// A completed withdrawal.
    Withdraw(Box<WithdrawRecord>),
    /// A copy of the database was taken.
    Backup(Box<BackupRecord>),
    /// Kept prediction files dropped at the end of their retention.
    PredictionsDropped(Box<DropRecord>),
    /// A closed holdout's labels shredded by its custodian.
    LabelsShredded(Box<ShredRecord>),
    /// A target's class counts released (a coded, charged symbol).
    ClassCounts(Box<ClassCountsRecord>),
    /// An identity event (these belong to the `@users` chain, never to a holdout's).
    Identity(Kind, Box<Value>),
}

impl Record {
    /// Parses an entry's body by its kind. The error says what is wrong; an unknown kind is
    /// an error too (an entry this binary cannot check).
    pub fn parse(e: &Entry) -> std::result::Result<Record, String> {
        let kind = e
            .kind()
            .ok_or_else(|| format!("unknown entry kind {:?}", e.kind))?;
        fn body<T: for<'de> Deserialize<'de>>(
            e: &Entry,
            what: &str,
        ) -> std::result::Result<T, String> {
            serde_json::from_str(&e.body).map_err(|err| format!("not {what}: {err}"))
        }
        Ok(match kind {
            Kind::Genesis => Record::Genesis(Box::new(body(e, "a genesis body")?)),
            Kind::Answer => Record::Answer(Box::new(body(e, "an answer record")?)),
            Kind::Adopt => Record::Adopt(Box::new(body(e, "an answer record")?)),
            Kind::Refusal => {
                let raw: Value = body(e, "JSON")?;
                let r: RefusalRecord = serde_json::from_value(raw.clone())
                    .map_err(|err| format!("not a refusal record: {err}"))?;
                Record::Refusal(Box::new(r), Box::new(raw))
            }
            Kind::Sealed => Record::Sealed(Box::new(body(e, "a sealed record")?)),
            Kind::Round => Record::Round(Box::new(body(e, "a round record")?)),
            Kind::Close => Record::Close(body(e, "a close record")?),
            Kind::Read => Record::Read(body(e, "a read record")?),
            Kind::WithdrawRequest => {
                Record::WithdrawRequest(body(e, "a withdrawal request record")?)
            }
            Kind::Withdraw => Record::Withdraw(Box::new(body(e, "a withdrawal record")?)),
            Kind::Backup => Record::Backup(Box::new(body(e, "a backup record")?)),
            Kind::PredictionsDropped => {
                Record::PredictionsDropped(Box::new(body(e, "a predictions-dropped record")?))
            }
            Kind::LabelsShredded => {
                Record::LabelsShredded(Box::new(body(e, "a labels-shredded record")?))
            }
            Kind::ClassCounts => Record::ClassCounts(Box::new(body(e, "a class-counts record")?)),
            k if k.is_identity() => Record::Identity(k, Box::new(body(e, "an identity event")?)),
            k => return Err(format!("entry kind {k} has no record parser")),
        })
    }

    /// [`Record::parse`] for the daemon's own reads: a stored entry that does not parse is an
    /// internal error naming the entry.
    pub(crate) fn read(e: &Entry) -> Result<Record> {
        Record::parse(e).map_err(|why| Error::Internal(format!("ledger entry {}: {why}", e.seq)))
    }

    /// The record's kind.
    pub fn kind(&self) -> Kind {
        match self {
            Record::Genesis(_) => Kind::Genesis,
            Record::Answer(_) => Kind::Answer,
            Record::Adopt(_) => Kind::Adopt,
            Record::Refusal(..) => Kind::Refusal,
            Record::Sealed(_) => Kind::Sealed,
            Record::Round(_) => Kind::Round,
            Record::Close(_) => Kind::Close,
            Record::Read(_) => Kind::Read,
            Record::WithdrawRequest(_) => Kind::WithdrawRequest,
            Record::Withdraw(_) => Kind::Withdraw,
            Record::Backup(_) => Kind::Backup,
            Record::PredictionsDropped(_) => Kind::PredictionsDropped,
            Record::LabelsShredded(_) => Kind::LabelsShredded,
            Record::ClassCounts(_) => Kind::ClassCounts,
            Record::Identity(k, _) => *k,
        }
    }

    /// The answer a record carries, if it is an answer or an adoption.
    pub fn answer(&self) -> Option<&AnswerRecord> {
        match self {
            Record::Answer(r) | Record::Adopt(r) => Some(r),
            _ => None,
        }
    }
}

/// One problem a replay step found at an entry.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Problem {
    /// Entry number.
    pub entry: u64,
    /// Field (or aspect) of the entry.
    pub field: String,
    /// What is wrong.
    pub problem: String,
}

/// A budget shown with an entry, and the budget the book just after the entry computes again.
/// Only a replayer that checks budgets (the audit's) computes these; the daemon's skips them
/// (they are display, not state). The recomputation is cheap: the accountant remembers the
/// status the answer itself computed ([`Book::budget`] asks for the same one).
#[derive(Debug, Clone)]
pub(crate) struct BudgetCheck {
    /// Entry number.
    pub(crate) entry: u64,
    /// What was recorded.
    pub(crate) recorded: BudgetView,
    /// What the book just after the entry computes.
    pub(crate) again: BudgetView,
}

impl BudgetCheck {
    /// Problems of the recorded budget against the recomputed one.
    pub(crate) fn run(&self) -> Vec<Problem> {
        let mut cmp = Cmp::new(self.entry);
        cmp.budget(&self.recorded, &self.again);
        cmp.out
    }
}

/// Keys that would carry exact scores; none may appear in a refusal.
const EXACT_KEYS: &[&str] = &["exact", "score", "losses", "errors", "loss"];

fn exact_key(v: &Value) -> Option<String> {
    match v {
        Value::Object(m) => m.iter().find_map(|(k, v)| {
            if EXACT_KEYS.contains(&k.as_str()) {
                Some(k.clone())
            } else {
                exact_key(v)
            }
        }),
        Value::Array(a) => a.iter().find_map(exact_key),
        _ => None,
    }
}

struct Cmp {
    entry: u64,
    out: Vec<Problem>,
}

impl Cmp {
    fn new(entry: u64) -> Cmp {
        Cmp {
            entry,
            out: Vec::new(),
        }
    }

    fn push(&mut self, field: &str, problem: String) {
        self.out.push(Problem {
            entry: self.entry,
            field: field.to_string(),
            problem,
        });
    }

    fn eq<T: PartialEq + std::fmt::Debug>(&mut self, field: &str, recorded: T, again: T) {
        if recorded != again {
            self.push(
                field,
                format!("recorded {recorded:?}, replay computes {again:?}"),
            );
        }
    }

    fn f(&mut self, field: &str, recorded: f64, again: f64) {
        if recorded.to_bits() != again.to_bits() && !(recorded == 0.0 && again == 0.0) {
            self.push(
                field,
                format!("recorded {recorded}, replay computes {again}"),
            );
        }
    }

    fn budget(&mut self, recorded: &BudgetView, again: &BudgetView) {
        self.f("budget.delta", recorded.delta, again.delta);
        self.f("budget.spent", recorded.spent, again.spent);
        self.f("budget.remaining", recorded.remaining, again.remaining);
        self.f(
            "budget.transcript_nats",
            recorded.transcript_nats,
            again.transcript_nats,
        );
        self.f(
            "budget.next_half_width",
            recorded.next_half_width,
            again.next_half_width,
        );
        self.eq(
            "budget.queries_left",
            recorded.queries_left,
            again.queries_left,
        );
        self.eq("budget.answered", recorded.answered, again.answered);
        self.eq("budget.refused", recorded.refused, again.refused);
    }

    fn time(&mut self, at: &str) {
        if chrono::DateTime::parse_from_rfc3339(at).is_err() {
            self.push("at", format!("{at:?} is not an RFC 3339 time"));
        }
    }
}

/// Refusals change nothing in the accountant (they charge nothing; only the refusal counts
/// move), so during a run of refusals the public state is the same: its decision and its budget
/// are computed once per accountant state and reused, with the counts moved on.
/// (accountant generation, team, target, reason code).
type DecisionKey = (u64, String, usize, String);

#[derive(Default, Clone)]
struct RefusalMemo {
    /// Bumped after every entry that moves the accountant.
    generation: u64,
    /// (generation, team, target, reason) -> the recomputed message, if the reason holds.
    decisions: HashMap<DecisionKey, Option<(String, bool)>>,
    /// (generation, team) -> budget then, and the refusal count it was computed at.
    budgets: HashMap<(u64, String), (BudgetView, u64)>,
}

/// The UTC day of an RFC 3339 time (its first ten characters).
pub(crate) fn day_of(at: &str) -> String {
    at.get(..10).unwrap_or("").to_string()
}

/// Replays a holdout's chain one entry at a time.
#[derive(Clone)]
pub(crate) struct Replayer<'p> {
    policy: &'p HoldoutPolicy,
    book: Book,
    /// Entry that closed the holdout (a `close`, a `round` or a `withdraw`), if any.
    closed_at: Option<u64>,
    /// The first entry that released something learned from the labels (an answer, an
    /// adoption, a sealed entry, a round, class counts), and its kind: a withdrawal after it is invalid.
    released_at: Option<(u64, Kind)>,
    /// The pending withdrawal request, if any, and its entry.
    withdraw_request: Option<(u64, WithdrawRequestRecord)>,
    /// Entry that withdrew the holdout, if any.
    withdrawn_at: Option<u64>,
    /// Entry that shredded the labels, if any.
    shredded_at: Option<u64>,
    /// Entries whose kept prediction files were dropped, and the entry that dropped them.
    gone: HashMap<u64, u64>,
    /// Sealed entries waiting for the round's close, in ticket order.
    pending: Vec<SealedRecord>,
    /// Whether budgets shown with refusals are compared (the audit) or not (the daemon).
    check_budgets: bool,
    memo: RefusalMemo,
}

impl<'p> Replayer<'p> {
    /// A replayer at the start of a chain (just after its genesis). `check_budgets`: compare
    /// the budgets shown with refusals too, and recompute those shown with answers for the
    /// `budgets` callback of [`Replayer::step`] (without it the callback is never called).
    pub(crate) fn new(policy: &'p HoldoutPolicy, check_budgets: bool) -> Result<Replayer<'p>> {
        Ok(Replayer {
            policy,
            book: Book::new(policy)?,
            closed_at: None,
            released_at: None,
            withdraw_request: None,
            withdrawn_at: None,
            shredded_at: None,
            gone: HashMap::new(),
            pending: Vec::new(),
            check_budgets,
            memo: RefusalMemo::default(),
        })
    }

    /// The accounting state, once the replay is done.
    pub(crate) fn into_book(self) -> Book {
        self.book
    }

    /// Replays entry `entries[i]` (parsed as `rec`), appending every problem to `out`. Earlier
    /// entries are there for adoptions, which name the answer they adopt. `budgets` receives the
    /// budget each answer showed with the one recomputed, for the caller to compare (only when
    /// the replayer checks budgets).
    pub(crate) fn step(
        &mut self,
        entries: &[Entry],
        i: usize,
        rec: &Record,
        out: &mut Vec<Problem>,
        budgets: &mut dyn FnMut(BudgetCheck),
    ) {
        let e = &entries[i];
        let mut cmp = Cmp::new(e.seq);
        let after_close = |cmp: &mut Cmp, closed: Option<u64>, what: &str| {
            if let Some(c) = closed {
                cmp.push(
                    "kind",
                    format!("{what} after the holdout was closed at entry {c}"),
                );
            }
        };
        if matches!(
            rec,
            Record::Answer(_)
                | Record::Adopt(_)
                | Record::Sealed(_)
                | Record::Round(_)
                | Record::ClassCounts(_)
        ) && self.released_at.is_none()
        {
            self.released_at = Some((e.seq, rec.kind()));
        }
        if let Some(s) = self.shredded_at
            && !matches!(
                rec,
                Record::Read(_) | Record::Backup(_) | Record::PredictionsDropped(_)
            )
        {
            cmp.push(
                "kind",
                format!(
                    "a {} entry after the labels were shredded at entry {s} (only reads, \
                     backups and drops of kept files may follow a shred)",
                    rec.kind()
                ),
            );
        }
        if let Some(w) = self.withdrawn_at
            && !matches!(
                rec,
                Record::Read(_) | Record::Backup(_) | Record::LabelsShredded(_)
            )
        {
            cmp.push(
                "kind",
                format!(
                    "a {} entry after the holdout was withdrawn at entry {w} (only reads and backups may \
                     follow a withdrawal)",
                    rec.kind()
                ),
            );
        }
        match rec {
            Record::Genesis(_) => {
                if i != 0 {
                    cmp.push("kind", "a second genesis entry inside the chain".into());
                }
            }
            Record::Answer(r) => {
                after_close(&mut cmp, self.closed_at, "answered");
                if self.answer(r, &mut cmp) && self.check_budgets {
                    budgets(BudgetCheck {
                        entry: e.seq,
                        recorded: r.budget.clone(),
                        again: self.book.budget(self.policy, &r.team),
                    });
                }
                self.memo.generation += 1;
            }
            Record::Adopt(r) => {
                after_close(&mut cmp, self.closed_at, "adopted");
                cmp.time(&r.at);
                match self.book.replay_adoption(self.policy, entries, e) {
                    Ok(()) if self.check_budgets => budgets(BudgetCheck {
                        entry: e.seq,
                        recorded: r.budget.clone(),
                        again: self.book.budget(self.policy, &r.team),
                    }),
                    Ok(()) => {}
                    Err(err) => cmp.push("replay", err.to_string()),
                }
                self.memo.generation += 1;
            }
            Record::Refusal(r, raw) => {
                after_close(&mut cmp, self.closed_at, "refused");
                self.refusal(r, raw, &mut cmp);
            }
            Record::Sealed(r) => {
                after_close(&mut cmp, self.closed_at, "sealed");
                self.sealed(r, &mut cmp);
                self.memo.generation += 1;
            }
            Record::Round(r) => {
                after_close(&mut cmp, self.closed_at, "a round closed");
                self.round(r, &mut cmp);
                self.closed_at = Some(e.seq);
                self.memo.generation += 1;
            }
            Record::Close(c) => {
                after_close(&mut cmp, self.closed_at, "closed again");
                cmp.time(&c.at);
                if self.policy.sealed() {
                    cmp.push(
                        "kind",
                        "a sealed round closes with a round entry, not a close entry".into(),
                    );
                }
                self.closed_at = Some(e.seq);
            }
            Record::Read(r) => cmp.time(&r.at),
            Record::Backup(b) => cmp.time(&b.at),
            Record::PredictionsDropped(d) => self.dropped(entries, e.seq, d, &mut cmp),
            Record::LabelsShredded(r) => self.shredded(entries, e.seq, r, &mut cmp),
            Record::ClassCounts(r) => {
                after_close(&mut cmp, self.closed_at, "class counts released");
                self.class_counts(r, &mut cmp);
                self.memo.generation += 1;
            }
            Record::WithdrawRequest(r) => self.withdraw_request(e.seq, r, &mut cmp),
            Record::Withdraw(w) => self.withdraw(e.seq, w, &mut cmp),
            Record::Identity(k, _) => cmp.push(
                "kind",
                format!("a {k} identity event inside a holdout's chain (they belong to @users)"),
            ),
        }
        out.append(&mut cmp.out);
    }

    /// The entries a drop names: each an earlier answer or sealed entry whose file was kept
    /// and is not gone already.
    fn kept_entries(&mut self, entries: &[Entry], seq: u64, named: &[u64], cmp: &mut Cmp) {
        for &n in named {
            let kind = entries
                .get(n as usize)
                .filter(|x| x.seq == n && n < seq)
                .and_then(Entry::kind);
            if !matches!(kind, Some(Kind::Answer | Kind::Sealed)) {
                cmp.push(
                    "entries",
                    format!("names entry {n}, which is not an earlier answer or sealed entry"),
                );
            } else if let Some(by) = self.gone.insert(n, seq) {
                cmp.push(
                    "entries",
                    format!("names entry {n}, whose kept file was already gone at entry {by}"),
                );
            }
        }
    }

    fn dropped(&mut self, entries: &[Entry], seq: u64, d: &DropRecord, cmp: &mut Cmp) {
        cmp.time(&d.at);
        let declared = entries
            .first()
            .and_then(|g| serde_json::from_str::<Value>(&g.body).ok())
            .map(|g| super::retention::Retention::from_genesis(&g));
        match declared {
            Some(Ok(super::retention::Retention::Keep { days })) if days == d.days => {}
            Some(Ok(r)) => cmp.push(
                "days",
                format!(
                    "drops kept files after {} days, the genesis entry declares {}",
                    d.days,
                    r.describe()
                ),
            ),
            _ => cmp.push("days", "the genesis entry's retention is unreadable".into()),
        }
        self.kept_entries(entries, seq, &d.entries, cmp);
        let Ok(now) = chrono::DateTime::parse_from_rfc3339(&d.at) else {
            return;
        };
        for &n in &d.entries {
            let at = entries
                .get(n as usize)
                .and_then(|x| Record::parse(x).ok())
                .and_then(|r| match r {
                    Record::Answer(a) => Some(a.at),
                    Record::Sealed(s) => Some(s.at),
                    _ => None,
                })
                .and_then(|at| chrono::DateTime::parse_from_rfc3339(&at).ok());
            if let Some(at) = at
                && now < at + chrono::Duration::days(i64::from(d.days))
            {
                cmp.push(
                    "entries",
                    format!(
                        "drops the kept file of entry {n} (at {at}) before its {} days were up",
                        d.days
                    ),
                );
            }
        }
    }

    fn shredded(&mut self, entries: &[Entry], seq: u64, r: &ShredRecord, cmp: &mut Cmp) {
        cmp.time(&r.at);
        if self.closed_at.is_none() {
            cmp.push(
                "kind",
                "labels shredded while the holdout was open (only a closed holdout's may be)"
                    .into(),
            );
        }
        if !r.roles.split(',').any(|x| x.trim() == "custodian") {
            cmp.push(
                "roles",
                format!("{} shredded the labels without the custodian role", r.by),
            );
        }
        let recorded = entries
            .first()
            .and_then(|g| serde_json::from_str::<Value>(&g.body).ok())
            .and_then(|g| g["labels_sha256"].as_str().map(str::to_string));
        if recorded.as_deref() != Some(r.labels_sha256.as_str()) {
            cmp.push(
                "labels_sha256",
                format!(
                    "names the labels digest {}, the genesis entry records {:?}",
                    r.labels_sha256, recorded
                ),
            );
        }
        self.shredded_at = Some(seq);
    }

    fn withdraw_request(&mut self, seq: u64, r: &WithdrawRequestRecord, cmp: &mut Cmp) {
        cmp.time(&r.at);
        if let Some((at, kind)) = self.released_at {
            cmp.push(
                "kind",
                format!("a withdrawal requested after entry {at} ({kind}) released an answer"),
            );
        }
        if !r.roles.iter().any(|x| x == "custodian" || x == "organizer") {
            cmp.push(
                "roles",
                format!(
                    "{} asked for a withdrawal without the custodian or organizer role",
                    r.by
                ),
            );
        }
        self.withdraw_request = Some((seq, r.clone()));
    }

    fn withdraw(&mut self, seq: u64, w: &WithdrawRecord, cmp: &mut Cmp) {
        cmp.time(&w.at);
        if let Some((at, kind)) = self.released_at {
            cmp.push(
                "kind",
                format!(
                    "withdrawn after entry {at} ({kind}) released an answer: only a holdout \
                     that released nothing can be withdrawn"
                ),
            );
        }
        if !w.both_roles() {
            cmp.push(
                "roles",
                format!(
                    "withdrawn by {} ({}) on the request of {} ({}): a withdrawal needs both \
                     the custodian and the organizer role",
                    w.by,
                    w.roles.join(","),
                    w.requested_by,
                    w.requested_roles.join(",")
                ),
            );
        }
        let one_call = w.requested_by == w.by && w.requested_at == w.at;
        if !one_call {
            match &self.withdraw_request {
                Some((_, r))
                    if r.by == w.requested_by
                        && r.at == w.requested_at
                        && r.roles == w.requested_roles => {}
                Some((at, r)) => cmp.push(
                    "requested_by",
                    format!(
                        "names a request by {} at {}, but the request at entry {at} was made \
                         by {} at {}",
                        w.requested_by, w.requested_at, r.by, r.at
                    ),
                ),
                None => cmp.push(
                    "requested_by",
                    format!(
                        "names a request by {} at {} that no earlier entry records",
                        w.requested_by, w.requested_at
                    ),
                ),
            }
        }
        self.withdraw_request = None;
        self.withdrawn_at = Some(seq);
        self.closed_at.get_or_insert(seq);
    }

    /// Answers and sealed entries a team had on the UTC day of `at`, before this entry.
    fn count_quota(&mut self, team: &str, at: &str, cmp: &mut Cmp) {
        let quota = u64::from(self.policy.daily_quota);
        let used = self.book.quota_used(team, &day_of(at));
        if quota > 0 && used >= quota {
            cmp.push(
                "quota",
                format!(
                    "team {team} was served beyond its daily quota of {quota} (public fact: \
                     answers and sealed entries that UTC day)"
                ),
            );
        }
        self.book.count_quota(team, &day_of(at));
    }

    /// A release of class counts: the same release on the book, and the recorded code and
    /// transcript compared with what it computes.
    fn class_counts(&mut self, r: &ClassCountsRecord, cmp: &mut Cmp) {
        cmp.time(&r.at);
        let Some(t) = self.policy.targets.get(r.target_index) else {
            cmp.push(
                "target_index",
                format!("{} is not a target of the policy", r.target_index),
            );
            return;
        };
        cmp.eq("target", r.target.as_str(), t.name.as_str());
        cmp.eq("classes", r.classes.join(","), t.classes.join(","));
        match self.book.release_counts(&r.team, r.target_index, &r.counts) {
            Ok(rel) => {
                cmp.f("code_nats", r.code_nats, rel.code_nats);
                cmp.f("transcript_nats", r.transcript_nats, rel.transcript_nats);
            }
            Err(err) => cmp.push("replay", err.to_string()),
        }
    }

    fn answer(&mut self, r: &AnswerRecord, cmp: &mut Cmp) -> bool {
        let policy = self.policy;
        cmp.time(&r.at);
        self.count_quota(&r.team, &r.at, cmp);
        let Some(t) = policy.targets.get(r.target_index) else {
            cmp.push(
                "target_index",
                format!("{} is not a target of the policy", r.target_index),
            );
            return false;
        };
        cmp.eq("target", r.target.as_str(), t.name.as_str());
        let Some(losses) = r.exact.clone() else {
            cmp.push(
                "exact",
                "the answer carries no exact losses, so it cannot be replayed".into(),
            );
            return false;
        };
        cmp.eq("models", r.models as usize, losses.len());
        for (m, l) in losses.iter().enumerate() {
            if l.rows != policy.core.rows || !(0.0..=l.rows as f64).contains(&l.sum) {
                cmp.push(
                    &format!("exact[{m}]"),
                    format!(
                        "loss sum {} over {} rows is impossible for this holdout ({} rows)",
                        l.sum, l.rows, policy.core.rows
                    ),
                );
            }
        }
        let quote = match self.book.quote(policy, &r.team, r.target_index, r.models) {
            Ok(q) => q,
            Err(why) => {
                cmp.push(
                    "kind",
                    format!(
                        "answered, but the public state at this point refuses it ({}: {why})",
                        why.code()
                    ),
                );
                return false;
            }
        };
        let again = match self
            .book
            .answer(policy, &r.team, r.target_index, &quote, &losses)
        {
            Ok(a) => a,
            Err(err) => {
                cmp.push(
                    "exact",
                    format!("the core cannot answer from these losses: {err}"),
                );
                return false;
            }
        };
        cmp.eq("query", r.query, again.query);
        cmp.eq("symbol", r.symbol.as_str(), again.symbol.as_str());
        cmp.eq(
            "score",
            r.score.map(f64::to_bits),
            again.score.map(f64::to_bits),
        );
        cmp.f("lower", r.lower, again.lower);
        cmp.f("upper", r.upper, again.upper);
        cmp.f("delta_i", r.delta_i, again.delta_i);
        cmp.f("level_nats", r.level_nats, again.level_nats);
        cmp.f("code_nats", r.code_nats, again.code_nats);
        cmp.eq("statement", r.statement.as_str(), again.statement.as_str());
        cmp.eq("best_model", r.best_model, again.best_model);
        if r.core != again.core {
            cmp.push(
                "core",
                "the core's own record differs from what the core computes again".into(),
            );
        }
        true
    }

    fn refusal(&mut self, r: &RefusalRecord, raw: &Value, cmp: &mut Cmp) {
        let policy = self.policy;
        if let Some(k) = exact_key(raw) {
            cmp.push(
                &k,
                "a refusal carries a score-like field; refusals must be decided before scoring"
                    .into(),
            );
        }
        cmp.time(&r.at);
        let generation = self.memo.generation;
        let now_count = self.book.refused_count(policy, &r.team);
        if self.check_budgets {
            let book = &self.book;
            let (view, at_count) = self
                .memo
                .budgets
                .entry((generation, r.team.clone()))
                .or_insert_with(|| (book.budget(policy, &r.team), now_count))
                .clone();
            let mut expected = view;
            expected.refused += now_count - at_count;
            cmp.budget(&r.budget, &expected);
        }
        let target = policy.targets.iter().position(|t| t.name == r.target);
        match r.reason.as_str() {
            c if c == RefusalReason::Quota.code() => {
                let quota = policy.daily_quota;
                let used = self.book.quota_used(&r.team, &day_of(&r.at));
                if quota == 0 || used < u64::from(quota) {
                    cmp.push(
                        "reason",
                        format!(
                            "refused for the quota, but team {} had {used} answers and sealed \
                             entries that day (quota {})",
                            r.team,
                            if quota == 0 {
                                "none".to_string()
                            } else {
                                quota.to_string()
                            }
                        ),
                    );
                }
            }
            c if c == RefusalReason::MaxCost.code() => cmp.push(
                "reason",
                "max-cost refusals are local and never recorded".into(),
            ),
            code => {
                // The number of models is not recorded with a refusal: accept the decision
                // when some batch size reproduces it from the public state, message included.
                let key = (
                    generation,
                    r.team.clone(),
                    target.unwrap_or(usize::MAX),
                    code.to_string(),
                );
                let book = &self.book;
                let decided = self
                    .memo
                    .decisions
                    .entry(key)
                    .or_insert_with(|| {
                        target.and_then(|t| {
                            (1..=64u32).find_map(|m| match book.quote(policy, &r.team, t, m) {
                                Err(why) if why.code() == code => {
                                    Some((why.to_string(), matches!(why, RefusalReason::Core(_))))
                                }
                                _ => None,
                            })
                        })
                    })
                    .clone();
                match decided {
                    None => cmp.push(
                        "reason",
                        format!(
                            "refused as {code:?}, but the public state at this point does not \
                             refuse for that reason"
                        ),
                    ),
                    Some((message, core)) => {
                        if core && message != r.message {
                            cmp.push(
                                "message",
                                format!("recorded {:?}, replay computes {message:?}", r.message),
                            );
                        }
                    }
                }
            }
        }
        self.book.note_refusal(policy, &r.team);
    }

    fn sealed(&mut self, r: &SealedRecord, cmp: &mut Cmp) {
        let policy = self.policy;
        cmp.time(&r.at);
        self.count_quota(&r.team, &r.at, cmp);
        if !policy.sealed() {
            cmp.push(
                "kind",
                "a sealed entry in a holdout that is not sealed".into(),
            );
        }
        let Some(t) = policy.targets.get(r.target_index) else {
            cmp.push(
                "target_index",
                format!("{} is not a target of the policy", r.target_index),
            );
            return;
        };
        cmp.eq("target", r.target.as_str(), t.name.as_str());
        let quote = match self.book.quote(policy, &r.team, r.target_index, 1) {
            Ok(q) => q,
            Err(why) => {
                cmp.push(
                    "kind",
                    format!(
                        "sealed and charged, but the public state at this point refuses it \
                         ({}: {why})",
                        why.code()
                    ),
                );
                return;
            }
        };
        cmp.eq("query", r.query, quote.query);
        cmp.f("level_nats", r.level_nats, quote.level_nats);
        cmp.f("delta_i", r.delta_i, quote.delta_i);
        match self.book.seal(&r.team, r.target_index, &quote) {
            Ok(ticket) => cmp.eq("ticket", r.ticket, ticket),
            Err(err) => cmp.push("ticket", format!("the core cannot seal it: {err}")),
        }
        self.pending.push(r.clone());
    }

    fn round(&mut self, r: &RoundRecord, cmp: &mut Cmp) {
        let policy = self.policy;
        cmp.time(&r.at);
        if !policy.sealed() {
            cmp.push("kind", "a round in a holdout that is not sealed".into());
        }
        let sealed = std::mem::take(&mut self.pending);
        if r.answers.len() != sealed.len() {
            cmp.push(
                "answers",
                format!(
                    "the round answers {} entries, {} were sealed",
                    r.answers.len(),
                    sealed.len()
                ),
            );
            return;
        }
        // Each answer belongs to the sealed entry with its ticket: same team, user, file.
        for (k, (a, s)) in r.answers.iter().zip(&sealed).enumerate() {
            let mut field = |name: &str, recorded: &str, sealed: &str| {
                if recorded != sealed {
                    cmp.push(
                        &format!("answers[{k}].{name}"),
                        format!("recorded {recorded:?}, the sealed entry has {sealed:?}"),
                    );
                }
            };
            field("team", &a.team, &s.team);
            field("user", &a.user, &s.user);
            field("digest", &a.digest, &s.digest);
            field("target", &a.target, &s.target);
            field("note", &a.note, &s.note);
            field("at", &a.at, &r.at);
            if a.target_index != s.target_index || a.models != 1 {
                cmp.push(
                    &format!("answers[{k}]"),
                    "target or model count differs from the sealed entry".into(),
                );
            }
        }
        let mut losses = Vec::with_capacity(r.answers.len());
        for (k, a) in r.answers.iter().enumerate() {
            match a.exact.as_ref().and_then(|v| v.first().copied()) {
                Some(l) if l.rows == policy.core.rows && (0.0..=l.rows as f64).contains(&l.sum) => {
                    losses.push(l)
                }
                _ => {
                    cmp.push(
                        &format!("answers[{k}].exact"),
                        "no possible exact loss recorded, so the round cannot be replayed".into(),
                    );
                    return;
                }
            }
        }
        let again = match self.book.close_round(policy, &losses) {
            Ok(a) => a,
            Err(err) => {
                cmp.push("answers", format!("the core cannot close the round: {err}"));
                return;
            }
        };
        for (k, (a, b)) in r.answers.iter().zip(&again).enumerate() {
            let p = |f: &str| format!("answers[{k}].{f}");
            cmp.eq(&p("query"), a.query, b.query);
            cmp.eq(&p("symbol"), a.symbol.as_str(), b.symbol.as_str());
            cmp.eq(
                &p("score"),
                a.score.map(f64::to_bits),
                b.score.map(f64::to_bits),
            );
            cmp.f(&p("lower"), a.lower, b.lower);
            cmp.f(&p("upper"), a.upper, b.upper);
            cmp.f(&p("delta_i"), a.delta_i, b.delta_i);
            cmp.f(&p("level_nats"), a.level_nats, b.level_nats);
            cmp.f(&p("code_nats"), a.code_nats, b.code_nats);
            cmp.eq(&p("statement"), a.statement.as_str(), b.statement.as_str());
            if a.core != b.core {
                cmp.push(
                    &p("core"),
                    "the core's own record differs from what the core computes again".into(),
                );
            }
            if self.check_budgets {
                cmp.budget(&a.budget, &self.book.budget(policy, &a.team));
            }
        }
        // The ranking and its comparisons, derived again from the sealed entries and the
        // released answers (public facts), with the recorded statistics re-checked.
        let plan = compete::rank(policy, &sealed, &r.answers);
        cmp.f("ranking_delta", r.ranking_delta, policy.ranking_delta);
        cmp.eq("pairs", r.pairs, plan.pairs);
        cmp.eq("ranking.len", r.ranking.len(), plan.ranking.len());
        for (k, (a, b)) in r.ranking.iter().zip(&plan.ranking).enumerate() {
            if a != b {
                cmp.push(
                    &format!("ranking[{k}]"),
                    format!(
                        "recorded rank {} team {} ticket {}, replay ranks team {} ticket {} there",
                        a.rank, a.team, a.ticket, b.team, b.ticket
                    ),
                );
            }
        }
        cmp.eq(
            "comparisons.len",
            r.comparisons.len(),
            plan.neighbours.len(),
        );
        let level = compete::ranking_level_for_pairs(policy.ranking_delta, plan.pairs);
        let rounding = Rounding::for_core(policy.core.core_version);
        for (k, (c, &(a, b))) in r.comparisons.iter().zip(&plan.neighbours).enumerate() {
            let p = |f: &str| format!("comparisons[{k}].{f}");
            cmp.eq(&p("ahead"), c.ahead, a as u64);
            cmp.eq(&p("behind"), c.behind, b as u64);
            cmp.f(&p("level_nats"), c.level_nats, level);
            let target = (policy.core.core_version >= 2).then(|| sealed[a].target.clone());
            cmp.eq(&p("target"), c.target.clone(), target);
            let binary = policy.core.targets[sealed[a].target_index].binary;
            let (la, lb) = (losses[a], losses[b]);
            // The recorded statistics must agree with the two entries' exact losses.
            if binary {
                match (c.a_only, c.b_only, la.errors, lb.errors) {
                    (Some(ao), Some(bo), Some(ea), Some(eb)) => {
                        if ao as i128 - bo as i128 != ea as i128 - eb as i128
                            || ao > ea
                            || bo > eb
                            || ao + bo > policy.core.rows
                        {
                            cmp.push(
                                &p("a_only"),
                                format!(
                                    "{ao} and {bo} discordant rows are impossible for entries \
                                     with {ea} and {eb} errors"
                                ),
                            );
                        }
                    }
                    _ => cmp.push(&p("a_only"), "missing discordant counts".into()),
                }
            } else {
                match (c.sum_diff, c.sum_sq_diff) {
                    (Some(d), Some(sq)) => {
                        let want = la.sum - lb.sum;
                        let rows = policy.core.rows as f64;
                        if (d - want).abs() > 1e-9 * rows.max(1.0)
                            || !(0.0..=rows).contains(&sq)
                            || d * d > sq * rows * (1.0 + 1e-12) + 1e-9
                        {
                            cmp.push(
                                &p("sum_diff"),
                                format!(
                                    "difference sums ({d}, {sq}) are impossible for entries \
                                     with loss sums {} and {}",
                                    la.sum, lb.sum
                                ),
                            );
                        }
                    }
                    _ => cmp.push(&p("sum_diff"), "missing difference sums".into()),
                }
            }
            match compete::replay_comparison_with(rounding, binary, policy.core.rows, c) {
                Some((lo, hi)) => {
                    cmp.f(&p("lower"), c.lower, lo);
                    cmp.f(&p("upper"), c.upper, hi);
                    cmp.eq(
                        &p("distinguishable"),
                        c.distinguishable,
                        lo > 0.0 || hi < 0.0,
                    );
                }
                None => cmp.push(
                    &p("lower"),
                    "the interval cannot be computed from the recorded statistics".into(),
                ),
            }
        }
    }
}

impl Book {
    /// Rebuilds the book from a holdout's ledger with the one replay step, stopping at the
    /// first entry that does not replay.
    pub(crate) fn replay(policy: &HoldoutPolicy, entries: &[Entry]) -> Result<Book> {
        let mut rp = Replayer::new(policy, false)?;
        let mut out = Vec::new();
        for i in 1..entries.len() {
            let rec = Record::parse(&entries[i]).map_err(|why| {
                Error::Internal(format!("ledger entry {}: {why}", entries[i].seq))
            })?;
            rp.step(entries, i, &rec, &mut out, &mut |_| {});
            if let Some(p) = out.first() {
                return Err(Error::Internal(format!(
                    "ledger entry {} does not replay ({}): {}",
                    p.entry, p.field, p.problem
                )));
            }
        }
        Ok(rp.into_book())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::account::PolicyInput;
    use crate::engine::create::TargetDecl;
    use crate::metric::Metric;

    /// A two-target policy (600 rows) whose first target needs the counts of its 3 classes.
    fn policy(sharing: &str, shares: &str) -> HoldoutPolicy {
        let decl = |name: &str| TargetDecl {
            name: name.into(),
            column: name.into(),
            metric: Metric::Error,
            method: "exact".into(),
            classes: vec!["a".into(), "b".into(), "c".into()],
        };
        let input = PolicyInput {
            sharing: sharing.into(),
            shares: shares.into(),
            ..PolicyInput::default()
        };
        let mut p = HoldoutPolicy::build(&input, vec![decl("y"), decl("z")], 600).unwrap();
        p.core.targets[0].class_counts = Some(3);
        p
    }

    fn entry(seq: u64, rec: &ClassCountsRecord) -> Entry {
        Entry {
            chain: rec.holdout.clone(),
            seq,
            kind: Kind::ClassCounts.as_str().into(),
            body: serde_json::to_string(rec).unwrap(),
            salt: String::new(),
            prev_hash: String::new(),
            hash: String::new(),
        }
    }

    fn release(team: &str, counts: Vec<u64>, code: f64, transcript: f64) -> ClassCountsRecord {
        ClassCountsRecord {
            holdout: "h".into(),
            target: "y".into(),
            target_index: 0,
            team: team.into(),
            classes: vec!["a".into(), "b".into(), "c".into()],
            counts,
            code_nats: code,
            transcript_nats: transcript,
            at: "2026-01-01T00:00:00Z".into(),
        }
    }

    /// Replays `recs` as entries 1.. of a chain; the problems found.
    fn replay(policy: &HoldoutPolicy, recs: &[ClassCountsRecord]) -> Vec<Problem> {
        let entries: Vec<Entry> = recs
            .iter()
            .enumerate()
            .map(|(i, r)| entry(i as u64 + 1, r))
            .collect();
        let mut rp = Replayer::new(policy, true).unwrap();
        let mut out = Vec::new();
        for (i, e) in entries.iter().enumerate() {
            let rec = Record::parse(e).unwrap();
            assert_eq!(rec.kind(), Kind::ClassCounts);
            rp.step(&entries, i, &rec, &mut out, &mut |_| {});
        }
        out
    }

    #[test]
    fn a_release_replays_and_a_changed_one_is_found() {
        let shared = policy("shared", "none");
        let due = crate::stats::codes::composition_nats(600, 3);
        let good = release("t1", vec![100, 200, 300], due, due);
        assert!(replay(&shared, std::slice::from_ref(&good)).is_empty());
        // A cheaper recorded code, or a transcript that leaves it out, is found.
        let cheap = release("t1", vec![100, 200, 300], due - 1.0, due);
        assert!(replay(&shared, &[cheap])[0].field == "code_nats");
        let left_out = release("t1", vec![100, 200, 300], due, 0.0);
        assert!(replay(&shared, &[left_out])[0].field == "transcript_nats");
        // Counts that do not add up to the rows, or that name other classes, are found.
        let bad_sum = release("t1", vec![100, 200, 200], due, due);
        assert!(replay(&shared, &[bad_sum])[0].field == "replay");
        let mut other = good.clone();
        other.classes = vec!["a".into(), "b".into(), "x".into()];
        assert!(replay(&shared, &[other])[0].field == "classes");
        // A target that needs no counts has none to release.
        let mut z = good.clone();
        (z.target, z.target_index) = ("z".into(), 1);
        assert!(replay(&shared, &[z])[0].field == "replay");
        // Under shared, once: a second release (any team) is found.
        let again = release("t2", vec![100, 200, 300], due, 2.0 * due);
        let found = replay(&shared, &[good.clone(), again]);
        assert_eq!(found.len(), 1, "{found:?}");
        assert_eq!((found[0].entry, found[0].field.as_str()), (2, "replay"));
        // Under isolated, once per team, each in its own transcript.
        let isolated = policy("isolated", "on-arrival");
        let t2 = release("t2", vec![100, 200, 300], due, due);
        assert!(replay(&isolated, &[good.clone(), t2]).is_empty());
        let twice = replay(&isolated, &[good.clone(), good]);
        assert_eq!(twice.len(), 1, "{twice:?}");
    }

    #[test]
    fn a_withdrawal_after_a_release_of_counts_is_found() {
        let shared = policy("shared", "none");
        let due = crate::stats::codes::composition_nats(600, 3);
        let counts = entry(1, &release("t1", vec![100, 200, 300], due, due));
        let w = WithdrawRecord {
            requested_by: "c".into(),
            requested_roles: vec!["custodian".into(), "organizer".into()],
            requested_at: "2026-01-01T00:00:01Z".into(),
            by: "c".into(),
            roles: vec!["custodian".into(), "organizer".into()],
            reason: "wrong settings".into(),
            at: "2026-01-01T00:00:01Z".into(),
        };
        let withdraw = Entry {
            kind: Kind::Withdraw.as_str().into(),
            body: serde_json::to_string(&w).unwrap(),
            seq: 2,
            ..counts.clone()
        };
        let entries = vec![counts, withdraw];
        let mut rp = Replayer::new(&shared, true).unwrap();
        let mut out = Vec::new();
        for (i, e) in entries.iter().enumerate() {
            let rec = Record::parse(e).unwrap();
            rp.step(&entries, i, &rec, &mut out, &mut |_| {});
        }
        assert!(
            out.iter()
                .any(|p| p.entry == 2 && p.problem.contains("class-counts")),
            "{out:?}"
        );
    }
}
