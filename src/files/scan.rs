//! A streaming CSV scanner: records as byte fields in one reused buffer, each with the line an
//! editor shows for it, and no allocation per row.
//!
//! It drives `csv_core` (the parser the `csv` crate is built on, with the same defaults:
//! comma, double quotes doubled inside quoted fields, `\n`, `\r` or `\r\n` ends a record, empty
//! lines skipped) over its own buffer, so it sees every byte the parser consumes and counts the
//! newlines among them as it goes: line numbers need no queue of offsets.

use std::io::Read;

/// Read size: large enough that a refill is rare, small enough to stay in cache.
const BUF_BYTES: usize = 256 * 1024;

/// Reads records one at a time; [`Scanner::field`] gives the fields of the last one.
pub(super) struct Scanner<R> {
    reader: R,
    core: csv_core::Reader,
    buf: Box<[u8]>,
    start: usize,
    end: usize,
    eof: bool,
    /// Bytes the parser has consumed.
    consumed: u64,
    /// Newlines among them.
    newlines: u64,
    /// The last byte consumed (0 before any).
    last: u8,
    /// The last record's unescaped bytes and the end of each field in them.
    out: Vec<u8>,
    ends: Vec<usize>,
    fields: usize,
}

impl<R: Read> Scanner<R> {
    /// A scanner over `reader`, starting with the bytes already read in `head`.
    pub(super) fn new(reader: R, head: &[u8]) -> Scanner<R> {
        let mut buf = vec![0u8; BUF_BYTES.max(head.len())].into_boxed_slice();
        buf[..head.len()].copy_from_slice(head);
        Scanner {
            reader,
            core: csv_core::Reader::new(),
            buf,
            start: 0,
            end: head.len(),
            eof: false,
            consumed: 0,
            newlines: 0,
            last: 0,
            out: vec![0; 4096],
            ends: vec![0; 32],
            fields: 0,
        }
    }

    /// Reads the next record; false at the end of the input.
    pub(super) fn next_record(&mut self) -> std::io::Result<bool> {
        let (mut out_len, mut n_ends) = (0, 0);
        loop {
            if self.start == self.end && !self.eof {
                self.start = 0;
                self.end = loop {
                    match self.reader.read(&mut self.buf) {
                        Ok(n) => break n,
                        Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                        Err(e) => return Err(e),
                    }
                };
                self.eof = self.end == 0;
            }
            // An empty input tells the parser the file has ended.
            let input = &self.buf[self.start..self.end];
            let (res, nin, nout, nend) =
                self.core
                    .read_record(input, &mut self.out[out_len..], &mut self.ends[n_ends..]);
            if nin > 0 {
                let taken = &input[..nin];
                self.newlines += newlines(taken);
                self.last = taken[nin - 1];
                self.consumed += nin as u64;
                self.start += nin;
            }
            out_len += nout;
            n_ends += nend;
            match res {
                csv_core::ReadRecordResult::InputEmpty => {}
                csv_core::ReadRecordResult::OutputFull => {
                    let grown = self.out.len() * 2;
                    self.out.resize(grown, 0);
                }
                csv_core::ReadRecordResult::OutputEndsFull => {
                    let grown = self.ends.len() * 2;
                    self.ends.resize(grown, 0);
                }
                csv_core::ReadRecordResult::Record => {
                    self.fields = n_ends;
                    return Ok(true);
                }
                csv_core::ReadRecordResult::End => {
                    self.fields = 0;
                    return Ok(false);
                }
            }
        }
    }

    /// Fields of the last record.
    pub(super) fn len(&self) -> usize {
        self.fields
    }

    /// Field `i` of the last record, as bytes (`i < len()`).
    pub(super) fn field(&self, i: usize) -> &[u8] {
        let from = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.out[from..self.ends[i]]
    }

    /// Bytes consumed so far.
    pub(super) fn consumed(&self) -> u64 {
        self.consumed
    }

    /// The line of the last byte consumed (the last record's terminator, or its last byte).
    pub(super) fn end_line(&self) -> u64 {
        1 + self.newlines - u64::from(self.last == b'\n')
    }

    /// The line the last record starts on: its end line less the newlines inside its fields.
    pub(super) fn line(&self) -> u64 {
        let end = if self.fields == 0 {
            0
        } else {
            self.ends[self.fields - 1]
        };
        let inner = newlines(&self.out[..end]);
        self.end_line().saturating_sub(inner).max(1)
    }
}

/// Newlines in `bytes`. Most slices are one short record, where a plain loop (which the
/// compiler vectorises) beats a search's set-up.
fn newlines(bytes: &[u8]) -> u64 {
    bytes.iter().filter(|&&b| b == b'\n').count() as u64
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every record as text with its line, read through a tiny first buffer.
    fn records(bytes: &[u8]) -> Vec<(u64, Vec<String>)> {
        let mut s = Scanner::new(bytes, &[]);
        let mut out = Vec::new();
        while s.next_record().expect("read") {
            let fields = (0..s.len())
                .map(|i| String::from_utf8_lossy(s.field(i)).into_owned())
                .collect();
            out.push((s.line(), fields));
        }
        out
    }

    /// The same records as the `csv` crate reads them (the reference), with flexible rows.
    fn reference(bytes: &[u8]) -> Vec<Vec<String>> {
        csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(bytes)
            .byte_records()
            .map(|r| {
                r.expect("reference read")
                    .iter()
                    .map(|f| String::from_utf8_lossy(f).into_owned())
                    .collect()
            })
            .collect()
    }

    #[test]
    fn fields_match_the_csv_crate_and_lines_count_blank_and_quoted_newlines() {
        let text: &[u8] =
            b"id,p\r\n\r\na,\"x\ny\"\n\n\nb,\"say \"\"hi\"\"\"\nc,1,extra\n\"d\ne\",2";
        let got = records(text);
        let fields: Vec<Vec<String>> = got.iter().map(|(_, f)| f.clone()).collect();
        assert_eq!(fields, reference(text));
        let lines: Vec<u64> = got.iter().map(|(l, _)| *l).collect();
        // Lines as an editor numbers them: the quoted newline in row `a` ends on line 4.
        assert_eq!(lines, [1, 3, 7, 8, 9]);
    }

    #[test]
    fn long_fields_and_many_fields_grow_the_buffers() {
        let long = "x".repeat(10_000);
        let many = (0..100)
            .map(|i| i.to_string())
            .collect::<Vec<_>>()
            .join(",");
        let text = format!("{long},1\n{many}\n");
        let got = records(text.as_bytes());
        assert_eq!(got[0].1[0], long);
        assert_eq!(got[1].1.len(), 100);
        assert_eq!(got[1].0, 2);
    }
}
