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

    /// Where text `i` lies in the buffer.
    fn span(&self, i: usize) -> (usize, usize) {
        let start = if i == 0 { 0 } else { self.ends[i - 1] as usize };
        (start, self.ends[i] as usize)
    }

    /// Appends texts `rows` to `out`, each followed by a newline, and each one's length to
    /// `lens`. Every place is looked up first, then every text copied: two loops of loads
    /// independent of one another, which the processor overlaps when the rows are scattered
    /// over the buffer (a shuffled file), where handing each text on as it was found waits
    /// for each in turn.
    fn gather(
        &self,
        rows: &[u32],
        spans: &mut Vec<(usize, usize)>,
        out: &mut Vec<u8>,
        lens: &mut Vec<u32>,
    ) {
        spans.clear();
        spans.extend(rows.iter().map(|&r| self.span(r as usize)));
        let text = self.text.as_bytes();
        for &(start, end) in spans.iter() {
            out.extend_from_slice(&text[start..end]);
            out.push(b'\n');
            lens.push((end - start) as u32);
        }
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
        let (order, repeated) = canonical_order(ids);
        let at = |i: usize| order.as_ref().map_or(i, |o| o[i] as usize);
        if ids.get(at(0)).is_empty() {
            return Err(Error::invalid("labels", "a row has an empty id"));
        }
        if let Some(row) = repeated {
            return Err(Error::invalid(
                format!("row id {}", ids.get(row as usize)),
                REPEATED,
            ));
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

/// What the error for a repeated id says (its field is `row id X`): the CLI, which leaves
/// repeats in an unsorted file to the daemon, recognises it and names the file's lines.
pub(crate) const REPEATED: &str = "appears more than once in the labels";

/// The canonical order of `ids` (bytewise, as `str` compares) as arrival rows, `None` when
/// they arrived in it, and the arrival row of the first repeated id in that order, if any.
///
/// Sorting a permutation by comparing ids through it reads two random places of the arena
/// per comparison, about 23 comparisons per row at 10M rows. Here each row becomes one `u64`
/// instead, read from the arena once, in arrival order: the top bits are the first bytes of
/// its id after the prefix every id shares (big-endian, zero-padded), the low bits its row
/// number. Those integers sort without touching the arena; rows whose top bits tie (ids
/// equal in those bytes) are then put in order by their whole ids, a few at a time, and only
/// there can an id repeat.
fn canonical_order(ids: &TextArena) -> (Option<Vec<u32>>, Option<u32>) {
    let n = ids.len();
    // Files are often sorted by id already: then there is nothing to sort, and no
    // permutation is kept (strictly increasing: no repeat either).
    if (1..n).all(|i| ids.get(i - 1) < ids.get(i)) {
        return (None, None);
    }
    let mut repeated = None;
    let first = ids.get(0).as_bytes();
    let mut shared = first.len();
    for id in ids.iter() {
        shared = first[..shared]
            .iter()
            .zip(id.as_bytes())
            .take_while(|(a, b)| a == b)
            .count();
        if shared == 0 {
            break;
        }
    }
    // Bits for a row number (n <= 2^32 - 1), the rest for the id's bytes.
    let row_bits = (usize::BITS - (n - 1).leading_zeros()).max(1);
    let row_mask = (1u64 << row_bits) - 1;
    // The id's bytes from `at` on, zero-padded, as a big-endian number.
    let bytes_at = |id: &str, at: usize| -> u64 {
        let mut b = [0u8; 8];
        let rest = id.as_bytes().get(at..).unwrap_or(&[]);
        let k = rest.len().min(8);
        b[..k].copy_from_slice(&rest[..k]);
        u64::from_be_bytes(b)
    };
    // The next four bytes after those in the key (from the byte the key's last bits fall in),
    // read in the same pass: rows whose keys tie are then put in order without going back to
    // the arena (a random read per row, two dependent ones: an offset, then the text).
    let next_at = shared + (64 - row_bits as usize) / 8;
    let mut next: Vec<u32> = Vec::with_capacity(n);
    let mut keys: Vec<u64> = Vec::with_capacity(n);
    for (r, id) in ids.iter().enumerate() {
        keys.push(bytes_at(id, shared) & !row_mask | r as u64);
        next.push((bytes_at(id, next_at) >> 32) as u32);
    }
    keys.sort_unstable();
    // Where those tie too, the whole ids decide.
    let whole = |a: u32, b: u32| ids.get(a as usize).cmp(ids.get(b as usize));
    let mut tied: Vec<(u32, u32)> = Vec::new();
    let mut start = 0;
    while start < n {
        let top = keys[start] & !row_mask;
        let mut end = start + 1;
        while end < n && keys[end] & !row_mask == top {
            end += 1;
        }
        if end - start > 1 {
            tied.clear();
            tied.extend(keys[start..end].iter().map(|k| {
                let r = (k & row_mask) as u32;
                (next[r as usize], r)
            }));
            tied.sort_unstable_by(|a, b| a.0.cmp(&b.0).then_with(|| whole(a.1, b.1)));
            if repeated.is_none() {
                repeated = tied
                    .windows(2)
                    .find(|w| w[0].0 == w[1].0 && whole(w[0].1, w[1].1).is_eq())
                    .map(|w| w[1].1);
            }
            for (k, &(_, r)) in keys[start..end].iter_mut().zip(&tied) {
                *k = top | u64::from(r);
            }
        }
        start = end;
    }
    drop(next);
    let order = keys.iter().map(|k| (k & row_mask) as u32).collect();
    (Some(order), repeated)
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

    /// How target `t`'s labels are stored (`sealed_labels.encoding`), and their bytes: `u8`,
    /// one byte per row, the class index; `u32le`, four bytes per row, little-endian, the class
    /// index (more than 256 classes); `lines`, each label's text followed by a newline
    /// (numbers: they never hold one).
    pub(crate) fn stored_as(&self, t: usize) -> (&'static str, usize) {
        let n = self.len();
        match &self.columns[t] {
            NewColumn::Bytes(_) => ("u8", n),
            NewColumn::Wide(_) => ("u32le", 4 * n),
            NewColumn::Numbers(_, text) => ("lines", text.text_len() + n),
        }
    }

    /// Arrival rows of canonical rows `start..end`: a slice of the permutation, or, when the
    /// rows arrived sorted, the numbers themselves written into `buf`.
    fn arrivals<'b>(&'b self, start: usize, end: usize, buf: &'b mut Vec<u32>) -> &'b [u32] {
        match &self.order {
            Some(o) => &o[start..end],
            None => {
                buf.clear();
                buf.extend(start as u32..end as u32);
                buf
            }
        }
    }

    /// The ids in the canonical order, [`BLOCK`] rows at a time: `f` gets the block's ids,
    /// each followed by a newline, and each one's length.
    pub(crate) fn id_blocks(&self, mut f: impl FnMut(&[u8], &[u32]) -> Result<()>) -> Result<()> {
        let (mut buf, mut spans) = (Vec::new(), Vec::with_capacity(BLOCK));
        let (mut text, mut lens) = (Vec::new(), Vec::with_capacity(BLOCK));
        for start in (0..self.len()).step_by(BLOCK) {
            let rows = self.arrivals(start, (start + BLOCK).min(self.len()), &mut buf);
            text.clear();
            lens.clear();
            self.ids.gather(rows, &mut spans, &mut text, &mut lens);
            f(&text, &lens)?;
        }
        Ok(())
    }

    /// Target `t`'s labels in the canonical order as they are stored ([`Sorted::stored_as`]: a
    /// byte per row, four bytes little-endian, or each text and a newline), [`BLOCK`] rows at
    /// a time.
    pub(crate) fn label_blocks(
        &self,
        t: usize,
        mut f: impl FnMut(&[u8]) -> Result<()>,
    ) -> Result<()> {
        let (mut buf, mut spans, mut lens) = (Vec::new(), Vec::new(), Vec::new());
        let mut out: Vec<u8> = Vec::new();
        for start in (0..self.len()).step_by(BLOCK) {
            let rows = self.arrivals(start, (start + BLOCK).min(self.len()), &mut buf);
            out.clear();
            match &self.columns[t] {
                NewColumn::Bytes(b) => out.extend(rows.iter().map(|&r| b[r as usize])),
                NewColumn::Wide(w) => {
                    for &r in rows {
                        out.extend_from_slice(&w[r as usize].to_le_bytes());
                    }
                }
                NewColumn::Numbers(_, text) => {
                    lens.clear();
                    text.gather(rows, &mut spans, &mut out, &mut lens);
                }
            }
            f(&out)?;
        }
        Ok(())
    }

    /// SHA-256 of the ids in the canonical order, each followed by a newline (what
    /// `stored::write_rows` computes while it writes them).
    #[cfg(test)]
    pub(crate) fn ids_digest(&self) -> String {
        let mut h = Sha256::new();
        let _ = self.id_blocks(|text, _| {
            h.update(text);
            Ok(())
        });
        hex::encode(h.finalize())
    }

    /// SHA-256 over every target's labels in the canonical order (ids excluded, so the same
    /// labels under new ids are still recognised): for each target `target\n{metric}\n`, then
    /// each label's text and a newline. The same bytes as the labels digest has always hashed.
    pub(crate) fn labels_digest(&self) -> String {
        let mut h = Sha256::new();
        let mut text: Vec<u8> = Vec::new();
        for (t, target) in self.targets.iter().enumerate() {
            h.update(format!("target\n{}\n", target.metric).as_bytes());
            let lines: Vec<String> = target.classes.iter().map(|c| format!("{c}\n")).collect();
            let _ = self.label_blocks(t, |block| {
                match &self.columns[t] {
                    NewColumn::Numbers(..) => h.update(block),
                    NewColumn::Bytes(_) => {
                        text.clear();
                        for &c in block {
                            text.extend_from_slice(lines[c as usize].as_bytes());
                        }
                        h.update(&text);
                    }
                    NewColumn::Wide(_) => {
                        text.clear();
                        for c in block.chunks_exact(4) {
                            let c = u32::from_le_bytes([c[0], c[1], c[2], c[3]]);
                            text.extend_from_slice(lines[c as usize].as_bytes());
                        }
                        h.update(&text);
                    }
                }
                Ok(())
            });
        }
        hex::encode(h.finalize())
    }
}

/// Rows of the canonical order gathered at once by [`Sorted::id_blocks`] and
/// [`Sorted::label_blocks`].
const BLOCK: usize = 8192;

/// Parses a target's stored labels (`encoding` as written by [`Sorted::stored_as`], or `json`: a JSON
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
        assert_eq!(sorted.stored_as(0), ("u8", 3));
        let mut canonical: Vec<u8> = Vec::new();
        sorted.label_blocks(0, |b| {
            canonical.extend_from_slice(b);
            Ok(())
        })?;
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

    /// The canonical order and the first repeat, the slow way: a permutation sorted by
    /// comparing whole ids.
    fn naive_order(ids: &[&str]) -> (Vec<u32>, Option<String>) {
        let mut order: Vec<u32> = (0..ids.len() as u32).collect();
        order.sort_by(|&a, &b| ids[a as usize].cmp(ids[b as usize]));
        let repeat = order
            .windows(2)
            .find(|w| ids[w[0] as usize] == ids[w[1] as usize])
            .map(|w| ids[w[1] as usize].to_string());
        (order, repeat)
    }

    #[test]
    fn the_fast_order_is_the_order_of_whole_ids() {
        // Ids that share long prefixes, are prefixes of one another, hold NUL bytes (which the
        // zero padding of short ids must not confuse), differ only past the first eight bytes
        // after the shared prefix, or are not ASCII; shuffled by a fixed LCG, some repeated.
        let mut pool: Vec<String> = Vec::new();
        for i in 0..3000 {
            pool.push(format!("case-{:012}", (i * 7919) % 3000));
            pool.push(format!("case-{}", i % 97));
            pool.push(format!("case-{:012}\0x{}", i % 50, i % 7));
            pool.push(format!("case-00000000000{}ü", i % 13));
        }
        pool.push("case-".into());
        pool.push("case-\0".into());
        pool.push("case-\0\0".into());
        let mut state = 12345u64;
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 33) as usize
        };
        for round in 0..6 {
            let mut chosen: Vec<String> = pool.clone();
            chosen.sort();
            chosen.dedup();
            // Rounds 0-2 without repeats, 3-5 with some.
            let keep = if round < 3 { 1 } else { 2 };
            let mut ids: Vec<String> = Vec::new();
            for id in &chosen {
                for _ in 0..(1 + (next() % keep)) {
                    ids.push(id.clone());
                }
            }
            for i in (1..ids.len()).rev() {
                ids.swap(i, next() % (i + 1));
            }
            if round == 1 {
                ids.truncate(2);
            }
            let mut arena = TextArena::default();
            for id in &ids {
                arena.push(id).unwrap();
            }
            let refs: Vec<&str> = ids.iter().map(String::as_str).collect();
            let (want, want_repeat) = naive_order(&refs);
            let (order, repeat) = canonical_order(&arena);
            let order = order.unwrap_or_else(|| (0..ids.len() as u32).collect());
            let got: Vec<&str> = order.iter().map(|&r| refs[r as usize]).collect();
            let expected: Vec<&str> = want.iter().map(|&r| refs[r as usize]).collect();
            assert_eq!(got, expected, "round {round}");
            let mut seen = order.clone();
            seen.sort_unstable();
            assert!(seen.iter().enumerate().all(|(i, &r)| r as usize == i));
            assert_eq!(
                repeat.map(|r| refs[r as usize].to_string()),
                want_repeat,
                "round {round}"
            );
        }
        // Already in order: no permutation; in order but for one repeat: found.
        let mut arena = TextArena::default();
        for id in ["a", "b", "c"] {
            arena.push(id).unwrap();
        }
        assert_eq!(canonical_order(&arena), (None, None));
        let mut arena = TextArena::default();
        for id in ["a", "b", "b", "c"] {
            arena.push(id).unwrap();
        }
        let (order, repeat) = canonical_order(&arena);
        assert!(order.is_some());
        assert_eq!(repeat.map(|r| arena.get(r as usize)), Some("b"));
    }

    #[test]
    fn blocks_give_every_row_in_the_canonical_order_across_block_edges() -> Result<()> {
        // More rows than two blocks, shuffled; a numeric target and one with 300 classes.
        let n = 2 * BLOCK + 77;
        let classes: Vec<String> = (0..300).map(|c| format!("k{c}")).collect();
        let class_refs: Vec<&str> = classes.iter().map(String::as_str).collect();
        let mut wide_target = target("error", &class_refs);
        wide_target.name = "w".into();
        let targets = vec![target("abs_error:9", &[]), wide_target];
        let mut new = NewRows::new(targets.clone(), 0, 0)?;
        let id = |i: usize| format!("row-{:06}", (i * 7919) % n);
        for i in 0..n {
            let r = (i * 7919) % n;
            new.push(&id(i), &[&format!("{}.5", r % 9), &classes[r % 300]])?;
        }
        let sorted = new.finish()?;
        // The ids in order, each with its newline, and their lengths.
        let (mut text, mut lens) = (Vec::new(), Vec::new());
        sorted.id_blocks(|t, l| {
            text.extend_from_slice(t);
            lens.extend_from_slice(l);
            Ok(())
        })?;
        let want: String = (0..n).map(|r| format!("row-{r:06}\n")).collect();
        assert_eq!(String::from_utf8(text).unwrap(), want);
        assert!(lens.len() == n && lens.iter().all(|&l| l == 10));
        // Labels as stored, and the digest over their texts.
        let mut numbers = Vec::new();
        sorted.label_blocks(0, |b| {
            numbers.extend_from_slice(b);
            Ok(())
        })?;
        let want_numbers: String = (0..n).map(|r| format!("{}.5\n", r % 9)).collect();
        assert_eq!(String::from_utf8(numbers).unwrap(), want_numbers);
        let mut wide = Vec::new();
        sorted.label_blocks(1, |b| {
            wide.extend_from_slice(b);
            Ok(())
        })?;
        let want_wide: Vec<u8> = (0..n)
            .flat_map(|r| ((r % 300) as u32).to_le_bytes())
            .collect();
        assert_eq!(wide, want_wide);
        assert_eq!(sorted.stored_as(1), ("u32le", 4 * n));
        let mut h = Sha256::new();
        h.update(format!("target\n{}\n", targets[0].metric).as_bytes());
        h.update(want_numbers.as_bytes());
        h.update(format!("target\n{}\n", targets[1].metric).as_bytes());
        for r in 0..n {
            h.update(format!("k{}\n", r % 300).as_bytes());
        }
        assert_eq!(sorted.labels_digest(), hex::encode(h.finalize()));
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
