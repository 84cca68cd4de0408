//! A holdout's rows in little memory: every id in one text arena with the end offset of each,
//! in the canonical (sorted) order, found through a hash table of row numbers built the first
//! time a lookup needs it; labels packed ([`Labels`]: a byte per row for class labels).
//!
//! A 10M-row holdout with 10-byte ids takes about 100 MB of id text, 40 MB of offsets and 10 MB
//! of labels per class target, where one `String` per id and a map from each id to its row took
//! more than ten times that. [`NewRows`] builds a holdout the same way as its labels arrive,
//! chunk by chunk, and checks them in the canonical order when they are complete.

use std::collections::HashMap;
use std::hash::BuildHasher;
use std::sync::OnceLock;

use sha2::{Digest, Sha256};

use super::create::{TargetDecl, check_targets, quote};
use crate::error::{Error, Result};
use crate::metric::Labels;

/// Texts (row ids, numeric label cells) in one buffer, each found by its end offset.
#[derive(Debug, Default, Clone)]
pub(crate) struct TextArena {
    text: String,
    ends: Vec<u32>,
}

impl TextArena {
    /// An arena with room for `rows` texts of about `bytes` bytes in all.
    pub(crate) fn with_capacity(rows: usize, bytes: usize) -> TextArena {
        TextArena {
            text: String::with_capacity(bytes),
            ends: Vec::with_capacity(rows),
        }
    }

    /// An arena from stored parts: the texts one after another, and each one's end offset.
    ///
    /// # Errors
    /// Text that is not UTF-8, and offsets that decrease, pass the end or split a character.
    pub(crate) fn from_parts(text: Vec<u8>, ends: Vec<u32>) -> std::result::Result<Self, String> {
        let text = String::from_utf8(text).map_err(|_| "the text is not UTF-8".to_string())?;
        let mut prev = 0u32;
        for &e in &ends {
            if e < prev || e as usize > text.len() || !text.is_char_boundary(e as usize) {
                return Err(format!("offset {e} is out of order or splits a character"));
            }
            prev = e;
        }
        if prev as usize != text.len() {
            return Err(format!(
                "the offsets end at {prev}, the text at {}",
                text.len()
            ));
        }
        Ok(TextArena { text, ends })
    }

    /// Appends a text.
    ///
    /// # Errors
    /// When the arena would pass 4 GiB (offsets are 32-bit).
    pub(crate) fn push(&mut self, s: &str) -> Result<()> {
        let end = u32::try_from(self.text.len() + s.len()).map_err(|_| {
            Error::invalid(
                "labels",
                "the row ids (or label texts) of one holdout take more than 4 GiB",
            )
        })?;
        self.text.push_str(s);
        self.ends.push(end);
        Ok(())
    }

    /// Number of texts.
    pub(crate) fn len(&self) -> usize {
        self.ends.len()
    }

    /// Text `i`.
    pub(crate) fn get(&self, i: usize) -> &str {
        let start = if i == 0 { 0 } else { self.ends[i - 1] as usize };
        &self.text[start..self.ends[i] as usize]
    }

    /// The texts in order.
    pub(crate) fn iter(&self) -> impl ExactSizeIterator<Item = &str> + '_ {
        (0..self.len()).map(|i| self.get(i))
    }

    /// Bytes of text.
    pub(crate) fn text_len(&self) -> usize {
        self.text.len()
    }

    /// Releases spare capacity.
    fn shrink(&mut self) {
        self.text.shrink_to_fit();
        self.ends.shrink_to_fit();
    }
}

/// A loaded holdout's row ids, in the canonical order, with the row of each id.
pub(crate) struct Rows {
    ids: TextArena,
    /// Row numbers under a fast hash of their ids (foldhash, seeded per process), built by the
    /// first lookup: a holdout whose submissions all arrive in the declared order never pays
    /// for it.
    index: OnceLock<hashbrown::HashTable<u32>>,
    hasher: hashbrown::DefaultHashBuilder,
}

impl std::fmt::Debug for Rows {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Rows")
            .field("rows", &self.ids.len())
            .field("indexed", &self.index.get().is_some())
            .finish()
    }
}

impl Rows {
    /// Rows over ids already in the canonical order.
    pub(crate) fn new(mut ids: TextArena) -> Rows {
        ids.shrink();
        Rows {
            ids,
            index: OnceLock::new(),
            hasher: hashbrown::DefaultHashBuilder::default(),
        }
    }

    /// Number of rows.
    pub(crate) fn len(&self) -> usize {
        self.ids.len()
    }

    /// The id of row `i`.
    pub(crate) fn id(&self, i: usize) -> &str {
        self.ids.get(i)
    }

    /// The ids in row order.
    pub(crate) fn iter(&self) -> impl ExactSizeIterator<Item = &str> + '_ {
        self.ids.iter()
    }

    /// The row of `id`, if the holdout has it.
    pub(crate) fn position(&self, id: &str) -> Option<u32> {
        let index = self.index.get_or_init(|| self.build_index());
        index
            .find(self.hasher.hash_one(id), |&r| {
                self.ids.get(r as usize) == id
            })
            .copied()
    }

    fn build_index(&self) -> hashbrown::HashTable<u32> {
        let (ids, hasher) = (&self.ids, &self.hasher);
        let rehash = |&r: &u32| hasher.hash_one(ids.get(r as usize));
        let mut index = hashbrown::HashTable::with_capacity(ids.len());
        for (r, id) in ids.iter().enumerate() {
            index.insert_unique(hasher.hash_one(id), r as u32, rehash);
        }
        index
    }
}

/// One label column as it arrives: class indices packed, or numbers with their text (the
/// labels digest and the stored labels use the text as written, trimmed).
#[derive(Debug)]
enum NewColumn {
    Bytes(Vec<u8>),
    Wide(Vec<u32>),
    Numbers(Vec<f64>, TextArena),
}

/// A holdout being built from its label rows, in the order they arrive: ids in one arena,
/// labels converted and packed as they come. Nothing is refused before [`NewRows::finish`]
/// except a malformed row, so the checks run in the canonical order whatever the arrival
/// order (the same errors as a holdout sent whole).
#[derive(Debug)]
pub struct NewRows {
    targets: Vec<TargetDecl>,
    ids: TextArena,
    columns: Vec<NewColumn>,
    /// Class lookup per class target (when it has more than a few classes).
    lookups: Vec<Option<HashMap<String, u32>>>,
    /// Labels outside their declared domain, by target: (arrival row, the label).
    bad: Vec<HashMap<u32, String>>,
}

/// Above this many declared classes a label is found through a hash map, not a scan.
const SCAN_CLASSES: usize = 16;

impl NewRows {
    /// A holdout with these targets (checked here: names, methods, declared classes), and room
    /// for about `rows` rows of `id_bytes` id bytes in all.
    ///
    /// # Errors
    /// The targets' errors ([`Error::InvalidArgument`] naming the target).
    pub fn new(targets: Vec<TargetDecl>, rows: usize, id_bytes: usize) -> Result<NewRows> {
        let targets = check_targets(targets)?;
        let columns = targets
            .iter()
            .map(|t| {
                if !t.classes.is_empty() {
                    if t.classes.len() <= 256 {
                        NewColumn::Bytes(Vec::with_capacity(rows))
                    } else {
                        NewColumn::Wide(Vec::with_capacity(rows))
                    }
                } else {
                    NewColumn::Numbers(Vec::with_capacity(rows), TextArena::default())
                }
            })
            .collect();
        let lookups = targets
            .iter()
            .map(|t| {
                (t.classes.len() > SCAN_CLASSES).then(|| {
                    t.classes
                        .iter()
                        .enumerate()
                        .map(|(i, c)| (c.clone(), i as u32))
                        .collect()
                })
            })
            .collect();
        let bad = vec![HashMap::new(); targets.len()];
        Ok(NewRows {
            targets,
            ids: TextArena::with_capacity(rows, id_bytes),
            columns,
            lookups,
            bad,
        })
    }

    /// The checked targets.
    pub fn targets(&self) -> &[TargetDecl] {
        &self.targets
    }

    /// Number of rows so far.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// Whether no row has arrived.
    pub fn is_empty(&self) -> bool {
        self.ids.len() == 0
    }

    /// Adds one row: its id and one label per target (both trimmed here).
    ///
    /// # Errors
    /// A row with the wrong number of labels; more than 4 GiB of ids or label text; more than
    /// 2^32 - 1 rows.
    pub fn push(&mut self, id: &str, labels: &[&str]) -> Result<()> {
        if labels.len() != self.targets.len() {
            return Err(Error::invalid(
                "labels",
                format!(
                    "a row has {} labels for {} targets",
                    labels.len(),
                    self.targets.len()
                ),
            ));
        }
        let row = u32::try_from(self.ids.len())
            .ok()
            .filter(|r| *r < u32::MAX)
            .ok_or_else(|| Error::invalid("labels", "more than 4,294,967,294 rows"))?;
        self.ids.push(id.trim())?;
        for (t, raw) in labels.iter().enumerate() {
            let v = raw.trim();
            let target = &self.targets[t];
            match &mut self.columns[t] {
                NewColumn::Numbers(values, text) => {
                    let x = v.parse::<f64>().ok().filter(|x| x.is_finite());
                    if x.is_none() {
                        self.bad[t].insert(row, v.to_string());
                    }
                    values.push(x.unwrap_or(f64::NAN));
                    text.push(v)?;
                }
                column => {
                    let class = match &self.lookups[t] {
                        Some(map) => map.get(v).copied(),
                        None => target.classes.iter().position(|c| c == v).map(|c| c as u32),
                    };
                    if class.is_none() {
                        self.bad[t].insert(row, v.to_string());
                    }
                    let c = class.unwrap_or(0);
                    match column {
                        NewColumn::Bytes(b) => b.push(c as u8),
                        NewColumn::Wide(w) => w.push(c),
                        NewColumn::Numbers(..) => {}
                    }
                }
            }
        }
        Ok(())
    }

    /// Puts the rows in the canonical order (sorted by id) and checks them: no empty id, no id
    /// twice, every label in its target's domain (the first problem in that order is named).
    ///
    /// # Errors
    /// No rows; an empty id; a repeated id; a label outside its declared domain (classes) or
    /// not a finite number (numeric targets).
    pub fn finish(mut self) -> Result<Sorted> {
        if self.ids.len() == 0 {
            return Err(Error::invalid("labels", "no label rows were sent"));
        }
        self.ids.shrink();
        let ids = &self.ids;
        // Files are often sorted by id already: then there is nothing to sort, and no
        // permutation is kept.
        let sorted = (1..ids.len()).all(|i| ids.get(i - 1) <= ids.get(i));
        let order: Option<Vec<u32>> = (!sorted).then(|| {
            let mut order: Vec<u32> = (0..ids.len() as u32).collect();
            order.sort_unstable_by(|&a, &b| ids.get(a as usize).cmp(ids.get(b as usize)));
            order
        });
        let at = |i: usize| order.as_ref().map_or(i, |o| o[i] as usize);
        if ids.get(at(0)).is_empty() {
            return Err(Error::invalid("labels", "a row has an empty id"));
        }
        for i in 1..ids.len() {
            let id = ids.get(at(i));
            if ids.get(at(i - 1)) == id {
                return Err(Error::invalid(
                    format!("row id {id}"),
                    "appears more than once in the labels",
                ));
            }
        }
        for (t, target) in self.targets.iter().enumerate() {
            let bad = &self.bad[t];
            if bad.is_empty() {
                continue;
            }
            let row = (0..ids.len())
                .map(|i| at(i) as u32)
                .find(|r| bad.contains_key(r))
                .expect("a bad label is in some row");
            let (id, v) = (ids.get(row as usize), &bad[&row]);
            return Err(if target.classes.is_empty() {
                Error::invalid(
                    format!("label of row id {id}"),
                    format!("{v:?} is not a finite number"),
                )
            } else {
                Error::invalid(
                    format!("labels of target {}", target.name),
                    format!(
                        "row id {} has label {}, which is not among the declared classes",
                        quote(id),
                        quote(v)
                    ),
                )
            });
        }
        Ok(Sorted {
            targets: self.targets,
            ids: self.ids,
            order,
            columns: self.columns,
        })
    }
}

/// Checked rows in the canonical order (a permutation of the arrival order, not a second copy
/// of them), ready to be digested and stored.
#[derive(Debug)]
pub struct Sorted {
    pub(crate) targets: Vec<TargetDecl>,
    ids: TextArena,
    /// Arrival row of each canonical row; `None` when they arrived sorted.
    order: Option<Vec<u32>>,
    columns: Vec<NewColumn>,
}

/// How a target's labels are stored (`sealed_labels.encoding`).
pub(crate) enum Stored<'a> {
    /// One byte per row: the class index.
    Bytes(&'a [u8]),
    /// Four bytes per row, little-endian: the class index (more than 256 classes).
    Wide(&'a [u32]),
    /// Each label's text followed by a newline (numbers: they never hold one).
    Lines(&'a TextArena),
}

impl Sorted {
    /// Number of rows.
    pub(crate) fn len(&self) -> usize {
        self.ids.len()
    }

    /// Arrival row of canonical row `i`.
    pub(crate) fn arrival(&self, i: usize) -> usize {
        self.order.as_ref().map_or(i, |o| o[i] as usize)
    }

    /// The ids in the canonical order.
    pub(crate) fn ids(&self) -> impl ExactSizeIterator<Item = &str> + '_ {
        (0..self.len()).map(|i| self.ids.get(self.arrival(i)))
    }

    /// Bytes of id text.
    pub(crate) fn id_bytes(&self) -> usize {
        self.ids.text_len()
    }

    /// Target `t`'s labels, in arrival order, as stored.
    pub(crate) fn column(&self, t: usize) -> Stored<'_> {
        match &self.columns[t] {
            NewColumn::Bytes(b) => Stored::Bytes(b),
            NewColumn::Wide(w) => Stored::Wide(w),
            NewColumn::Numbers(_, text) => Stored::Lines(text),
        }
    }

    /// SHA-256 of the ids in the canonical order, each followed by a newline.
    pub(crate) fn ids_digest(&self) -> String {
        let mut h = Sha256::new();
        for id in self.ids() {
            h.update(id.as_bytes());
            h.update(b"\n");
        }
        hex::encode(h.finalize())
    }

    /// SHA-256 over every target's labels in the canonical order (ids excluded, so the same
    /// labels under new ids are still recognised): for each target `target\n{metric}\n`, then
    /// each label's text and a newline. The same bytes as the labels digest has always hashed.
    pub(crate) fn labels_digest(&self) -> String {
        let mut h = Sha256::new();
        for (t, target) in self.targets.iter().enumerate() {
            h.update(format!("target\n{}\n", target.metric).as_bytes());
            for i in 0..self.len() {
                let a = self.arrival(i);
                let text = match &self.columns[t] {
                    NewColumn::Bytes(b) => target.classes[b[a] as usize].as_str(),
                    NewColumn::Wide(w) => target.classes[w[a] as usize].as_str(),
                    NewColumn::Numbers(_, text) => text.get(a),
                };
                h.update(text.as_bytes());
                h.update(b"\n");
            }
        }
        hex::encode(h.finalize())
    }
}

/// Parses a target's stored labels (`encoding` as written by [`Stored`], or `json`: a JSON
/// array of strings, how holdouts were stored before) into packed labels; `rows` are the
/// holdout's ids, named in errors.
///
/// # Errors
/// A blob that does not decode, has the wrong length, or holds a label outside the domain.
pub(crate) fn parse_stored(
    target: &TargetDecl,
    encoding: &str,
    blob: &[u8],
    rows: &Rows,
) -> std::result::Result<Labels, String> {
    let n = rows.len();
    let classes = target.classes.len();
    let check_len = |got: usize| {
        if got == n {
            Ok(())
        } else {
            Err(format!("{got} labels for {n} rows"))
        }
    };
    let uses_indices = target.metric.uses_classes();
    match encoding {
        "u8" => {
            check_len(blob.len())?;
            if let Some(bad) = blob.iter().find(|&&c| c as usize >= classes) {
                return Err(format!("class index {bad} past the {classes} classes"));
            }
            if uses_indices {
                Ok(Labels::Classes(blob.to_vec()))
            } else {
                class_numbers(target, blob.iter().map(|&c| c as usize))
            }
        }
        "u32le" => {
            if !blob.len().is_multiple_of(4) {
                return Err("a partial class index".into());
            }
            check_len(blob.len() / 4)?;
            let v: Vec<u32> = blob
                .chunks_exact(4)
                .map(|b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                .collect();
            if let Some(bad) = v.iter().find(|&&c| c as usize >= classes) {
                return Err(format!("class index {bad} past the {classes} classes"));
            }
            if uses_indices {
                Ok(Labels::ManyClasses(v))
            } else {
                class_numbers(target, v.iter().map(|&c| c as usize))
            }
        }
        "lines" => {
            let text = std::str::from_utf8(blob).map_err(|_| "labels not UTF-8".to_string())?;
            let body = text.strip_suffix('\n').unwrap_or(text);
            let mut out = Vec::with_capacity(n);
            for (i, v) in body.split('\n').enumerate() {
                let x = v
                    .parse::<f64>()
                    .ok()
                    .filter(|x| x.is_finite())
                    .ok_or_else(|| {
                        format!(
                            "label {v:?} of row id {} is not a finite number",
                            row(rows, i)
                        )
                    })?;
                out.push(x);
            }
            check_len(if text.is_empty() { 0 } else { out.len() })?;
            Ok(Labels::Numbers(out))
        }
        "json" => {
            let col: Vec<String> = serde_json::from_slice(blob).map_err(|e| e.to_string())?;
            check_len(col.len())?;
            let ids: Vec<String> = rows.iter().map(str::to_string).collect();
            crate::metric::parse_labels(&target.metric, &target.classes, &col, &ids)
                .map_err(|e| e.to_string())
        }
        other => Err(format!("unknown label encoding {other:?}")),
    }
}

fn row(rows: &Rows, i: usize) -> &str {
    if i < rows.len() { rows.id(i) } else { "?" }
}

/// Labels of a binary-label numeric metric (brier, log_loss) from class indices: the class
/// names are the numbers.
fn class_numbers(
    target: &TargetDecl,
    indices: impl Iterator<Item = usize>,
) -> std::result::Result<Labels, String> {
    let values: Vec<f64> = target
        .classes
        .iter()
        .map(|c| c.parse::<f64>().unwrap_or(f64::NAN))
        .collect();
    Ok(Labels::Numbers(indices.map(|c| values[c]).collect()))
}

/// The label texts of a stored target (for an audit that reads labels from the database).
pub(crate) fn stored_texts(
    target: &TargetDecl,
    encoding: &str,
    blob: &[u8],
) -> std::result::Result<Vec<String>, String> {
    let class = |c: usize| {
        target
            .classes
            .get(c)
            .cloned()
            .ok_or_else(|| format!("class index {c} past the {} classes", target.classes.len()))
    };
    match encoding {
        "u8" => blob.iter().map(|&c| class(c as usize)).collect(),
        "u32le" if blob.len().is_multiple_of(4) => blob
            .chunks_exact(4)
            .map(|b| class(u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as usize))
            .collect(),
        "lines" => {
            let text = std::str::from_utf8(blob).map_err(|_| "labels not UTF-8".to_string())?;
            Ok(text.lines().map(str::to_string).collect())
        }
        "json" => serde_json::from_slice(blob).map_err(|e| e.to_string()),
        other => Err(format!("unknown label encoding {other:?}")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn target(metric: &str, classes: &[&str]) -> TargetDecl {
        TargetDecl {
            name: "t".into(),
            column: "y".into(),
            metric: metric.parse().unwrap(),
            method: String::new(),
            classes: classes.iter().map(|c| c.to_string()).collect(),
        }
    }

    #[test]
    fn the_arena_gives_back_what_went_in_and_rejects_bad_parts() {
        let mut a = TextArena::default();
        for s in ["b", "", "ünï", "a"] {
            a.push(s).unwrap();
        }
        assert_eq!(a.iter().collect::<Vec<_>>(), ["b", "", "ünï", "a"]);
        let text = a.text.clone().into_bytes();
        let again = TextArena::from_parts(text.clone(), a.ends.clone()).unwrap();
        assert_eq!(again.get(2), "ünï");
        // An offset inside "ü", one past the end, one going back.
        assert!(TextArena::from_parts(text.clone(), vec![1, 2, 3, 7]).is_err());
        assert!(TextArena::from_parts(text.clone(), vec![1, 1, 7, 99]).is_err());
        assert!(TextArena::from_parts(text, vec![1, 0, 6, 7]).is_err());
    }

    #[test]
    fn rows_find_every_id_and_only_those() {
        let mut a = TextArena::default();
        for i in 0..1000 {
            a.push(&format!("r{i:04}")).unwrap();
        }
        let rows = Rows::new(a);
        for i in (0..1000).rev() {
            assert_eq!(rows.position(&format!("r{i:04}")), Some(i as u32));
        }
        assert_eq!(rows.position("r1000"), None);
        assert_eq!(rows.position(""), None);
    }

    #[test]
    fn rows_are_put_in_order_and_checked_in_that_order() -> Result<()> {
        let mut new = NewRows::new(vec![target("error", &["cat", "dog"])], 0, 0)?;
        for (id, y) in [("c", " dog"), (" a", "cat"), ("b", "dog")] {
            new.push(id, &[y])?;
        }
        let sorted = new.finish()?;
        assert_eq!(sorted.ids().collect::<Vec<_>>(), ["a", "b", "c"]);
        let Stored::Bytes(b) = sorted.column(0) else {
            panic!("classes are bytes")
        };
        let canonical: Vec<u8> = (0..3).map(|i| b[sorted.arrival(i)]).collect();
        assert_eq!(canonical, [0, 1, 1]);

        // Two bad labels: the one first in id order is named, whatever the arrival order.
        let mut new = NewRows::new(vec![target("error", &["cat", "dog"])], 0, 0)?;
        for (id, y) in [("z", "eel"), ("m", "cat"), ("k", "owl")] {
            new.push(id, &[y])?;
        }
        let err = new.finish().unwrap_err().to_string();
        assert!(err.contains("\"k\"") && err.contains("owl"), "{err}");

        // A repeated id is found before a bad label.
        let mut new = NewRows::new(vec![target("abs_error:2", &[])], 0, 0)?;
        for (id, y) in [("x", "nan"), ("y", "1"), ("x", "2")] {
            new.push(id, &[y])?;
        }
        let err = new.finish().unwrap_err().to_string();
        assert!(
            err.contains("row id x") && err.contains("more than once"),
            "{err}"
        );
        let mut new = NewRows::new(vec![target("abs_error:2", &[])], 0, 0)?;
        new.push("x", &["nan"])?;
        let err = new.finish().unwrap_err().to_string();
        assert!(err.contains("not a finite number"), "{err}");
        let mut new = NewRows::new(vec![target("abs_error:2", &[])], 0, 0)?;
        new.push("  ", &["1"])?;
        assert!(new.finish().unwrap_err().to_string().contains("empty id"));
        Ok(())
    }

    #[test]
    fn the_digests_hash_the_same_bytes_as_before() -> Result<()> {
        // The labels digest as it was computed from text columns (create.rs before rows.rs).
        let t = target("abs_error:2", &[]);
        let mut new = NewRows::new(vec![t.clone()], 0, 0)?;
        for (id, y) in [("b", "2.50"), ("a", "-1")] {
            new.push(id, &[y])?;
        }
        let sorted = new.finish()?;
        let mut h = Sha256::new();
        h.update(format!("target\n{}\n", t.metric).as_bytes());
        h.update(b"-1\n2.50\n");
        assert_eq!(sorted.labels_digest(), hex::encode(h.finalize()));
        let mut h = Sha256::new();
        h.update(b"a\nb\n");
        assert_eq!(sorted.ids_digest(), hex::encode(h.finalize()));
        Ok(())
    }

    #[test]
    fn stored_labels_decode_and_bad_blobs_are_refused() {
        let mut a = TextArena::default();
        for id in ["a", "b"] {
            a.push(id).unwrap();
        }
        let rows = Rows::new(a);
        let e = target("error", &["cat", "dog"]);
        assert_eq!(
            parse_stored(&e, "u8", &[1, 0], &rows),
            Ok(Labels::Classes(vec![1, 0]))
        );
        assert!(parse_stored(&e, "u8", &[1, 2], &rows).is_err());
        assert!(parse_stored(&e, "u8", &[1], &rows).is_err());
        assert_eq!(
            parse_stored(&e, "json", br#"["dog","cat"]"#, &rows),
            Ok(Labels::Classes(vec![1, 0]))
        );
        let b = target("brier", &["0", "1"]);
        assert_eq!(
            parse_stored(&b, "u8", &[1, 0], &rows),
            Ok(Labels::Numbers(vec![1.0, 0.0]))
        );
        let n = target("abs_error:2", &[]);
        assert_eq!(
            parse_stored(&n, "lines", b"2.50\n-1\n", &rows),
            Ok(Labels::Numbers(vec![2.5, -1.0]))
        );
        assert!(parse_stored(&n, "lines", b"2.50\n", &rows).is_err());
        assert!(parse_stored(&n, "lines", b"2.50\nx\n", &rows).is_err());
        assert_eq!(
            stored_texts(&e, "u8", &[1, 0]),
            Ok(vec!["dog".to_string(), "cat".to_string()])
        );
    }
}
