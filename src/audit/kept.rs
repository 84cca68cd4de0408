//! Kept prediction files (format `holdout-ledger-kept/1`): the parsed predictions of one
//! submission, kept compressed by the daemon under a holdout whose genesis declares
//! `retention.predictions = "kept"`, carried whole by the auditor's export so that the audit can
//! re-score them offline.
//!
//! The file holds the parsed values in the holdout's canonical row order (row ids sorted), the
//! order [`predictions_digest`](super::predictions_digest) reads them in, so the digest of a
//! decoded file is comparable with the digest its entry records. Uncompressed layout: the line
//! `holdout-ledger-kept/1`, then the line `MODELS ROWS KIND` (`classes` or `numbers`), then each
//! model's values, row after row: a class index as a little-endian `u32`, a number as the
//! little-endian bits of its `f64`. The whole is compressed with DEFLATE (zlib wrapper, the
//! pure-Rust `miniz_oxide` backend of `flate2`).

use std::io::{Read, Write};

use serde::{Deserialize, Serialize};

use crate::metric::Predictions;

/// Format tag of a kept file.
pub const KEPT_FORMAT: &str = "holdout-ledger-kept/1";

/// Most values a kept file may announce (a bound on what decoding allocates, whatever the
/// compressed bytes claim): 2^31 values, 16 GiB of numbers.
const MAX_VALUES: u64 = 1 << 31;

/// One kept file as the export carries it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KeptFile {
    /// The answer or sealed entry that scored (or sealed) it.
    pub entry: u64,
    /// Its target.
    pub target: String,
    /// The digest that entry records.
    pub digest: String,
    /// The entry's time (the retention runs from it).
    pub at: String,
    /// The compressed file, base64 (standard alphabet) in the export.
    #[serde(with = "b64")]
    pub data: Vec<u8>,
}

mod b64 {
    use base64::Engine as _;
    use serde::{Deserialize, Deserializer, Serializer};

    pub(super) fn serialize<S: Serializer>(v: &[u8], s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&base64::engine::general_purpose::STANDARD.encode(v))
    }

    pub(super) fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<u8>, D::Error> {
        let text = String::deserialize(d)?;
        base64::engine::general_purpose::STANDARD
            .decode(text.as_bytes())
            .map_err(serde::de::Error::custom)
    }
}

/// The compressed kept file of one submission's parsed predictions (one vector per model).
pub fn encode(preds: &[Predictions]) -> Vec<u8> {
    let rows = preds.first().map_or(0, |p| match p {
        Predictions::Classes(v) => v.len(),
        Predictions::Numbers(v) => v.len(),
    });
    let kind = match preds.first() {
        Some(Predictions::Numbers(_)) => "numbers",
        _ => "classes",
    };
    let mut z = flate2::write::ZlibEncoder::new(Vec::new(), flate2::Compression::default());
    // Writing into a Vec cannot fail.
    let _ = write!(z, "{KEPT_FORMAT}\n{} {rows} {kind}\n", preds.len());
    for p in preds {
        match p {
            Predictions::Classes(v) => {
                for c in v {
                    let _ = z.write_all(&c.to_le_bytes());
                }
            }
            Predictions::Numbers(v) => {
                for x in v {
                    let _ = z.write_all(&x.to_bits().to_le_bytes());
                }
            }
        }
    }
    z.finish().unwrap_or_default()
}

/// Decodes a compressed kept file; the error says what is wrong with it.
pub fn decode(data: &[u8]) -> Result<Vec<Predictions>, String> {
    let mut z = flate2::read::ZlibDecoder::new(data);
    let mut head = Vec::new();
    let mut byte = [0u8; 1];
    let mut lines = 0;
    while lines < 2 {
        match z.read(&mut byte) {
            Ok(1) => {
                if byte[0] == b'\n' {
                    lines += 1;
                }
                head.push(byte[0]);
                if head.len() > 200 {
                    return Err("not a kept predictions file (no header)".into());
                }
            }
            Ok(_) => return Err("truncated before the end of its header".into()),
            Err(e) => return Err(format!("not DEFLATE data: {e}")),
        }
    }
    let head = String::from_utf8(head).map_err(|_| "a header that is not UTF-8".to_string())?;
    let mut it = head.lines();
    if it.next() != Some(KEPT_FORMAT) {
        return Err(format!("not {KEPT_FORMAT}"));
    }
    let fields: Vec<&str> = it.next().unwrap_or("").split(' ').collect();
    let [models, rows, kind] = fields[..] else {
        return Err("a header without MODELS ROWS KIND".into());
    };
    let models: u64 = models
        .parse()
        .map_err(|_| "a bad model count".to_string())?;
    let rows: u64 = rows.parse().map_err(|_| "a bad row count".to_string())?;
    if models.saturating_mul(rows) > MAX_VALUES {
        return Err(format!("{models} models of {rows} rows: too large"));
    }
    let width = match kind {
        "classes" => 4,
        "numbers" => 8,
        other => return Err(format!("unknown kind {other:?}")),
    };
    let mut out = Vec::with_capacity(models as usize);
    let mut buf = vec![0u8; rows as usize * width];
    for _ in 0..models {
        z.read_exact(&mut buf)
            .map_err(|e| format!("truncated values: {e}"))?;
        out.push(if width == 4 {
            Predictions::Classes(
                buf.chunks_exact(4)
                    .map(|b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                    .collect(),
            )
        } else {
            Predictions::Numbers(
                buf.chunks_exact(8)
                    .map(|b| {
                        f64::from_bits(u64::from_le_bytes([
                            b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7],
                        ]))
                    })
                    .collect(),
            )
        });
    }
    if z.read(&mut byte).map_err(|e| e.to_string())? != 0 {
        return Err("bytes after the values its header announces".into());
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trips_classes_and_numbers_bit_for_bit() {
        let c = vec![
            Predictions::Classes(vec![0, 2, 1, 1]),
            Predictions::Classes(vec![1, 1, 1, 0]),
        ];
        assert_eq!(decode(&encode(&c)).unwrap(), c);
        let n = vec![Predictions::Numbers(vec![
            0.1,
            -0.0,
            1e300,
            f64::MIN_POSITIVE,
        ])];
        let back = decode(&encode(&n)).unwrap();
        let (Predictions::Numbers(a), Predictions::Numbers(b)) = (&back[0], &n[0]) else {
            panic!("kind changed");
        };
        assert!(a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits()));
    }

    #[test]
    fn refuses_damaged_files() {
        let good = encode(&[Predictions::Classes(vec![0; 1000])]);
        assert!(decode(&good[..good.len() / 2]).is_err());
        assert!(decode(b"not compressed at all").is_err());
        let mut z = flate2::write::ZlibEncoder::new(Vec::new(), flate2::Compression::default());
        z.write_all(b"holdout-ledger-kept/1\n1 99999999999 numbers\n")
            .unwrap();
        assert!(
            decode(&z.finish().unwrap())
                .unwrap_err()
                .contains("too large")
        );
    }
}
