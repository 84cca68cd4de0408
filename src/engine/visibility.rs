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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{PolicyInput, TargetDecl};

    fn policy(sharing: &str, leaderboard: &str) -> HoldoutPolicy {
        let input = PolicyInput {
            delta: 0.05,
            tolerance: 0.3,
            sharing: sharing.into(),
            leaderboard: leaderboard.into(),
            shares: if sharing == "isolated" {
                "on-arrival".into()
            } else {
                String::new()
            },
            ..PolicyInput::default()
        };
        let target = TargetDecl {
            name: "y".into(),
            column: "y".into(),
            metric: "error".parse().unwrap(),
            method: "exact".into(),
            classes: vec!["a".into(), "b".into()],
        };
        HoldoutPolicy::build(&input, vec![target], 100).unwrap()
    }

    fn user(roles: &[Role], team: &str) -> Caller {
        Caller {
            name: "u".into(),
            roles: roles.to_vec(),
            team: team.into(),
        }
    }

    #[test]
    fn the_public_sees_activity_only_behind_a_public_leaderboard() {
        let public = Caller::public();
        let open = Visibility::of(&policy("shared", "public"), &public);
        assert_eq!(open.history, Scope::Every);
        assert_eq!(open.leaderboard, Scope::Every);
        assert!(open.ranking && open.budget);
        // The default under `shared` is public.
        assert_eq!(Visibility::of(&policy("shared", ""), &public), open);
        for hidden in [policy("shared", "organizers"), policy("isolated", "")] {
            let v = Visibility::of(&hidden, &public);
            assert_eq!(v.history, Scope::Nothing);
            assert_eq!(v.leaderboard, Scope::Nothing);
            assert!(!v.ranking && !v.budget);
        }
        // A policy from before the setting reads as public; under `isolated` it is not.
        let mut legacy = policy("isolated", "");
        legacy.public_leaderboard = true;
        assert_eq!(Visibility::of(&legacy, &public).history, Scope::Nothing);
    }

    #[test]
    fn users_see_what_the_command_line_shows_them() {
        let analyst = user(&[Role::Analyst], "red");
        let v = Visibility::of(&policy("shared", "organizers"), &analyst);
        assert_eq!(
            v.history,
            Scope::Every,
            "shared: every answer is public to analysts"
        );
        assert_eq!(v.leaderboard, Scope::Team("red".into()));
        let v = Visibility::of(&policy("isolated", ""), &analyst);
        assert_eq!(v.history, Scope::Team("red".into()));
        assert_eq!(v.leaderboard, Scope::Team("red".into()));
        for roles in [&[Role::Organizer][..], &[Role::Auditor][..]] {
            let v = Visibility::of(&policy("isolated", ""), &user(roles, "staff"));
            assert_eq!((v.history, v.leaderboard), (Scope::Every, Scope::Every));
        }
        assert!(Scope::Team("red".into()).covers("red"));
        assert!(!Scope::Team("red".into()).covers("blue"));
        assert!(!Scope::Nothing.covers(""));
    }
}
