//! Submitting predictions: validation against the public declaration, idempotency, the
//! refuse-or-charge decision, scoring, and the ledger append, all in one transaction.

use rusqlite::{OptionalExtension, params};

use super::account::{Quote, RefusalReason};
use super::records::{AnswerRecord, RefusalRecord};
use super::{Engine, Loaded};
use crate::auth::{Caller, Role, rfc3339};
use crate::error::{Error, Result};
use crate::ledger::{self, Entry};
use crate::metric::{self, Loss, Metric, Predictions};

/// What the caller asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SubmitMode {
    /// Score, charge, answer or refuse.
    Answer,
    /// Quote only; nothing scored or recorded.
    DryRun,
    /// Check against the public declaration only.
    Validate,
}

/// Prediction values as received.
#[derive(Debug, Clone, PartialEq)]
pub enum RawValues {
    /// Class names (metric `error`).
    Classes(Vec<String>),
    /// Classes as indices into the target's declared classes (metric `error`).
    ClassIndices(Vec<u32>),
    /// Numbers (every other metric).
    Numbers(Vec<f64>),
}

/// One model's predictions as received (any row order).
#[derive(Debug, Clone, PartialEq)]
pub struct ModelPredictions {
    /// Row ids.
    pub ids: Vec<String>,
    /// Values aligned with `ids`.
    pub values: RawValues,
}

/// A submission.
#[derive(Debug, Clone)]
pub struct SubmitRequest {
    /// Holdout name.
    pub holdout: String,
    /// Target name; empty for the only target.
    pub target: String,
    /// Mode.
    pub mode: SubmitMode,
    /// Client request id.
    pub request_id: Option<String>,
    /// Note.
    pub note: String,
    /// Refuse locally if the answer could cost more nats than this.
    pub max_cost_nats: Option<f64>,
    /// Display names of the models.
    pub model_names: Vec<String>,
    /// One entry per model (more than one only for best-of batches).
    pub models: Vec<ModelPredictions>,
    /// Sealed rounds: mark this entry as the team's selected one (else its last entry is).
    pub mark_final: bool,
}

/// What the analyst keeps of a ledger entry: the holdout, the team's own query number and the
/// entry's hash. Never the entry's salt (with it and the hash, anyone could test each of the n+1
/// possible exact scores, DESIGN 4.2 rule 6) and never the entry's position in the chain (under
/// `isolated` it would count other teams' queries, rule 7). The hash names the entry: an auditor
/// finds it in the export and recomputes it with the salt only the export holds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Receipt {
    /// Holdout.
    pub holdout: String,
    /// The query number of the answer or sealed entry as its team sees it (per team under
    /// `isolated`); 0 for a refusal, which has none.
    pub query: u64,
    /// Entry hash.
    pub entry_hash: String,
}

impl Receipt {
    pub(crate) fn of(e: &Entry, query: u64) -> Receipt {
        Receipt {
            holdout: e.chain.clone(),
            query,
            entry_hash: e.hash.clone(),
        }
    }
}

/// The result of a submission.
// Returned once per call and never stored in bulk, so a larger `Quote` variant costs nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Clone)]
pub enum SubmitOutcome {
    /// Answered (or answered again at no charge when `replayed`).
    Answer {
        /// The record, with exact losses removed.
        record: Box<AnswerRecord>,
        /// Receipt.
        receipt: Receipt,
        /// Whether this is a repeat of an earlier answer.
        replayed: bool,
    },
    /// Refused; `receipt` is None for a local max-cost refusal (not recorded).
    Refusal {
        /// The record.
        record: Box<RefusalRecord>,
        /// Receipt.
        receipt: Option<Receipt>,
    },
    /// Dry run.
    Quote {
        /// The quote.
        quote: Quote,
        /// Refusal reason if the query would be refused.
        would_refuse: Option<String>,
        /// Budget now.
        budget: super::BudgetView,
    },
    /// A sealed entry: its share is taken, nothing about its score is released until the
    /// round closes.
    Sealed {
        /// The record (it holds nothing about the score).
        record: Box<super::records::SealedRecord>,
        /// Receipt.
        receipt: Receipt,
        /// Whether this repeats an earlier entry (same predictions or request id): no charge.
        replayed: bool,
    },
    /// Validation.
    Validation {
        /// Rows per model.
        rows: u64,
        /// Digest.
        digest: String,
    },
}

impl Engine {
    /// Handles a submission.
    pub fn submit(&mut self, caller: &Caller, req: SubmitRequest) -> Result<SubmitOutcome> {
        let loaded = self.loaded(&req.holdout)?;
        let target_index = resolve_target(&loaded, &req.target)?;
        let target = &loaded.policy.targets[target_index];
        if req.mode != SubmitMode::Validate {
            caller.require("submitting predictions", &[Role::Analyst])?;
        }
        if req.models.is_empty() {
            return Err(Error::invalid("predictions", "no predictions were sent"));
        }
        if req.models.len() > 1 && !loaded.policy.allows_batches() {
            return Err(Error::invalid(
                "predictions",
                format!(
                    "a batch of {} models needs a best-of holdout; this one answers with {}",
                    req.models.len(),
                    loaded.policy.answers_spec()
                ),
            ));
        }
        let mut preds = Vec::with_capacity(req.models.len());
        for (m, model) in req.models.iter().enumerate() {
            let label = req
                .model_names
                .get(m)
                .cloned()
                .unwrap_or_else(|| format!("model {m}"));
            preds.push(join(
                &loaded,
                &target.metric,
                &target.classes,
                model,
                &label,
            )?);
        }
        let digest = crate::audit::predictions_digest(&target.name, &target.classes, &preds);
        if req.mode == SubmitMode::Validate {
            return Ok(SubmitOutcome::Validation {
                rows: loaded.rows.len() as u64,
                digest,
            });
        }
        self.settle(&loaded)?;
        if let Some(at) = self.closed_at(loaded.id)? {
            let what = if self.withdrawn_at(loaded.id)?.is_some() {
                "withdrawn"
            } else {
                "closed"
            };
            return Err(Error::FailedPrecondition(format!(
                "holdout {} was {what} at {at} and answers no more queries",
                loaded.name
            )));
        }
        let models = req.models.len() as u32;
        let team = caller.team.clone();

        if req.mode == SubmitMode::DryRun {
            let book = self.book(&loaded)?;
            let budget = book.budget(&loaded.policy, &team);
            let quote = book.quote(&loaded.policy, &team, target_index, models);
            return Ok(match quote {
                Ok(q) => SubmitOutcome::Quote {
                    quote: q,
                    would_refuse: self.quota_refusal(&loaded, &book, &team)?.map(|(r, _)| r),
                    budget,
                },
                Err(r) => SubmitOutcome::Quote {
                    quote: book.quote_ignoring_limits(&loaded.policy, &team, target_index, models),
                    would_refuse: Some(r.code().to_string()),
                    budget,
                },
            });
        }

        let sample = super::probe::sample(&preds[0], self.probes.settings.max_rows);
        let outcome = if loaded.policy.sealed() {
            self.seal_entry(caller, &loaded, &req, target_index, &preds[0], digest)
        } else {
            self.answer_in_tx(caller, &loaded, &req, target_index, preds, digest, models)
        }?;
        // A recorded submission (not a replay, not a refusal) moves the team's probing run.
        if matches!(
            outcome,
            SubmitOutcome::Answer {
                replayed: false,
                ..
            } | SubmitOutcome::Sealed {
                replayed: false,
                ..
            }
        ) {
            self.probes.observe_sample(&loaded.name, &team, sample);
        }
        Ok(outcome)
    }

    #[allow(clippy::too_many_arguments)]
    fn answer_in_tx(
        &mut self,
        caller: &Caller,
        loaded: &Loaded,
        req: &SubmitRequest,
        target_index: usize,
        preds: Vec<Predictions>,
        digest: String,
        models: u32,
    ) -> Result<SubmitOutcome> {
        let team = caller.team.clone();
        let scope = if loaded.policy.isolated() {
            team.clone()
        } else {
            String::new()
        };
        let now = self.now();
        let at = rfc3339(now);
        // Take the write lock before reading anything the decision depends on.
        self.begin_write()?;
        let outcome = (|| -> Result<(SubmitOutcome, Option<(u64, super::account::Book)>)> {
            // Idempotency: the request id is scoped to the team and tied to the digest.
            if let Some(rid) = &req.request_id {
                let known: Option<(String, i64)> = self
                    .store
                    .conn()
                    .query_row(
                        "SELECT digest, seq FROM request_keys
                         WHERE holdout_id = ?1 AND team = ?2 AND request_id = ?3",
                        params![loaded.id, team, rid],
                        |r| Ok((r.get(0)?, r.get(1)?)),
                    )
                    .optional()?;
                if let Some((d, seq)) = known {
                    if d != digest {
                        return Err(Error::FailedPrecondition(format!(
                            "request id {rid} was already used with different predictions; a \
                             retry must send the same file, a new query needs a new id"
                        )));
                    }
                    return Ok((self.replay_answer(loaded, seq as u64)?, None));
                }
            }
            // An identical prediction vector is answered again from the ledger at no charge.
            let seen: Option<i64> = self
                .store
                .conn()
                .query_row(
                    "SELECT seq FROM answered_digests
                     WHERE holdout_id = ?1 AND target = ?2 AND scope = ?3 AND digest = ?4",
                    params![loaded.id, target_index as i64, scope, digest],
                    |r| r.get(0),
                )
                .optional()?;
            if let Some(seq) = seen {
                match self.replay_kind(loaded, &team, target_index, &digest, seq as u64)? {
                    ReplayKind::Entry(seq) => {
                        self.remember_request(loaded, &team, req, &digest, seq)?;
                        return Ok((self.replay_answer(loaded, seq)?, None));
                    }
                    ReplayKind::Adopt(src_seq, src, cell) => {
                        return self.adopt_in_tx(
                            caller,
                            loaded,
                            req,
                            (src_seq, &src, cell),
                            &digest,
                            &at,
                        );
                    }
                    // Another team's file that does not fix this team's ladder: a charged
                    // ladder query of this team, below.
                    ReplayKind::Charge => {}
                }
            }

            let mut book = self.book(loaded)?;
            let target_name = loaded.policy.targets[target_index].name.clone();
            let refusal = |reason: String, message: String, budget| RefusalRecord {
                holdout: loaded.name.clone(),
                target: target_name.clone(),
                user: caller.name.clone(),
                team: team.clone(),
                reason,
                message,
                request_id: req.request_id.clone(),
                note: req.note.clone(),
                at: at.clone(),
                budget,
            };
            let budget_now = book.budget(&loaded.policy, &team);
            if let Some((reason, message)) = self.quota_refusal(loaded, &book, &team)? {
                return self.record_refusal(
                    loaded,
                    &mut book,
                    refusal(reason, message, budget_now),
                );
            }
            let quote = match book.quote(&loaded.policy, &team, target_index, models) {
                Ok(q) => q,
                Err(r) => {
                    let (code, msg) = (r.code().to_string(), r.to_string());
                    return self.record_refusal(loaded, &mut book, refusal(code, msg, budget_now));
                }
            };
            if let Some(max) = req.max_cost_nats
                && quote.worst_code_nats > max
            {
                let r = refusal(
                    RefusalReason::MaxCost.code().into(),
                    format!(
                        "this answer could cost up to {:.3} nats of transcript, more than \
                             --max-cost {max}; nothing was charged or recorded",
                        quote.worst_code_nats
                    ),
                    budget_now,
                );
                return Ok((
                    SubmitOutcome::Refusal {
                        record: Box::new(r),
                        receipt: None,
                    },
                    None,
                ));
            }
            // A target whose metric needs class counts releases them first, once per
            // transcript: a coded, charged entry of its own (DESIGN 4.8). The quote above
            // already included their code and decided from public facts alone that the query
            // is answered; nothing before this point shows the counts.
            let quote = if book.counts_pending(&team, target_index).is_some() {
                self.release_counts(loaded, &mut book, &team, target_index, &at)?;
                book.quote(&loaded.policy, &team, target_index, models)
                    .map_err(|r| {
                        Error::Internal(format!("the quote changed with the class counts: {r}"))
                    })?
            } else {
                quote
            };
            // Only now, with the charge decided from public facts, is anything scored.
            let target = &loaded.policy.targets[target_index];
            let losses: Vec<Loss> = preds
                .iter()
                .map(|p| metric::score(&target.metric, &loaded.labels[target_index], p))
                .collect::<Result<_>>()?;
            let core = book.answer(&loaded.policy, &team, target_index, &quote, &losses)?;
            book.count_quota(&team, &super::replay::day_of(&at));
            let budget = book.budget(&loaded.policy, &team);
            let record = AnswerRecord {
                holdout: loaded.name.clone(),
                target: target.name.clone(),
                target_index,
                user: caller.name.clone(),
                team: team.clone(),
                query: core.query,
                symbol: core.symbol,
                score: core.score,
                lower: core.lower,
                upper: core.upper,
                delta_i: core.delta_i,
                level_nats: core.level_nats,
                code_nats: core.code_nats,
                statement: core.statement,
                best_model: core.best_model,
                models,
                model_names: req.model_names.clone(),
                digest: digest.clone(),
                request_id: req.request_id.clone(),
                note: req.note.clone(),
                at: at.clone(),
                budget,
                core: core.core,
                exact: Some(losses),
            };
            let body = serde_json::to_value(&record)
                .map_err(|e| Error::Internal(format!("answer encoding: {e}")))?;
            let entry = self.append(&loaded.name, ledger::Kind::Answer, &body, None)?;
            self.keep_predictions(loaded, entry.seq, &target.name, &digest, &at, &preds)?;
            let conn = self.store.conn();
            conn.execute(
                "INSERT OR IGNORE INTO answered_digests (holdout_id, target, scope, digest, seq)
                 VALUES (?1, ?2, ?3, ?4, ?5)",
                params![
                    loaded.id,
                    target_index as i64,
                    scope,
                    digest,
                    entry.seq as i64
                ],
            )?;
            self.remember_request(loaded, &team, req, &digest, entry.seq)?;
            let mut shown = record;
            shown.exact = None;
            let receipt = Receipt::of(&entry, shown.query);
            Ok((
                SubmitOutcome::Answer {
                    record: Box::new(shown),
                    receipt,
                    replayed: false,
                },
                Some((entry.seq, book)),
            ))
        })();
        self.finish_write(&loaded.name, outcome)
    }

    /// Releases `target_index`'s class counts to `team`'s transcript (the holdout's under
    /// `shared`) and records the release (entry kind `class-counts`), inside the open write.
    pub(super) fn release_counts(
        &mut self,
        loaded: &Loaded,
        book: &mut super::account::Book,
        team: &str,
        target_index: usize,
        at: &str,
    ) -> Result<()> {
        let target = &loaded.policy.targets[target_index];
        let labels = loaded.labels.get(target_index).ok_or_else(|| {
            Error::FailedPrecondition(format!("the labels of holdout {} are gone", loaded.name))
        })?;
        let counts = metric::class_counts(labels, &target.classes);
        let rel = book.release_counts(team, target_index, &counts)?;
        let record = super::replay::ClassCountsRecord {
            holdout: loaded.name.clone(),
            target: target.name.clone(),
            target_index,
            team: team.to_string(),
            classes: target.classes.clone(),
            counts,
            code_nats: rel.code_nats,
            transcript_nats: rel.transcript_nats,
            at: at.to_string(),
        };
        let body = serde_json::to_value(&record)
            .map_err(|e| Error::Internal(format!("class counts encoding: {e}")))?;
        self.append(&loaded.name, ledger::Kind::ClassCounts, &body, None)?;
        Ok(())
    }

    /// What an identical prediction vector, already answered at entry `seq`, gets. Core 1,
    /// or any rule but a ladder under `shared`: that answer again, free. Core 2 ladder under
    /// `shared`, when `seq` was another team's (DESIGN 4.8): this team's own earlier entry for
    /// the file if it has one; else a free adoption when the released symbol fixes this team's
    /// ladder; else a charged ladder query of this team.
    fn replay_kind(
        &mut self,
        loaded: &Loaded,
        team: &str,
        target_index: usize,
        digest: &str,
        seq: u64,
    ) -> Result<ReplayKind> {
        let policy = &loaded.policy;
        if policy.core.core_version < 2
            || !matches!(policy.core.rule, crate::stats::rules::Rule::Ladder(_))
            || policy.isolated()
        {
            return Ok(ReplayKind::Entry(seq));
        }
        let body: String = self.store.conn().query_row(
            "SELECT body FROM ledger WHERE chain = ?1 AND seq = ?2",
            params![loaded.name, seq as i64],
            |r| r.get(0),
        )?;
        let src: AnswerRecord = serde_json::from_str(&body)
            .map_err(|e| Error::Internal(format!("stored answer {seq}: {e}")))?;
        if src.team == team {
            return Ok(ReplayKind::Entry(seq));
        }
        let own: Option<i64> = self
            .store
            .conn()
            .query_row(
                "SELECT seq FROM ledger WHERE chain = ?1 AND kind IN (?5, ?6)
                 AND json_extract(body, '$.team') = ?2 AND json_extract(body, '$.digest') = ?3
                 AND json_extract(body, '$.target_index') = ?4 ORDER BY seq LIMIT 1",
                params![
                    loaded.name,
                    team,
                    digest,
                    target_index as i64,
                    ledger::Kind::Answer.as_str(),
                    ledger::Kind::Adopt.as_str()
                ],
                |r| r.get(0),
            )
            .optional()?;
        if let Some(own) = own {
            return Ok(ReplayKind::Entry(own as u64));
        }
        let book = self.book(loaded)?;
        Ok(match book.adoptable(team, &src) {
            Some(cell) => ReplayKind::Adopt(seq, Box::new(src), cell),
            None => ReplayKind::Charge,
        })
    }

    /// Records a free adoption (entry kind `adopt`) of another team's answered file as this
    /// team's new best, and answers with it.
    fn adopt_in_tx(
        &mut self,
        caller: &Caller,
        loaded: &Loaded,
        req: &SubmitRequest,
        (src_seq, src, cell): (u64, &AnswerRecord, u64),
        digest: &str,
        at: &str,
    ) -> Result<(SubmitOutcome, Option<(u64, super::account::Book)>)> {
        let team = caller.team.clone();
        let mut book = self.book(loaded)?;
        let core = book.adopt(&loaded.policy, &team, src_seq, src, cell)?;
        let budget = book.budget(&loaded.policy, &team);
        let record = AnswerRecord {
            holdout: loaded.name.clone(),
            target: src.target.clone(),
            target_index: src.target_index,
            user: caller.name.clone(),
            team: team.clone(),
            query: core.query,
            symbol: core.symbol,
            score: core.score,
            lower: core.lower,
            upper: core.upper,
            delta_i: core.delta_i,
            level_nats: core.level_nats,
            code_nats: core.code_nats,
            statement: core.statement,
            best_model: None,
            models: 1,
            model_names: req.model_names.clone(),
            digest: digest.to_string(),
            request_id: req.request_id.clone(),
            note: req.note.clone(),
            at: at.to_string(),
            budget,
            core: core.core,
            exact: None,
        };
        let body = serde_json::to_value(&record)
            .map_err(|e| Error::Internal(format!("adoption encoding: {e}")))?;
        let entry = self.append(&loaded.name, ledger::Kind::Adopt, &body, None)?;
        self.remember_request(loaded, &team, req, digest, entry.seq)?;
        let receipt = Receipt::of(&entry, record.query);
        Ok((
            SubmitOutcome::Answer {
                record: Box::new(record),
                receipt,
                replayed: true,
            },
            Some((entry.seq, book)),
        ))
    }

    pub(super) fn record_refusal(
        &mut self,
        loaded: &Loaded,
        book: &mut super::account::Book,
        record: RefusalRecord,
    ) -> Result<(SubmitOutcome, Option<(u64, super::account::Book)>)> {
        book.note_refusal(&loaded.policy, &record.team);
        let body = serde_json::to_value(&record)
            .map_err(|e| Error::Internal(format!("refusal encoding: {e}")))?;
        let entry = ledger::append(
            self.store.conn(),
            &loaded.name,
            ledger::Kind::Refusal,
            &body,
        )?;
        let mut record = record;
        record.budget = book.budget(&loaded.policy, &record.team);
        Ok((
            SubmitOutcome::Refusal {
                record: Box::new(record),
                receipt: Some(Receipt::of(&entry, 0)),
            },
            Some((entry.seq, book.clone())),
        ))
    }

    fn remember_request(
        &mut self,
        loaded: &Loaded,
        team: &str,
        req: &SubmitRequest,
        digest: &str,
        seq: u64,
    ) -> Result<()> {
        if let Some(rid) = &req.request_id {
            self.store.conn().execute(
                "INSERT OR IGNORE INTO request_keys (holdout_id, team, request_id, digest, seq)
                 VALUES (?1, ?2, ?3, ?4, ?5)",
                params![loaded.id, team, rid, digest, seq as i64],
            )?;
        }
        Ok(())
    }

    fn replay_answer(&mut self, loaded: &Loaded, seq: u64) -> Result<SubmitOutcome> {
        let (body, hash): (String, String) = self.store.conn().query_row(
            "SELECT body, hash FROM ledger WHERE chain = ?1 AND seq = ?2",
            params![loaded.name, seq as i64],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )?;
        let mut record: AnswerRecord = serde_json::from_str(&body)
            .map_err(|e| Error::Internal(format!("stored answer {seq}: {e}")))?;
        record.exact = None;
        let receipt = Receipt {
            holdout: loaded.name.clone(),
            query: record.query,
            entry_hash: hash,
        };
        Ok(SubmitOutcome::Answer {
            record: Box::new(record),
            receipt,
            replayed: true,
        })
    }

    /// A quota refusal, decided from public facts (the team's answers today), if any.
    pub(super) fn quota_refusal(
        &mut self,
        loaded: &Loaded,
        book: &super::account::Book,
        team: &str,
    ) -> Result<Option<(String, String)>> {
        let quota = loaded.policy.daily_quota;
        if quota == 0 {
            return Ok(None);
        }
        let now = self.now();
        let used = book.quota_used(team, &super::replay::day_of(&rfc3339(now)));
        if used < u64::from(quota) {
            return Ok(None);
        }
        let reset = next_midnight(now);
        Ok(Some((
            RefusalReason::Quota.code().into(),
            format!(
                "team {team} has used its {quota} queries for today (UTC); the quota resets at {}",
                rfc3339(reset)
            ),
        )))
    }
}

/// How a repeated prediction vector is answered (see `Engine::replay_kind`).
enum ReplayKind {
    /// The answer at this entry again, free.
    Entry(u64),
    /// Adopt this cell of the answer at this entry (another team's), free.
    Adopt(u64, Box<AnswerRecord>, u64),
    /// A charged query of the sender.
    Charge,
}

/// Start of the next UTC day.
pub(crate) fn next_midnight(now: chrono::DateTime<chrono::Utc>) -> chrono::DateTime<chrono::Utc> {
    let tomorrow = now.date_naive().succ_opt().unwrap_or(now.date_naive());
    tomorrow
        .and_hms_opt(0, 0, 0)
        .map(|t| t.and_utc())
        .unwrap_or(now)
}

fn resolve_target(loaded: &Loaded, target: &str) -> Result<usize> {
    let targets = &loaded.policy.targets;
    if target.is_empty() {
        if targets.len() == 1 {
            return Ok(0);
        }
        let names: Vec<&str> = targets.iter().map(|t| t.name.as_str()).collect();
        return Err(Error::invalid(
            "target",
            format!(
                "holdout {} has several targets; choose one of {}",
                loaded.name,
                names.join(", ")
            ),
        ));
    }
    targets
        .iter()
        .position(|t| t.name == target)
        .ok_or_else(|| Error::not_found("target", format!("{target} (holdout {})", loaded.name)))
}

/// Joins predictions to the holdout's row order, checking them against the public declaration
/// only: every declared id exactly once, no other id, values in the declared domain.
fn join(
    loaded: &Loaded,
    metric: &Metric,
    classes: &[String],
    model: &ModelPredictions,
    label: &str,
) -> Result<Predictions> {
    let n = loaded.rows.len();
    let given = match &model.values {
        RawValues::Classes(v) => v.len(),
        RawValues::ClassIndices(v) => v.len(),
        RawValues::Numbers(v) => v.len(),
    };
    if given != model.ids.len() {
        return Err(Error::invalid(
            label,
            format!("{} ids but {given} values", model.ids.len()),
        ));
    }
    if model.ids.is_empty() {
        return Err(Error::invalid(label, "no prediction rows"));
    }
    let slot = slots(loaded, model, label)?;
    // The file row that predicts holdout row `r`.
    let row = |r: usize| slot.as_ref().map_or(r, |s| s[r] as usize);
    let wrong_kind = |expects: &str, got: &str| {
        Err(Error::invalid(
            label,
            format!("metric {metric} expects {expects}, not {got}"),
        ))
    };
    match (&model.values, metric.uses_classes()) {
        (RawValues::Classes(v), true) => {
            let index: std::collections::HashMap<&str, u32> = classes
                .iter()
                .enumerate()
                .map(|(i, c)| (c.as_str(), i as u32))
                .collect();
            let mut out = Vec::with_capacity(n);
            for r in 0..n {
                let s = row(r);
                let raw = v[s].trim();
                let c = *index.get(raw).ok_or_else(|| {
                    Error::invalid(
                        format!("{label}, row id {}", model.ids[s]),
                        format!("{raw:?} is not a declared class ({})", classes.join(",")),
                    )
                })?;
                out.push(c);
            }
            Ok(Predictions::Classes(out))
        }
        (RawValues::ClassIndices(v), true) => {
            let mut out = Vec::with_capacity(n);
            for r in 0..n {
                let s = row(r);
                let c = v[s];
                if c as usize >= classes.len() {
                    return Err(Error::invalid(
                        format!("{label}, row id {}", model.ids[s]),
                        format!(
                            "class index {c} is outside the {} declared classes ({})",
                            classes.len(),
                            classes.join(",")
                        ),
                    ));
                }
                out.push(c);
            }
            Ok(Predictions::Classes(out))
        }
        (RawValues::Numbers(v), false) => {
            let mut out = Vec::with_capacity(n);
            for r in 0..n {
                let s = row(r);
                let x = v[s];
                metric::check_number(metric, x)
                    .map_err(|m| Error::invalid(format!("{label}, row id {}", model.ids[s]), m))?;
                out.push(x);
            }
            Ok(Predictions::Numbers(out))
        }
        (RawValues::Numbers(_), true) => wrong_kind("class names", "numbers"),
        (RawValues::Classes(_) | RawValues::ClassIndices(_), false) => {
            wrong_kind("numbers", "class names")
        }
    }
}

/// Which file row predicts each holdout row: `None` when the file lists exactly the declared
/// ids in the declared order (the usual case: files are made from `holdout ids`), found by one
/// comparison per row; else through the hash index of the declared ids.
///
/// # Errors
/// An id the holdout does not have, an id predicted twice, and a missing row (the first in
/// the declared order, with how many are missing).
fn slots(loaded: &Loaded, model: &ModelPredictions, label: &str) -> Result<Option<Vec<u32>>> {
    let n = loaded.rows.len();
    if model.ids.len() == n
        && model
            .ids
            .iter()
            .zip(loaded.rows.iter())
            .all(|(given, declared)| given.trim() == declared)
    {
        return Ok(None);
    }
    let mut slot: Vec<u32> = vec![u32::MAX; n];
    for (i, id) in model.ids.iter().enumerate() {
        let pos = loaded.rows.position(id.trim()).ok_or_else(|| {
            Error::invalid(
                format!("{label}, row id {id}"),
                format!("not a row of holdout {} (see `holdout ids`)", loaded.name),
            )
        })? as usize;
        if slot[pos] != u32::MAX {
            return Err(Error::invalid(
                format!("{label}, row id {id}"),
                "predicted more than once",
            ));
        }
        slot[pos] = i as u32;
    }
    if let Some(missing) = slot.iter().position(|s| *s == u32::MAX) {
        let count = slot.iter().filter(|s| **s == u32::MAX).count();
        return Err(Error::invalid(
            format!("{label}, row id {}", loaded.rows.id(missing)),
            format!("missing: every row needs a prediction ({count} missing)"),
        ));
    }
    Ok(Some(slot))
}
