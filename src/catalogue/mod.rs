//! A star catalogue the user supplies, read from bytes: CSV with a header row, or a FITS
//! binary table (FITS Standard 4.0, section 7.3). Each row becomes one [`CatalogueStar`];
//! a bad row or a missing column is an error naming the file, the row and the column,
//! and nothing is guessed. Proper motion carries a position from the catalogue's epoch to
//! the frame's. Pure: the shell reads the files and indexes the stars (`store::catalogue`).

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
    #[error("{file}: row {row}, column {column:?}: {reason}")]
    BadValue {
        file: String,
        row: usize,
        column: String,
        reason: String,
    },
    #[error("{file}: {reason}")]
    Format { file: String, reason: String },
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
    row: usize,
    names: &[String],
    lay: &Layout,
    cols: &Columns,
    cell: &dyn Fn(usize) -> Cell<'a>,
) -> Result<CatalogueStar, CatalogueError> {
    let bad = |c: usize, reason: String| CatalogueError::BadValue {
        file: file.to_string(),
        row,
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

/// The longest line a catalogue row may have, characters.
pub const MAX_LINE: usize = 65_536;
/// The most columns a catalogue may have (as FITS tables: TFIELDS ≤ 999).
pub const MAX_COLUMNS: usize = 999;

/// Split one CSV line (RFC 4180 quoting: a quoted field may hold commas and doubled
/// quotes; fields do not span lines), at most `max` fields (the rest is one more).
fn csv_fields(line: &str, max: usize) -> Vec<String> {
    let mut out = Vec::new();
    let mut field = String::new();
    let mut quoted = false;
    let mut chars = line.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                field.push('"');
                chars.next();
            }
            ('"', true) => quoted = false,
            ('"', false) if field.trim().is_empty() => {
                field.clear();
                quoted = true;
            }
            (',', false) if out.len() < max => out.push(std::mem::take(&mut field)),
            _ => field.push(c),
        }
    }
    out.push(field);
    out
}

/// Parse a CSV catalogue: a header row naming the columns, then one star per line.
/// Blank lines and lines starting with `#` are passed over.
pub fn parse_csv(
    file: &str,
    text: &str,
    cols: &Columns,
) -> Result<Vec<CatalogueStar>, CatalogueError> {
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty() && !l.trim_start().starts_with('#'));
    let Some((_, head)) = lines.next() else {
        return Err(CatalogueError::Format {
            file: file.to_string(),
            reason: "no header row".into(),
        });
    };
    let too_long = |row: usize| CatalogueError::Format {
        file: file.to_string(),
        reason: format!("row {row}: longer than {MAX_LINE} characters"),
    };
    if head.len() > MAX_LINE {
        return Err(too_long(0));
    }
    let names: Vec<String> = csv_fields(head.trim_start_matches('\u{feff}'), MAX_COLUMNS)
        .into_iter()
        .map(|n| n.trim().to_string())
        .collect();
    if names.len() > MAX_COLUMNS {
        return Err(CatalogueError::Format {
            file: file.to_string(),
            reason: format!("the header row names more than {MAX_COLUMNS} columns"),
        });
    }
    let lay = layout(file, &names, cols)?;
    let mut stars = Vec::new();
    for (row, (_, line)) in lines.enumerate() {
        if line.len() > MAX_LINE {
            return Err(too_long(row + 1));
        }
        let fields = csv_fields(line, names.len());
        if fields.len() != names.len() {
            return Err(CatalogueError::Format {
                file: file.to_string(),
                reason: format!(
                    "row {}: {} fields where the header row names {}",
                    row + 1,
                    fields.len(),
                    names.len()
                ),
            });
        }
        let cell = |c: usize| {
            let t = fields[c].as_str();
            if t.trim().is_empty() {
                Cell::Empty
            } else {
                Cell::Text(t)
            }
        };
        stars.push(star_of(file, row + 1, &names, &lay, cols, &cell)?);
    }
    Ok(stars)
}

/// Parse a catalogue from the first binary-table extension of a FITS file's bytes.
pub fn parse_fits_table(
    file: &str,
    bytes: &[u8],
    cols: &Columns,
) -> Result<Vec<CatalogueStar>, CatalogueError> {
    let format = |reason: String| CatalogueError::Format {
        file: file.to_string(),
        reason,
    };
    let t = table::BinTable::find(bytes).map_err(format)?;
    let names = t.names();
    let lay = layout(file, &names, cols)?;
    // Not sized from the header: NAXIS2 is a claim until the rows are read.
    let mut stars = Vec::with_capacity(t.rows().min(1 << 16));
    for row in 0..t.rows() {
        let cell = |c: usize| match t.value(bytes, row, c) {
            table::Value::Number(v) => Cell::Number(v),
            table::Value::Text(s) => Cell::Text(s),
            table::Value::Empty => Cell::Empty,
        };
        stars.push(star_of(file, row + 1, &names, &lay, cols, &cell)?);
    }
    Ok(stars)
}

/// Whether bytes look like a FITS file (its first card is SIMPLE).
pub fn is_fits(bytes: &[u8]) -> bool {
    bytes.starts_with(b"SIMPLE  =")
}

/// Rows that name the same star (one row per band) as one star with all their
/// magnitudes: the same id within an arcsecond.
pub fn merge_bands(stars: Vec<CatalogueStar>) -> Vec<CatalogueStar> {
    let mut by_id: std::collections::HashMap<String, usize> = std::collections::HashMap::new();
    let mut out: Vec<CatalogueStar> = Vec::with_capacity(stars.len());
    for s in stars {
        if let Some(&k) = by_id.get(&s.id) {
            let o = &out[k];
            let sep = (o.dec_deg - s.dec_deg).hypot(
                ((o.ra_deg - s.ra_deg + 540.0).rem_euclid(360.0) - 180.0)
                    * o.dec_deg.to_radians().cos(),
            );
            if sep * 3600.0 <= 1.0 {
                let o = &mut out[k];
                for m in s.mags {
                    if !o.mags.iter().any(|(b, _)| *b == m.0) {
                        o.mags.push(m);
                    }
                }
                continue;
            }
        }
        by_id.insert(s.id.clone(), out.len());
        out.push(s);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rows_of_one_star_in_several_bands_become_one_star() {
        let text = "id,ra_deg,dec_deg,mag,band\nK-1,84.25,27.6,11.5,V\nK-1,84.25,27.6,10.9,I\nK-2,84.3,27.6,12.0,V\n";
        let stars = merge_bands(parse_csv("c.csv", text, &Columns::default()).unwrap());
        assert_eq!(stars.len(), 2);
        assert_eq!(
            stars[0].mags,
            vec![("V".to_string(), 11.5), ("I".to_string(), 10.9)]
        );
    }

    #[test]
    fn a_hostile_line_is_refused_before_it_is_split() {
        let long = format!("ra_deg,dec_deg,mag\n{}\n", ",".repeat(MAX_LINE + 1));
        let e = parse_csv("c.csv", &long, &Columns::default()).unwrap_err();
        assert!(e.to_string().contains("longer than"), "{e}");
        let many = format!("{}\n", ",".repeat(5000));
        let e = parse_csv("c.csv", &many, &Columns::default()).unwrap_err();
        assert!(e.to_string().contains("more than 999 columns"), "{e}");
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
            "c.csv: row 2, column \"dec_deg\": \"x\" is not a number"
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
