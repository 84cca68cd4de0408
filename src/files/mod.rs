//! Reading label and prediction tables from CSV or JSON Lines files, and writing CSV.
//!
//! A table is a set of rows keyed by a unique id column, with some value columns kept as trimmed
//! text: what a value means (a class, a number) depends on the metric, so the caller parses it.
//! Every problem is reported as [`Error::InvalidArgument`] whose `field` is `path:line` (or the
//! path alone when no line applies) and whose message names the id and the column.
//!
//! Formats: CSV with a header row; JSON Lines (one object per line) for files ending in `.jsonl`
//! or `.ndjson`, or whose first non-blank character is `{`. Blank lines are skipped in both.
//!
//! ```
//! use holdout_ledger::files::{read_table, TableSpec};
//! let dir = tempfile::tempdir().unwrap();
//! let path = dir.path().join("labels.csv");
//! std::fs::write(&path, "id,label\nr1, cat\nr2,dog\n").unwrap();
//! let table = read_table(&path, &TableSpec::new("id", ["label"])).unwrap();
//! assert_eq!(table.rows[0].id, "r1");
//! assert_eq!(table.rows[0].values, ["cat"]);
//! ```

use std::collections::HashMap;
use std::fs::File;
use std::hash::BuildHasher;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::Path;

use crate::error::{Error, Result};

mod scan;

/// Default largest file size accepted: 2 GiB (see `--max-file-bytes`).
pub const DEFAULT_MAX_FILE_BYTES: u64 = 2 << 30;

/// How a file is laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Comma-separated values with a header row.
    Csv,
    /// One JSON object per line.
    JsonLines,
}

/// Which columns to read, and the limits to read them under.
#[derive(Debug, Clone)]
pub struct TableSpec {
    /// Column holding the unique row id.
    pub id_column: String,
    /// Value columns to read, in the order wanted; `None` reads every column of the file
    /// (the id column included) in the file's order.
    pub columns: Option<Vec<String>>,
    /// Refuse files larger than this many bytes.
    pub max_bytes: u64,
    /// Accept empty values (after trimming) in value columns.
    pub allow_empty_values: bool,
    /// At most this many data rows, and what they are counted against (for the message): the
    /// row past it is an error, and reading stops there.
    pub max_rows: Option<(u64, String)>,
}

impl TableSpec {
    /// Reads the id column and the named value columns; empty values are errors; 2 GiB limit.
    pub fn new<I, S>(id_column: &str, columns: I) -> Self
    where
        I: IntoIterator<Item = S>,
        S: Into<String>,
    {
        TableSpec {
            id_column: id_column.to_string(),
            columns: Some(columns.into_iter().map(Into::into).collect()),
            max_bytes: DEFAULT_MAX_FILE_BYTES,
            allow_empty_values: false,
            max_rows: None,
        }
    }

    /// Reads every column of the file, empty values allowed (for copying rows around).
    pub fn all_columns(id_column: &str) -> Self {
        TableSpec {
            id_column: id_column.to_string(),
            columns: None,
            max_bytes: DEFAULT_MAX_FILE_BYTES,
            allow_empty_values: true,
            max_rows: None,
        }
    }

    /// Sets the size limit.
    pub fn max_bytes(mut self, max_bytes: u64) -> Self {
        self.max_bytes = max_bytes;
        self
    }

    /// Allows at most `rows` data rows, counted against `what` (named in the error, e.g.
    /// "holdout yard"): reading stops at the row past it.
    pub fn max_rows(mut self, rows: u64, what: impl Into<String>) -> Self {
        self.max_rows = Some((rows, what.into()));
        self
    }
}

/// One row of a table.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Row {
    /// 1-based line of the file where the row starts.
    pub line: u64,
    /// The row id, trimmed and non-empty.
    pub id: String,
    /// Values of the table's columns, trimmed, in [`Table::columns`] order.
    pub values: Vec<String>,
}

/// A table read from a file: rows in file order, ids unique.
#[derive(Debug, Clone)]
pub struct Table {
    /// The file, as given (used in messages).
    pub source: String,
    /// Its layout.
    pub format: Format,
    /// The id column.
    pub id_column: String,
    /// The value columns, in the order of [`Row::values`].
    pub columns: Vec<String>,
    /// The rows.
    pub rows: Vec<Row>,
}

impl Table {
    /// Position of a column in [`Row::values`].
    pub fn column_index(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c == name)
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// Whether the table has no rows (never true for a table returned by [`read_table`]).
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }
}

/// Guesses the format from the extension, else from the first non-blank byte.
pub fn detect_format(path: &Path, first_bytes: &[u8]) -> Format {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    match ext.as_deref() {
        Some("jsonl" | "ndjson") => Format::JsonLines,
        Some("csv") => Format::Csv,
        _ => {
            let first = first_bytes
                .iter()
                .copied()
                .skip_while(|b| *b == 0xEF || *b == 0xBB || *b == 0xBF)
                .find(|b| !b.is_ascii_whitespace());
            if first == Some(b'{') {
                Format::JsonLines
            } else {
                Format::Csv
            }
        }
    }
}

/// Reads a table. See the module docs for the formats and the errors.
///
/// # Errors
/// [`Error::InvalidArgument`] naming `path:line`, the id and the column for: a missing or
/// unreadable file, a file over the size limit, invalid UTF-8, a file with no rows, a missing
/// column, a missing or empty id, a duplicate id (both lines named), a row with the wrong number
/// of fields, invalid JSON or a JSON line that is not an object, (unless allowed) an empty
/// value, and more rows than [`TableSpec::max_rows`].
pub fn read_table(path: &Path, spec: &TableSpec) -> Result<Table> {
    let mut values: Vec<Vec<String>> = Vec::new();
    let read = scan(path, spec, Keep::All, &mut |_, _, v| {
        values.push(v.iter().map(|s| s.to_string()).collect());
        Ok(())
    })?;
    let rows = read
        .ids
        .ids
        .into_iter()
        .zip(read.ids.lines)
        .zip(values)
        .map(|((id, line), values)| Row { line, id, values })
        .collect();
    Ok(Table {
        source: read.source,
        format: read.format,
        id_column: spec.id_column.clone(),
        columns: read.columns,
        rows,
    })
}

/// The ids of a file and one value column, each value converted as it is read (no table of
/// rows is built): what a predictions file is sent as.
#[derive(Debug, Clone)]
pub struct Column<V> {
    /// The file, as given (used in messages).
    pub source: String,
    /// Its layout.
    pub format: Format,
    /// The row ids, trimmed, unique, in file order.
    pub ids: Vec<String>,
    /// The 1-based line of each row.
    pub lines: Vec<u64>,
    /// The converted values, aligned with `ids`.
    pub values: Vec<V>,
}

impl<V> Column<V> {
    /// Number of rows.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// Whether there are no rows (never true for a column returned by [`read_column`]).
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }
}

/// Reads the id column and the one value column of `spec`, converting each (trimmed) value with
/// `convert(value, id)`, which returns the message of the error to report at the value's line.
/// Reads with the same rules and errors as [`read_table`], streaming: a CSV row costs one
/// allocation (its id), and reading stops at the first error, the row past
/// [`TableSpec::max_rows`] included.
///
/// # Errors
/// As [`read_table`]; a spec that does not name exactly one value column; a value `convert`
/// refuses, as [`Error::InvalidArgument`] naming `path:line`.
pub fn read_column<V>(
    path: &Path,
    spec: &TableSpec,
    mut convert: impl FnMut(&str, &str) -> std::result::Result<V, String>,
) -> Result<Column<V>> {
    if spec.columns.as_ref().is_none_or(|c| c.len() != 1) {
        return Err(Error::invalid(
            "columns",
            "read_column reads exactly one value column",
        ));
    }
    let source = path.display().to_string();
    let mut values = Vec::new();
    let read = scan(path, spec, Keep::All, &mut |line, id, v| {
        let x = convert(v[0], id).map_err(|m| Error::invalid(format!("{source}:{line}"), m))?;
        values.push(x);
        Ok(())
    })?;
    Ok(Column {
        source: read.source,
        format: read.format,
        ids: read.ids.ids,
        lines: read.ids.lines,
        values,
    })
}

/// What every row of a file is handed to, after its id and values passed the checks: its line,
/// its id and its values (trimmed, in the spec's column order).
pub type RowSink<'s> = dyn FnMut(u64, &str, &[&str]) -> Result<()> + 's;
type Sink<'s> = RowSink<'s>;

/// A file read through: its columns and its ids; the values went to the sink.
struct Scanned {
    source: String,
    format: Format,
    columns: Vec<String>,
    ids: Ids,
}

/// What a file read by [`check_rows`] or [`stream_rows`] held (its rows went to the sink).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Streamed {
    /// The file, as given (used in messages).
    pub source: String,
    /// Its layout.
    pub format: Format,
    /// The value columns, in the order of the values handed to the sink.
    pub columns: Vec<String>,
    /// Data rows.
    pub rows: u64,
    /// Bytes of all the (trimmed) ids.
    pub id_bytes: u64,
    /// Whether the ids came in strictly increasing order (then none repeats). A file read by
    /// [`check_rows_except_repeats`] whose ids did not was not checked for repeats. Always
    /// true from [`stream_rows`], which does not look.
    pub ids_increase: bool,
}

/// Reads a file through with every check of [`read_table`] (repeated ids included), handing
/// each row to `sink` as `(line, id, values)` and keeping no row: the first pass over a file
/// too large to hold. While the ids come in increasing order only the last one is kept; at
/// the first id out of order the file is read again from the start with a table of the ids
/// (so then `sink` sees the first rows twice, the second time with lines starting over; and
/// the ids, not the values, are held).
///
/// # Errors
/// As [`read_table`], and whatever `sink` returns.
pub fn check_rows(path: &Path, spec: &TableSpec, sink: &mut RowSink<'_>) -> Result<Streamed> {
    match scan(path, spec, Keep::Last, sink) {
        Err(Error::Internal(m)) if m == OUT_OF_ORDER => scan(path, spec, Keep::All, sink),
        other => other,
    }
    .map(Scanned::streamed)
}

/// Reads a file through with every check of [`check_rows`] but, once the ids stop coming in
/// increasing order, without looking for repeated ids, and keeping nothing: no table of ids,
/// no second read. While the ids increase none can repeat (each is compared with the one
/// before); from the first id out of order on, repeats are left to whoever receives the rows
/// (the daemon finds them while it sorts the rows), and [`Streamed::ids_increase`] is false.
/// [`find_repeat`] names the lines of a repeated id afterwards.
///
/// # Errors
/// As [`read_table`] except repeated ids after the first id out of order, and whatever `sink`
/// returns.
pub fn check_rows_except_repeats(
    path: &Path,
    spec: &TableSpec,
    sink: &mut RowSink<'_>,
) -> Result<Streamed> {
    scan(path, spec, Keep::WhileIncreasing, sink).map(Scanned::streamed)
}

/// The lines of the first two rows whose id is `id` (trimmed, as the checks compare them), or
/// `None` when fewer than two rows have it: reads the file through keeping nothing.
///
/// # Errors
/// As [`stream_rows`].
pub fn find_repeat(path: &Path, spec: &TableSpec, id: &str) -> Result<Option<(u64, u64)>> {
    let mut first = None;
    let mut found = None;
    let read = stream_rows(path, spec, &mut |line, row_id, _| {
        if row_id == id {
            match first {
                None => first = Some(line),
                Some(f) => {
                    found = Some((f, line));
                    return Err(Error::Internal(FOUND.into()));
                }
            }
        }
        Ok(())
    });
    match read {
        Err(Error::Internal(m)) if m == FOUND => Ok(found),
        Err(e) => Err(e),
        Ok(_) => Ok(None),
    }
}

/// The error for an id seen again: `source:line`, naming both lines (as every check says it).
pub fn repeat_error(source: &str, id: &str, first: u64, line: u64) -> Error {
    Error::invalid(
        format!("{source}:{line}"),
        format!("duplicate id `{id}`: first on line {first}, again on line {line}"),
    )
}

/// The internal signal of [`find_repeat`] that the second row was found.
const FOUND: &str = "files: the repeat was found";

/// Reads a file through as [`check_rows`] does but without looking for repeated ids (for a
/// second pass over a file [`check_rows`] has checked): nothing is kept.
///
/// # Errors
/// As [`read_table`] except repeated ids, and whatever `sink` returns.
pub fn stream_rows(path: &Path, spec: &TableSpec, sink: &mut RowSink<'_>) -> Result<Streamed> {
    scan(path, spec, Keep::Nothing, sink).map(Scanned::streamed)
}

/// The internal signal of [`Keep::Last`] that an id came out of order.
const OUT_OF_ORDER: &str = "files: an id out of order";

impl Scanned {
    fn streamed(self) -> Streamed {
        Streamed {
            source: self.source,
            format: self.format,
            columns: self.columns,
            rows: self.ids.count,
            id_bytes: self.ids.id_bytes,
            ids_increase: !self.ids.out_of_order,
        }
    }
}

fn scan(path: &Path, spec: &TableSpec, keep: Keep, sink: &mut Sink<'_>) -> Result<Scanned> {
    let source = path.display().to_string();
    let meta = std::fs::metadata(path).map_err(|e| open_error(&source, &e))?;
    if meta.is_dir() {
        return Err(Error::invalid(source, "is a directory, not a file"));
    }
    if meta.len() > spec.max_bytes {
        return Err(Error::invalid(
            source,
            format!(
                "file is {} bytes, over the limit of {} bytes (raise it with --max-file-bytes)",
                meta.len(),
                spec.max_bytes
            ),
        ));
    }
    let mut file = File::open(path)
        .map_err(|e| open_error(&source, &e))?
        // The limit is checked again while reading, in case the file grows meanwhile.
        .take(spec.max_bytes.saturating_add(1));
    let mut head = vec![0u8; 8192];
    let mut got = 0;
    while got < head.len() {
        match file.read(&mut head[got..]) {
            Ok(0) => break,
            Ok(n) => got += n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(Error::invalid(source, format!("cannot read: {e}"))),
        }
    }
    head.truncate(got);
    let format = detect_format(path, &head);
    let mut builder = Builder::new(source, format, spec, sink);
    builder.ids.keep = keep;
    // Room for the rows up front: growing a duplicate index rehashes every id read so far.
    // A row takes at least 4 bytes (`a,b` and a newline); without a row limit, a guess.
    let rows = match &spec.max_rows {
        Some((max, _)) => (*max).min(meta.len() / 4 + 1),
        None => meta.len() / 32,
    };
    if keep == Keep::All {
        builder
            .ids
            .reserve(usize::try_from(rows).unwrap_or(0).min(1 << 26));
    }
    match format {
        Format::Csv => read_csv(scan::Scanner::new(file, &head), &mut builder)?,
        Format::JsonLines => read_jsonl(
            BufReader::new(std::io::Cursor::new(head).chain(file)),
            &mut builder,
        )?,
    }
    builder.finish()
}

fn open_error(source: &str, e: &std::io::Error) -> Error {
    let message = match e.kind() {
        std::io::ErrorKind::NotFound => "no such file".to_string(),
        std::io::ErrorKind::PermissionDenied => "permission denied".to_string(),
        _ => format!("cannot open: {e}"),
    };
    Error::invalid(source.to_string(), message)
}

/// Row ids in file order with their lines, and what finds a duplicate without a second copy of
/// any id: while the ids come in strictly increasing order (files are often sorted by id) none
/// can repeat, so each is only compared with the one before; from the first id that breaks
/// the order on, a hash table of row numbers, hashed by the id each points to.
#[derive(Default)]
struct Ids {
    /// What is kept of the ids.
    keep: Keep,
    /// Rows pushed, and the bytes of their ids.
    count: u64,
    id_bytes: u64,
    /// The last id ([`Keep::Last`], [`Keep::WhileIncreasing`]).
    last: String,
    /// The line of the last id ([`Keep::WhileIncreasing`]).
    last_line: u64,
    /// Whether an id came that was not greater than the one before.
    out_of_order: bool,
    ids: Vec<String>,
    lines: Vec<u64>,
    /// Built at the first id out of order; empty (and unused) before.
    index: hashbrown::HashTable<u32>,
    indexed: bool,
    /// Rows expected in all, for the index's size.
    expected: usize,
    hasher: hashbrown::DefaultHashBuilder,
}

/// What [`Ids`] keeps.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
enum Keep {
    /// Every id and its line (repeats found, ids returned).
    #[default]
    All,
    /// The last id only: an id out of order is an error ([`OUT_OF_ORDER`]).
    Last,
    /// Nothing: repeats are not looked for.
    Nothing,
    /// The last id while the ids increase; nothing from the first id out of order on.
    WhileIncreasing,
}

impl Ids {
    /// Makes room for `rows` rows.
    fn reserve(&mut self, rows: usize) {
        self.expected = rows;
        self.ids.reserve(rows);
        self.lines.reserve(rows);
    }

    /// The line of an earlier row with this id.
    fn find(&mut self, id: &str) -> Result<Option<u64>> {
        let in_order = self.count == 0 || id > self.last.as_str();
        match self.keep {
            Keep::All => {
                if self.count > 0
                    && !self.indexed
                    && self.ids.last().is_some_and(|l| id <= l.as_str())
                {
                    self.out_of_order = true;
                }
                Ok(self.find_kept(id))
            }
            Keep::Last if !in_order => Err(Error::Internal(OUT_OF_ORDER.into())),
            // The same id twice in a row is a repeat found without a table.
            Keep::WhileIncreasing if id == self.last.as_str() && self.count > 0 => {
                Ok(Some(self.last_line))
            }
            Keep::WhileIncreasing if !in_order => {
                self.out_of_order = true;
                self.keep = Keep::Nothing;
                self.last = String::new();
                Ok(None)
            }
            Keep::Last | Keep::WhileIncreasing | Keep::Nothing => Ok(None),
        }
    }

    fn find_kept(&mut self, id: &str) -> Option<u64> {
        if !self.indexed {
            match self.ids.last() {
                Some(last) if id <= last.as_str() => self.build_index(),
                _ => return None,
            }
        }
        let hash = self.hasher.hash_one(id);
        self.index
            .find(hash, |&row| self.ids[row as usize] == id)
            .map(|&row| self.lines[row as usize])
    }

    /// Indexes every row so far (they are distinct: they were in increasing order).
    fn build_index(&mut self) {
        let (ids, hasher) = (&self.ids, &self.hasher);
        let room = self.expected.max(ids.len() + 1);
        self.index
            .reserve(room, |&r| hasher.hash_one(ids[r as usize].as_str()));
        for (row, id) in ids.iter().enumerate() {
            let hash = hasher.hash_one(id.as_str());
            self.index.insert_unique(hash, row as u32, |&r| {
                hasher.hash_one(ids[r as usize].as_str())
            });
        }
        self.indexed = true;
    }

    /// Adds a row (its id not yet present).
    fn push(&mut self, id: &str, line: u64) {
        self.count += 1;
        self.id_bytes += id.len() as u64;
        match self.keep {
            Keep::All => self.keep(id.to_string(), line),
            Keep::Last | Keep::WhileIncreasing => {
                self.last.clear();
                self.last.push_str(id);
                self.last_line = line;
            }
            Keep::Nothing => {}
        }
    }

    fn keep(&mut self, id: String, line: u64) {
        if self.indexed {
            let row = self.ids.len() as u32;
            let hash = self.hasher.hash_one(id.as_str());
            let (ids, hasher) = (&self.ids, &self.hasher);
            self.index
                .insert_unique(hash, row, |&r| hasher.hash_one(ids[r as usize].as_str()));
        }
        self.ids.push(id);
        self.lines.push(line);
    }
}

/// Checks rows as they come and hands them on.
struct Builder<'a, 's> {
    source: String,
    format: Format,
    spec: &'a TableSpec,
    columns: Vec<String>,
    ids: Ids,
    sink: &'a mut Sink<'s>,
    bytes_seen: u64,
}

impl<'a, 's> Builder<'a, 's> {
    fn new(source: String, format: Format, spec: &'a TableSpec, sink: &'a mut Sink<'s>) -> Self {
        Builder {
            source,
            format,
            spec,
            columns: spec.columns.clone().unwrap_or_default(),
            ids: Ids::default(),
            sink,
            bytes_seen: 0,
        }
    }

    fn err(&self, line: u64, message: impl Into<String>) -> Error {
        Error::invalid(format!("{}:{line}", self.source), message)
    }

    fn check_size(&mut self, more: u64) -> Result<()> {
        self.bytes_seen += more;
        if self.bytes_seen > self.spec.max_bytes {
            return Err(Error::invalid(
                self.source.clone(),
                format!(
                    "file is over the limit of {} bytes (raise it with --max-file-bytes)",
                    self.spec.max_bytes
                ),
            ));
        }
        Ok(())
    }

    /// Adds a row given its id (untrimmed, `None` when the field is absent) and its values
    /// (trimmed).
    fn push(&mut self, line: u64, id: Option<&str>, values: &[&str]) -> Result<()> {
        let id_column = &self.spec.id_column;
        let id = match id.map(str::trim) {
            None => return Err(self.err(line, format!("no id: the row lacks `{id_column}`"))),
            Some("") => return Err(self.err(line, format!("empty id in column `{id_column}`"))),
            Some(id) => id,
        };
        if let Some(first) = self.ids.find(id)? {
            return Err(repeat_error(&self.source, id, first, line));
        }
        // Checked after the id, so a repeated id is named as such.
        if let Some((max, what)) = &self.spec.max_rows
            && self.ids.count >= *max
        {
            return Err(self.err(
                line,
                format!("more rows than the {max} of {what}; the rest of the file was not read"),
            ));
        }
        if !self.spec.allow_empty_values
            && let Some(pos) = values.iter().position(|v| v.is_empty())
        {
            return Err(self.err(
                line,
                format!(
                    "empty value in column `{}` for id `{id}`",
                    self.columns[pos]
                ),
            ));
        }
        (self.sink)(line, id, values)?;
        self.ids.push(id, line);
        Ok(())
    }

    fn finish(self) -> Result<Scanned> {
        if self.ids.count == 0 {
            return Err(Error::invalid(
                self.source,
                "empty file: no data rows".to_string(),
            ));
        }
        Ok(Scanned {
            source: self.source,
            format: self.format,
            columns: self.columns,
            ids: self.ids,
        })
    }
}

/// Empties a vector of borrowed text and gives back its allocation for borrows of another
/// lifetime (the standard library collects in place when the element layout is the same), so
/// the values of every row go through one buffer.
fn recycle<'b>(mut v: Vec<&str>) -> Vec<&'b str> {
    v.clear();
    v.into_iter().map(|_| "").collect()
}

/// The fields of the scanner's record as text; the error names the first field that is not
/// UTF-8.
fn record_text<'r, R: Read>(
    s: &'r scan::Scanner<R>,
    into: &mut Vec<&'r str>,
) -> std::result::Result<(), usize> {
    into.clear();
    for i in 0..s.len() {
        into.push(std::str::from_utf8(s.field(i)).map_err(|_| i)?);
    }
    Ok(())
}

fn read_csv<R: Read>(mut s: scan::Scanner<R>, b: &mut Builder<'_, '_>) -> Result<()> {
    let mut spare: Vec<&str> = Vec::new();
    // Header: the first record that is not blank.
    let header: Vec<String> = loop {
        if !next_csv_record(&mut s, b)? {
            return Err(Error::invalid(
                b.source.clone(),
                "empty file: no header row (CSV files start with a header naming the columns)",
            ));
        }
        let mut fields = recycle(spare);
        text_or_error(&s, &mut fields, b)?;
        if !is_blank(&fields) {
            break fields
                .iter()
                .map(|h| h.trim_start_matches('\u{feff}').trim().to_string())
                .collect();
        }
        spare = recycle(fields);
    };
    let header_line = s.line();
    let mut seen = HashMap::new();
    for (i, h) in header.iter().enumerate() {
        if let Some(j) = seen.insert(h.as_str(), i) {
            return Err(b.err(
                header_line,
                format!(
                    "column `{h}` appears twice in the header (columns {} and {})",
                    j + 1,
                    i + 1
                ),
            ));
        }
    }
    let find = |name: &str| -> Result<usize> {
        header.iter().position(|h| h == name).ok_or_else(|| {
            b.err(
                header_line,
                format!("no column `{name}`; the header has: {}", header.join(", ")),
            )
        })
    };
    let id_pos = find(&b.spec.id_column)?;
    let positions: Vec<usize> = match &b.spec.columns {
        Some(cols) => cols.iter().map(|c| find(c)).collect::<Result<_>>()?,
        None => (0..header.len()).collect(),
    };
    if b.spec.columns.is_none() {
        b.columns = header.clone();
    }
    let mut spare: Vec<&str> = Vec::new();
    let mut spare_values: Vec<&str> = Vec::new();
    while next_csv_record(&mut s, b)? {
        let mut fields = recycle(spare);
        text_or_error(&s, &mut fields, b)?;
        if is_blank(&fields) {
            spare = recycle(fields);
            continue;
        }
        let line = s.line();
        if fields.len() != header.len() {
            let id = fields.get(id_pos).map(|f| f.trim()).unwrap_or("");
            let about = if id.is_empty() {
                String::new()
            } else {
                format!(" (id `{id}`)")
            };
            return Err(b.err(
                line,
                format!(
                    "row has {} fields but the header has {}{about}",
                    fields.len(),
                    header.len()
                ),
            ));
        }
        let mut values = recycle(spare_values);
        values.extend(positions.iter().map(|&p| fields[p].trim()));
        b.push(line, Some(fields[id_pos]), &values)?;
        spare_values = recycle(values);
        spare = recycle(fields);
    }
    Ok(())
}

/// The record's fields as text, or the error naming its line and the first field that is not
/// UTF-8.
fn text_or_error<'r, R: Read>(
    s: &'r scan::Scanner<R>,
    fields: &mut Vec<&'r str>,
    b: &Builder<'_, '_>,
) -> Result<()> {
    record_text(s, fields).map_err(|field| {
        b.err(
            s.end_line(),
            format!("invalid UTF-8 in field {} (files must be UTF-8)", field + 1),
        )
    })
}

/// Reads the next CSV record, counting its bytes against the limit; false at the end.
fn next_csv_record<R: Read>(s: &mut scan::Scanner<R>, b: &mut Builder<'_, '_>) -> Result<bool> {
    let more = s
        .next_record()
        .map_err(|e| Error::invalid(b.source.clone(), format!("cannot read: {e}")))?;
    let seen = b.bytes_seen;
    b.check_size(s.consumed().saturating_sub(seen))?;
    Ok(more)
}

fn is_blank(fields: &[&str]) -> bool {
    fields.iter().all(|f| f.trim().is_empty())
}

fn read_jsonl<R: BufRead>(mut reader: R, b: &mut Builder<'_, '_>) -> Result<()> {
    let mut buf = Vec::new();
    let mut line_no = 0u64;
    // Columns in order of first appearance, when reading every column.
    let mut all: Vec<String> = Vec::new();
    let mut pending: Vec<(u64, serde_json::Map<String, serde_json::Value>)> = Vec::new();
    loop {
        buf.clear();
        let n = reader
            .read_until(b'\n', &mut buf)
            .map_err(|e| Error::invalid(b.source.clone(), format!("cannot read: {e}")))?;
        if n == 0 {
            break;
        }
        b.check_size(n as u64)?;
        line_no += 1;
        let text = std::str::from_utf8(&buf).map_err(|e| {
            b.err(
                line_no,
                format!(
                    "invalid UTF-8 at byte {} of the line (files must be UTF-8)",
                    e.valid_up_to() + 1
                ),
            )
        })?;
        let text = text.trim_start_matches('\u{feff}').trim();
        if text.is_empty() {
            continue;
        }
        let value: serde_json::Value =
            serde_json::from_str(text).map_err(|e| b.err(line_no, format!("invalid JSON: {e}")))?;
        let serde_json::Value::Object(object) = value else {
            return Err(b.err(line_no, "expected a JSON object on each line"));
        };
        if b.spec.columns.is_some() {
            let (id, values) = json_row(b, line_no, &object)?;
            let values: Vec<&str> = values.iter().map(String::as_str).collect();
            b.push(line_no, id.as_deref(), &values)?;
        } else {
            for key in object.keys() {
                if !all.iter().any(|k| k == key) {
                    all.push(key.clone());
                }
            }
            pending.push((line_no, object));
        }
    }
    if b.spec.columns.is_none() {
        // serde_json sorts an object's keys, so the file's order is not known: id first, then
        // the other keys in order of first appearance.
        all.retain(|k| *k != b.spec.id_column);
        all.insert(0, b.spec.id_column.clone());
        b.columns = all;
        for (line, object) in pending {
            let (id, values) = json_row(b, line, &object)?;
            let values: Vec<&str> = values.iter().map(String::as_str).collect();
            b.push(line, id.as_deref(), &values)?;
        }
    }
    Ok(())
}

/// The id and the values of the builder's columns in one JSON object.
fn json_row(
    b: &Builder<'_, '_>,
    line: u64,
    object: &serde_json::Map<String, serde_json::Value>,
) -> Result<(Option<String>, Vec<String>)> {
    let id = match object.get(&b.spec.id_column) {
        None => None,
        Some(v) => Some(json_text(b, line, &b.spec.id_column, v)?),
    };
    let id_text = id.as_deref().unwrap_or("").trim().to_string();
    let mut values = Vec::with_capacity(b.columns.len());
    for col in &b.columns {
        match object.get(col) {
            Some(v) => values.push(json_text(b, line, col, v)?.trim().to_string()),
            None if b.spec.columns.is_none() => values.push(String::new()),
            None => {
                return Err(b.err(
                    line,
                    format!("no field `{col}` in the object for id `{id_text}`"),
                ));
            }
        }
    }
    Ok((id, values))
}

fn json_text(b: &Builder<'_, '_>, line: u64, col: &str, v: &serde_json::Value) -> Result<String> {
    use serde_json::Value;
    match v {
        Value::String(s) => Ok(s.clone()),
        Value::Number(n) => Ok(n.to_string()),
        Value::Bool(x) => Ok(x.to_string()),
        Value::Null => Ok(String::new()),
        Value::Array(_) | Value::Object(_) => Err(b.err(
            line,
            format!("field `{col}` holds a nested JSON value; expected text or a number"),
        )),
    }
}

/// Writes a CSV table: a header row, then the rows.
///
/// # Errors
/// [`Error::Io`] when writing fails; [`Error::InvalidArgument`] when a row's length differs
/// from the header's.
pub fn write_csv<W, I, R>(out: W, header: &[String], rows: I) -> Result<()>
where
    W: Write,
    I: IntoIterator<Item = R>,
    R: AsRef<[String]>,
{
    let mut w = csv::WriterBuilder::new().flexible(false).from_writer(out);
    w.write_record(header).map_err(csv_write_error)?;
    for row in rows {
        w.write_record(row.as_ref()).map_err(csv_write_error)?;
    }
    w.flush()?;
    Ok(())
}

/// Writes a CSV table to a new file (refusing to replace an existing one unless `overwrite`).
///
/// # Errors
/// As [`write_csv`], and [`Error::InvalidArgument`] when the file exists and `overwrite` is false.
pub fn write_csv_file<I, R>(path: &Path, header: &[String], rows: I, overwrite: bool) -> Result<()>
where
    I: IntoIterator<Item = R>,
    R: AsRef<[String]>,
{
    write_csv(
        std::io::BufWriter::new(new_file(path, overwrite)?),
        header,
        rows,
    )
}

/// Opens a new file for writing (refusing to replace an existing one unless `overwrite`).
///
/// # Errors
/// [`Error::InvalidArgument`] naming the file when it exists and `overwrite` is false, or
/// cannot be created.
pub fn new_file(path: &Path, overwrite: bool) -> Result<File> {
    let mut options = std::fs::OpenOptions::new();
    options.write(true);
    if overwrite {
        options.create(true).truncate(true);
    } else {
        options.create_new(true);
    }
    options.open(path).map_err(|e| {
        let message = if e.kind() == std::io::ErrorKind::AlreadyExists {
            "already exists; refusing to replace it".to_string()
        } else {
            format!("cannot write: {e}")
        };
        Error::invalid(path.display().to_string(), message)
    })
}

pub(crate) fn csv_write_error(e: csv::Error) -> Error {
    match e.into_kind() {
        csv::ErrorKind::Io(io) => Error::Io(io),
        other => Error::invalid("csv", format!("{other:?}")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(dir: &tempfile::TempDir, name: &str, bytes: &[u8]) -> std::path::PathBuf {
        let path = dir.path().join(name);
        std::fs::write(&path, bytes).expect("write test file");
        path
    }

    fn read(name: &str, bytes: &[u8], spec: &TableSpec) -> Result<Table> {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = write(&dir, name, bytes);
        read_table(&path, spec)
    }

    /// The error's field and message, panicking on success.
    fn fail(name: &str, bytes: &[u8], spec: &TableSpec) -> (String, String) {
        match read(name, bytes, spec) {
            Ok(t) => panic!("expected an error, read {} rows", t.len()),
            Err(Error::InvalidArgument { field, message }) => (field, message),
            Err(other) => panic!("expected InvalidArgument, got {other}"),
        }
    }

    fn label_spec() -> TableSpec {
        TableSpec::new("id", ["label"])
    }

    /// `check_rows` over a file: the rows its sink saw, or the error's field and message.
    #[allow(clippy::type_complexity)]
    fn check(
        bytes: &[u8],
    ) -> std::result::Result<(Streamed, Vec<(u64, String)>), (String, String)> {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = write(&dir, "labels.csv", bytes);
        let mut seen = Vec::new();
        match check_rows(&path, &label_spec(), &mut |line, id, v| {
            seen.push((line, format!("{id}={}", v[0])));
            Ok(())
        }) {
            Ok(s) => Ok((s, seen)),
            Err(Error::InvalidArgument { field, message }) => Err((field, message)),
            Err(other) => panic!("expected InvalidArgument, got {other}"),
        }
    }

    #[test]
    fn streaming_checks_repeats_in_sorted_and_unsorted_files_alike() {
        // Sorted: one pass, every row seen once.
        let (s, seen) = check(b"id,label\na,1\nb, 2\nc,3\n").expect("sorted file");
        assert_eq!((s.rows, s.id_bytes), (3, 3));
        assert_eq!(
            seen,
            [(2, "a=1".into()), (3, "b=2".into()), (4, "c=3".into())]
        );
        // Unsorted: read again with an index, so the first rows are seen twice.
        let (s, seen) = check(b"id,label\nb,1\na,2\nc,3\n").expect("unsorted file");
        assert_eq!(s.rows, 3);
        assert_eq!(seen.len(), 3 + 1);
        // A repeat is named with both lines whichever pass finds it, as read_table names it.
        for bytes in [
            &b"id,label\na,1\nb,2\nb,3\n"[..],
            b"id,label\nb,1\na,2\nb,3\n",
        ] {
            let (field, message) = check(bytes).expect_err("a repeated id");
            let (tfield, tmessage) = fail("labels.csv", bytes, &label_spec());
            assert!(field.ends_with("labels.csv:4"), "{field}");
            assert!(message.contains("duplicate id `b`"), "{message}");
            assert_eq!(
                (field.rsplit('/').next(), message.as_str()),
                (tfield.rsplit('/').next(), tmessage.as_str())
            );
        }
        // The second pass looks for no repeats and keeps nothing.
        let dir = tempfile::tempdir().expect("tempdir");
        let path = write(&dir, "labels.csv", b"id,label\na,1\na,2\n");
        let mut n = 0;
        let s = stream_rows(&path, &label_spec(), &mut |_, _, _| {
            n += 1;
            Ok(())
        })
        .expect("no repeat check");
        assert_eq!((s.rows, n), (2, 2));
    }

    #[test]
    fn the_check_except_repeats_reads_once_and_finds_repeats_only_while_ids_increase() {
        let dir = tempfile::tempdir().expect("tempdir");
        let run = |bytes: &[u8]| {
            let path = write(&dir, "labels.csv", bytes);
            let mut seen = Vec::new();
            let r = check_rows_except_repeats(&path, &label_spec(), &mut |line, id, _| {
                seen.push((line, id.to_string()));
                Ok(())
            });
            (path, r, seen)
        };
        // Sorted: checked, repeats ruled out.
        let (_, r, seen) = run(b"id,label
a,1
b,2
c,3
");
        let s = r.expect("sorted");
        assert!(s.ids_increase && s.rows == 3 && seen.len() == 3);
        // Sorted up to a repeat: named with both lines, as by check_rows.
        let (_, r, _) = run(b"id,label
a,1
b,2
b,3
c,4
");
        match r {
            Err(Error::InvalidArgument { field, message }) => {
                assert!(field.ends_with("labels.csv:4"), "{field}");
                assert_eq!(
                    message,
                    "duplicate id `b`: first on line 3, again on line 4"
                );
            }
            other => panic!("expected a repeat, got {other:?}"),
        }
        // Unsorted: one read (no row seen twice), repeats not looked for, the rows counted...
        let (path, r, seen) = run(b"id,label
b,1
a,2
 b ,3
c,4
a,5
");
        let s = r.expect("repeats after the order broke are left to the daemon");
        assert!(!s.ids_increase);
        assert_eq!((s.rows, s.id_bytes, seen.len()), (5, 5, 5));
        assert_eq!(seen[2], (4, "b".to_string()));
        // ... and find_repeat names the first two lines of an id (trimmed), or none.
        assert_eq!(
            find_repeat(&path, &label_spec(), "b").unwrap(),
            Some((2, 4))
        );
        assert_eq!(
            find_repeat(&path, &label_spec(), "a").unwrap(),
            Some((3, 6))
        );
        assert_eq!(find_repeat(&path, &label_spec(), "c").unwrap(), None);
        // Other problems after the order broke are still found.
        let (_, r, _) = run(b"id,label
b,1
a,2
,3
");
        let err = r.expect_err("an empty id").to_string();
        assert!(
            err.contains("labels.csv:4") && err.contains("empty id"),
            "{err}"
        );
    }

    #[test]
    fn reads_csv_trimmed_in_requested_order() {
        let t = read(
            "l.csv",
            b"x, id ,label\n1, a , cat\n\n2,b,dog\n",
            &TableSpec::new("id", ["label", "x"]),
        )
        .expect("read");
        assert_eq!(t.format, Format::Csv);
        assert_eq!(t.columns, ["label", "x"]);
        assert_eq!(t.rows.len(), 2);
        assert_eq!(t.rows[0].id, "a");
        assert_eq!(t.rows[0].values, ["cat", "1"]);
        assert_eq!(t.rows[1].line, 4);
        assert_eq!(t.column_index("x"), Some(1));
    }

    #[test]
    fn reads_jsonl_by_extension_and_by_sniffing() {
        let body = b"{\"id\": 7, \"label\": \" 1 \"}\n\n{\"id\": \"b\", \"label\": 0.5}\n";
        for name in ["p.jsonl", "p.ndjson", "p.txt"] {
            let t = read(name, body, &label_spec()).expect("read");
            assert_eq!(t.format, Format::JsonLines, "{name}");
            assert_eq!(t.rows[0].id, "7");
            assert_eq!(t.rows[0].values, ["1"]);
            assert_eq!(t.rows[1].values, ["0.5"]);
            assert_eq!(t.rows[1].line, 3);
        }
    }

    #[test]
    fn all_columns_keeps_file_order_and_empty_values() {
        let t = read(
            "s.csv",
            b"a,id,b\n1,x,\n2,y,3\n",
            &TableSpec::all_columns("id"),
        )
        .expect("read");
        assert_eq!(t.columns, ["a", "id", "b"]);
        assert_eq!(t.rows[0].values, ["1", "x", ""]);
        let j = read(
            "s.jsonl",
            b"{\"id\":\"x\",\"a\":1}\n{\"id\":\"y\",\"b\":2}\n",
            &TableSpec::all_columns("id"),
        )
        .expect("read");
        assert_eq!(j.columns, ["id", "a", "b"]);
        assert_eq!(j.rows[1].values, ["y", "", "2"]);
    }

    #[test]
    fn missing_file() {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("nope.csv");
        match read_table(&path, &label_spec()) {
            Err(Error::InvalidArgument { field, message }) => {
                assert!(field.ends_with("nope.csv"), "{field}");
                assert_eq!(message, "no such file");
            }
            other => panic!("unexpected {other:?}"),
        }
    }

    #[test]
    fn empty_files() {
        let (_, m) = fail("e.csv", b"", &label_spec());
        assert!(m.contains("no header row"), "{m}");
        let (_, m) = fail("e.csv", b"id,label\n\n", &label_spec());
        assert!(m.contains("no data rows"), "{m}");
        let (_, m) = fail("e.jsonl", b"\n  \n", &label_spec());
        assert!(m.contains("no data rows"), "{m}");
    }

    #[test]
    fn missing_column() {
        let (f, m) = fail("m.csv", b"id,lab\na,1\n", &label_spec());
        assert!(f.ends_with("m.csv:1"), "{f}");
        assert!(
            m.contains("no column `label`") && m.contains("id, lab"),
            "{m}"
        );
        let (f, m) = fail("m.csv", b"key,label\na,1\n", &label_spec());
        assert!(f.ends_with(":1") && m.contains("no column `id`"), "{f} {m}");
        let (f, m) = fail(
            "m.jsonl",
            b"{\"id\":\"a\",\"label\":1}\n{\"id\":\"b\"}\n",
            &label_spec(),
        );
        assert!(f.ends_with("m.jsonl:2"), "{f}");
        assert!(
            m.contains("no field `label`") && m.contains("id `b`"),
            "{m}"
        );
    }

    #[test]
    fn missing_or_empty_id() {
        let (f, m) = fail("i.csv", b"id,label\na,1\n  ,0\n", &label_spec());
        assert!(f.ends_with("i.csv:3"), "{f}");
        assert!(m.contains("empty id"), "{m}");
        let (f, m) = fail("i.jsonl", b"{\"label\":1}\n", &label_spec());
        assert!(f.ends_with("i.jsonl:1"), "{f}");
        assert!(m.contains("lacks `id`"), "{m}");
    }

    #[test]
    fn duplicate_id_names_both_lines() {
        let (f, m) = fail("d.csv", b"id,label\na,1\nb,0\n a ,1\n", &label_spec());
        assert!(f.ends_with("d.csv:4"), "{f}");
        assert!(
            m.contains("duplicate id `a`") && m.contains("line 2") && m.contains("line 4"),
            "{m}"
        );
    }

    #[test]
    fn duplicates_are_found_in_sorted_runs_and_after_them() {
        // Sorted, then an id equal to the one before.
        let (f, m) = fail("s.csv", b"id,label\na,1\nb,0\nb,1\n", &label_spec());
        assert!(
            f.ends_with("s.csv:4") && m.contains("first on line 3"),
            "{f} {m}"
        );
        // Sorted, then an earlier id out of order.
        let (f, m) = fail("s.csv", b"id,label\na,1\nc,0\nd,0\na,1\n", &label_spec());
        assert!(
            f.ends_with("s.csv:5") && m.contains("first on line 2"),
            "{f} {m}"
        );
        // Out of order early, then a repeat of a row read before the order broke.
        let (f, m) = fail(
            "s.csv",
            b"id,label\nb,1\nc,0\na,0\nd,0\nc,1\n",
            &label_spec(),
        );
        assert!(
            f.ends_with("s.csv:6") && m.contains("first on line 3"),
            "{f} {m}"
        );
        // Out of order but distinct: read whole.
        let t = read("s.csv", b"id,label\nb,1\na,0\nc,0\n", &label_spec()).expect("read");
        assert_eq!(t.len(), 3);
    }

    #[test]
    fn ragged_rows() {
        let (f, m) = fail("r.csv", b"id,label\na,1\nb,0,extra\n", &label_spec());
        assert!(f.ends_with("r.csv:3"), "{f}");
        assert!(
            m.contains("3 fields") && m.contains("header has 2") && m.contains("`b`"),
            "{m}"
        );
        let (f, _) = fail("r.csv", b"id,label\na\n", &label_spec());
        assert!(f.ends_with("r.csv:2"), "{f}");
    }

    #[test]
    fn empty_value_is_an_error_unless_allowed() {
        let (f, m) = fail("v.csv", b"id,label\na,1\nb, \n", &label_spec());
        assert!(f.ends_with("v.csv:3"), "{f}");
        assert!(
            m.contains("empty value in column `label` for id `b`"),
            "{m}"
        );
    }

    #[test]
    fn invalid_utf8() {
        let (f, m) = fail(
            "u.csv",
            b"id,label\na,1\n\nb,\xff\xfe\nc,1\n",
            &label_spec(),
        );
        assert!(f.ends_with("u.csv:4"), "{f}");
        assert!(m.contains("invalid UTF-8"), "{m}");
        let (f, m) = fail(
            "u.jsonl",
            b"{\"id\":\"a\",\"label\":1}\n{\"id\":\"\xff\"}\n",
            &label_spec(),
        );
        assert!(
            f.ends_with("u.jsonl:2") && m.contains("invalid UTF-8"),
            "{f} {m}"
        );
    }

    #[test]
    fn json_errors() {
        let (f, m) = fail(
            "j.jsonl",
            b"{\"id\":\"a\",\"label\":1}\n{\"id\": \n",
            &label_spec(),
        );
        assert!(
            f.ends_with("j.jsonl:2") && m.contains("invalid JSON"),
            "{f} {m}"
        );
        let (f, m) = fail("j.jsonl", b"[1,2]\n", &label_spec());
        assert!(f.ends_with(":1") && m.contains("JSON object"), "{f} {m}");
        let (_, m) = fail("j.jsonl", b"{\"id\":\"a\",\"label\":[1]}\n", &label_spec());
        assert!(m.contains("nested"), "{m}");
    }

    #[test]
    fn size_limit() {
        let body = b"id,label\na,1\nb,0\n";
        let spec = label_spec().max_bytes(10);
        let (f, m) = fail("big.csv", body, &spec);
        assert!(f.ends_with("big.csv"), "{f}");
        assert!(
            m.contains("over the limit of 10 bytes") && m.contains("--max-file-bytes"),
            "{m}"
        );
        let exact = label_spec().max_bytes(body.len() as u64);
        assert_eq!(read("ok.csv", body, &exact).expect("read").len(), 2);
    }

    #[test]
    fn duplicate_header() {
        let (f, m) = fail("h.csv", b"id,label,label\na,1,2\n", &label_spec());
        assert!(f.ends_with(":1") && m.contains("appears twice"), "{f} {m}");
    }

    #[test]
    fn csv_writer_round_trips_quoting() {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("out.csv");
        let header = vec!["id".to_string(), "label".to_string()];
        let rows = vec![
            vec!["a,1".to_string(), "say \"hi\"".to_string()],
            vec!["b".to_string(), String::new()],
        ];
        write_csv_file(&path, &header, &rows, false).expect("write");
        let t = read_table(&path, &TableSpec::all_columns("id")).expect("read back");
        assert_eq!(t.rows[0].values, rows[0]);
        assert_eq!(t.rows[1].values, rows[1]);
        match write_csv_file(&path, &header, &rows, false) {
            Err(Error::InvalidArgument { message, .. }) => {
                assert!(message.contains("already exists"))
            }
            other => panic!("expected a refusal to overwrite, got {other:?}"),
        }
        write_csv_file(&path, &header, &rows[..1], true).expect("overwrite");
        assert_eq!(
            read_table(&path, &TableSpec::all_columns("id"))
                .expect("read")
                .len(),
            1
        );
    }
}
