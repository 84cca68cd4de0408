//! Prediction digests over parsed values (DESIGN 5), shared by the daemon (idempotency, repeat
//! answers) and the audit (`--find`, re-scoring), so both compute it with one function.

use sha2::{Digest, Sha256};

use crate::metric::Predictions;

/// SHA-256 over the parsed values in row-id order (not the file's bytes), so a re-exported file
/// with other float formatting or row order has the same digest. `classes` maps class indices
/// back to their declared names; `preds` holds one vector per model of the query.
pub fn predictions_digest(target: &str, classes: &[String], preds: &[Predictions]) -> String {
    let mut h = Sha256::new();
    h.update(format!("holdout-ledger-predictions/1\n{target}\n{}\n", preds.len()).as_bytes());
    for p in preds {
        match p {
            Predictions::Classes(v) => {
                for c in v {
                    h.update(classes[*c as usize].as_bytes());
                    h.update(b"\n");
                }
            }
            Predictions::Numbers(v) => {
                for x in v {
                    // Normalise -0.0 so it digests like 0.0.
                    let x = if *x == 0.0 { 0.0 } else { *x };
                    h.update(x.to_bits().to_le_bytes());
                }
            }
        }
        h.update(b"--\n");
    }
    hex::encode(h.finalize())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn negative_zero_and_formatting_do_not_matter_but_values_do() {
        let a = predictions_digest("t", &[], &[Predictions::Numbers(vec![0.0, 0.25])]);
        let b = predictions_digest("t", &[], &[Predictions::Numbers(vec![-0.0, 2.5e-1])]);
        let c = predictions_digest("t", &[], &[Predictions::Numbers(vec![0.0, 0.26])]);
        assert_eq!(a, b);
        assert_ne!(a, c);
        let other_target = predictions_digest("u", &[], &[Predictions::Numbers(vec![0.0, 0.25])]);
        assert_ne!(a, other_target);
    }
}
