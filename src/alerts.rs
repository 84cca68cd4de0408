//! Budget alerts: when a holdout's spent share of its budget crosses a configured share, or the
//! half-width its next answer would get comes within a margin of its tolerance, the daemon logs
//! it and optionally runs a configured local command.
//!
//! Alerts derive from released figures only (the budget shown with the answer that crossed:
//! spent, delta, next half-width, and the public tolerance), never from exact scores, so an
//! alert and its timing say nothing a team could not read from its own answers. The command is
//! run without a shell, detached (its exit is collected on its own thread, never awaited by the
//! answer path), with the arguments `KIND HOLDOUT TEAM SPENT DELTA NEXT_HALF_WIDTH TOLERANCE`
//! (`KIND` is `budget-share` or `tolerance-margin`; `TEAM` is empty under `shared`). Each
//! crossing fires once per holdout (and team, under `isolated`) while the daemon runs: a
//! restarted daemon fires once more at the next answer past a threshold.

use std::collections::HashSet;
use std::path::PathBuf;
use std::sync::Mutex;

use crate::engine::BudgetView;

/// What to watch and what to run.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct AlertSettings {
    /// Alert when spent / delta reaches this share (in (0, 1]).
    pub share: Option<f64>,
    /// Alert when the next half-width is within this margin of the tolerance
    /// (`next_half_width >= tolerance - margin`).
    pub margin: Option<f64>,
    /// A program to run on each alert (no shell).
    pub command: Option<PathBuf>,
}

/// The alerts of a running daemon: the settings and the crossings already fired.
#[derive(Debug, Default)]
pub struct Alerts {
    settings: AlertSettings,
    fired: Mutex<HashSet<(String, String, &'static str)>>,
    list: Mutex<Vec<Alert>>,
}

/// One alert.
#[derive(Debug, Clone, PartialEq)]
pub struct Alert {
    /// `budget-share` or `tolerance-margin`.
    pub kind: &'static str,
    /// Holdout.
    pub holdout: String,
    /// Team under `isolated` (empty under `shared`).
    pub team: String,
    /// The released budget figures.
    pub spent: f64,
    /// Total delta.
    pub delta: f64,
    /// Next half-width.
    pub next_half_width: f64,
    /// Tolerance.
    pub tolerance: f64,
}

impl Alert {
    /// What was crossed, in words.
    pub fn detail(&self) -> String {
        match self.kind {
            "budget-share" => format!(
                "spent {} of delta {} ({:.0}%); next half-width {}, tolerance {}",
                self.spent,
                self.delta,
                100.0 * self.spent / self.delta,
                self.next_half_width,
                self.tolerance
            ),
            _ => format!(
                "next half-width {} is within the alert margin of the tolerance {}; spent {} \
                 of delta {}",
                self.next_half_width, self.tolerance, self.spent, self.delta
            ),
        }
    }

    /// The command's arguments.
    pub fn args(&self) -> Vec<String> {
        vec![
            self.kind.to_string(),
            self.holdout.clone(),
            self.team.clone(),
            self.spent.to_string(),
            self.delta.to_string(),
            self.next_half_width.to_string(),
            self.tolerance.to_string(),
        ]
    }
}

impl Alerts {
    /// Alerts with these settings.
    pub fn new(settings: AlertSettings) -> Alerts {
        Alerts {
            settings,
            fired: Mutex::default(),
            list: Mutex::default(),
        }
    }

    /// Whether any threshold is configured.
    pub fn active(&self) -> bool {
        self.settings.share.is_some() || self.settings.margin.is_some()
    }

    /// The alerts a released budget crosses that have not fired yet (marked fired).
    pub fn crossed(
        &self,
        holdout: &str,
        team: &str,
        budget: &BudgetView,
        tolerance: f64,
    ) -> Vec<Alert> {
        let mut out = Vec::new();
        let mut hit = |kind: &'static str| {
            out.push(Alert {
                kind,
                holdout: holdout.to_string(),
                team: team.to_string(),
                spent: budget.spent,
                delta: budget.delta,
                next_half_width: budget.next_half_width,
                tolerance,
            })
        };
        if let Some(share) = self.settings.share
            && budget.delta > 0.0
            && budget.spent >= share * budget.delta
        {
            hit("budget-share");
        }
        if let Some(margin) = self.settings.margin
            && budget.next_half_width >= tolerance - margin
        {
            hit("tolerance-margin");
        }
        let mut fired = self.fired.lock().unwrap_or_else(|p| p.into_inner());
        out.retain(|a| fired.insert((a.holdout.clone(), a.team.clone(), a.kind)));
        self.list
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .extend(out.iter().cloned());
        out
    }

    /// The alerts fired for `holdout` since the daemon started, in order.
    pub fn fired_for(&self, holdout: &str) -> Vec<Alert> {
        self.list
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .iter()
            .filter(|a| a.holdout == holdout)
            .cloned()
            .collect()
    }

    /// Checks a released budget: logs each new alert and runs the command for it, detached.
    pub fn observe(&self, holdout: &str, team: &str, budget: &BudgetView, tolerance: f64) {
        if !self.active() {
            return;
        }
        for a in self.crossed(holdout, team, budget, tolerance) {
            tracing::warn!(
                alert = a.kind,
                holdout = %a.holdout,
                team = %a.team,
                spent = a.spent,
                delta = a.delta,
                next_half_width = a.next_half_width,
                tolerance = a.tolerance,
                "budget alert"
            );
            if let Some(cmd) = &self.settings.command {
                match std::process::Command::new(cmd)
                    .args(a.args())
                    .stdin(std::process::Stdio::null())
                    .stdout(std::process::Stdio::null())
                    .stderr(std::process::Stdio::null())
                    .spawn()
                {
                    Ok(mut child) => {
                        std::thread::spawn(move || {
                            let _ = child.wait();
                        });
                    }
                    Err(e) => tracing::warn!(
                        command = %cmd.display(),
                        error = %e,
                        "the alert command could not be started"
                    ),
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn budget(spent: f64, next: f64) -> BudgetView {
        BudgetView {
            delta: 0.05,
            spent,
            next_half_width: next,
            ..BudgetView::default()
        }
    }

    #[test]
    fn each_crossing_fires_once_per_holdout_and_team() {
        let a = Alerts::new(AlertSettings {
            share: Some(0.5),
            margin: Some(0.01),
            command: None,
        });
        assert!(a.crossed("h", "", &budget(0.02, 0.05), 0.1).is_empty());
        let got = a.crossed("h", "", &budget(0.03, 0.05), 0.1);
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].kind, "budget-share");
        assert!(a.crossed("h", "", &budget(0.04, 0.05), 0.1).is_empty());
        let got = a.crossed("h", "", &budget(0.04, 0.095), 0.1);
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].kind, "tolerance-margin");
        // Another team (isolated) or holdout has its own crossings.
        assert_eq!(a.crossed("h", "t2", &budget(0.04, 0.05), 0.1).len(), 1);
        assert_eq!(a.crossed("g", "", &budget(0.04, 0.05), 0.1).len(), 1);
    }
}
