//! The first binary-table extension of a FITS file (FITS Standard 4.0, section 7.3),
//! read from a stream: the headers block by block (at most `MAX_HEADER_BLOCKS` each),
//! other HDUs' data passed over, then the table a row at a time, so memory does not
//! grow with the table. Every size is checked; a file that ends before the rows its
//! header promises is an error at the row where it ends. Scalar columns of types B, I,
//! J, K, E, D and character columns (A) are read; other types (logical, bits, complex,
//! arrays) are skipped over by their width and read as empty.

use std::io::Read;

use crate::frame::cards::{keyword, parse_card, Cards, HeaderCard};

const BLOCK: usize = 2880;
const MAX_HEADER_BLOCKS: usize = 1000;
const MAX_COLUMNS: usize = 999;

pub enum Value<'a> {
    Number(f64),
    Text(&'a str),
    Empty,
}

struct Column {
    name: String,
    offset: usize,
    kind: u8,
    repeat: usize,
    scale: f64,
    zero: f64,
    null: Option<i64>,
}

struct BinTable {
    columns: Vec<Column>,
    row_bytes: usize,
    rows: usize,
}

/// One header read from `input`: its value cards (the input is left just past its END
/// block).
fn read_header(input: &mut impl Read) -> Result<Option<Vec<HeaderCard>>, String> {
    let mut cards = Vec::new();
    let mut block = vec![0u8; BLOCK];
    for b in 0..MAX_HEADER_BLOCKS {
        match read_full(input, &mut block)? {
            0 if b == 0 => return Ok(None),
            BLOCK => {}
            _ => return Err("the file ends inside a header".into()),
        }
        for raw in block.chunks_exact(80) {
            if keyword(raw) == "END" {
                return Ok(Some(cards));
            }
            if let Some(c) = std::str::from_utf8(raw).ok().and_then(parse_card) {
                cards.push(c);
            }
        }
    }
    Err(format!(
        "no END card within {MAX_HEADER_BLOCKS} header blocks"
    ))
}

/// Read until `buf` is full or the input ends; how many bytes were read.
fn read_full(input: &mut impl Read, buf: &mut [u8]) -> Result<usize, String> {
    let mut got = 0;
    while got < buf.len() {
        match input.read(&mut buf[got..]) {
            Ok(0) => break,
            Ok(n) => got += n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(format!("cannot be read: {e}")),
        }
    }
    Ok(got)
}

fn whole(cards: &[HeaderCard], key: &str) -> Result<usize, String> {
    cards
        .integer(key)
        .filter(|v| *v >= 0)
        .and_then(|v| usize::try_from(v).ok())
        .ok_or_else(|| format!("{key} is missing or not a whole number"))
}

/// Bytes of an HDU's data (before padding), checked.
fn data_bytes(cards: &[HeaderCard]) -> Result<usize, String> {
    let naxis = whole(cards, "NAXIS")?;
    if naxis == 0 {
        return Ok(0);
    }
    if naxis > 999 {
        return Err("NAXIS above 999".into());
    }
    let bitpix = cards.integer("BITPIX").ok_or("BITPIX is missing")?;
    // FITS Standard 4.0, eq. 2: |BITPIX|/8 · GCOUNT · (PCOUNT + NAXIS1 ··· NAXISn), with
    // NAXIS1 = 0 left out of the product for random groups.
    let mut n = 1usize;
    for k in 1..=naxis {
        let axis = whole(cards, &format!("NAXIS{k}"))?;
        if k == 1 && axis == 0 {
            continue;
        }
        n = n.checked_mul(axis).ok_or("the data size overflows")?;
    }
    let pcount = cards.integer("PCOUNT").unwrap_or(0).max(0) as usize;
    let gcount = cards.integer("GCOUNT").unwrap_or(1).max(1) as usize;
    n.checked_add(pcount)
        .and_then(|v| v.checked_mul(gcount))
        .and_then(|v| v.checked_mul((bitpix.unsigned_abs() as usize) / 8))
        .ok_or_else(|| "the data size overflows".into())
}

/// "1D", "12A", "E": repeat and type code.
fn tform(s: &str) -> Option<(usize, u8)> {
    let s = s.trim();
    let digits = s.chars().take_while(|c| c.is_ascii_digit()).count();
    let repeat = if digits == 0 {
        1
    } else {
        s[..digits].parse().ok()?
    };
    let kind = *s.as_bytes().get(digits)?;
    Some((repeat, kind.to_ascii_uppercase()))
}

fn width(kind: u8, repeat: usize) -> Option<usize> {
    let each = match kind {
        b'L' | b'B' | b'A' => 1,
        b'I' => 2,
        b'J' | b'E' => 4,
        b'K' | b'D' | b'C' | b'P' => 8,
        b'M' | b'Q' => 16,
        b'X' => return Some(repeat.div_ceil(8)),
        _ => return None,
    };
    repeat.checked_mul(each)
}

/// A binary table being read row by row.
pub struct TableRows<R: Read> {
    input: std::io::BufReader<R>,
    table: BinTable,
    row: Vec<u8>,
    read: usize,
}

impl<R: Read> TableRows<R> {
    /// Find the first BINTABLE extension of the stream.
    pub fn open(input: R) -> Result<Self, String> {
        let mut input = std::io::BufReader::with_capacity(1 << 16, input);
        for hdu in 0..1000 {
            let Some(cards) = read_header(&mut input)? else {
                break;
            };
            if hdu == 0 && cards.logical("SIMPLE").is_none() {
                return Err("not a FITS file (no SIMPLE card)".into());
            }
            if hdu > 0 && cards.text("XTENSION").as_deref() == Some("BINTABLE") {
                let table = BinTable::from_header(&cards)?;
                return Ok(TableRows {
                    input,
                    row: vec![0u8; table.row_bytes],
                    table,
                    read: 0,
                });
            }
            let padded = data_bytes(&cards)?
                .div_ceil(BLOCK)
                .checked_mul(BLOCK)
                .ok_or("size overflows")?;
            let skipped = std::io::copy(
                &mut Read::take(&mut input, padded as u64),
                &mut std::io::sink(),
            )
            .map_err(|e| format!("cannot be read: {e}"))?;
            if skipped < padded as u64 {
                break;
            }
        }
        Err("no binary table extension".into())
    }

    pub fn names(&self) -> Vec<String> {
        self.table.columns.iter().map(|c| c.name.clone()).collect()
    }

    /// Read the next row; `false` after the last.
    pub fn next_row(&mut self) -> Result<bool, String> {
        if self.read == self.table.rows {
            return Ok(false);
        }
        if read_full(&mut self.input, &mut self.row)? < self.row.len() {
            return Err(format!(
                "the table promises {} rows of {} bytes; the file ends in row {}",
                self.table.rows,
                self.table.row_bytes,
                self.read + 1
            ));
        }
        self.read += 1;
        Ok(true)
    }

    /// Column `c` of the row last read.
    pub fn value(&self, c: usize) -> Value<'_> {
        self.table.value(&self.row, c)
    }
}

impl BinTable {
    fn from_header(cards: &[HeaderCard]) -> Result<Self, String> {
        let row_bytes = whole(cards, "NAXIS1")?;
        let rows = whole(cards, "NAXIS2")?;
        if rows > 0 && row_bytes == 0 {
            return Err(format!("NAXIS2 = {rows} rows of NAXIS1 = 0 bytes"));
        }
        let fields = whole(cards, "TFIELDS")?;
        if fields > MAX_COLUMNS {
            return Err(format!("TFIELDS = {fields}, more than {MAX_COLUMNS}"));
        }
        row_bytes
            .checked_mul(rows)
            .ok_or("the table's size overflows")?;
        let mut columns = Vec::with_capacity(fields);
        let mut offset = 0usize;
        for k in 1..=fields {
            let form = cards
                .text(&format!("TFORM{k}"))
                .ok_or_else(|| format!("TFORM{k} is missing"))?;
            let (repeat, kind) = tform(&form)
                .ok_or_else(|| format!("TFORM{k} = {form:?} is not a column format"))?;
            let w = width(kind, repeat)
                .ok_or_else(|| format!("TFORM{k} = {form:?} is not a column format"))?;
            columns.push(Column {
                name: cards
                    .text(&format!("TTYPE{k}"))
                    .unwrap_or_else(|| format!("column {k}")),
                offset,
                kind,
                repeat,
                scale: cards.number(&format!("TSCAL{k}")).unwrap_or(1.0),
                zero: cards.number(&format!("TZERO{k}")).unwrap_or(0.0),
                null: cards.integer(&format!("TNULL{k}")),
            });
            offset = offset.checked_add(w).ok_or("the row's size overflows")?;
        }
        if offset > row_bytes {
            return Err(format!(
                "the columns need {offset} bytes per row, NAXIS1 gives {row_bytes}"
            ));
        }
        Ok(BinTable {
            columns,
            row_bytes,
            rows,
        })
    }

    /// Column `c` of a row's bytes; the first element of a vector column.
    fn value<'a>(&self, row: &'a [u8], c: usize) -> Value<'a> {
        let col = &self.columns[c];
        let at = col.offset;
        let take = |n: usize| row.get(at..at + n);
        let int = |v: i64| {
            if col.null == Some(v) {
                Value::Empty
            } else {
                Value::Number(col.zero + col.scale * v as f64)
            }
        };
        let float = |v: f64| {
            if v.is_finite() {
                Value::Number(col.zero + col.scale * v)
            } else {
                Value::Empty
            }
        };
        if col.repeat == 0 {
            return Value::Empty;
        }
        match col.kind {
            b'A' => take(col.repeat)
                .and_then(|b| std::str::from_utf8(b).ok())
                .map_or(Value::Empty, |s| {
                    Value::Text(s.trim_end_matches(['\0', ' ']))
                }),
            b'B' => take(1).map_or(Value::Empty, |b| int(i64::from(b[0]))),
            b'I' => take(2).map_or(Value::Empty, |b| {
                int(i64::from(i16::from_be_bytes([b[0], b[1]])))
            }),
            b'J' => take(4).map_or(Value::Empty, |b| {
                int(i64::from(i32::from_be_bytes(
                    b.try_into().expect("4 bytes"),
                )))
            }),
            b'K' => take(8).map_or(Value::Empty, |b| {
                int(i64::from_be_bytes(b.try_into().expect("8 bytes")))
            }),
            b'E' => take(4).map_or(Value::Empty, |b| {
                float(f64::from(f32::from_be_bytes(
                    b.try_into().expect("4 bytes"),
                )))
            }),
            b'D' => take(8).map_or(Value::Empty, |b| {
                float(f64::from_be_bytes(b.try_into().expect("8 bytes")))
            }),
            _ => Value::Empty,
        }
    }
}
