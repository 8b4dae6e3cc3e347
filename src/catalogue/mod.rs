//! A star catalogue the user supplies, read from bytes: CSV with a header row, or a FITS
//! binary table (FITS Standard 4.0, section 7.3). Each row becomes one [`CatalogueStar`];
//! a bad row or a missing column is an error naming the file, the row and the column,
//! and nothing is guessed. Proper motion carries a position from the catalogue's epoch to
//! the frame's. Pure: the shell reads the files and indexes the stars (`store::catalogue`).

mod csv_rows;
mod table;

use serde::{Deserialize, Serialize};

/// One catalogue star.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CatalogueStar {
    pub id: String,
    /// ICRS (J2000) position at `epoch`, degrees.
    pub ra_deg: f64,
    pub dec_deg: f64,
    /// Proper motion in RA times cos(Dec), and in Dec, milliarcseconds per year.
    pub pm_ra_mas_yr: Option<f64>,
    pub pm_dec_mas_yr: Option<f64>,
    /// Julian year of the position.
    pub epoch: f64,
    /// Magnitudes by band name.
    pub mags: Vec<(String, f64)>,
}

impl CatalogueStar {
    /// The position at Julian year `year`, by linear proper motion on the tangent plane
    /// (adequate over decades for the motions of field stars; common practice).
    pub fn position_at(&self, year: f64) -> (f64, f64) {
        propagate(
            (self.ra_deg, self.dec_deg),
            (self.pm_ra_mas_yr, self.pm_dec_mas_yr),
            self.epoch,
            year,
        )
    }

    /// The magnitude in `band` (case-insensitive), or the first one when `band` is `None`.
    pub fn mag(&self, band: Option<&str>) -> Option<f64> {
        match band {
            Some(b) => self
                .mags
                .iter()
                .find(|(n, _)| n.eq_ignore_ascii_case(b))
                .map(|m| m.1),
            None => self.mags.first().map(|m| m.1),
        }
    }
}

/// A position at `epoch` carried to Julian year `year` by its proper motion (μα cos δ,
/// μδ in mas/yr): the unit vector moved along the local east and north directions and
/// normalised (ESA 1997, The Hipparcos and Tycho Catalogues, vol. 1, sec. 1.5.5, without
/// the radial terms), so right across the pole too.
pub fn propagate(
    (ra_deg, dec_deg): (f64, f64),
    pm: (Option<f64>, Option<f64>),
    epoch: f64,
    year: f64,
) -> (f64, f64) {
    let dt = year - epoch;
    let (Some(pa), Some(pd)) = pm else {
        return (ra_deg, dec_deg);
    };
    if !dt.is_finite() || dt == 0.0 {
        return (ra_deg, dec_deg);
    }
    let (a, d) = (ra_deg.to_radians(), dec_deg.to_radians());
    let p = [d.cos() * a.cos(), d.cos() * a.sin(), d.sin()];
    let east = [-a.sin(), a.cos(), 0.0];
    let north = [-d.sin() * a.cos(), -d.sin() * a.sin(), d.cos()];
    let mas = (1.0f64 / 3.6e6).to_radians();
    let (ea, nd) = (pa * dt * mas, pd * dt * mas);
    let v: Vec<f64> = (0..3)
        .map(|k| p[k] + ea * east[k] + nd * north[k])
        .collect();
    let norm = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
    let ra = v[1].atan2(v[0]).to_degrees();
    let dec = (v[2] / norm).clamp(-1.0, 1.0).asin().to_degrees();
    (ra.rem_euclid(360.0), dec)
}

/// Which columns hold what. The defaults are the contract's names.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Columns {
    pub ra: String,
    pub dec: String,
    /// Magnitude columns with the band each holds (`None`: from the `band` column, or
    /// the file's band).
    pub mags: Vec<(String, Option<String>)>,
    pub id: String,
    pub band: String,
    pub pm_ra: String,
    pub pm_dec: String,
    /// Julian year of the positions.
    pub epoch: f64,
    /// The band of a file whose rows name none.
    pub file_band: Option<String>,
}

impl Default for Columns {
    fn default() -> Self {
        Columns {
            ra: "ra_deg".into(),
            dec: "dec_deg".into(),
            mags: vec![("mag".into(), None)],
            id: "id".into(),
            band: "band".into(),
            pm_ra: "pmra_mas_yr".into(),
            pm_dec: "pmdec_mas_yr".into(),
            epoch: 2000.0,
            file_band: None,
        }
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CatalogueError {
    #[error("{file}: no column {column:?} (the columns are: {present})")]
    MissingColumn {
        file: String,
        column: String,
        present: String,
    },
    #[error("{file}: row {row}{}, column {column:?}: {reason}", at_line(*line))]
    BadValue {
        file: String,
        row: usize,
        /// The text line the row starts on (CSV: comments, blank lines and quoted line
        /// breaks make it differ from the row).
        line: Option<u64>,
        column: String,
        reason: String,
    },
    #[error("{file}: the column {column:?} is named twice (columns {first} and {second}); which one holds the value cannot be known, so rename or remove one")]
    DuplicateColumn {
        file: String,
        column: String,
        first: usize,
        second: usize,
    },
    #[error("{file}: {reason}")]
    Format { file: String, reason: String },
}

fn at_line(line: Option<u64>) -> String {
    line.map(|l| format!(" (line {l})")).unwrap_or_default()
}

/// A row's values by column, for both formats.
enum Cell<'a> {
    Text(&'a str),
    Number(f64),
    Empty,
}

/// Where each wanted column sits in a row.
struct Layout {
    ra: usize,
    dec: usize,
    mags: Vec<(usize, Option<String>, String)>,
    id: Option<usize>,
    band: Option<usize>,
    pm: Option<(usize, usize)>,
}

fn layout(file: &str, names: &[String], cols: &Columns) -> Result<Layout, CatalogueError> {
    // A column read twice over would be read from one of them silently: refused.
    let wanted = [
        &cols.ra,
        &cols.dec,
        &cols.id,
        &cols.band,
        &cols.pm_ra,
        &cols.pm_dec,
    ]
    .into_iter()
    .chain(cols.mags.iter().map(|(c, _)| c));
    for name in wanted {
        let mut at = names
            .iter()
            .enumerate()
            .filter(|(_, n)| n.trim().eq_ignore_ascii_case(name))
            .map(|(k, _)| k + 1);
        if let (Some(first), Some(second)) = (at.next(), at.next()) {
            return Err(CatalogueError::DuplicateColumn {
                file: file.to_string(),
                column: name.clone(),
                first,
                second,
            });
        }
    }
    let find = |name: &str| {
        names
            .iter()
            .position(|n| n.trim().eq_ignore_ascii_case(name))
    };
    let need = |name: &str| {
        find(name).ok_or_else(|| CatalogueError::MissingColumn {
            file: file.to_string(),
            column: name.to_string(),
            present: shorten(&names.join(", ")),
        })
    };
    let mut mags = Vec::new();
    for (column, band) in &cols.mags {
        mags.push((need(column)?, band.clone(), column.clone()));
    }
    let pm = match (find(&cols.pm_ra), find(&cols.pm_dec)) {
        (Some(a), Some(d)) => Some((a, d)),
        (None, None) => None,
        (Some(_), None) => {
            need(&cols.pm_dec)?;
            None
        }
        (None, Some(_)) => {
            need(&cols.pm_ra)?;
            None
        }
    };
    Ok(Layout {
        ra: need(&cols.ra)?,
        dec: need(&cols.dec)?,
        mags,
        id: find(&cols.id),
        band: find(&cols.band),
        pm,
    })
}

/// One row into a star. `row` is 1-based, counting data rows.
fn star_of<'a>(
    file: &str,
    (row, line): (usize, Option<u64>),
    names: &[String],
    lay: &Layout,
    cols: &Columns,
    cell: &dyn Fn(usize) -> Cell<'a>,
) -> Result<CatalogueStar, CatalogueError> {
    let bad = |c: usize, reason: String| CatalogueError::BadValue {
        file: file.to_string(),
        row,
        line,
        column: names[c].trim().to_string(),
        reason,
    };
    let number = |c: usize, required: bool| -> Result<Option<f64>, CatalogueError> {
        match cell(c) {
            Cell::Number(v) if v.is_finite() => Ok(Some(v)),
            Cell::Number(_) | Cell::Empty if !required => Ok(None),
            Cell::Number(_) | Cell::Empty => Err(bad(c, "empty; a number is needed".into())),
            Cell::Text(t) => match t.trim().parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(Some(v)),
                _ if t.trim().is_empty() && !required => Ok(None),
                _ => Err(bad(c, format!("{:?} is not a number", shorten(t)))),
            },
        }
    };
    let ra = number(lay.ra, true)?.unwrap_or_default();
    if !(0.0..=360.0).contains(&ra) {
        return Err(bad(lay.ra, format!("{ra} is outside 0 to 360 degrees")));
    }
    let dec = number(lay.dec, true)?.unwrap_or_default();
    if !(-90.0..=90.0).contains(&dec) {
        return Err(bad(lay.dec, format!("{dec} is outside -90 to 90 degrees")));
    }
    let row_band = lay.band.and_then(|c| match cell(c) {
        Cell::Text(t) if !t.trim().is_empty() => Some(t.trim().to_string()),
        Cell::Number(v) if v.is_finite() => Some(format!("{v}")),
        _ => None,
    });
    let mut mags = Vec::new();
    for (c, band, column) in &lay.mags {
        if let Some(m) = number(*c, false)? {
            if !(-30.0..=40.0).contains(&m) {
                return Err(bad(*c, format!("{m} is not a plausible magnitude")));
            }
            let band = band
                .clone()
                .or_else(|| row_band.clone())
                .or_else(|| cols.file_band.clone())
                .unwrap_or_else(|| column.clone());
            mags.push((band, m));
        }
    }
    let (pm_ra, pm_dec) = match lay.pm {
        Some((a, d)) => (number(a, false)?, number(d, false)?),
        None => (None, None),
    };
    let id = lay
        .id
        .and_then(|c| match cell(c) {
            Cell::Text(t) if !t.trim().is_empty() => Some(shorten(t.trim())),
            Cell::Number(v) if v.is_finite() => Some(format!("{v}")),
            _ => None,
        })
        .unwrap_or_else(|| format!("row {row}"));
    Ok(CatalogueStar {
        id,
        ra_deg: ra.rem_euclid(360.0),
        dec_deg: dec,
        pm_ra_mas_yr: pm_ra,
        pm_dec_mas_yr: pm_dec,
        epoch: cols.epoch,
        mags,
    })
}

/// At most 64 characters of a value, for ids and messages.
fn shorten(t: &str) -> String {
    let mut out: String = t.chars().filter(|c| !c.is_control()).take(64).collect();
    if t.chars().count() > 64 {
        out.push('…');
    }
    out
}

/// The longest row a catalogue may have, bytes: a hostile file cannot make one row
/// fill memory.
pub const MAX_LINE: usize = 65_536;
/// The most columns a catalogue may have (as FITS tables: TFIELDS ≤ 999).
pub const MAX_COLUMNS: usize = 999;
/// Rows are read and handed on at most this many at a time, so a catalogue of any size
/// is imported in bounded memory.
pub const BATCH_ROWS: usize = 20_000;

/// A catalogue being read, a batch of stars at a time: CSV (`csv_rows`) or the first
/// binary table of a FITS file (`table`), told apart by the first bytes.
pub struct Reader<R: std::io::Read> {
    file: String,
    cols: Columns,
    names: Vec<String>,
    lay: Layout,
    rows: Rows<R>,
    /// Data rows read so far.
    row: usize,
}

enum Rows<R: std::io::Read> {
    Csv(csv_rows::CsvRows<std::io::Chain<std::io::Cursor<Vec<u8>>, R>>),
    Fits(table::TableRows<std::io::Chain<std::io::Cursor<Vec<u8>>, R>>),
}

impl<R: std::io::Read> Reader<R> {
    /// Start reading `input` (named `file` in messages): its header row or table header
    /// read and every wanted column found.
    pub fn open(file: &str, mut input: R, cols: &Columns) -> Result<Self, CatalogueError> {
        let format = |reason: String| CatalogueError::Format {
            file: file.to_string(),
            reason,
        };
        let mut head = Vec::new();
        std::io::Read::read_to_end(&mut std::io::Read::take(&mut input, 80), &mut head)
            .map_err(|e| format(format!("cannot be read: {e}")))?;
        let fits = head.starts_with(b"SIMPLE  =");
        let input = std::io::Read::chain(std::io::Cursor::new(head), input);
        let (names, rows) = if fits {
            let t = table::TableRows::open(input).map_err(format)?;
            (t.names(), Rows::Fits(t))
        } else {
            let c = csv_rows::CsvRows::open(input).map_err(format)?;
            (c.names().to_vec(), Rows::Csv(c))
        };
        let lay = layout(file, &names, cols)?;
        Ok(Reader {
            file: file.to_string(),
            cols: cols.clone(),
            names,
            lay,
            rows,
            row: 0,
        })
    }

    /// Whether the rows carry ids of their own (else each star is named by its row, and
    /// no two rows can be one star).
    pub fn has_ids(&self) -> bool {
        self.lay.id.is_some()
    }

    /// The next stars, at most `max`; empty at the end.
    pub fn next_batch(&mut self, max: usize) -> Result<Vec<CatalogueStar>, CatalogueError> {
        let mut out = Vec::new();
        let file = self.file.clone();
        let format = |reason: String| CatalogueError::Format {
            file: file.clone(),
            reason,
        };
        while out.len() < max {
            let row = self.row + 1;
            let star = match &mut self.rows {
                Rows::Csv(c) => {
                    let Some(line) = c.next_row(self.names.len()).map_err(format)? else {
                        break;
                    };
                    let cell = |k: usize| {
                        let t = c.field(k);
                        if t.trim().is_empty() {
                            Cell::Empty
                        } else {
                            Cell::Text(t)
                        }
                    };
                    star_of(
                        &self.file,
                        (row, Some(line)),
                        &self.names,
                        &self.lay,
                        &self.cols,
                        &cell,
                    )?
                }
                Rows::Fits(t) => {
                    if !t.next_row().map_err(format)? {
                        break;
                    }
                    let cell = |k: usize| match t.value(k) {
                        table::Value::Number(v) => Cell::Number(v),
                        table::Value::Text(s) => Cell::Text(s),
                        table::Value::Empty => Cell::Empty,
                    };
                    star_of(
                        &self.file,
                        (row, None),
                        &self.names,
                        &self.lay,
                        &self.cols,
                        &cell,
                    )?
                }
            };
            self.row = row;
            out.push(star);
        }
        Ok(out)
    }
}

/// Every star of a catalogue held in memory (tests, small files), row by row; rows of
/// one star in several bands are merged where the index is built, not here.
pub fn read_all(
    file: &str,
    bytes: &[u8],
    cols: &Columns,
) -> Result<Vec<CatalogueStar>, CatalogueError> {
    let mut reader = Reader::open(file, bytes, cols)?;
    let mut stars = Vec::new();
    loop {
        let batch = reader.next_batch(BATCH_ROWS)?;
        if batch.is_empty() {
            return Ok(stars);
        }
        stars.extend(batch);
    }
}

/// Whether two positions of rows naming the same star are one star: within an arcsecond.
pub fn same_star(a: (f64, f64), b: (f64, f64)) -> bool {
    let sep =
        (a.1 - b.1).hypot(((a.0 - b.0 + 540.0).rem_euclid(360.0) - 180.0) * a.1.to_radians().cos());
    sep * 3600.0 <= 1.0
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse_csv(
        file: &str,
        text: &str,
        cols: &Columns,
    ) -> Result<Vec<CatalogueStar>, CatalogueError> {
        read_all(file, text.as_bytes(), cols)
    }

    #[test]
    fn a_hostile_line_is_refused_before_it_is_split() {
        let long = format!("ra_deg,dec_deg,mag\n{}\n", ",".repeat(MAX_LINE + 1));
        let e = parse_csv("c.csv", &long, &Columns::default()).unwrap_err();
        assert!(e.to_string().contains("longer than"), "{e}");
        let many = format!("{}\n", ",".repeat(5000));
        let e = parse_csv("c.csv", &many, &Columns::default()).unwrap_err();
        assert!(e.to_string().contains("more than 999 columns"), "{e}");
        // No line break at all: refused within a bounded read, not held whole.
        let endless = format!("ra_deg,dec_deg,mag\n1,2,\"{}", "x".repeat(10 * MAX_LINE));
        let e = parse_csv("c.csv", &endless, &Columns::default()).unwrap_err();
        assert!(e.to_string().contains("longer than"), "{e}");
    }

    #[test]
    fn a_column_named_twice_is_refused() {
        let e = parse_csv(
            "c.csv",
            "id,ra_deg,RA_DEG,dec_deg,mag\nK-1,1,2,3,4\n",
            &Columns::default(),
        )
        .unwrap_err();
        assert_eq!(
            e.to_string(),
            "c.csv: the column \"ra_deg\" is named twice (columns 2 and 3); which one holds the value cannot be known, so rename or remove one"
        );
        // A column nobody reads may repeat.
        assert!(parse_csv(
            "c.csv",
            "note,ra_deg,dec_deg,mag,note\na,1,2,3,b\n",
            &Columns::default()
        )
        .is_ok());
    }

    #[test]
    fn quoted_line_breaks_comments_and_the_line_of_a_bad_row() {
        // RFC 4180 section 2, rule 6: a quoted field may hold a line break.
        let text = "# a note\nid,ra_deg,dec_deg,mag\n\"K-1\nsecond line\",84.25,27.6,11.5\n\n# another\nK-2,84.3,x,12\n";
        let e = parse_csv("c.csv", text, &Columns::default()).unwrap_err();
        assert_eq!(
            e.to_string(),
            "c.csv: row 2 (line 7), column \"dec_deg\": \"x\" is not a number"
        );
        let ok = parse_csv("c.csv", &text.replace(",x,", ",27.6,"), &Columns::default()).unwrap();
        assert_eq!(ok.len(), 2);
        assert_eq!(ok[0].id, "K-1second line");
    }

    #[test]
    fn reads_the_contracts_columns_and_names_bad_rows() {
        let text = "id,ra_deg,dec_deg,mag,band\nK-1,84.25,27.6,11.5,V\n\"K,2\",84.3,27.61,,V\n";
        let stars = parse_csv("c.csv", text, &Columns::default()).unwrap();
        assert_eq!(stars.len(), 2);
        assert_eq!(stars[0].mags, vec![("V".to_string(), 11.5)]);
        assert_eq!(stars[1].id, "K,2");
        assert!(stars[1].mags.is_empty());
        let bad = parse_csv(
            "c.csv",
            "ra_deg,dec_deg,mag\n1,2,3\n1,x,3\n",
            &Columns::default(),
        )
        .unwrap_err();
        assert_eq!(
            bad.to_string(),
            "c.csv: row 2 (line 3), column \"dec_deg\": \"x\" is not a number"
        );
        let missing = parse_csv("c.csv", "ra,dec_deg,mag\n", &Columns::default()).unwrap_err();
        assert!(
            matches!(missing, CatalogueError::MissingColumn { ref column, .. } if column == "ra_deg")
        );
        let out = parse_csv("c.csv", "ra_deg,dec_deg,mag\n1,95,3\n", &Columns::default());
        assert!(out.unwrap_err().to_string().contains("outside -90 to 90"));
    }

    #[test]
    fn proper_motion_moves_a_star_by_its_rate() {
        // 1000 mas/yr in each direction for 26 years: 26 arcsec north, and 26 arcsec
        // east, which is 52 arcsec of RA at Dec 60; second-order terms of the
        // propagation are (26″)² / 1 rad ≈ 3 mas, so 10 mas is the tolerance.
        let s = CatalogueStar {
            id: "a".into(),
            ra_deg: 10.0,
            dec_deg: 60.0,
            pm_ra_mas_yr: Some(1000.0),
            pm_dec_mas_yr: Some(1000.0),
            epoch: 2000.0,
            mags: vec![],
        };
        let (ra, dec) = s.position_at(2026.0);
        assert!(((dec - 60.0) * 3600.0 - 26.0).abs() < 0.01, "{dec}");
        assert!(((ra - 10.0) * 3600.0 - 52.0).abs() < 0.02, "{ra}");
        // Across the pole: 1″ north of it, moving 2″ north, ends 1″ beyond, at RA + 180.
        let polar = CatalogueStar {
            ra_deg: 30.0,
            dec_deg: 90.0 - 1.0 / 3600.0,
            pm_ra_mas_yr: Some(0.0),
            pm_dec_mas_yr: Some(2000.0),
            epoch: 2000.0,
            ..s
        };
        let (ra, dec) = polar.position_at(2001.0);
        assert!(((90.0 - dec) * 3600.0 - 1.0).abs() < 1e-4, "{dec}");
        assert!((ra - 210.0).abs() < 1e-6, "{ra}");
    }
}
