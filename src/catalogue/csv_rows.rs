//! CSV rows read one at a time with the `csv` crate (RFC 4180: quoted fields may hold
//! commas, doubled quotes and line breaks), from a header row naming the columns. Lines
//! starting with `#` and blank lines are passed over. No row may exceed `MAX_LINE`
//! bytes: the input is read through a guard that counts the bytes since the last row
//! began, so a file with no line break cannot fill memory.

use std::cell::RefCell;
use std::io::Read;
use std::rc::Rc;

use super::{MAX_COLUMNS, MAX_LINE};

/// What the input passed so far tells: the bytes since the current row began (a row
/// may not grow past `MAX_LINE`), and where the line breaks are (a row's line in
/// messages), shared with the reader that reads through it.
#[derive(Default)]
struct Passed {
    since_row: usize,
    read: u64,
    /// Offsets of line breaks read but not yet counted.
    breaks: std::collections::VecDeque<u64>,
    /// Line breaks before the offsets already counted, and the last of them.
    counted: u64,
    last_counted: u64,
}

impl Passed {
    /// Line breaks before byte `offset` (offsets asked for never go back).
    fn breaks_before(&mut self, offset: u64) -> u64 {
        while let Some(&b) = self.breaks.front().filter(|&&b| b < offset) {
            self.breaks.pop_front();
            self.counted += 1;
            self.last_counted = b;
        }
        self.counted
    }
}

struct Guarded<R> {
    inner: R,
    passed: Rc<RefCell<Passed>>,
}

impl<R: Read> Read for Guarded<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let mut p = self.passed.borrow_mut();
        // The csv reader buffers ahead (8 KiB), so a row is refused at MAX_LINE plus at
        // most one buffer.
        if p.since_row > MAX_LINE + (8 << 10) {
            return Err(std::io::Error::other(format!(
                "a row longer than {MAX_LINE} bytes"
            )));
        }
        let n = self.inner.read(buf)?;
        let start = p.read;
        p.breaks.extend(
            buf[..n]
                .iter()
                .enumerate()
                .filter(|(_, b)| **b == b'\n')
                .map(|(k, _)| start + k as u64),
        );
        p.read += n as u64;
        p.since_row += n;
        Ok(n)
    }
}

pub struct CsvRows<R: Read> {
    reader: csv::Reader<Guarded<R>>,
    passed: Rc<RefCell<Passed>>,
    names: Vec<String>,
    record: csv::StringRecord,
}

/// A csv error in plain words, with the line it was met on.
fn words(e: &csv::Error) -> String {
    let line = e
        .position()
        .map(|p| format!("line {}: ", p.line()))
        .unwrap_or_default();
    match e.kind() {
        csv::ErrorKind::Utf8 { .. } => format!("{line}not UTF-8 text"),
        csv::ErrorKind::Io(io) => format!("{line}{io}"),
        _ => format!("{line}{e}"),
    }
}

impl<R: Read> CsvRows<R> {
    /// Read the header row.
    pub fn open(input: R) -> Result<Self, String> {
        let passed = Rc::new(RefCell::new(Passed::default()));
        // Comments are told apart here (`blank`), not by the csv reader, so that every
        // line of the file is counted where the reader says a row ends.
        let reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(Guarded {
                inner: input,
                passed: passed.clone(),
            });
        let mut record = csv::StringRecord::new();
        let mut rows = CsvRows {
            reader,
            passed,
            names: Vec::new(),
            record: csv::StringRecord::new(),
        };
        loop {
            if rows.read(&mut record)?.is_none() {
                return Err("no header row".into());
            }
            if !blank(&record) {
                break;
            }
        }
        if record.len() > MAX_COLUMNS {
            return Err(format!(
                "the header row names more than {MAX_COLUMNS} columns"
            ));
        }
        rows.names = record
            .iter()
            .enumerate()
            .map(|(k, n)| {
                let n = if k == 0 {
                    n.trim_start_matches('\u{feff}')
                } else {
                    n
                };
                n.trim().to_string()
            })
            .collect();
        Ok(rows)
    }

    /// Read one record; the line it starts on, or `None` at the end.
    fn read(&mut self, record: &mut csv::StringRecord) -> Result<Option<u64>, String> {
        self.passed.borrow_mut().since_row = 0;
        let start = self.reader.position().byte();
        let got = self.reader.read_record(record).map_err(|e| words(&e))?;
        let end = self.reader.position().byte();
        // The row's first line: the breaks before its end, less its own terminator and
        // the breaks inside its quoted fields.
        let mut passed = self.passed.borrow_mut();
        let before_end = passed.breaks_before(end);
        // The last break counted is the row's terminator when it is the row's last byte.
        let ends_in_break = before_end > 0 && end > 0 && passed.last_counted == end - 1;
        let inner = record
            .iter()
            .map(|f| f.matches('\n').count() as u64)
            .sum::<u64>();
        let line = (before_end + 1).saturating_sub(u64::from(ends_in_break) + inner);
        if end - start > MAX_LINE as u64 {
            return Err(format!("line {line}: a row longer than {MAX_LINE} bytes"));
        }
        Ok(got.then_some(line))
    }

    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// The next data row, which must have `fields` fields; the line it starts on, or
    /// `None` at the end.
    pub fn next_row(&mut self, fields: usize) -> Result<Option<u64>, String> {
        let mut record = std::mem::take(&mut self.record);
        let out = loop {
            match self.read(&mut record) {
                Ok(None) => break Ok(None),
                Ok(Some(_)) if blank(&record) => continue,
                Ok(Some(line)) => {
                    if record.len() != fields {
                        break Err(format!(
                            "line {line}: {} fields where the header row names {fields}",
                            record.len()
                        ));
                    }
                    break Ok(Some(line));
                }
                Err(e) => break Err(e),
            }
        };
        self.record = record;
        out
    }

    /// Field `k` of the row last read.
    pub fn field(&self, k: usize) -> &str {
        self.record.get(k).unwrap_or("")
    }
}

/// A row of one empty field (a line of spaces), or one whose first field starts a
/// comment after spaces.
fn blank(record: &csv::StringRecord) -> bool {
    (record.len() == 1 && record[0].trim().is_empty())
        || record
            .get(0)
            .is_some_and(|f| f.trim_start().starts_with('#'))
}
