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
use std::io::{BufRead, BufReader, Read, Write};
use std::path::Path;

use crate::error::{Error, Result};

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
        }
    }

    /// Reads every column of the file, empty values allowed (for copying rows around).
    pub fn all_columns(id_column: &str) -> Self {
        TableSpec {
            id_column: id_column.to_string(),
            columns: None,
            max_bytes: DEFAULT_MAX_FILE_BYTES,
            allow_empty_values: true,
        }
    }

    /// Sets the size limit.
    pub fn max_bytes(mut self, max_bytes: u64) -> Self {
        self.max_bytes = max_bytes;
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
/// of fields, invalid JSON or a JSON line that is not an object, and (unless allowed) an empty
/// value.
pub fn read_table(path: &Path, spec: &TableSpec) -> Result<Table> {
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
    let file = File::open(path).map_err(|e| open_error(&source, &e))?;
    // The limit is checked again while reading, in case the file grows meanwhile.
    let mut reader = BufReader::new(file.take(spec.max_bytes.saturating_add(1)));
    let head = reader
        .fill_buf()
        .map_err(|e| Error::invalid(source.clone(), format!("cannot read: {e}")))?
        .to_vec();
    let format = detect_format(path, &head);
    let mut builder = Builder::new(source, format, spec);
    match format {
        Format::Csv => read_csv(reader, &mut builder)?,
        Format::JsonLines => read_jsonl(reader, &mut builder)?,
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

/// Collects rows, checking ids and values as they come.
struct Builder<'a> {
    source: String,
    format: Format,
    spec: &'a TableSpec,
    columns: Vec<String>,
    rows: Vec<Row>,
    first_line: HashMap<String, u64>,
    bytes_seen: u64,
}

impl<'a> Builder<'a> {
    fn new(source: String, format: Format, spec: &'a TableSpec) -> Self {
        Builder {
            source,
            format,
            spec,
            columns: spec.columns.clone().unwrap_or_default(),
            rows: Vec::new(),
            first_line: HashMap::new(),
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

    /// Adds a row given its id (untrimmed, `None` when the field is absent) and values.
    fn push(&mut self, line: u64, id: Option<&str>, values: Vec<String>) -> Result<()> {
        let id_column = &self.spec.id_column;
        let id = match id.map(str::trim) {
            None => return Err(self.err(line, format!("no id: the row lacks `{id_column}`"))),
            Some("") => return Err(self.err(line, format!("empty id in column `{id_column}`"))),
            Some(id) => id.to_string(),
        };
        if let Some(first) = self.first_line.get(&id) {
            return Err(self.err(
                line,
                format!("duplicate id `{id}`: first on line {first}, again on line {line}"),
            ));
        }
        if !self.spec.allow_empty_values
            && let Some(pos) = values.iter().position(String::is_empty)
        {
            return Err(self.err(
                line,
                format!(
                    "empty value in column `{}` for id `{id}`",
                    self.columns[pos]
                ),
            ));
        }
        self.first_line.insert(id.clone(), line);
        self.rows.push(Row { line, id, values });
        Ok(())
    }

    fn finish(self) -> Result<Table> {
        if self.rows.is_empty() {
            return Err(Error::invalid(
                self.source,
                "empty file: no data rows".to_string(),
            ));
        }
        Ok(Table {
            source: self.source,
            format: self.format,
            id_column: self.spec.id_column.clone(),
            columns: self.columns,
            rows: self.rows,
        })
    }
}

/// Counts the newlines a reader has passed, so that a byte offset maps to its 1-based line.
///
/// The csv crate's own line numbers skip blank lines, and error messages must name the line an
/// editor shows. The csv reader reads ahead by at most its buffer, so few offsets are pending.
#[derive(Default)]
struct LineTracker {
    pending: std::collections::VecDeque<u64>,
    read: u64,
    lines_before: u64,
}

impl LineTracker {
    /// The line of the byte at `offset` (offsets must not decrease between calls).
    fn line_at(&mut self, offset: u64) -> u64 {
        while self.pending.front().is_some_and(|&nl| nl < offset) {
            self.pending.pop_front();
            self.lines_before += 1;
        }
        self.lines_before + 1
    }
}

struct Counting<R> {
    inner: R,
    tracker: std::rc::Rc<std::cell::RefCell<LineTracker>>,
}

impl<R: Read> Read for Counting<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        let mut t = self.tracker.borrow_mut();
        let start = t.read;
        for (i, _) in buf[..n].iter().enumerate().filter(|(_, b)| **b == b'\n') {
            t.pending.push_back(start + i as u64);
        }
        t.read += n as u64;
        Ok(n)
    }
}

fn read_csv<R: Read>(reader: R, b: &mut Builder<'_>) -> Result<()> {
    let tracker = std::rc::Rc::new(std::cell::RefCell::new(LineTracker::default()));
    let reader = Counting {
        inner: reader,
        tracker: tracker.clone(),
    };
    // The record's own position points before any blank lines the reader skipped, so the line
    // is found from the record's last byte, less the newlines inside its quoted fields.
    let line_of = |csv: &csv::Reader<Counting<R>>, record: &csv::StringRecord| {
        let last = csv.position().byte().saturating_sub(1);
        let inner: usize = record.iter().map(|f| f.matches('\n').count()).sum();
        let end_line = tracker.borrow_mut().line_at(last);
        end_line.saturating_sub(inner as u64).max(1)
    };
    let mut csv = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .trim(csv::Trim::None)
        .from_reader(reader);
    let mut record = csv::StringRecord::new();
    // Header: the first record that is not blank.
    let header: Vec<String> = loop {
        if !next_csv_record(&mut csv, &mut record, b, &tracker)? {
            return Err(Error::invalid(
                b.source.clone(),
                "empty file: no header row (CSV files start with a header naming the columns)",
            ));
        }
        if !is_blank(&record) {
            break record
                .iter()
                .map(|h| h.trim_start_matches('\u{feff}').trim().to_string())
                .collect();
        }
    };
    let header_line = line_of(&csv, &record);
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
    while next_csv_record(&mut csv, &mut record, b, &tracker)? {
        if is_blank(&record) {
            continue;
        }
        let line = line_of(&csv, &record);
        if record.len() != header.len() {
            let id = record.get(id_pos).map(str::trim).unwrap_or("");
            let about = if id.is_empty() {
                String::new()
            } else {
                format!(" (id `{id}`)")
            };
            return Err(b.err(
                line,
                format!(
                    "row has {} fields but the header has {}{about}",
                    record.len(),
                    header.len()
                ),
            ));
        }
        let values = positions
            .iter()
            .map(|&p| record.get(p).unwrap_or("").trim().to_string())
            .collect();
        b.push(line, record.get(id_pos), values)?;
    }
    Ok(())
}

/// Reads the next CSV record; false at the end of the file.
fn next_csv_record<R: Read>(
    csv: &mut csv::Reader<Counting<R>>,
    record: &mut csv::StringRecord,
    b: &mut Builder<'_>,
    tracker: &std::cell::RefCell<LineTracker>,
) -> Result<bool> {
    match csv.read_record(record) {
        Ok(more) => {
            let end = csv.position().byte();
            let seen = b.bytes_seen;
            b.check_size(end.saturating_sub(seen))?;
            Ok(more)
        }
        Err(e) => {
            let last = csv.position().byte().saturating_sub(1);
            let line = tracker.borrow_mut().line_at(last);
            Err(csv_error(b, line, &e))
        }
    }
}

fn csv_error(b: &Builder<'_>, line: u64, e: &csv::Error) -> Error {
    match e.kind() {
        csv::ErrorKind::Utf8 { err, .. } => b.err(
            line,
            format!(
                "invalid UTF-8 in field {} (files must be UTF-8)",
                err.field() + 1
            ),
        ),
        csv::ErrorKind::Io(io) => Error::invalid(b.source.clone(), format!("cannot read: {io}")),
        _ => b.err(line, format!("malformed CSV: {e}")),
    }
}

fn is_blank(record: &csv::StringRecord) -> bool {
    record.iter().all(|f| f.trim().is_empty())
}

fn read_jsonl<R: BufRead>(mut reader: R, b: &mut Builder<'_>) -> Result<()> {
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
            b.push(line_no, id.as_deref(), values)?;
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
            b.push(line, id.as_deref(), values)?;
        }
    }
    Ok(())
}

/// The id and the values of the builder's columns in one JSON object.
fn json_row(
    b: &Builder<'_>,
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

fn json_text(b: &Builder<'_>, line: u64, col: &str, v: &serde_json::Value) -> Result<String> {
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
    let mut options = std::fs::OpenOptions::new();
    options.write(true);
    if overwrite {
        options.create(true).truncate(true);
    } else {
        options.create_new(true);
    }
    let file = options.open(path).map_err(|e| {
        let message = if e.kind() == std::io::ErrorKind::AlreadyExists {
            "already exists; refusing to replace it".to_string()
        } else {
            format!("cannot write: {e}")
        };
        Error::invalid(path.display().to_string(), message)
    })?;
    write_csv(std::io::BufWriter::new(file), header, rows)
}

fn csv_write_error(e: csv::Error) -> Error {
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
