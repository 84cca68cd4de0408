//! Who may see what of a holdout's per-team activity: the one rule behind histories, ladder
//! leaderboards, rankings and the web view (`serve --web`), so a page can never show more than
//! the command line shows the same caller.
//!
//! The holdout's `leaderboard` setting decides what the public (a web visitor without a token)
//! sees: with `public`, what any analyst of a `shared` holdout sees; with `organizers` (and
//! always under `isolated`), nothing but the holdout's public declaration and guarantee.

use super::Engine;
use super::account::HoldoutPolicy;
use crate::auth::{Caller, Role};
use crate::error::Result;

/// How much of a holdout's per-team activity (answers, refusals, sealed entries, leaderboard
/// rows) a caller may see.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Scope {
    /// Every team's.
    Every,
    /// One team's: the caller's own.
    Team(String),
    /// None at all.
    Nothing,
}

impl Scope {
    /// Whether `team`'s activity is inside the scope.
    pub fn covers(&self, team: &str) -> bool {
        match self {
            Scope::Every => true,
            Scope::Team(t) => t == team,
            Scope::Nothing => false,
        }
    }
}

/// What one caller may see of one holdout.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Visibility {
    /// Released answers, refusals and sealed entries.
    pub history: Scope,
    /// Rows of a ladder leaderboard.
    pub leaderboard: Scope,
    /// The ranking of a closed sealed round (every entry, every comparison).
    pub ranking: bool,
    /// Budget figures (spent, transcript, next half-width, queries left): they count answers.
    pub budget: bool,
}

impl Visibility {
    /// The rule. Organizers and auditors see everything. Other users see every team's history
    /// unless the holdout is `isolated` (then their own team's), and every leaderboard row only
    /// when the leaderboard is public (else their own team's row). The public
    /// ([`Caller::public`]) sees every team's activity only when the leaderboard is public (never
    /// under `isolated`), and nothing of it otherwise.
    pub fn of(policy: &HoldoutPolicy, caller: &Caller) -> Visibility {
        let isolated = policy.isolated();
        // A public leaderboard is refused under `isolated` at creation; older policies that
        // predate the setting read it as public, so the check is repeated here.
        let public = policy.public_leaderboard && !isolated;
        if caller.has(Role::Organizer) || caller.has(Role::Auditor) {
            return Visibility {
                history: Scope::Every,
                leaderboard: Scope::Every,
                ranking: true,
                budget: true,
            };
        }
        if caller.is_public() {
            let scope = if public { Scope::Every } else { Scope::Nothing };
            return Visibility {
                history: scope.clone(),
                leaderboard: scope,
                ranking: public,
                budget: public,
            };
        }
        let own = Scope::Team(caller.team.clone());
        Visibility {
            history: if isolated { own.clone() } else { Scope::Every },
            leaderboard: if public { Scope::Every } else { own },
            ranking: true,
            budget: true,
        }
    }
}

impl Engine {
    /// What `caller` may see of holdout `name`.
    ///
    /// # Errors
    /// [`crate::error::Error::NotFound`] for an unknown holdout.
    pub fn visibility(&mut self, caller: &Caller, name: &str) -> Result<Visibility> {
        let loaded = self.loaded(name)?;
        Ok(Visibility::of(&loaded.policy, caller))
    }

    /// Whether `name` is a ladder holdout (it has a leaderboard) and whether it is a sealed
    /// round (it has a ranking once closed).
    pub fn board_kind(&mut self, name: &str) -> Result<(bool, bool)> {
        let loaded = self.loaded(name)?;
        Ok((
            matches!(
                loaded.policy.core.rule,
                crate::stats::rules::Rule::Ladder(_)
            ),
            loaded.policy.sealed(),
        ))
    }
}
