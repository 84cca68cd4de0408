//! Certificates of one answer from an export and a signed checkpoint alone (no daemon).
//!
//! [`certify`] checks that the checkpoint anchors the export (its signature, and that the
//! export's chain, intact, still holds the checkpointed head: the audit's own check), reads the
//! policy from the genesis entry, and finds the entry to certify by its team's query number or
//! by the hash a receipt names. Every kind of answer is found: a charged `answer`, a free
//! `adopt`ion, and a `sealed` entry, whose answer is in the `round` entry that closed its round
//! (in ticket order). Only what the checkpoint anchors is certified: an entry after its head is
//! refused, and a sealed entry whose round closed after it is certified as sealed and
//! unanswered.
//!
//! What comes back holds the certified team's own records only, with exact losses and the
//! core's own record removed, so no rendering of it can show an exact score, a salt, or
//! anything of another team.

use super::Finding;
use super::check::{checkpoint_problems, genesis_policy};
use super::export::Export;
use crate::audit::anchor::Checkpoint;
use crate::engine::{AnswerRecord, HoldoutPolicy, Record, SealedRecord};
use crate::error::Error;
use crate::ledger;

/// Which entry to certify.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Which {
    /// The answer (or sealed entry) with this query number, of this team when given (isolated
    /// holdouts number each team's queries separately).
    Query {
        /// Query number.
        query: u64,
        /// Team.
        team: Option<String>,
    },
    /// The entry a receipt names by its hash.
    Entry(String),
}

/// Why a certificate was not made.
#[derive(Debug, thiserror::Error)]
pub enum Refused {
    /// The checkpoint does not anchor the export, or the export itself does not verify:
    /// nothing in it can be certified.
    #[error(
        "this export cannot be certified against this checkpoint (run `holdout audit` on it): {}",
        .0.join("; ")
    )]
    Untrusted(Vec<String>),
    /// Anything else: not found, ambiguous, past the checkpoint.
    #[error(transparent)]
    Other(#[from] Error),
}

/// The answer a round gave a sealed entry.
#[derive(Debug, Clone)]
pub struct RoundAnswer {
    /// The answer (exact losses and the core's record removed).
    pub answer: AnswerRecord,
    /// Hash of the round entry.
    pub entry_hash: String,
    /// When the round closed.
    pub at: String,
    /// `deadline` or `organizer`.
    pub trigger: String,
}

/// What a certificate is about.
#[derive(Debug, Clone)]
pub enum Subject {
    /// A charged answer.
    Answer(Box<AnswerRecord>),
    /// A free adoption of an answer another team got for the same file (core 2 ladders).
    Adoption(Box<AnswerRecord>),
    /// A sealed entry of a final round.
    Sealed {
        /// The sealed entry (its charge; nothing about its score).
        sealed: Box<SealedRecord>,
        /// Its answer, when its round closed at or before the checkpoint's head.
        round: Option<Box<RoundAnswer>>,
        /// Whether its round closed, but after the checkpoint's head (so it is not anchored).
        closed_after_checkpoint: bool,
    },
}

/// Everything a certificate states, checked against the checkpoint.
#[derive(Debug, Clone)]
pub struct Certified {
    /// Holdout.
    pub holdout: String,
    /// The policy recorded in the genesis entry.
    pub policy: HoldoutPolicy,
    /// The checkpoint that anchors the entry.
    pub checkpoint: Checkpoint,
    /// The certified entry's hash (its receipt names it).
    pub entry_hash: String,
    /// Its query number as its team sees it (0 for an adoption, which has none of its own).
    pub query: u64,
    /// What is certified.
    pub subject: Subject,
}

impl Certified {
    /// The certified team.
    pub fn team(&self) -> &str {
        match &self.subject {
            Subject::Answer(r) | Subject::Adoption(r) => &r.team,
            Subject::Sealed { sealed, .. } => &sealed.team,
        }
    }

    /// The released answer, if there is one (none for a sealed entry not yet answered).
    pub fn answer(&self) -> Option<&AnswerRecord> {
        match &self.subject {
            Subject::Answer(r) | Subject::Adoption(r) => Some(r),
            Subject::Sealed { round, .. } => round.as_ref().map(|r| &r.answer),
        }
    }
}

/// A record as a certificate may carry it: without exact losses or the core's own record.
fn public(mut r: AnswerRecord) -> AnswerRecord {
    r.exact = None;
    r.core = crate::engine::CoreJson::null();
    r
}

/// Why an export and a checkpoint cannot be trusted together, or the policy they hold.
fn anchored(
    export: &Export,
    cp: &Checkpoint,
    trusted_key: Option<&str>,
) -> Result<HoldoutPolicy, Refused> {
    let name = export.header.holdout.as_str();
    let mut problems = Vec::new();
    if cp.holdout != name {
        problems.push(format!(
            "the checkpoint is of {}, the export of {name}; certify needs a checkpoint of {name}",
            cp.holdout
        ));
    } else {
        for (field, why) in checkpoint_problems(export, cp, trusted_key) {
            problems.push(format!("checkpoint {field}: {why}"));
        }
    }
    for f in ledger::verify_chain(&export.entries) {
        problems.push(format!("entry {}: {}", f.seq, f.problem));
    }
    for e in export.entries.iter().filter(|e| e.chain != name) {
        problems.push(format!("entry {} belongs to chain {:?}", e.seq, e.chain));
    }
    let mut findings: Vec<Finding> = Vec::new();
    let policy = genesis_policy(export, &mut findings);
    problems.extend(findings.iter().map(ToString::to_string));
    match policy {
        Some((policy, _)) if problems.is_empty() => Ok(policy),
        _ => {
            if problems.is_empty() {
                problems.push("the genesis entry is unreadable".into());
            }
            Err(Refused::Untrusted(problems))
        }
    }
}

/// One entry that could be the one to certify.
struct Candidate {
    seq: u64,
    hash: String,
    subject: Subject,
}

/// Certifies one entry of `export`, anchored by `cp` (signed by `trusted_key` when given).
///
/// # Errors
/// [`Refused::Untrusted`] when the checkpoint does not verify or does not anchor the export,
/// the export's chain does not verify, or its genesis entry does not check; otherwise not found,
/// ambiguous (several teams' queries share the number: name the team), or recorded after the
/// checkpoint's head.
pub fn certify(
    export: &Export,
    cp: &Checkpoint,
    which: &Which,
    trusted_key: Option<&str>,
) -> Result<Certified, Refused> {
    let policy = anchored(export, cp, trusted_key)?;
    let name = export.header.holdout.clone();
    let head = cp.seq;
    let wanted = |hash: &str, team: &str, query: u64| match which {
        Which::Entry(h) => h.eq_ignore_ascii_case(hash),
        Which::Query { query: q, team: t } => *q == query && t.as_deref().is_none_or(|t| t == team),
    };
    let mut found: Vec<Candidate> = Vec::new();
    // Sealed entries waiting for their round, each with its place in `found` when wanted.
    let mut pending: Vec<(SealedRecord, Option<usize>)> = Vec::new();
    for e in &export.entries {
        let rec = match Record::parse(e) {
            Ok(r) => r,
            // Entries past the checkpoint are not certified; one this binary cannot read
            // before it could hide the round that answers a sealed entry.
            Err(_) if e.seq > head => continue,
            Err(why) => {
                return Err(Refused::Untrusted(vec![format!("entry {}: {why}", e.seq)]));
            }
        };
        match rec {
            Record::Answer(r) if wanted(&e.hash, &r.team, r.query) => found.push(Candidate {
                seq: e.seq,
                hash: e.hash.clone(),
                subject: Subject::Answer(Box::new(public(*r))),
            }),
            Record::Adopt(r) if wanted(&e.hash, &r.team, r.query) => found.push(Candidate {
                seq: e.seq,
                hash: e.hash.clone(),
                subject: Subject::Adoption(Box::new(public(*r))),
            }),
            Record::Sealed(s) => {
                let at = wanted(&e.hash, &s.team, s.query).then(|| {
                    found.push(Candidate {
                        seq: e.seq,
                        hash: e.hash.clone(),
                        subject: Subject::Sealed {
                            sealed: s.clone(),
                            round: None,
                            closed_after_checkpoint: false,
                        },
                    });
                    found.len() - 1
                });
                pending.push((*s, at));
            }
            Record::Round(r) => {
                let sealed = std::mem::take(&mut pending);
                if !sealed.iter().any(|(_, at)| at.is_some()) {
                    continue;
                }
                if r.answers.len() != sealed.len() {
                    return Err(Refused::Untrusted(vec![format!(
                        "entry {}: the round answers {} entries, {} were sealed",
                        e.seq,
                        r.answers.len(),
                        sealed.len()
                    )]));
                }
                for ((s, at), a) in sealed.iter().zip(&r.answers) {
                    let Some(at) = *at else { continue };
                    if a.team != s.team
                        || a.query != s.query
                        || a.digest != s.digest
                        || a.target_index != s.target_index
                    {
                        return Err(Refused::Untrusted(vec![format!(
                            "entry {}: the round's answer for the sealed entry of team {} query \
                             {} names another entry",
                            e.seq, s.team, s.query
                        )]));
                    }
                    if let Subject::Sealed {
                        round,
                        closed_after_checkpoint,
                        ..
                    } = &mut found[at].subject
                    {
                        if e.seq <= head {
                            *round = Some(Box::new(RoundAnswer {
                                answer: public(a.clone()),
                                entry_hash: e.hash.clone(),
                                at: r.at.clone(),
                                trigger: r.trigger.clone(),
                            }));
                        } else {
                            *closed_after_checkpoint = true;
                        }
                    }
                }
            }
            _ => {}
        }
    }
    let what = match which {
        Which::Query { query, team } => match team {
            Some(t) => format!("{query} of team {t} in holdout {name}"),
            None => format!("{query} of holdout {name}"),
        },
        Which::Entry(h) => format!("entry {h} of holdout {name}"),
    };
    let chosen = match found.len() {
        0 => {
            return Err(Error::not_found(
                if matches!(which, Which::Entry(_)) {
                    "answer"
                } else {
                    "query"
                },
                format!("{what} (no answer, adoption or sealed entry has it)"),
            )
            .into());
        }
        1 => found.pop().expect("one candidate"),
        n => {
            return Err(Error::invalid(
                "--query",
                format!(
                    "{n} entries have query {what}: query numbers are counted per team here \
                     (or an adoption, numbered 0, was asked for); pass --team, or name the \
                     entry by its receipt's hash with --entry"
                ),
            )
            .into());
        }
    };
    if chosen.seq > head {
        return Err(Error::FailedPrecondition(format!(
            "{what} was recorded after the checkpoint's head, so the checkpoint does not anchor \
             it; certify it with a checkpoint taken after it"
        ))
        .into());
    }
    let query = match &chosen.subject {
        Subject::Answer(r) | Subject::Adoption(r) => r.query,
        Subject::Sealed { sealed, .. } => sealed.query,
    };
    Ok(Certified {
        holdout: name,
        policy,
        checkpoint: cp.clone(),
        entry_hash: chosen.hash,
        query,
        subject: chosen.subject,
    })
}
