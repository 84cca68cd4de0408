//! Heavy probing, flagged for organizers in `status` (issue 12, fair service).
//!
//! Two signs that a team is probing the holdout rather than testing models:
//!
//! * **transcript share**: the nats released by a team's answers are more than
//!   [`ProbeSettings::share_factor`] (2) times its fair share of the holdout's transcript (the
//!   transcript over the teams that answered, or over the declared roster when it is larger).
//!   Read from the ledger (answers, adoptions and rounds carry their code), cached per holdout
//!   and brought up to date from the entries after the cached head.
//! * **near-duplicates**: [`ProbeSettings::run`] (5) or more consecutive submissions of a team,
//!   each differing from the one before in under [`ProbeSettings::diff`] (1 %) of rows. The
//!   daemon compares each answered or sealed submission's predictions with the team's previous
//!   ones, predictions with predictions only (never with labels, so the flag is no label
//!   channel). It keeps, per team and holdout, the previous predictions on at most
//!   [`ProbeSettings::max_rows`] rows (every k-th row beyond that) and the length of the
//!   current run, in memory: a restart starts every run afresh.
//!
//! Who sees which flag: organizers, custodians and auditors see every team's; an analyst only
//! its own team's, and under `isolated` not the transcript share (which would tell it the
//! other teams' activity).

use std::collections::{BTreeMap, HashMap};

use serde::{Deserialize, Serialize};

use super::replay::Record;
use crate::metric::Predictions;

/// Thresholds of the probing flags (`holdout serve --probe-share-factor`, `--probe-run`,
/// `--probe-diff`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProbeSettings {
    /// A team is flagged when its nats exceed this multiple of its fair share.
    pub share_factor: f64,
    /// Consecutive near-duplicate submissions that raise the flag.
    pub run: u32,
    /// A submission is a near-duplicate of the one before when it differs in under this
    /// fraction of rows.
    pub diff: f64,
    /// Rows kept per team for the comparison (every k-th row beyond it).
    pub max_rows: usize,
}

impl Default for ProbeSettings {
    fn default() -> ProbeSettings {
        ProbeSettings {
            share_factor: 2.0,
            run: 5,
            diff: 0.01,
            max_rows: 1_000_000,
        }
    }
}

/// One flag raised for a team.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProbeFlag {
    /// The team.
    pub team: String,
    /// `transcript-share` or `near-duplicates`.
    pub kind: String,
    /// What was seen, in words.
    pub detail: String,
}

/// A team's last predictions (sampled) and its current run of near-duplicates.
#[derive(Debug, Clone, Default)]
struct Last {
    sample: Vec<u64>,
    run: u32,
}

/// Per-holdout nats released by each team, as of a ledger head.
#[derive(Debug, Clone, Default)]
struct Nats {
    head: u64,
    by_team: BTreeMap<String, f64>,
}

/// The probing state the engine keeps.
#[derive(Debug, Default)]
pub(crate) struct Probes {
    pub(crate) settings: ProbeSettings,
    last: HashMap<(String, String), Last>,
    nats: HashMap<String, Nats>,
}

/// Every k-th row's prediction as bits, at most `max` of them.
pub(crate) fn sample(preds: &Predictions, max: usize) -> Vec<u64> {
    let n = match preds {
        Predictions::Classes(v) => v.len(),
        Predictions::Numbers(v) => v.len(),
    };
    let stride = n.div_ceil(max.max(1)).max(1);
    match preds {
        Predictions::Classes(v) => v.iter().step_by(stride).map(|&c| u64::from(c)).collect(),
        Predictions::Numbers(v) => v.iter().step_by(stride).map(|x| x.to_bits()).collect(),
    }
}

impl Probes {
    /// Notes a recorded submission (answered or sealed) of `team`: compares its predictions
    /// with the team's previous ones and moves the run on.
    #[cfg(test)]
    fn observe(&mut self, holdout: &str, team: &str, preds: &Predictions) {
        let now = sample(preds, self.settings.max_rows);
        self.observe_sample(holdout, team, now);
    }

    /// [`Probes::observe`] with the predictions already sampled ([`sample`]).
    pub(crate) fn observe_sample(&mut self, holdout: &str, team: &str, now: Vec<u64>) {
        let diff = self.settings.diff;
        let last = self
            .last
            .entry((holdout.to_string(), team.to_string()))
            .or_default();
        let near = !last.sample.is_empty() && last.sample.len() == now.len() && {
            let differ = last.sample.iter().zip(&now).filter(|(a, b)| a != b).count();
            (differ as f64) < diff * now.len() as f64
        };
        last.run = if near { last.run + 1 } else { 0 };
        last.sample = now;
    }

    /// Brings the per-team nats of `holdout` up to `entries` (those after the cached head).
    pub(crate) fn nats_head(&self, holdout: &str) -> u64 {
        self.nats.get(holdout).map_or(0, |n| n.head)
    }

    /// Adds the codes of `entries` (after [`Probes::nats_head`]) to the per-team nats.
    pub(crate) fn add_entries(&mut self, holdout: &str, entries: &[crate::ledger::Entry]) {
        let nats = self.nats.entry(holdout.to_string()).or_default();
        for e in entries {
            nats.head = nats.head.max(e.seq);
            match Record::parse(e) {
                Ok(Record::Answer(r)) | Ok(Record::Adopt(r)) => {
                    *nats.by_team.entry(r.team.clone()).or_default() += r.code_nats;
                }
                Ok(Record::Round(r)) => {
                    for a in &r.answers {
                        *nats.by_team.entry(a.team.clone()).or_default() += a.code_nats;
                    }
                }
                _ => {}
            }
        }
    }

    /// The flags of `holdout`, every team's. `roster` is the number of declared teams (0:
    /// none).
    pub(crate) fn flags(&self, holdout: &str, roster: usize) -> Vec<ProbeFlag> {
        let mut out = Vec::new();
        if let Some(n) = self.nats.get(holdout) {
            let total: f64 = n.by_team.values().sum();
            let teams = n.by_team.len().max(roster);
            if teams >= 2 && total > 0.0 {
                let fair = total / teams as f64;
                for (team, &nats) in &n.by_team {
                    if nats > self.settings.share_factor * fair {
                        out.push(ProbeFlag {
                            team: team.clone(),
                            kind: "transcript-share".into(),
                            detail: format!(
                                "{nats:.1} nats of the {total:.1} released ({:.0} %), more than \
                                 {} times its fair share of 1/{teams}",
                                100.0 * nats / total,
                                self.settings.share_factor
                            ),
                        });
                    }
                }
            }
        }
        let mut runs: Vec<(&String, u32)> = self
            .last
            .iter()
            .filter(|((h, _), l)| h == holdout && l.run >= self.settings.run)
            .map(|((_, t), l)| (t, l.run))
            .collect();
        runs.sort();
        for (team, run) in runs {
            out.push(ProbeFlag {
                team: team.clone(),
                kind: "near-duplicates".into(),
                detail: format!(
                    "its last {run} submissions each differed from the one before in under {} % \
                     of rows",
                    100.0 * self.settings.diff
                ),
            });
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_run_of_near_duplicates_is_counted_and_broken() {
        let mut p = Probes::default();
        let base: Vec<u32> = (0..1000).map(|i| i % 2).collect();
        let mut v = base.clone();
        p.observe("h", "t", &Predictions::Classes(v.clone()));
        for k in 0..5 {
            v[k] ^= 1; // one row in a thousand: 0.1 %
            p.observe("h", "t", &Predictions::Classes(v.clone()));
        }
        let flags = p.flags("h", 0);
        assert_eq!(flags.len(), 1, "{flags:?}");
        assert_eq!(flags[0].kind, "near-duplicates");
        // A submission that changes 2 % of rows breaks the run.
        for x in v.iter_mut().take(20) {
            *x ^= 1;
        }
        p.observe("h", "t", &Predictions::Classes(v));
        assert!(p.flags("h", 0).is_empty());
        // Four near-duplicates are not enough.
        let mut w = base;
        p.observe("h", "u", &Predictions::Classes(w.clone()));
        for k in 0..4 {
            w[k] ^= 1;
            p.observe("h", "u", &Predictions::Classes(w.clone()));
        }
        assert!(p.flags("h", 0).is_empty());
    }

    #[test]
    fn large_holdouts_are_compared_on_a_sample() {
        let v: Vec<f64> = (0..10_000).map(f64::from).collect();
        let s = sample(&Predictions::Numbers(v), 1_000);
        assert_eq!(s.len(), 1_000);
        assert_eq!(s[1], 10.0f64.to_bits());
    }
}
