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

use super::show::count;

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
    // Under a roster every team draws on its own share of delta, so every figure below is a
    // team's: its share is the delta its answers use (less the roster's reserve and a sealed
    // round's ranking share), split evenly over the declared teams.
    let team_share = team_share(policy, &rule);
    let plan_delta = team_share.map_or(policy.delta, |(_, d)| d);
    let mut text = format!(
        "{n} rows; policy: {}\nWhat the policy buys{} (queries that fit before the half-width \
         passes the tolerance {}, every answer coded at its worst case; {} = the chosen rule):",
        show::policy_text(policy),
        team_share.map_or(String::new(), |(teams, d)| format!(
            " for each team, on its share {} of delta (per team: {} split over {teams} teams{})",
            show::num(d),
            show::num(policy.delta),
            if policy.sharing == "isolated" {
                String::new()
            } else {
                "; under shared sharing the teams' answers lengthen one transcript, so these \
                 counts are for a team submitting alone"
                    .to_string()
            }
        )),
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
            delta: plan_delta,
            tolerance: policy.tolerance,
            schedule,
            method,
            batch: PLAN_BATCH,
            // No metric `create` accepts needs the class counts yet (issue 18).
            class_counts: None,
        };
        let first_level = schedule.ln_inv_fraction(1).map(|f| -plan_delta.ln() + f);
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
            "\n\ntarget {} ({}, method {}): {}first answer's half-width {} at worst\n{}",
            t.name,
            t.metric,
            method,
            if team_share.is_some() {
                "a team's "
            } else {
                ""
            },
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
        "per_team": team_share.map_or(Value::Null, |(teams, d)| json!({"teams": teams, "delta": d})),
    });
    if let Some(fair) = fair_service(n, policy, targets, expected_error, teams)? {
        text.push_str(&format!("\n\n{}", fair.text));
        json["teams"] = fair.json;
    }
    Ok(Plan { text, json })
}

/// Under per-team shares (`--shares roster:...`): the declared teams and the delta each
/// team's answers draw on (the holdout's delta less the roster's reserve and, for a sealed
/// round, the ranking's share, split evenly). `None` with one pool (or on-arrival shares,
/// whose teams are not known in advance).
fn team_share(policy: &Policy, rule: &Rule) -> Option<(u64, f64)> {
    if !policy.shares.trim().starts_with("roster:") {
        return None;
    }
    let (Some(teams), reserve) = declared_teams(&policy.shares, None) else {
        return None;
    };
    let ranking = if matches!(rule, Rule::Sealed(_)) {
        if policy.ranking_share > 0.0 {
            policy.ranking_share
        } else {
            crate::engine::DEFAULT_RANKING_SHARE
        }
    } else {
        0.0
    };
    Some((
        teams,
        policy.delta * (1.0 - reserve) * (1.0 - ranking) / teams as f64,
    ))
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
    fn under_a_roster_every_figure_is_a_teams_share() {
        // Five teams on a roster with a 0.2 reserve: each team's share is 0.05 * 0.8 / 5 =
        // 0.008, and the table and half-width are those of one pool of delta 0.008.
        let mut roster = policy("ladder:0.01", "series");
        roster.shares = "roster:a,b,c,d,e:0.2".into();
        roster.sharing = "isolated".into();
        let mut alone = policy("ladder:0.01", "series");
        alone.delta = 0.05 * 0.8 / 5.0;
        let t = [target("exact")];
        let per_team = describe(2000, &roster, &t, 0.1, None).expect("plan");
        let one_pool = describe(2000, &alone, &t, 0.1, None).expect("plan");
        let whole = describe(2000, &policy("ladder:0.01", "series"), &t, 0.1, None).unwrap();
        let hw = |p: &Plan| p.json["targets"][0]["first_half_width"].as_f64().unwrap();
        assert_eq!(hw(&per_team), hw(&one_pool));
        assert!(
            hw(&per_team) > hw(&whole),
            "a share is less than the whole delta"
        );
        assert_eq!(
            per_team.json["targets"][0]["rules"],
            one_pool.json["targets"][0]["rules"]
        );
        assert_eq!(per_team.json["per_team"]["teams"], 5);
        assert!((per_team.json["per_team"]["delta"].as_f64().unwrap() - 0.008).abs() < 1e-12);
        assert!(one_pool.json["per_team"].is_null());
        assert!(
            per_team
                .text
                .contains("for each team, on its share 0.008 of delta")
                && per_team.text.contains("a team's first answer's half-width"),
            "{}",
            per_team.text
        );
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
