//! What a policy buys for `n` rows, printed by `create` before anything is sent.

use serde_json::{Value, json};

use super::show;
use crate::proto::v1::{Policy, Target};

/// A plan in both renderings.
#[derive(Debug, Clone)]
pub struct Plan {
    /// For people.
    pub text: String,
    /// For scripts.
    pub json: Value,
}

/// Describes what the policy buys for `n` rows.
pub fn describe(n: u64, policy: &Policy, targets: &[Target], expected_error: f64) -> Plan {
    let _ = expected_error;
    let mut text = format!("{n} rows\npolicy     {}", show::policy_text(policy));
    for t in targets {
        text.push_str(&format!("\ntarget     {}", show::target_text(t)));
    }
    Plan {
        text,
        json: json!({ "rows": n, "policy": show::policy_json(policy) }),
    }
}
