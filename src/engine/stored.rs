//! A holdout's rows in SQLite: its ids as one blob of text and one blob of end offsets
//! (`holdout_ids`, migration 0005), its labels as one packed blob per target
//! (`sealed_labels.encoding`), all written and read through SQLite's incremental blob I/O so
//! no second copy is made on the way. Holdouts created before keep their ids one row each in
//! `holdout_rows` (and their labels as JSON): they are read from there when they have no blob.

use std::io::{BufReader, BufWriter, Read, Write};

use rusqlite::blob::ZeroBlob;
use rusqlite::{Connection, MAIN_DB, OptionalExtension, params};
use sha2::{Digest, Sha256};

use super::rows::{Sorted, TextArena};
use crate::error::{Error, Result};

/// Buffer for blob reads and writes.
const BUF: usize = 256 * 1024;

fn io_error(what: &str, e: std::io::Error) -> Error {
    Error::Internal(format!("{what}: {e}"))
}

/// Writes the holdout's ids and labels in the canonical order; gives back the ids digest
/// ([`Sorted::ids_digest`], computed on the way).
pub(super) fn write_rows(tx: &Connection, holdout_id: i64, rows: &Sorted) -> Result<String> {
    let n = rows.len();
    tx.execute(
        "INSERT INTO holdout_ids (holdout_id, row_count, ids, ends) VALUES (?1, ?2, ?3, ?4)",
        params![
            holdout_id,
            n as i64,
            ZeroBlob(rows.id_bytes() as u64),
            ZeroBlob(4 * n as u64)
        ],
    )?;
    // One pass over the ids in the canonical order writes their blob, hashes them and keeps
    // their end offsets, written next: one blob at a time, for while two handles are open on
    // one row each write through one makes SQLite drop the other's cache of overflow pages
    // and walk the page chain again.
    let mut digest = Sha256::new();
    let mut ends: Vec<u32> = Vec::with_capacity(n);
    {
        let mut w = BufWriter::with_capacity(
            BUF,
            tx.blob_open(MAIN_DB, "holdout_ids", "ids", holdout_id, false)?,
        );
        let mut end = 0u32;
        rows.id_blocks(|text, lens| {
            digest.update(text);
            let mut at = 0;
            for &len in lens {
                end += len;
                ends.push(end);
                let len = len as usize;
                w.write_all(&text[at..at + len])
                    .map_err(|e| io_error("writing ids", e))?;
                at += len + 1;
            }
            Ok(())
        })?;
        w.flush().map_err(|e| io_error("writing ids", e))?;
    }
    {
        let mut w = BufWriter::with_capacity(
            BUF,
            tx.blob_open(MAIN_DB, "holdout_ids", "ends", holdout_id, false)?,
        );
        for end in &ends {
            w.write_all(&end.to_le_bytes())
                .map_err(|e| io_error("writing ids", e))?;
        }
        w.flush().map_err(|e| io_error("writing ids", e))?;
    }
    drop(ends);
    for t in 0..rows.targets.len() {
        let (encoding, len) = rows.stored_as(t);
        tx.execute(
            "INSERT INTO sealed_labels (holdout_id, target, labels, encoding)
             VALUES (?1, ?2, ?3, ?4)",
            params![holdout_id, t as i64, ZeroBlob(len as u64), encoding],
        )?;
        let blob = tx.blob_open(
            MAIN_DB,
            "sealed_labels",
            "labels",
            tx.last_insert_rowid(),
            false,
        )?;
        let mut w = BufWriter::with_capacity(BUF, blob);
        rows.label_blocks(t, |block| {
            w.write_all(block)
                .map_err(|e| io_error("writing labels", e))
        })?;
        w.flush().map_err(|e| io_error("writing labels", e))?;
    }
    Ok(hex::encode(digest.finalize()))
}

/// The holdout's ids from their blobs, in the canonical order; `None` for a holdout stored
/// before the blobs (its ids are in `holdout_rows`).
pub(super) fn read_ids(conn: &Connection, holdout_id: i64) -> Result<Option<TextArena>> {
    let found: Option<(i64, i64)> = conn
        .query_row(
            "SELECT length(ids), length(ends) FROM holdout_ids WHERE holdout_id = ?1",
            [holdout_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .optional()?;
    let Some((text_len, ends_len)) = found else {
        return Ok(None);
    };
    let mut text = Vec::with_capacity(text_len as usize);
    conn.blob_open(MAIN_DB, "holdout_ids", "ids", holdout_id, true)?
        .read_to_end(&mut text)
        .map_err(|e| io_error("reading ids", e))?;
    let mut ends = Vec::with_capacity(ends_len as usize / 4);
    let mut r = BufReader::with_capacity(
        BUF,
        conn.blob_open(MAIN_DB, "holdout_ids", "ends", holdout_id, true)?,
    );
    let mut b = [0u8; 4];
    for _ in 0..ends_len / 4 {
        r.read_exact(&mut b)
            .map_err(|e| io_error("reading ids", e))?;
        ends.push(u32::from_le_bytes(b));
    }
    TextArena::from_parts(text, ends)
        .map(Some)
        .map_err(|m| Error::Internal(format!("stored ids of holdout {holdout_id}: {m}")))
}

/// A target's stored labels: the encoding and the blob.
pub(super) fn read_labels(
    conn: &Connection,
    holdout_id: i64,
    target: usize,
) -> Result<(String, Vec<u8>)> {
    let (rowid, encoding, len): (i64, String, i64) = conn.query_row(
        "SELECT rowid, encoding, length(labels) FROM sealed_labels
         WHERE holdout_id = ?1 AND target = ?2",
        params![holdout_id, target as i64],
        |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
    )?;
    let mut blob = Vec::with_capacity(len as usize);
    conn.blob_open(MAIN_DB, "sealed_labels", "labels", rowid, true)?
        .read_to_end(&mut blob)
        .map_err(|e| io_error("reading labels", e))?;
    Ok((encoding, blob))
}

/// Ids of a stored holdout one at a time, in the canonical order, read through a small buffer.
struct BlobIds<'c> {
    text: BufReader<rusqlite::blob::Blob<'c>>,
    ends: BufReader<rusqlite::blob::Blob<'c>>,
    left: u64,
    prev: u32,
    current: Vec<u8>,
}

impl<'c> BlobIds<'c> {
    fn open(conn: &'c Connection, holdout_id: i64, rows: u64) -> Result<BlobIds<'c>> {
        Ok(BlobIds {
            text: BufReader::with_capacity(
                BUF,
                conn.blob_open(MAIN_DB, "holdout_ids", "ids", holdout_id, true)?,
            ),
            ends: BufReader::with_capacity(
                BUF,
                conn.blob_open(MAIN_DB, "holdout_ids", "ends", holdout_id, true)?,
            ),
            left: rows,
            prev: 0,
            current: Vec::new(),
        })
    }

    /// The next id, or `None` after the last.
    fn next_id(&mut self) -> Result<Option<&[u8]>> {
        if self.left == 0 {
            return Ok(None);
        }
        self.left -= 1;
        let mut b = [0u8; 4];
        self.ends
            .read_exact(&mut b)
            .map_err(|e| io_error("reading ids", e))?;
        let end = u32::from_le_bytes(b);
        let len = end
            .checked_sub(self.prev)
            .ok_or_else(|| Error::Internal("stored id offsets decrease".into()))?;
        self.prev = end;
        self.current.resize(len as usize, 0);
        self.text
            .read_exact(&mut self.current)
            .map_err(|e| io_error("reading ids", e))?;
        Ok(Some(&self.current))
    }
}

/// The first id (in the canonical order) of `rows` that already belongs to another holdout, and
/// that holdout's name: each stored holdout's ids are merged with these (both sorted), a
/// buffer at a time, so the check holds no second copy of anyone's ids.
pub(super) fn first_overlap(tx: &Connection, rows: &Sorted) -> Result<Option<(String, String)>> {
    let mut best: Option<(String, String)> = None;
    let mut consider = |id: &str, holdout: String| {
        if best.as_ref().is_none_or(|(b, _)| id < b.as_str()) {
            best = Some((id.to_string(), holdout));
        }
    };
    let stored: Vec<(i64, i64, String)> = {
        let mut stmt = tx.prepare(
            "SELECT i.holdout_id, i.row_count, h.name FROM holdout_ids i
             JOIN holdouts h ON h.id = i.holdout_id WHERE h.withdrawn_at IS NULL",
        )?;
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
            .collect::<std::result::Result<_, _>>()?
    };
    for (holdout_id, count, name) in stored {
        let mut theirs = BlobIds::open(tx, holdout_id, count as u64)?;
        let mut ours = rows.ids().peekable();
        while let Some(other) = theirs.next_id()? {
            while ours.next_if(|id| id.as_bytes() < other).is_some() {}
            match ours.peek() {
                None => break,
                Some(id) if id.as_bytes() == other => {
                    consider(id, name.clone());
                    break;
                }
                Some(_) => {}
            }
        }
    }
    // Holdouts stored one row per id: the primary key's index gives them in order.
    // (Withdrawn holdouts' rows are free again.)
    let mut stmt = tx.prepare(
        "SELECT row_id, holdout_id FROM holdout_rows
         WHERE holdout_id NOT IN (SELECT id FROM holdouts WHERE withdrawn_at IS NOT NULL)
         ORDER BY row_id",
    )?;
    let mut old = stmt.query([])?;
    let mut ours = rows.ids().peekable();
    while let Some(r) = old.next()? {
        let other = r
            .get_ref(0)?
            .as_str()
            .map_err(|e| Error::Internal(format!("a stored row id: {e}")))?;
        while ours.next_if(|id| *id < other).is_some() {}
        match ours.peek() {
            None => break,
            Some(id) if *id == other => {
                let holdout_id: i64 = r.get(1)?;
                let name: String = tx.query_row(
                    "SELECT name FROM holdouts WHERE id = ?1",
                    [holdout_id],
                    |r| r.get(0),
                )?;
                consider(id, name);
                break;
            }
            Some(_) => {}
        }
    }
    Ok(best)
}

/// A holdout's ids, and its label columns as text or what is wrong with them.
pub(crate) type StoredTexts = (Vec<String>, std::result::Result<Vec<Vec<String>>, String>);

/// A stored holdout's ids and each target's label texts, for an audit that reads the labels
/// from a database file; the labels are `Err` (with what is wrong) when they do not decode.
///
/// # Errors
/// A database that cannot be read.
pub(crate) fn texts(conn: &Connection, holdout_id: i64) -> Result<StoredTexts> {
    let ids: Vec<String> = match read_ids(conn, holdout_id)? {
        Some(arena) => arena.iter().map(str::to_string).collect(),
        None => {
            let mut stmt =
                conn.prepare("SELECT row_id FROM holdout_rows WHERE holdout_id = ?1 ORDER BY pos")?;
            stmt.query_map([holdout_id], |r| r.get::<_, String>(0))?
                .collect::<std::result::Result<_, _>>()?
        }
    };
    let targets_json: String = conn.query_row(
        "SELECT targets_json FROM holdouts WHERE id = ?1",
        [holdout_id],
        |r| r.get(0),
    )?;
    let targets: Vec<super::TargetDecl> = match serde_json::from_str(&targets_json) {
        Ok(t) => t,
        Err(e) => return Ok((ids, Err(format!("the stored targets are unreadable: {e}")))),
    };
    let mut columns = Vec::with_capacity(targets.len());
    for (t, target) in targets.iter().enumerate() {
        let (encoding, blob) = read_labels(conn, holdout_id, t)?;
        match super::rows::stored_texts(target, &encoding, &blob) {
            Ok(col) => columns.push(col),
            Err(e) => {
                return Ok((
                    ids,
                    Err(format!(
                        "the sealed labels of target {t} in the database are unreadable: {e}"
                    )),
                ));
            }
        }
    }
    Ok((ids, Ok(columns)))
}
