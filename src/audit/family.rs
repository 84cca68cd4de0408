//! Holdout families: row-disjoint holdouts that share one total delta.
//!
//! Each holdout carved by `split` has its own delta, so k of them hold jointly only at
//! `k * delta` (union bound). A family fixes one total instead: its first member records the
//! total, every member's own delta is its share, and the shares must sum to at most the total.
//! Then, by the union bound over the members, every interval of every member holds jointly with
//! probability at least `1 - total`. The daemon refuses a member whose share would break the sum;
//! each member's genesis entry records `family: {name, share, total}`; and
//! `holdout audit EXPORT --family OTHER ...` checks, from the exports alone, that the members
//! agree on the total, that each share is the member's delta, and that the shares fit.
//!
//! Sums are compared exactly ([`shares_fit`]): adding rounded doubles could refuse shares that
//! fit (0.01 + 0.02 + 0.02 rounds above 0.05 in some orders) or accept ones that do not.

use std::collections::BTreeMap;

use serde::Serialize;
use serde_json::Value;

use super::Finding;
use super::export::Export;

/// The `family` object of a genesis entry.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Membership {
    /// Family name.
    pub name: String,
    /// This member's share (its own delta).
    pub share: f64,
    /// The family's total delta.
    pub total: f64,
}

impl Membership {
    /// The JSON recorded in the genesis entry.
    pub fn to_json(&self) -> Value {
        serde_json::json!({"name": self.name, "share": self.share, "total": self.total})
    }
}

/// Error-free sum of two doubles: `a + b = s + e` exactly (Knuth's TwoSum).
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bv = s - a;
    let av = s - bv;
    (s, (a - av) + (b - bv))
}

/// Whether the exact (real-number) sum of `shares` is at most `total`, for finite inputs whose
/// partial sums do not overflow (shares and totals of a family lie in (0, 1)).
///
/// The sum minus the total is kept as a nonoverlapping expansion (Shewchuk 1997, "Adaptive
/// precision floating-point arithmetic", Grow-Expansion with zero elimination), whose sign is the
/// sign of its largest component, so the comparison involves no rounding at all.
pub fn shares_fit(shares: &[f64], total: f64) -> bool {
    let mut expansion: Vec<f64> = Vec::new();
    for &x in shares.iter().chain(std::iter::once(&-total)) {
        let mut q = x;
        let mut next = Vec::with_capacity(expansion.len() + 1);
        for &e in &expansion {
            let (s, err) = two_sum(q, e);
            if err != 0.0 {
                next.push(err);
            }
            q = s;
        }
        if q != 0.0 {
            next.push(q);
        }
        expansion = next;
    }
    expansion.last().is_none_or(|&top| top <= 0.0)
}

/// Reads the family membership recorded in a genesis body: `None` when the holdout belongs to
/// no family (every genesis written before families existed), an error when the field is
/// malformed.
pub fn membership(genesis: &Value) -> Result<Option<Membership>, String> {
    let f = &genesis["family"];
    if f.is_null() {
        return Ok(None);
    }
    let name = f["name"].as_str().filter(|s| !s.is_empty());
    let share = f["share"].as_f64();
    let total = f["total"].as_f64();
    match (name, share, total) {
        (Some(name), Some(share), Some(total)) => Ok(Some(Membership {
            name: name.to_string(),
            share,
            total,
        })),
        _ => Err(format!(
            "malformed: {f}; expected {{\"name\", \"share\", \"total\"}}"
        )),
    }
}

/// One member as the family audit saw it.
#[derive(Debug, Clone, Serialize)]
pub struct MemberSummary {
    /// Holdout name.
    pub holdout: String,
    /// Hash of its genesis entry (members are told apart by it).
    pub genesis_hash: String,
    /// Its share.
    pub share: f64,
    /// The total it records.
    pub total: f64,
}

/// One family as the audit saw it.
#[derive(Debug, Clone, Serialize)]
pub struct FamilySummary {
    /// Family name.
    pub family: String,
    /// The total its first member (in the order given) records.
    pub total: f64,
    /// Members given, in the order given (an export given twice counts once).
    pub members: Vec<MemberSummary>,
    /// Sum of the shares, rounded to the nearest double (for display; the check is exact).
    pub shares_sum: f64,
    /// Whether the shares sum to at most the total, exactly.
    pub fits: bool,
}

/// The family audit over several exports.
#[derive(Debug, Clone, Default, Serialize)]
pub struct FamilyReport {
    /// Families found among the exports.
    pub families: Vec<FamilySummary>,
    /// Discrepancies.
    pub findings: Vec<Finding>,
}

/// What a family audit cannot establish.
pub const FAMILY_CANNOT_CHECK: &[&str] = &[
    "that every member of the family was given: a member whose export is left out is not \
     counted in the sum",
    "that the members' rows are disjoint: the exports record only a digest of each member's row \
     ids (the daemon refuses overlapping rows within one database)",
];

fn finding(chain: &str, problem: String) -> Finding {
    Finding {
        chain: chain.to_string(),
        entry: Some(0),
        field: "family".into(),
        problem,
    }
}

/// Checks the family records of several exports: each export names a family, each share is the
/// member's own delta, the members of a family agree on its total, and the shares sum to at
/// most the total. Exports whose chain or genesis is broken are reported by the ordinary audit;
/// here they count with what their genesis says.
pub fn check_families(exports: &[&Export]) -> FamilyReport {
    let mut report = FamilyReport::default();
    let mut families: BTreeMap<String, FamilySummary> = BTreeMap::new();
    let mut order: Vec<String> = Vec::new();
    for ex in exports {
        let chain = ex.header.holdout.as_str();
        let Some(g) = ex.entries.first() else {
            report
                .findings
                .push(finding(chain, "the export has no genesis entry".into()));
            continue;
        };
        let body: Value = match serde_json::from_str(&g.body) {
            Ok(v) => v,
            Err(e) => {
                report
                    .findings
                    .push(finding(chain, format!("genesis is not JSON: {e}")));
                continue;
            }
        };
        let m = match membership(&body) {
            Ok(Some(m)) => m,
            Ok(None) => {
                report.findings.push(finding(
                    chain,
                    "the holdout belongs to no family, but was given to a family audit".into(),
                ));
                continue;
            }
            Err(why) => {
                report.findings.push(finding(chain, why));
                continue;
            }
        };
        let delta = body["policy"]["input"]["delta"].as_f64();
        if delta != Some(m.share) {
            report.findings.push(finding(
                chain,
                format!(
                    "share {} is not the holdout's own delta {}",
                    m.share, body["policy"]["input"]["delta"]
                ),
            ));
        }
        if !(m.share > 0.0 && m.share <= m.total && m.total < 1.0) {
            report.findings.push(finding(
                chain,
                format!(
                    "share {} and total {} do not satisfy 0 < share <= total < 1",
                    m.share, m.total
                ),
            ));
        }
        let fam = families.entry(m.name.clone()).or_insert_with(|| {
            order.push(m.name.clone());
            FamilySummary {
                family: m.name.clone(),
                total: m.total,
                members: Vec::new(),
                shares_sum: 0.0,
                fits: true,
            }
        });
        if fam.members.iter().any(|x| x.genesis_hash == g.hash) {
            continue;
        }
        if m.total != fam.total {
            report.findings.push(finding(
                chain,
                format!(
                    "family {} has total {} here but {} in {} (members must agree on the total)",
                    m.name, m.total, fam.total, fam.members[0].holdout
                ),
            ));
        }
        fam.members.push(MemberSummary {
            holdout: chain.to_string(),
            genesis_hash: g.hash.clone(),
            share: m.share,
            total: m.total,
        });
    }
    for name in order {
        let Some(mut fam) = families.remove(&name) else {
            continue;
        };
        let shares: Vec<f64> = fam.members.iter().map(|m| m.share).collect();
        fam.shares_sum = shares.iter().sum();
        // Every total recorded must hold: the smallest one is the binding one.
        let least = fam
            .members
            .iter()
            .map(|m| m.total)
            .fold(fam.total, f64::min);
        fam.fits = shares_fit(&shares, least);
        if !fam.fits {
            let chain = fam
                .members
                .last()
                .map_or(String::new(), |m| m.holdout.clone());
            report.findings.push(finding(
                &chain,
                format!(
                    "the shares of family {name} ({}) sum to {} (exactly: more than) its total \
                     {least}: the members do not hold jointly at 1 - {least}",
                    fam.members
                        .iter()
                        .map(|m| format!("{} {}", m.holdout, m.share))
                        .collect::<Vec<_>>()
                        .join(", "),
                    fam.shares_sum,
                ),
            ));
        }
        report.families.push(fam);
    }
    report
}

/// The family part of `holdout audit EXPORT [--family OTHER]...`: audits every other member's
/// export in full (its findings are returned with the family's), then checks the family records
/// of all of them together. Without other exports it only reports the main export's membership
/// (and checks nothing across members). Returns the findings and a JSON summary for the report.
pub fn audit_members(main: &Export, others: &[(String, Export)]) -> (Vec<Finding>, Value) {
    let mut findings = Vec::new();
    let own = main
        .entries
        .first()
        .and_then(|g| serde_json::from_str::<Value>(&g.body).ok())
        .and_then(|b| membership(&b).ok().flatten());
    if others.is_empty() {
        let summary = match own {
            Some(m) => serde_json::json!({
                "membership": m,
                "checked": false,
                "note": format!(
                    "member of family {} (share {} of total {}); give the other members' exports \
                     with --family to check that the shares fit",
                    m.name, m.share, m.total
                ),
            }),
            None => Value::Null,
        };
        return (findings, summary);
    }
    let mut members = Vec::new();
    for (file, ex) in others {
        let r = super::audit(ex, super::AuditOptions::default());
        members.push(serde_json::json!({
            "file": file,
            "holdout": r.holdout,
            "entries": r.entries,
            "answers": r.queries.len(),
            "discrepancies": r.findings.len(),
        }));
        findings.extend(r.findings);
    }
    let all: Vec<&Export> = std::iter::once(main)
        .chain(others.iter().map(|(_, e)| e))
        .collect();
    let report = check_families(&all);
    findings.extend(report.findings.iter().cloned());
    let summary = serde_json::json!({
        "membership": own,
        "checked": true,
        "exports": members,
        "families": report.families,
        "family_findings": report.findings.len(),
        "cannot_check": FAMILY_CANNOT_CHECK,
    });
    (findings, summary)
}

/// Lines for the text report of [`audit_members`]'s summary.
pub fn text_lines(summary: &Value) -> Vec<String> {
    let mut out = Vec::new();
    if summary.is_null() {
        return out;
    }
    if summary["checked"] != Value::Bool(true) {
        if let Some(n) = summary["note"].as_str() {
            out.push(format!("family     {n}"));
        }
        return out;
    }
    for e in summary["exports"].as_array().into_iter().flatten() {
        out.push(format!(
            "member     {} (holdout {}): {} entries, {} answers, {} discrepancies in its own audit",
            e["file"].as_str().unwrap_or(""),
            e["holdout"].as_str().unwrap_or(""),
            e["entries"],
            e["answers"],
            e["discrepancies"]
        ));
    }
    for f in summary["families"].as_array().into_iter().flatten() {
        let members: Vec<String> = f["members"]
            .as_array()
            .into_iter()
            .flatten()
            .map(|m| format!("{} {}", m["holdout"].as_str().unwrap_or(""), m["share"]))
            .collect();
        out.push(format!(
            "family     {}: total {}, shares {} (sum {}): {}",
            f["family"].as_str().unwrap_or(""),
            f["total"],
            members.join(", "),
            f["shares_sum"],
            if f["fits"] == Value::Bool(true) {
                "the shares fit within the total (exact sum)"
            } else {
                "the shares sum PAST the total"
            }
        ));
    }
    for c in FAMILY_CANNOT_CHECK {
        out.push(format!("family     cannot check: {c}"));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// A double in [2^-60, 2) as an exact integer count of 2^-112 (its 53-bit mantissa shifted
    /// by its exponent fits in an i128): an independent, obviously exact reference sum.
    fn fixed(x: f64) -> i128 {
        assert!(x >= 2f64.powi(-60) && x < 2.0);
        let bits = x.to_bits();
        let exp = ((bits >> 52) & 0x7ff) as i32 - 1075; // x = mantissa * 2^exp
        let mantissa = ((bits & ((1 << 52) - 1)) | (1 << 52)) as i128;
        mantissa << (exp + 112)
    }

    #[test]
    fn exact_where_rounded_sums_err() {
        // Reference: Python 3.11 fractions.Fraction over the same doubles (exact rationals):
        // Fraction(0.01) + Fraction(0.02) + Fraction(0.02) < Fraction(0.05) is True, while the
        // float sum 0.02 + 0.02 + 0.01 == 0.05 and 0.1 + 0.2 > 0.3 in doubles; Fraction(0.1) +
        // Fraction(0.2) > Fraction(0.3) is also True (0.1 and 0.2 are stored slightly above).
        assert!(shares_fit(&[0.01, 0.02, 0.02], 0.05));
        assert!(shares_fit(&[0.02, 0.02, 0.01], 0.05));
        assert!(!shares_fit(&[0.1, 0.2], 0.3));
        // 0.01 + 0.02 rounds to exactly 0.03, yet Fraction(0.01) + Fraction(0.02) >
        // Fraction(0.03) (Python fractions): the rounded sum would accept, the exact one refuses.
        let (a, b, t) = (std::hint::black_box(0.01_f64), 0.02_f64, 0.03_f64);
        assert!(a + b <= t, "the rounded sum fits");
        assert!(!shares_fit(&[a, b], t));
        // And 0.7 + 0.1 rounds below 0.8 while the exact sum is below it too (fits).
        assert!(shares_fit(&[0.7, 0.1], 0.8));
        assert!(shares_fit(&[0.025, 0.025], 0.05));
        assert!(!shares_fit(&[0.025, 0.025, 1e-300], 0.05));
        assert!(shares_fit(&[], 0.05));
        assert!(shares_fit(&[0.05], 0.05));
        assert!(!shares_fit(&[0.05_f64.next_up()], 0.05));
    }

    proptest! {
        #[test]
        fn agrees_with_fixed_point(
            shares in prop::collection::vec(2f64.powi(-50)..0.5f64, 0..12),
            total in 2f64.powi(-50)..1.0f64,
            nudge in -3i32..3,
        ) {
            let exact: i128 = shares.iter().map(|&s| fixed(s)).sum();
            prop_assert_eq!(shares_fit(&shares, total), exact <= fixed(total));
            // A total right at the exact sum (when representable) or one ulp around it.
            let sum: f64 = shares.iter().sum();
            if sum >= 2f64.powi(-50) && sum < 1.5 {
                let mut t = sum;
                for _ in 0..nudge.abs() {
                    t = if nudge > 0 { t.next_up() } else { t.next_down() };
                }
                prop_assert_eq!(shares_fit(&shares, t), exact <= fixed(t));
            }
        }
    }

    fn genesis(name: &str, family: Option<(&str, f64, f64)>, delta: f64) -> Value {
        let mut v = serde_json::json!({
            "holdout": name,
            "policy": {"input": {"delta": delta}},
        });
        if let Some((f, s, t)) = family {
            v["family"] = serde_json::json!({"name": f, "share": s, "total": t});
        }
        v
    }

    fn export(name: &str, body: &Value, hash: &str) -> Export {
        let entry = crate::ledger::Entry {
            chain: name.into(),
            seq: 0,
            kind: crate::ledger::Kind::Genesis.as_str().into(),
            body: body.to_string(),
            salt: "00".into(),
            prev_hash: "00".into(),
            hash: hash.into(),
        };
        Export::new(name, "2026-01-01T00:00:00Z", vec![entry], vec![])
    }

    #[test]
    fn families_sum_and_agree() {
        let a = export("a", &genesis("a", Some(("f", 0.02, 0.05)), 0.02), "h1");
        let b = export("b", &genesis("b", Some(("f", 0.03, 0.05)), 0.03), "h2");
        let r = check_families(&[&a, &b]);
        assert!(r.findings.is_empty(), "{:?}", r.findings);
        assert_eq!(r.families.len(), 1);
        assert!(r.families[0].fits);
        // The same export twice counts once.
        let r = check_families(&[&a, &b, &a]);
        assert!(r.findings.is_empty(), "{:?}", r.findings);
        assert_eq!(r.families[0].members.len(), 2);

        // An excess: 0.02 + 0.04 > 0.05.
        let c = export("c", &genesis("c", Some(("f", 0.04, 0.05)), 0.04), "h3");
        let r = check_families(&[&a, &c]);
        assert_eq!(r.findings.len(), 1, "{:?}", r.findings);
        assert!(r.findings[0].problem.contains("sum to"), "{:?}", r.findings);
        assert!(!r.families[0].fits);

        // Disagreeing totals; the smaller one binds (0.02 + 0.03 > 0.04).
        let d = export("d", &genesis("d", Some(("f", 0.03, 0.04)), 0.03), "h4");
        let r = check_families(&[&a, &d]);
        assert_eq!(r.findings.len(), 2, "{:?}", r.findings);
        assert!(r.findings[0].problem.contains("agree"), "{:?}", r.findings);

        // A share that is not the member's delta; a holdout outside any family; malformed.
        let e = export("e", &genesis("e", Some(("f", 0.01, 0.05)), 0.03), "h5");
        let r = check_families(&[&e]);
        assert!(
            r.findings[0].problem.contains("own delta"),
            "{:?}",
            r.findings
        );
        let g = export("g", &genesis("g", None, 0.05), "h6");
        let r = check_families(&[&g]);
        assert!(
            r.findings[0].problem.contains("no family"),
            "{:?}",
            r.findings
        );
        let mut bad = genesis("x", None, 0.05);
        bad["family"] = serde_json::json!({"name": "f"});
        let r = check_families(&[&export("x", &bad, "h7")]);
        assert!(
            r.findings[0].problem.contains("malformed"),
            "{:?}",
            r.findings
        );
    }
}
