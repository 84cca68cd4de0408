//! The export file: JSON Lines, one header line then every ledger entry in order.
//!
//! Header: `{"format":"holdout-ledger-export/1","holdout":NAME,"exported_at":T,
//! "encoding":ENCODING,"binary":VERSION,"chains":{NAME:COUNT,"@users":COUNT}}`.
//! Entry lines: `{"chain","seq","kind","body","salt","prev_hash","hash"}`, where `body` is the
//! canonical JSON text exactly as hashed (a string, so re-encoding cannot change the bytes).
//! The holdout's chain comes first, then the identity chain `@users`. Labels are never part of
//! it: the genesis entry carries only their digest.
//!
//! Under a retention that keeps prediction files, the files still kept follow the entries, one
//! line each, `{"kept":{"entry","target","digest","at","data"}}` (`data`: the compressed
//! [`kept`](super::kept) file in base64), and the header counts them (`"kept":N`; absent when
//! there are none, as in every export written before).

use std::io::{BufRead, Write};
use std::path::Path;

use serde::{Deserialize, Serialize};

use super::kept::KeptFile;
use crate::error::{Error, Result};
use crate::ledger::{self, Entry};

/// Version tag of the export format.
pub const EXPORT_FORMAT: &str = "holdout-ledger-export/1";

/// The first line of an export.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Header {
    /// Always [`EXPORT_FORMAT`].
    pub format: String,
    /// The holdout exported.
    pub holdout: String,
    /// Time of export, RFC 3339 UTC.
    pub exported_at: String,
    /// The holdout chain's entry encoding ([`ledger::Encoding`]).
    pub encoding: String,
    /// Version of the binary that wrote the export.
    pub binary: String,
    /// Entries per chain, as written.
    pub chains: std::collections::BTreeMap<String, u64>,
    /// Kept prediction files carried after the entries (absent: none).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kept: Option<u64>,
}

/// A kept-file line of an export.
#[derive(Serialize, Deserialize)]
struct KeptLine {
    kept: KeptFile,
}

/// A parsed export: the holdout's chain and the identity chain.
#[derive(Debug, Clone)]
pub struct Export {
    /// The header.
    pub header: Header,
    /// The holdout's entries, in file order.
    pub entries: Vec<Entry>,
    /// `@users` entries, in file order.
    pub users: Vec<Entry>,
    /// Entry lines whose chain is neither (named in the audit report).
    pub foreign: Vec<(u64, String)>,
    /// Kept prediction files, in entry order.
    pub kept: Vec<KeptFile>,
}

impl Export {
    /// Assembles an export of `holdout` from its chain and the identity chain.
    pub fn new(holdout: &str, exported_at: &str, entries: Vec<Entry>, users: Vec<Entry>) -> Self {
        let mut chains = std::collections::BTreeMap::new();
        chains.insert(holdout.to_string(), entries.len() as u64);
        chains.insert(ledger::USERS_CHAIN.to_string(), users.len() as u64);
        Export {
            header: Header {
                format: EXPORT_FORMAT.into(),
                holdout: holdout.into(),
                exported_at: exported_at.into(),
                encoding: ledger::Encoding::of_chain(&entries).name().into(),
                binary: env!("CARGO_PKG_VERSION").into(),
                chains,
                kept: None,
            },
            entries,
            users,
            foreign: Vec::new(),
            kept: Vec::new(),
        }
    }

    /// The export with these kept prediction files (counted in the header).
    pub fn with_kept(mut self, kept: Vec<KeptFile>) -> Export {
        self.header.kept = (!kept.is_empty()).then_some(kept.len() as u64);
        self.kept = kept;
        self
    }

    /// Writes the export as JSON Lines.
    pub fn write_to(&self, mut out: impl Write) -> std::io::Result<()> {
        serde_json::to_writer(&mut out, &self.header)?;
        out.write_all(b"\n")?;
        for e in self.entries.iter().chain(&self.users) {
            serde_json::to_writer(&mut out, e)?;
            out.write_all(b"\n")?;
        }
        for k in &self.kept {
            serde_json::to_writer(&mut out, &KeptLine { kept: k.clone() })?;
            out.write_all(b"\n")?;
        }
        out.flush()
    }

    /// Writes the export to a new file (refuses to overwrite).
    pub fn write_file(&self, path: &Path) -> Result<()> {
        let file = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(path)
            .map_err(|e| {
                Error::invalid(
                    path.display().to_string(),
                    format!("cannot create (it must not exist yet): {e}"),
                )
            })?;
        self.write_to(std::io::BufWriter::new(file))
            .map_err(|e| Error::invalid(path.display().to_string(), format!("write failed: {e}")))
    }

    /// Parses an export; `source` names it in errors (`FILE:LINE: problem`).
    pub fn parse(source: &str, input: impl BufRead) -> Result<Export> {
        let mut lines = input.lines();
        let bad = |line: u64, msg: String| Error::invalid(format!("{source}:{line}"), msg);
        let first = lines
            .next()
            .ok_or_else(|| bad(1, "empty file: no export header".into()))?
            .map_err(|e| bad(1, e.to_string()))?;
        let raw: serde_json::Value = serde_json::from_str(&first)
            .map_err(|e| bad(1, format!("not an export header: {e}")))?;
        if raw["format"].as_str() != Some(EXPORT_FORMAT) {
            return Err(bad(
                1,
                format!(
                    "format {} is not one this binary reads ({EXPORT_FORMAT})",
                    raw["format"]
                ),
            ));
        }
        let header: Header = serde_json::from_value(raw)
            .map_err(|e| bad(1, format!("not an export header: {e}")))?;
        let mut out = Export {
            header,
            entries: Vec::new(),
            users: Vec::new(),
            foreign: Vec::new(),
            kept: Vec::new(),
        };
        for (i, line) in lines.enumerate() {
            let n = i as u64 + 2;
            let line = line.map_err(|e| bad(n, e.to_string()))?;
            if line.trim().is_empty() {
                continue;
            }
            if line.starts_with("{\"kept\":") {
                let k: KeptLine = serde_json::from_str(&line)
                    .map_err(|e| bad(n, format!("not a kept prediction file: {e}")))?;
                out.kept.push(k.kept);
                continue;
            }
            let e: Entry =
                serde_json::from_str(&line).map_err(|e| bad(n, format!("not an entry: {e}")))?;
            if e.chain == out.header.holdout {
                out.entries.push(e);
            } else if e.chain == ledger::USERS_CHAIN {
                out.users.push(e);
            } else {
                out.foreign.push((n, e.chain));
            }
        }
        Ok(out)
    }

    /// Reads an export file.
    pub fn read(path: &Path) -> Result<Export> {
        let file = std::fs::File::open(path)
            .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot open: {e}")))?;
        Export::parse(
            &path.display().to_string(),
            std::io::BufReader::with_capacity(1 << 20, file),
        )
    }
}
