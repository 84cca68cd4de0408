//! The bodies of ledger entries the engine writes, and what callers are shown of them.
//!
//! An answer entry holds everything needed to replay it (the request, the charge, the exact
//! losses) and everything that was released (symbol, interval, budget after). Exact losses are
//! stripped before an analyst or an organizer of an open holdout sees a record.

use serde::{Deserialize, Serialize};

use crate::metric::Loss;
use crate::stats::accounting::Answer;
use crate::stats::rules::Symbol;

/// Budget position as shown to a caller.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct BudgetView {
    /// Total failure probability.
    pub delta: f64,
    /// Schedule shares used.
    pub spent: f64,
    /// delta - spent.
    pub remaining: f64,
    /// Transcript cost L, nats.
    pub transcript_nats: f64,
    /// Half-width the next query would get at the public reference score.
    pub next_half_width: f64,
    /// Queries that still fit within the tolerance at worst-case cost.
    pub queries_left: u64,
    /// Answered queries (per team under isolated).
    pub answered: u64,
    /// Refused queries (per team under isolated).
    pub refused: u64,
    /// Whether the holdout accepts queries.
    pub open: bool,
    /// Next quota reset, RFC 3339, when a quota applies.
    pub quota_resets_at: Option<String>,
    /// Queries left today under the quota.
    pub quota_left_today: Option<u32>,
}

/// The accounting core's own record of an answer, kept as the canonical JSON text it is
/// recorded with (keys sorted at every depth, serde_json's number format; see
/// [`canonical_json`](crate::ledger::canonical_json)).
///
/// Replays compare it as text with what the core computes again, made canonical the same way:
/// equal texts are equal records, and any change to a recorded field, a field added or one
/// removed makes them differ. Keeping the text instead of a parsed tree is what lets an audit
/// read an answer without building and freeing a map per entry (about a quarter of the
/// parsing thread's time on an all-answer ledger).
#[derive(Debug, Clone)]
pub struct CoreJson(Box<str>);

impl Serialize for CoreJson {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        // Written as the JSON it is (not as a string); the text is checked to be JSON here,
        // on the write path, rather than each time one is made or compared.
        let raw = serde_json::value::RawValue::from_string(self.0.to_string())
            .map_err(serde::ser::Error::custom)?;
        raw.serialize(s)
    }
}

impl<'de> Deserialize<'de> for CoreJson {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<CoreJson, D::Error> {
        let raw = Box::<serde_json::value::RawValue>::deserialize(d)?;
        Ok(CoreJson(raw.into()))
    }
}

impl CoreJson {
    /// The canonical text of `value`.
    pub fn from_value(value: &serde_json::Value) -> CoreJson {
        // The same text as `canonical_json(value)` (a `Value`'s maps sort their keys).
        CoreJson(value.to_string().into_boxed_str())
    }

    /// The canonical text of `value`'s JSON form (through a [`serde_json::Value`], whose maps
    /// sort their keys).
    pub fn of<T: Serialize>(value: &T) -> CoreJson {
        CoreJson::from_value(&serde_json::to_value(value).unwrap_or_default())
    }

    /// The canonical text of an answer, written field by field in sorted key order: the same
    /// text as [`CoreJson::of`] gives (a unit test compares them for every kind of symbol),
    /// without building and freeing a map per answer (a fifth of an audit's replay did that).
    pub fn of_answer(a: &Answer) -> CoreJson {
        // Each value is serialized straight into the text (no string per field, no format
        // machinery: both were most of this function's cost in an audit).
        fn num<T: Serialize>(out: &mut Vec<u8>, key: &str, v: T) {
            out.push(b'"');
            out.extend_from_slice(key.as_bytes());
            out.extend_from_slice(b"\":");
            let mark = out.len();
            if serde_json::to_writer(&mut *out, &v).is_err() {
                out.truncate(mark);
                out.extend_from_slice(b"null");
            }
            out.push(b',');
        }
        let mut out = Vec::with_capacity(320);
        out.push(b'{');
        num(&mut out, "code_nats", a.code_nats);
        num(&mut out, "delta_i", a.delta_i);
        out.extend_from_slice(b"\"interval\":{");
        num(&mut out, "lower", a.interval.lower);
        num(&mut out, "upper", a.interval.upper);
        out.pop();
        out.extend_from_slice(b"},");
        num(&mut out, "level_nats", a.level_nats);
        num(&mut out, "next_half_width", a.next_half_width);
        num(&mut out, "queries_left", a.queries_left);
        num(&mut out, "query_number", a.query_number);
        num(&mut out, "released_score", a.released_score);
        num(&mut out, "remaining", a.remaining);
        num(&mut out, "spent", a.spent);
        num(&mut out, "statement", a.statement.as_str());
        out.extend_from_slice(b"\"symbol\":{");
        match a.symbol {
            Symbol::Cell { index } => {
                num(&mut out, "index", index);
                num(&mut out, "kind", "cell");
            }
            Symbol::Pass => num(&mut out, "kind", "pass"),
            Symbol::Fail => num(&mut out, "kind", "fail"),
            Symbol::NoImprovement => num(&mut out, "kind", "no_improvement"),
            Symbol::NewBest { cell } => {
                num(&mut out, "cell", cell);
                num(&mut out, "kind", "new_best");
            }
            Symbol::Best { model, cell } => {
                num(&mut out, "cell", cell);
                num(&mut out, "kind", "best");
                num(&mut out, "model", model);
            }
        }
        out.pop();
        out.extend_from_slice(b"},");
        num(&mut out, "transcript_nats", a.transcript_nats);
        out.pop();
        out.push(b'}');
        // serde_json writes UTF-8 only, and the keys are ASCII.
        CoreJson(
            String::from_utf8(out)
                .unwrap_or_else(|e| String::from_utf8_lossy(e.as_bytes()).into_owned())
                .into_boxed_str(),
        )
    }

    /// `null`: a record shown without the core's own part.
    pub fn null() -> CoreJson {
        CoreJson("null".into())
    }

    /// The text as recorded.
    pub fn as_str(&self) -> &str {
        &self.0
    }

    /// The record parsed (`Null` if the text is not JSON, which a parsed entry's cannot be).
    pub fn to_value(&self) -> serde_json::Value {
        serde_json::from_str(&self.0).unwrap_or_default()
    }

    /// The record parsed as `T`.
    pub fn parse<T: for<'de> Deserialize<'de>>(&self) -> Option<T> {
        serde_json::from_str(&self.0).ok()
    }
}

impl PartialEq for CoreJson {
    fn eq(&self, other: &CoreJson) -> bool {
        self.as_str() == other.as_str()
    }
}

/// A released answer, as recorded in the ledger.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AnswerRecord {
    /// Holdout.
    pub holdout: String,
    /// Target name.
    pub target: String,
    /// Target index.
    pub target_index: usize,
    /// User who asked.
    pub user: String,
    /// Team (accounting identity).
    pub team: String,
    /// Query number (per team under isolated).
    pub query: u64,
    /// Released symbol, as text.
    pub symbol: String,
    /// Released score, if the rule releases one.
    pub score: Option<f64>,
    /// Reported interval, lower end.
    pub lower: f64,
    /// Reported interval, upper end.
    pub upper: f64,
    /// Schedule share (per model).
    pub delta_i: f64,
    /// ln(1/d_i).
    pub level_nats: f64,
    /// Code length of the symbol.
    pub code_nats: f64,
    /// What the symbol certifies.
    pub statement: String,
    /// Chosen model of a batch.
    pub best_model: Option<u32>,
    /// Number of models.
    pub models: u32,
    /// Model display names.
    pub model_names: Vec<String>,
    /// Digest of the parsed predictions.
    pub digest: String,
    /// Client request id.
    pub request_id: Option<String>,
    /// Note.
    pub note: String,
    /// Time, RFC 3339 UTC.
    pub at: String,
    /// Budget after the answer.
    pub budget: BudgetView,
    /// The accounting core's own record of the answer (for replay).
    pub core: CoreJson,
    /// Exact losses per model. Hidden from analysts, and from organizers while open.
    pub exact: Option<Vec<Loss>>,
}

/// A refusal, as recorded in the ledger.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RefusalRecord {
    /// Holdout.
    pub holdout: String,
    /// Target name.
    pub target: String,
    /// User who asked.
    pub user: String,
    /// Team.
    pub team: String,
    /// Machine-readable reason.
    pub reason: String,
    /// Explanation.
    pub message: String,
    /// Request id.
    pub request_id: Option<String>,
    /// Note.
    pub note: String,
    /// Time.
    pub at: String,
    /// Budget at the time.
    pub budget: BudgetView,
}

/// A sealed entry of a final round, as recorded in the ledger when it arrives. It carries the
/// charge (taken now, DESIGN 4.3 `sealed` (d)) and nothing about the score.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SealedRecord {
    /// Holdout.
    pub holdout: String,
    /// Target name.
    pub target: String,
    /// Target index.
    pub target_index: usize,
    /// User who submitted.
    pub user: String,
    /// Team (accounting identity).
    pub team: String,
    /// Position in the round (0-based); outcomes at the close come in this order.
    pub ticket: u64,
    /// Query number (per pool).
    pub query: u64,
    /// Schedule share taken.
    pub delta_i: f64,
    /// ln(1/d_i) the answer will use at the close.
    pub level_nats: f64,
    /// Digest of the parsed predictions.
    pub digest: String,
    /// Whether the team marked this entry as its selected one.
    pub marked: bool,
    /// Client request id.
    pub request_id: Option<String>,
    /// Note.
    pub note: String,
    /// Time, RFC 3339 UTC.
    pub at: String,
}

/// A paired comparison between two neighbours of a ranking (DESIGN 4.6).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Comparison {
    /// Ticket of the better-ranked entry (A).
    pub ahead: u64,
    /// Ticket of the entry ranked just below (B).
    pub behind: u64,
    /// Interval for `R(A) - R(B)`.
    pub lower: f64,
    /// Interval for `R(A) - R(B)`.
    pub upper: f64,
    /// ln(1/d) of the comparison.
    pub level_nats: f64,
    /// True when the interval excludes 0: the data tell the two ranks apart.
    pub distinguishable: bool,
    /// 0-1 loss: rows where A is wrong and B right.
    pub a_only: Option<u64>,
    /// 0-1 loss: rows where B is wrong and A right.
    pub b_only: Option<u64>,
    /// Bounded loss: sum of the per-row differences `l_A - l_B`.
    pub sum_diff: Option<f64>,
    /// Bounded loss: sum of their squares.
    pub sum_sq_diff: Option<f64>,
    /// Target both entries answer (core version 2 ranks within each target; absent before).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target: Option<String>,
}

/// One ranked entry: a team's selected entry with its released answer.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RankedEntry {
    /// Rank, from 1.
    pub rank: u64,
    /// Team.
    pub team: String,
    /// Ticket in the round.
    pub ticket: u64,
    /// Released score.
    pub score: Option<f64>,
    /// Interval.
    pub lower: f64,
    /// Interval.
    pub upper: f64,
    /// Digest of the entry's predictions.
    pub digest: String,
    /// Target of the entry; ranks count within it (core version 2; absent before).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target: Option<String>,
}

/// The close of a sealed round: every entry answered at once, then the ranking of the teams'
/// selected entries with paired comparisons between neighbours. Carries the exact outcomes and
/// the comparisons' statistics so an audit can replay it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RoundRecord {
    /// Holdout.
    pub holdout: String,
    /// `deadline` or `organizer`.
    pub trigger: String,
    /// Who closed it (`daemon` at the deadline).
    pub by: String,
    /// Time of the close.
    pub at: String,
    /// One answer per entry, in ticket order (exact losses kept for replay).
    pub answers: Vec<AnswerRecord>,
    /// The teams' selected entries, best first.
    pub ranking: Vec<RankedEntry>,
    /// Comparisons between neighbours of the ranking, top first.
    pub comparisons: Vec<Comparison>,
    /// Part of delta the comparisons use, split evenly over every pair of ranked entries.
    pub ranking_delta: f64,
    /// Pairs the reserve is split over: `K (K - 1) / 2`, summed over the targets from core
    /// version 2 (entries are compared only within their target).
    pub pairs: u64,
}

#[cfg(test)]
mod tests {
    use super::CoreJson;

    /// The text is the ledger's canonical JSON of the value, whatever order it was built in.
    #[test]
    fn core_text_is_the_canonical_json() {
        let v = serde_json::json!({"z": 1.5, "a": {"y": [1, 2], "b": null}, "m": "x"});
        assert_eq!(
            CoreJson::from_value(&v).as_str(),
            crate::ledger::canonical_json(&v)
        );
        assert_eq!(
            CoreJson::from_value(&v).as_str(),
            r#"{"a":{"b":null,"y":[1,2]},"m":"x","z":1.5}"#
        );
        assert_eq!(CoreJson::from_value(&v).to_value(), v);
        assert_eq!(CoreJson::null().as_str(), "null");
    }

    /// The answer's hand-written canonical text is the text through a `Value` (keys sorted at
    /// every depth), for every kind of symbol, absent and non-finite numbers, and a statement
    /// that needs escaping. A field added to `Answer` fails to compile here until it is written.
    #[test]
    fn an_answers_text_is_its_canonical_json() {
        use crate::stats::accounting::Answer;
        use crate::stats::interval::Interval;
        use crate::stats::rules::Symbol;
        let symbols = [
            Symbol::Cell { index: 7 },
            Symbol::Pass,
            Symbol::Fail,
            Symbol::NoImprovement,
            Symbol::NewBest { cell: 12 },
            Symbol::Best { model: 3, cell: 0 },
        ];
        for (i, symbol) in symbols.into_iter().enumerate() {
            for odd in [false, true] {
                let a = Answer {
                    symbol,
                    released_score: (!odd).then_some(0.07),
                    interval: Interval {
                        lower: 0.0123456789,
                        upper: if odd { 1.0 } else { 0.2 },
                    },
                    statement: format!("error \"at most\" 0.2 \\ line\n{i} \u{e9}"),
                    query_number: 40 + i as u64,
                    delta_i: 1.25e-7,
                    level_nats: 17.5,
                    code_nats: if odd { 0.0 } else { 4.61512051684126 },
                    spent: 0.049999999999999996,
                    remaining: 1e-300,
                    transcript_nats: 123.0,
                    next_half_width: if odd { f64::INFINITY } else { f64::NAN },
                    queries_left: if odd { u64::MAX } else { 0 },
                };
                let fast = CoreJson::of_answer(&a);
                assert_eq!(
                    fast.as_str(),
                    CoreJson::of(&a).as_str(),
                    "{symbol:?}, odd {odd}"
                );
                // Written and read back through a record, it is the same text.
                let back: CoreJson =
                    serde_json::from_str(&serde_json::to_string(&fast).unwrap()).unwrap();
                assert_eq!(back, fast);
            }
        }
    }
}
