//! What a policy buys for `n` rows, printed by `create` before anything is sent: per target, the
//! first answer's worst-case half-width and how many queries fit within the tolerance under the
//! chosen answer rule and a few alternatives, at the worst case and at an expected error. The
//! numbers come from the statistics core's planning functions ([`crate::stats::plan`]), the ones
//! the daemon's accountant uses.

use serde_json::{Value, json};

use super::show;
use crate::error::{Error, Result};
use crate::proto::v1::{Policy, Target};
use crate::stats::interval::{Method, reference_half_width};
use crate::stats::plan::{PlanSpec, plan_table};
use crate::stats::rules::Rule;
use crate::stats::schedule::Schedule;

/// Models per batch assumed when planning a `best-of` rule.
const PLAN_BATCH: u32 = 2;

/// A plan in both renderings.
#[derive(Debug, Clone)]
pub struct Plan {
    /// For people.
    pub text: String,
    /// For scripts.
    pub json: Value,
}

/// A count of queries for people: exact below a million, rounded above.
fn count(q: f64) -> String {
    if q < 1e6 {
        format!("{}", q as u64)
    } else {
        format!("~{q:.1e}")
    }
}

/// Describes what the policy buys for `n` rows.
///
/// # Errors
/// [`Error::InvalidArgument`] for a schedule, answer rule or method the core does not accept,
/// so a bad policy is caught before anything is sent.
pub fn describe(
    n: u64,
    policy: &Policy,
    targets: &[Target],
    expected_error: f64,
    teams: Option<u64>,
) -> Result<Plan> {
    let schedule: Schedule = policy
        .schedule
        .parse()
        .map_err(|e| Error::invalid("--schedule", format!("{e}")))?;
    let rule: Rule = policy
        .answers
        .parse()
        .map_err(|e| Error::invalid("--answers", format!("{e}")))?;
    if !(expected_error > 0.0 && expected_error < 1.0) {
        return Err(Error::invalid(
            "--expected-error",
            format!("must lie in (0, 1), got {expected_error}"),
        ));
    }
    let mut rules = vec![rule];
    for alt in [
        "rounded:0.01".to_string(),
        format!("threshold:{expected_error}"),
        "ladder:0.01".to_string(),
        "sealed".to_string(),
    ] {
        if let Ok(r) = alt.parse::<Rule>()
            && !rules.contains(&r)
        {
            rules.push(r);
        }
    }
    let mut text = format!(
        "{n} rows; policy: {}\nWhat the policy buys (queries that fit before the half-width passes \
         the tolerance {}, every answer coded at its worst case; {} = the chosen rule):",
        show::policy_text(policy),
        show::num(policy.tolerance),
        "*"
    );
    let mut per_target = Vec::new();
    for t in targets {
        let method: Method = t
            .method
            .parse()
            .map_err(|e| Error::invalid("--target", format!("method of {}: {e}", t.name)))?;
        let spec = PlanSpec {
            rows: n,
            delta: policy.delta,
            tolerance: policy.tolerance,
            schedule,
            method,
            batch: PLAN_BATCH,
        };
        let first_level = schedule.ln_inv_fraction(1).map(|f| -policy.delta.ln() + f);
        let first_hw =
            first_level.and_then(|l| reference_half_width(method, n, 0.5, l, rule.sides()).ok());
        let table = plan_table(&spec, &rules, Some(expected_error));
        let rows: Vec<Vec<String>> = table
            .iter()
            .enumerate()
            .map(|(i, r)| {
                vec![
                    format!("{}{}", if i == 0 { "* " } else { "  " }, r.rule),
                    r.queries.map_or("-".into(), count),
                    r.queries_expected.map_or("-".into(), count),
                ]
            })
            .collect();
        let expected_col = format!("at expected loss {}", show::num(expected_error));
        text.push_str(&format!(
            "\n\ntarget {} ({}, method {}): first answer's half-width {} at worst\n{}",
            t.name,
            t.metric,
            method,
            first_hw.map_or("-".to_string(), show::num),
            show::table(&["rule", "worst case", &expected_col], &rows)
        ));
        per_target.push(json!({
            "target": t.name,
            "method": method.to_string(),
            "first_half_width": first_hw,
            "rules": table,
        }));
    }
    if targets.len() > 1 {
        text.push_str(
            "\n(the targets share one budget: each count assumes every query goes to that target)",
        );
    }
    if matches!(rule, Rule::BestOf(_)) {
        text.push_str(&format!(
            "\n(best-of counts batches of {PLAN_BATCH} models; each model takes a share)"
        ));
    }
    let mut json = json!({
        "rows": n,
        "expected_error": expected_error,
        "policy": show::policy_json(policy),
        "targets": per_target,
    });
    if let Some(fair) = fair_service(n, policy, targets, expected_error, teams)? {
        text.push_str(&format!("\n\n{}", fair.text));
        json["teams"] = fair.json;
    }
    Ok(Plan { text, json })
}

/// Answers counted for one team when asking what it can expect (more is shown as "at least").
const EXPECT_CAP: u64 = 10_000;

/// The teams a policy declares (a roster), or `teams` when given; the roster's reserve.
fn declared_teams(shares: &str, teams: Option<u64>) -> (Option<u64>, f64) {
    let Some(rest) = shares.trim().strip_prefix("roster:") else {
        return (teams, 0.0);
    };
    let (names, reserve) = match rest.rsplit_once(':') {
        Some((names, r)) => (names, r.trim().parse().unwrap_or(0.0)),
        None => (rest, 0.0),
    };
    let count = names.split(',').filter(|s| !s.trim().is_empty()).count() as u64;
    (Some(count.max(1)), reserve)
}

/// Fair service lines for `create`, when teams are declared (`--shares roster:...`) or given
/// (`--teams`): the answers each team can expect when the teams take turns, at the expected
/// error and at worst case, and a warning when a first team that keeps submitting would starve
/// the others. Counted for the first target (the targets share one budget).
fn fair_service(
    n: u64,
    policy: &Policy,
    targets: &[Target],
    expected_error: f64,
    teams: Option<u64>,
) -> Result<Option<Plan>> {
    use crate::stats::fair::{FairPolicy, FairSpec, PoolSplit, first_comer, served};
    let (Some(teams), Some(target)) = (declared_teams(&policy.shares, teams).0, targets.first())
    else {
        return Ok(None);
    };
    let reserve = declared_teams(&policy.shares, Some(teams)).1;
    let rule: Rule = policy
        .answers
        .parse()
        .map_err(|e| Error::invalid("--answers", format!("{e}")))?;
    if matches!(rule, Rule::BestOf(_)) {
        return Ok(None);
    }
    let split = match policy.shares.trim() {
        "none" | "" => PoolSplit::None,
        "on-arrival" => PoolSplit::OnArrival,
        _ => PoolSplit::Roster,
    };
    // The delta the teams' answers draw on: a roster's reserve and a sealed round's ranking
    // share are kept apart (the daemon's default ranking share when none is given).
    let ranking = if matches!(rule, Rule::Sealed(_)) {
        if policy.ranking_share > 0.0 {
            policy.ranking_share
        } else {
            crate::engine::DEFAULT_RANKING_SHARE
        }
    } else {
        0.0
    };
    let method: Method = target
        .method
        .parse()
        .map_err(|e| Error::invalid("--target", format!("method of {}: {e}", target.name)))?;
    let spec = FairSpec {
        rows: n,
        delta: policy.delta * (1.0 - reserve) * (1.0 - ranking),
        tolerance: policy.tolerance,
        method,
        teams,
        answers_each: EXPECT_CAP,
    };
    let fair = FairPolicy {
        rule,
        schedule: policy
            .schedule
            .parse()
            .map_err(|e| Error::invalid("--schedule", format!("{e}")))?,
        split,
        isolated: policy.sharing == "isolated",
    };
    let expected = served(&spec, &fair, expected_error);
    let worst = served(&spec, &fair, 0.5);
    let (alone, after) = first_comer(&spec, &fair, expected_error);
    let each = |k: u64| {
        if k >= EXPECT_CAP {
            format!("at least {EXPECT_CAP}")
        } else {
            k.to_string()
        }
    };
    let mut text = format!(
        "fair service, {teams} teams taking turns: each can expect {} answers at the expected \
         error {} ({} at worst case)",
        each(expected),
        show::num(expected_error),
        each(worst)
    );
    let starves = after < expected;
    if starves {
        text.push_str(&format!(
            "\nwarning: the first answers would starve later teams: a team that keeps submitting \
             gets {} answers before its next is refused, and the other {} teams are then left \
             {} each (instead of {}). Give each team its own pool (--shares roster:TEAM,... \
             with --sharing isolated), an even schedule over the expected answers \
             (--schedule even:K), or a daily quota (--daily-quota N); `holdout plan --rows {n} \
             --teams {teams} --answers-each M` compares them",
            each(alone),
            teams - 1,
            after,
            each(expected)
        ));
    }
    Ok(Some(Plan {
        text,
        json: json!({
            "teams": teams,
            "each_expected": expected,
            "each_worst_case": worst,
            "first_team_alone": alone,
            "others_after_first": after,
            "starves": starves,
            "counted_up_to": EXPECT_CAP,
        }),
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn policy(answers: &str, schedule: &str) -> Policy {
        Policy {
            delta: 0.05,
            schedule: schedule.into(),
            answers: answers.into(),
            tolerance: 0.05,
            ..Default::default()
        }
    }

    fn target(method: &str) -> Target {
        Target {
            name: "y".into(),
            column: "y".into(),
            metric: "error".into(),
            method: method.into(),
            classes: vec![],
        }
    }

    #[test]
    fn design_magnitudes_show_up() {
        // DESIGN 4.5: Hoeffding, n = 10,000, delta 0.05, series, tolerance 0.05, rounded 0.01: 10
        // with the one-count interval and the uniform code. Core 2 judges the reported cell
        // interval, 0.00495 wider (99 counts / 2n), and code 2's worst case is ln 101 for the
        // first answer and ln 202 for each later one: query j >= 2 fits while
        // ln(40 j(j+1)) + ln 101 + (j-2) ln 202 <= 2n(0.05 - 0.00495)^2 = 40.59 nats, i.e.
        // j <= 7 (j = 7: 38.87; j = 8: 44.43; our arithmetic; 8 with the uniform code).
        let p = describe(
            10_000,
            &policy("rounded:0.01", "series"),
            &[target("hoeffding")],
            0.1,
            None,
        )
        .expect("plan");
        assert_eq!(
            p.json["targets"][0]["rules"][0]["queries"], 7.0,
            "{}",
            p.json
        );
        assert!(p.text.contains("* rounded:0.01"), "{}", p.text);
        assert!(p.text.contains("sealed"), "{}", p.text);
    }

    #[test]
    fn bad_policy_parts_are_named() {
        let t = [target("exact")];
        for (answers, schedule, field) in [
            ("rounded:0.01", "weekly", "--schedule"),
            ("coin", "series", "--answers"),
        ] {
            match describe(100, &policy(answers, schedule), &t, 0.1, None) {
                Err(Error::InvalidArgument { field: f, .. }) => assert_eq!(f, field),
                other => panic!("expected a refusal, got {other:?}"),
            }
        }
        assert!(describe(100, &policy("rounded:0.01", "series"), &t, 1.5, None).is_err());
    }
}
