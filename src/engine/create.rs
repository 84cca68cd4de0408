//! Creating a holdout: checking the declaration and the labels, refusing overlaps, writing the
//! sealed labels and the genesis ledger entry in one transaction; and loading one back.

use std::collections::HashSet;

use rusqlite::{OptionalExtension, params};
use serde::{Deserialize, Serialize};
use serde_json::json;

use super::account::{HoldoutPolicy, PolicyInput};
use super::rows::{NewRows, Rows, TextArena, parse_stored};
use super::{Engine, Loaded, stored, unknown_holdout};
use crate::audit::family::Membership;
use crate::auth::{Caller, Role, check_name, rfc3339};
use crate::error::{Error, Result};
use crate::ledger;
use crate::metric::Metric;

/// One target of a holdout: a label column scored with a metric.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TargetDecl {
    /// Target name.
    pub name: String,
    /// Source column.
    pub column: String,
    /// Metric.
    pub metric: Metric,
    /// Interval method: exact, kl or hoeffding.
    pub method: String,
    /// Declared classes (public); empty for numeric labels.
    pub classes: Vec<String>,
}

/// Everything needed to create a holdout.
#[derive(Debug, Clone)]
pub struct CreateRequest {
    /// Name.
    pub name: String,
    /// Description.
    pub description: String,
    /// Policy as given.
    pub policy: PolicyInput,
    /// Targets, in column order.
    pub targets: Vec<TargetDecl>,
    /// Row ids.
    pub ids: Vec<String>,
    /// Label columns, one per target, aligned with `ids`.
    pub columns: Vec<Vec<String>>,
}

/// The declaration of a holdout whose rows come separately ([`NewRows`]).
#[derive(Debug, Clone)]
pub struct CreateHead {
    /// Name.
    pub name: String,
    /// Description.
    pub description: String,
    /// Policy as given.
    pub policy: PolicyInput,
    /// What is kept of each submitted prediction file (stated in the genesis entry).
    pub retention: super::Retention,
}

/// Membership asked for at creation: the holdout joins family `name`, its own delta being its
/// share of the family's total. The first member fixes the total (`total` must be given); later
/// members may omit it or must repeat it exactly.
#[derive(Debug, Clone, PartialEq)]
pub struct FamilyRequest {
    /// Family name (letters, digits, '-', '_' and '.', at most 64 characters).
    pub name: String,
    /// The family's total delta; required for the first member.
    pub total: Option<f64>,
}

/// Longest label value or row id quoted whole in an error message; longer ones are cut.
const QUOTE_MAX: usize = 40;

/// A value for an error message: quoted, cut after [`QUOTE_MAX`] characters with its length
/// stated, so a huge cell never comes back whole.
pub(super) fn quote(v: &str) -> String {
    if v.chars().count() <= QUOTE_MAX {
        format!("{v:?}")
    } else {
        let head: String = v.chars().take(QUOTE_MAX).collect();
        format!("{head:?}... ({} bytes)", v.len())
    }
}

/// Versions recorded in every genesis entry, so later binaries replay with the right rules.
pub(crate) fn versions() -> serde_json::Value {
    json!({
        "binary": env!("CARGO_PKG_VERSION"),
        "core": crate::stats::CORE_VERSION,
        "encoding": ledger::ENCODING,
    })
}

/// Longest holdout description: it is shown to every user and written to the ledger.
pub(crate) const MAX_DESCRIPTION_CHARS: usize = 4_000;

impl Engine {
    /// Creates a holdout (custodian).
    pub fn create_holdout(
        &mut self,
        caller: &Caller,
        req: CreateRequest,
    ) -> Result<super::HoldoutView> {
        self.create_family_member(caller, req, None)
    }

    /// Creates a holdout (custodian), as a member of a family when `family` is given: its own
    /// delta is then its share of the family's total, and a share that would make the members'
    /// shares sum past the total is refused with nothing stored.
    pub fn create_family_member(
        &mut self,
        caller: &Caller,
        req: CreateRequest,
        family: Option<FamilyRequest>,
    ) -> Result<super::HoldoutView> {
        self.create_expecting(caller, req, family, 1)
    }

    /// Creates a holdout that must afford at least `expect` answers: a policy that, on a fresh
    /// holdout, fits fewer within its tolerance at worst-case cost is refused before anything is
    /// stored (its rows and labels stay free for another create), as is a deadline already past.
    pub fn create_expecting(
        &mut self,
        caller: &Caller,
        req: CreateRequest,
        family: Option<FamilyRequest>,
        expect: u32,
    ) -> Result<super::HoldoutView> {
        self.create_keeping(caller, req, family, expect, super::Retention::Digests)
    }

    /// [`Engine::create_expecting`] with a retention of prediction files other than the
    /// default (digests only).
    pub fn create_keeping(
        &mut self,
        caller: &Caller,
        req: CreateRequest,
        family: Option<FamilyRequest>,
        expect: u32,
        retention: super::Retention,
    ) -> Result<super::HoldoutView> {
        let head = CreateHead {
            name: req.name,
            description: req.description,
            policy: req.policy,
            retention,
        };
        check_head(caller, &head, family.as_ref())?;
        if req.ids.is_empty() {
            return Err(Error::invalid("labels", "no label rows were sent"));
        }
        let mut rows = NewRows::new(req.targets, req.ids.len(), 0)?;
        if rows.targets().len() != req.columns.len() {
            return Err(Error::invalid(
                "labels",
                format!(
                    "{} targets but {} label columns",
                    rows.targets().len(),
                    req.columns.len()
                ),
            ));
        }
        let mut values: Vec<&str> = Vec::with_capacity(req.columns.len());
        for (i, id) in req.ids.iter().enumerate() {
            values.clear();
            for c in &req.columns {
                values.push(c.get(i).map_or("", String::as_str));
            }
            rows.push(id, &values)?;
        }
        drop(values);
        self.create_streamed(caller, head, rows, family, expect)
    }

    /// Creates a holdout from rows built as they arrived ([`NewRows`]: the gRPC stream adds
    /// each chunk as it comes), with the checks of [`Engine::create_expecting`]. The rows are
    /// sorted in place of a copy, digested, and written to the store as blobs; nothing of them
    /// is kept once the holdout is stored (it is loaded back compact).
    pub fn create_streamed(
        &mut self,
        caller: &Caller,
        head: CreateHead,
        rows: NewRows,
        family: Option<FamilyRequest>,
        expect: u32,
    ) -> Result<super::HoldoutView> {
        check_head(caller, &head, family.as_ref())?;
        if rows.is_empty() {
            return Err(Error::invalid("labels", "no label rows were sent"));
        }
        let n = rows.len();
        let policy = HoldoutPolicy::build(&head.policy, rows.targets().to_vec(), n as u64)?;
        if let Some(deadline) = policy.closes_at
            && deadline <= self.now()
        {
            return Err(Error::invalid(
                "closes_at",
                format!(
                    "{} is already past: the round would refuse every entry; nothing was sealed",
                    head.policy.closes_at
                ),
            ));
        }
        // Canonical order: rows sorted by id, so digests do not depend on file order.
        let sorted = rows.finish()?;
        // With one pool (no per-team shares) the fresh budget is everyone's: it must afford the
        // answers asked for. With a roster every declared team has an equal share of its own,
        // and each must afford them on a fresh holdout (the first team's stands for all).
        // On-arrival shares name no team in advance; `plan --teams` covers them.
        use crate::stats::schedule::Shares;
        let probe = match &policy.core.shares {
            Shares::None => Some((String::new(), "")),
            Shares::Roster { analysts, .. } => analysts
                .first()
                .map(|t| (t.clone(), " for each declared team")),
            Shares::OnArrival => None,
        };
        if let Some((team, whom)) = probe {
            let fresh = super::account::Book::new(&policy)?.budget(&policy, &team);
            let expect = u64::from(expect.max(1));
            if fresh.queries_left < expect {
                return Err(Error::invalid(
                    "policy",
                    format!(
                        "it affords {} answer{}{whom} within the tolerance {} at worst case \
                         on {n} rows, fewer than the {expect} expected; nothing was sealed and \
                         the labels stay free. Widen --tolerance, add rows, or pick a rule, \
                         schedule or shares that fit (`holdout plan --rows {n} --tolerance {}`)",
                        fresh.queries_left,
                        if fresh.queries_left == 1 { "" } else { "s" },
                        head.policy.tolerance,
                        head.policy.tolerance
                    ),
                ));
            }
        }
        let labels_digest = sorted.labels_digest();

        let now = self.now();
        let at = rfc3339(now);
        self.begin_write()?;
        let result = (|| -> Result<()> {
            let tx: &rusqlite::Connection = self.store.conn();
            let exists: Option<i64> = tx
                .query_row(
                    "SELECT id FROM holdouts WHERE name = ?1",
                    [&head.name],
                    |r| r.get(0),
                )
                .optional()?;
            if exists.is_some() {
                return Err(Error::AlreadyExists(format!(
                    "holdout {} already exists",
                    head.name
                )));
            }
            let same_labels: Option<String> = tx
                .query_row(
                    "SELECT name FROM holdouts WHERE labels_digest = ?1",
                    [&labels_digest],
                    |r| r.get(0),
                )
                .optional()?;
            if let Some(other) = same_labels {
                return Err(Error::AlreadyExists(format!(
                    "these labels are already sealed in holdout {other}: one set of rows gets one \
                     budget. Add label columns as targets of one holdout (--target), or carve \
                     row-disjoint holdouts with `holdout split`"
                )));
            }
            if let Some((id, other)) = stored::first_overlap(tx, &sorted)? {
                return Err(Error::AlreadyExists(format!(
                    "row id {id} already belongs to holdout {other}: overlapping rows would \
                     be charged twice against independent budgets. Use targets of one holdout \
                     for several label columns, or `holdout split` for row-disjoint holdouts"
                )));
            }
            let membership = match &family {
                Some(f) => Some(join_family(tx, f, policy.input.delta, &at)?),
                None => None,
            };
            let policy_json = serde_json::to_string(&policy)
                .map_err(|e| Error::Internal(format!("policy encoding: {e}")))?;
            tx.execute(
                "INSERT INTO holdouts (name, description, row_count, policy_json, targets_json,
                                       labels_digest, created_at, keep_predictions_days)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
                params![
                    head.name,
                    head.description,
                    n as i64,
                    policy_json,
                    serde_json::to_string(&policy.targets).unwrap_or_default(),
                    labels_digest,
                    at,
                    head.retention.days()
                ],
            )?;
            let holdout_id = tx.last_insert_rowid();
            if let Some(m) = &membership {
                tx.execute(
                    "INSERT INTO family_members (holdout_id, family, share) VALUES (?1, ?2, ?3)",
                    params![holdout_id, m.name, m.share],
                )?;
            }
            // The ids digest is computed while the ids are written (one pass over them).
            let ids_digest = stored::write_rows(tx, holdout_id, &sorted)?;
            let mut genesis = json!({
                "holdout": head.name,
                "description": head.description,
                "rows": n,
                "policy": serde_json::to_value(&policy).unwrap_or_default(),
                "declaration": {
                    "row_ids_sha256": ids_digest,
                    "targets": serde_json::to_value(&policy.targets).unwrap_or_default(),
                },
                "labels_sha256": labels_digest,
                "retention": head.retention.to_genesis(),
                "versions": versions(),
                "created_by": caller.name,
                "at": at,
            });
            // Additive: a genesis without a family (every one written before families existed)
            // reads as "no family".
            if let Some(m) = &membership {
                genesis["family"] = m.to_json();
            }
            self.append(&head.name, ledger::Kind::Genesis, &genesis, None)?;
            Ok(())
        })();
        // The rows are in the store: free them before the holdout is loaded back.
        drop(sorted);
        self.end_write(result)?;
        tracing::info!(holdout = %head.name, rows = n, by = %caller.name, "created holdout");
        self.holdout_view(caller, &head.name)
    }
}

/// The checks of a creation that need no rows: the caller's role, the name, the description's
/// length and the family's name and total.
fn check_head(caller: &Caller, head: &CreateHead, family: Option<&FamilyRequest>) -> Result<()> {
    caller.require("creating a holdout", &[Role::Custodian])?;
    check_name("holdout name", &head.name)?;
    let description_chars = head.description.chars().count();
    if description_chars > MAX_DESCRIPTION_CHARS {
        return Err(Error::invalid(
            "description",
            format!(
                "at most {MAX_DESCRIPTION_CHARS} characters, got {description_chars} (it is \
                 shown to every user and kept in the append-only ledger)"
            ),
        ));
    }
    if let Some(f) = family {
        check_name("family name", &f.name)?;
        if let Some(t) = f.total
            && !(t > 0.0 && t < 1.0)
        {
            return Err(Error::invalid(
                "family delta",
                format!("the family's total delta must lie in (0, 1), got {t}"),
            ));
        }
    }
    Ok(())
}

/// Joins (or founds) a family inside the creating transaction: checks the total against the
/// recorded one and that the shares, this one included, sum to at most the total (exactly).
fn join_family(
    tx: &rusqlite::Connection,
    f: &FamilyRequest,
    share: f64,
    at: &str,
) -> Result<Membership> {
    let recorded: Option<f64> = tx
        .query_row(
            "SELECT total_delta FROM families WHERE name = ?1",
            [&f.name],
            |r| r.get(0),
        )
        .optional()?;
    let total = match (recorded, f.total) {
        (None, None) => {
            return Err(Error::invalid(
                "family delta",
                format!(
                    "family {} does not exist yet: its first member fixes the family's total \
                     delta (give --family-delta TOTAL; each member's --delta is its share)",
                    f.name
                ),
            ));
        }
        (None, Some(t)) => {
            tx.execute(
                "INSERT INTO families (name, total_delta, created_at) VALUES (?1, ?2, ?3)",
                params![f.name, t, at],
            )?;
            t
        }
        (Some(r), None) => r,
        (Some(r), Some(t)) if r == t => r,
        (Some(r), Some(t)) => {
            return Err(Error::invalid(
                "family delta",
                format!(
                    "family {} has total delta {r}, fixed by its first member; {t} was given \
                     (omit --family-delta, or give exactly {r})",
                    f.name
                ),
            ));
        }
    };
    let mut shares: Vec<f64> = {
        let mut stmt = tx.prepare_cached("SELECT share FROM family_members WHERE family = ?1")?;
        stmt.query_map([&f.name], |r| r.get::<_, f64>(0))?
            .collect::<std::result::Result<_, _>>()?
    };
    let members = shares.len();
    shares.push(share);
    if !crate::audit::family::shares_fit(&shares, total) {
        let taken: f64 = shares[..members].iter().sum();
        return Err(Error::FailedPrecondition(format!(
            "family {} has total delta {total}; its {members} member(s) already hold shares \
             summing to {taken}, so a share (--delta) of {share} would sum past the total. \
             Nothing was stored. Give a smaller --delta (at most what is left, about {})",
            f.name,
            round_down((total - taken).max(0.0))
        )));
    }
    Ok(Membership {
        name: f.name.clone(),
        share,
        total,
    })
}

/// A positive number rounded down to 6 significant digits, for messages.
fn round_down(x: f64) -> f64 {
    if x <= 0.0 || !x.is_finite() {
        return 0.0;
    }
    let scale = 10f64.powi(5 - x.log10().floor() as i32);
    (x * scale).floor() / scale
}

/// Checks the declared targets (names, methods, classes) and fixes the classes of the
/// metrics that imply theirs.
pub(super) fn check_targets(targets: Vec<TargetDecl>) -> Result<Vec<TargetDecl>> {
    if targets.is_empty() {
        return Err(Error::invalid("targets", "declare at least one target"));
    }
    let mut seen = HashSet::new();
    let mut out = Vec::with_capacity(targets.len());
    for mut t in targets {
        check_name("target name", &t.name)?;
        if !seen.insert(t.name.clone()) {
            return Err(Error::invalid(
                "targets",
                format!("target {} is declared twice", t.name),
            ));
        }
        if t.method.is_empty() {
            t.method = t.metric.default_method().to_string();
        }
        match t.method.as_str() {
            "exact" if !t.metric.is_binary() => {
                return Err(Error::invalid(
                    format!("target {}", t.name),
                    format!(
                        "exact (Clopper-Pearson) intervals need a 0-1 loss; {} is not binary, \
                         use kl or hoeffding",
                        t.metric
                    ),
                ));
            }
            "exact" | "kl" | "hoeffding" => {}
            other => {
                return Err(Error::invalid(
                    format!("target {}", t.name),
                    format!("unknown interval method {other:?}; use exact, kl or hoeffding"),
                ));
            }
        }
        if let Some(fixed) = t.metric.fixed_classes() {
            t.classes = fixed;
        } else if t.metric.uses_classes() {
            // The label domain is a declaration: read from the labels, it would publish which
            // classes occur (a rare class that is absent, say) through everything built on it.
            if t.classes.is_empty() {
                return Err(Error::invalid(
                    format!("classes of target {}", t.name),
                    "an `error` target needs its declared classes: the label domain is public \
                     and must be stated, not read from the labels (CLI: --classes A,B,...; gRPC: \
                     Target.classes; Python: classes=[...])",
                ));
            }
            let mut uniq = HashSet::new();
            for c in &t.classes {
                if c.is_empty() || !uniq.insert(c) {
                    return Err(Error::invalid(
                        format!("classes of target {}", t.name),
                        "classes must be distinct and non-empty",
                    ));
                }
            }
        } else {
            t.classes.clear();
        }
        out.push(t);
    }
    Ok(out)
}

/// Loads a holdout's immutable facts.
pub(super) fn load(conn: &rusqlite::Connection, name: &str) -> Result<Loaded> {
    type Row = (i64, String, String, String, Option<u32>, Option<String>);
    let row: Option<Row> = conn
        .query_row(
            "SELECT id, description, created_at, policy_json, keep_predictions_days, shredded_at
             FROM holdouts WHERE name = ?1",
            [name],
            |r| {
                Ok((
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                ))
            },
        )
        .optional()?;
    let (id, description, created_at, policy_json, keep_days, shredded) =
        row.ok_or_else(|| unknown_holdout(name))?;
    let policy: HoldoutPolicy = serde_json::from_str(&policy_json)
        .map_err(|e| Error::Internal(format!("stored policy of {name}: {e}")))?;
    let ids = match stored::read_ids(conn, id)? {
        Some(ids) => ids,
        None => {
            // A holdout created before the blobs: one row per id.
            let mut ids = TextArena::default();
            let mut stmt =
                conn.prepare("SELECT row_id FROM holdout_rows WHERE holdout_id = ?1 ORDER BY pos")?;
            let mut q = stmt.query([id])?;
            while let Some(r) = q.next()? {
                let id = r
                    .get_ref(0)?
                    .as_str()
                    .map_err(|e| Error::Internal(format!("a stored row id: {e}")))?;
                ids.push(id)?;
            }
            ids
        }
    };
    let rows = Rows::new(ids);
    let mut labels = Vec::new();
    // Shredded labels are gone from the store; the holdout is closed and scores nothing.
    for (t, target) in policy
        .targets
        .iter()
        .enumerate()
        .filter(|_| shredded.is_none())
    {
        let (encoding, blob) = stored::read_labels(conn, id, t)?;
        labels.push(
            parse_stored(target, &encoding, &blob, &rows)
                .map_err(|m| Error::Internal(format!("stored labels of {name}: {m}")))?,
        );
    }
    let genesis_hash: String = conn.query_row(
        "SELECT hash FROM ledger WHERE chain = ?1 AND seq = 0",
        [name],
        |r| r.get(0),
    )?;
    Ok(Loaded {
        id,
        name: name.to_string(),
        description,
        created_at,
        policy,
        rows,
        labels,
        genesis_hash,
        keep_days,
    })
}
