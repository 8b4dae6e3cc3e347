//! The user's star catalogue, indexed once for cone queries: an SQLite file with the
//! stars and an R*Tree (Guttman 1984; Beckmann et al. 1990) over each star's unit
//! vector, so a cone is the box around its chord and a query over a million stars
//! touches only the stars near it. The index remembers the files (path, size,
//! modification time) and the column settings it was built from; a change to either
//! makes it stale and it is built again.

use std::path::{Path, PathBuf};

use rusqlite::{params, Connection, OpenFlags};

use crate::catalogue::CatalogueStar;

use super::StoreError;

/// A catalogue file as the index remembers it.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SourceFile {
    pub path: String,
    pub size: u64,
    pub mtime_ns: i64,
}

/// The index's layout; an index of another is built again.
const FORMAT: &str = "3";

/// A star as the fit needs it, straight from the index's boxes (no row read, no parse).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConeStar {
    /// The star's row, to read the whole of it later ([`CatalogueIndex::stars`]).
    pub row: i64,
    pub ra_deg: f64,
    pub dec_deg: f64,
    pub pm_ra_mas_yr: Option<f64>,
    pub pm_dec_mas_yr: Option<f64>,
    pub epoch: f64,
    /// The first magnitude the catalogue gives it.
    pub mag: Option<f64>,
}

/// A cone holding more stars than this is refused (a frame needs thousands).
pub const MAX_CONE_STARS: usize = 2_000_000;

pub struct CatalogueIndex {
    conn: Connection,
    path: PathBuf,
}

/// Builds an index in a temporary file beside `path`; `finish` renames it into place, so
/// a reader never sees half an index.
pub struct IndexWriter {
    conn: Connection,
    path: PathBuf,
    tmp: PathBuf,
    next_id: i64,
    /// The file being added (rows of one star in several bands are merged within a
    /// file), and whether its rows carry ids (without, no two rows are one star).
    file: i64,
    merging: bool,
    finished: bool,
}

// An abandoned build leaves no temporary file behind.
impl Drop for IndexWriter {
    fn drop(&mut self) {
        if !self.finished {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

fn unit(ra: f64, dec: f64) -> [f64; 3] {
    let (a, d) = (ra.to_radians(), dec.to_radians());
    [d.cos() * a.cos(), d.cos() * a.sin(), d.sin()]
}

impl IndexWriter {
    pub fn create(path: &Path) -> Result<Self, StoreError> {
        let tmp = path.with_extension(format!("building-{}", std::process::id()));
        let err = |source: rusqlite::Error| StoreError::Database {
            store: path.to_path_buf().display().to_string(),
            source: source.into(),
        };
        let _ = std::fs::remove_file(&tmp);
        // Created here and now (never a file or link someone else left at that name).
        std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&tmp)
            .map_err(|source| StoreError::File {
                path: tmp.clone(),
                source,
            })?;
        let conn = Connection::open(&tmp).map_err(err)?;
        conn.execute_batch(
            "PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
             CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
             CREATE TABLE stars (id INTEGER PRIMARY KEY, name TEXT NOT NULL, ra REAL NOT NULL,
                 dec REAL NOT NULL, pm_ra REAL, pm_dec REAL, epoch REAL NOT NULL, mags TEXT NOT NULL);
             CREATE VIRTUAL TABLE stars_xyz USING rtree(id, x0, x1, y0, y1, z0, z1,
                 +ra, +dec, +pm_ra, +pm_dec, +epoch, +mag);
             CREATE TEMP TABLE named (id INTEGER PRIMARY KEY, file INTEGER NOT NULL,
                 name TEXT NOT NULL);
             PRAGMA cache_size = -65536;
             BEGIN;",
        )
        .map_err(err)?;
        Ok(IndexWriter {
            conn,
            path: path.to_path_buf(),
            tmp,
            next_id: 1,
            file: 0,
            merging: false,
            finished: false,
        })
    }

    /// Stars from here on come from the next file; `ids`: its rows name their stars.
    pub fn begin_file(&mut self, ids: bool) -> Result<(), StoreError> {
        self.file += 1;
        self.merging = ids;
        Ok(())
    }

    fn err(&self) -> impl Fn(rusqlite::Error) -> StoreError + '_ {
        |source: rusqlite::Error| StoreError::Database {
            store: self.path.clone().display().to_string(),
            source: source.into(),
        }
    }

    /// Add stars. Rows of one star in several bands are merged when the index is
    /// finished (`merge_bands`); here each row is written as it comes, so memory does not
    /// grow with the catalogue.
    pub fn add(&mut self, stars: &[CatalogueStar]) -> Result<(), StoreError> {
        let err = |source: rusqlite::Error| StoreError::Database {
            store: self.path.display().to_string(),
            source: source.into(),
        };
        let mut star = self
            .conn
            .prepare_cached(
                "INSERT INTO stars (id, name, ra, dec, pm_ra, pm_dec, epoch, mags)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            )
            .map_err(err)?;
        let mut boxed = self
            .conn
            .prepare_cached(
                "INSERT INTO stars_xyz VALUES (?1, ?2, ?2, ?3, ?3, ?4, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
            )
            .map_err(err)?;
        let mut name = self
            .conn
            .prepare_cached("INSERT INTO temp.named (id, file, name) VALUES (?1, ?2, ?3)")
            .map_err(err)?;
        for s in stars {
            let id = self.next_id;
            self.next_id += 1;
            let mags = serde_json::to_string(&s.mags).unwrap_or_else(|_| "[]".into());
            star.execute(params![
                id,
                s.id,
                s.ra_deg,
                s.dec_deg,
                s.pm_ra_mas_yr,
                s.pm_dec_mas_yr,
                s.epoch,
                mags
            ])
            .map_err(err)?;
            let v = unit(s.ra_deg, s.dec_deg);
            boxed
                .execute(params![
                    id,
                    v[0],
                    v[1],
                    v[2],
                    s.ra_deg,
                    s.dec_deg,
                    s.pm_ra_mas_yr,
                    s.pm_dec_mas_yr,
                    s.epoch,
                    s.mags.first().map(|m| m.1)
                ])
                .map_err(err)?;
            if self.merging {
                name.execute(params![id, self.file, s.id]).map_err(err)?;
            }
        }
        Ok(())
    }

    /// Rows of one file that name the same star (one row per band) become one star: a
    /// row whose id an earlier row of the file gave, within an arcsecond of that row, is
    /// that star in another band, and its magnitudes join the earlier row's (a band it
    /// has already keeps the first value). The names are indexed once, after every row
    /// is in (a sort, not ten million lookups), and only repeated names are read.
    fn merge_bands(&self) -> Result<(), StoreError> {
        let err = self.err();
        self.conn
            .execute_batch("CREATE INDEX temp.named_by_name ON named (file, name, id);")
            .map_err(&err)?;
        let mut repeated = self
            .conn
            .prepare(
                "SELECT n.id, n.file, n.name, s.ra, s.dec, s.mags FROM temp.named n
                 JOIN stars s ON s.id = n.id
                 WHERE (n.file, n.name) IN
                     (SELECT file, name FROM temp.named GROUP BY file, name HAVING COUNT(*) > 1)
                 ORDER BY n.file, n.name, n.id",
            )
            .map_err(&err)?;
        type Row = (i64, i64, String, f64, f64, String);
        let rows = repeated
            .query_map([], |r| {
                Ok((
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                ))
            })
            .map_err(&err)?;
        // What changes goes into two tables of its own while the names are read (a
        // table the query does not read may be written meanwhile), so nothing of it is
        // held in memory.
        self.conn
            .execute_batch(
                "CREATE TEMP TABLE joined (id INTEGER PRIMARY KEY, mags TEXT NOT NULL);
                 CREATE TEMP TABLE gone (id INTEGER PRIMARY KEY);",
            )
            .map_err(&err)?;
        let mut join = self
            .conn
            .prepare("INSERT OR REPLACE INTO temp.joined (id, mags) VALUES (?1, ?2)")
            .map_err(&err)?;
        let mut goes = self
            .conn
            .prepare("INSERT INTO temp.gone (id) VALUES (?1)")
            .map_err(&err)?;
        // The (file, name) being merged, and its star: id, position, magnitudes.
        type Current = ((i64, String), i64, (f64, f64), Vec<(String, f64)>);
        let mut current: Option<Current> = None;
        let mut keep = |c: &Current| -> Result<(), StoreError> {
            let mags = serde_json::to_string(&c.3).unwrap_or_else(|_| "[]".into());
            join.execute(params![c.1, mags]).map_err(&err)?;
            Ok(())
        };
        let mut changed = false;
        for row in rows {
            let (id, file, name, ra, dec, mags): Row = row.map_err(&err)?;
            let mags: Vec<(String, f64)> = serde_json::from_str(&mags).unwrap_or_default();
            if let Some(c) = current.as_mut() {
                if c.0 .0 == file && c.0 .1 == name && crate::catalogue::same_star(c.2, (ra, dec)) {
                    for m in mags {
                        if !c.3.iter().any(|(b, _)| *b == m.0) {
                            c.3.push(m);
                        }
                    }
                    goes.execute([id]).map_err(&err)?;
                    changed = true;
                    continue;
                }
            }
            // A new name, or the same name too far away: a star of its own, which later
            // rows of the name join.
            if let (Some(c), true) = (&current, changed) {
                keep(c)?;
            }
            changed = false;
            current = Some(((file, name), id, (ra, dec), mags));
        }
        if let (Some(c), true) = (&current, changed) {
            keep(c)?;
        }
        drop(repeated);
        self.conn
            .execute_batch(
                "UPDATE stars SET mags = (SELECT j.mags FROM temp.joined j WHERE j.id = stars.id)
                     WHERE id IN (SELECT id FROM temp.joined);
                 DELETE FROM stars WHERE id IN (SELECT id FROM temp.gone);
                 DELETE FROM stars_xyz WHERE id IN (SELECT id FROM temp.gone);",
            )
            .map_err(&err)?;
        Ok(())
    }

    /// Record what the index was built from, and move it into place.
    pub fn finish(
        mut self,
        sources: &[SourceFile],
        settings: &str,
    ) -> Result<CatalogueIndex, StoreError> {
        self.merge_bands()?;
        let meta = serde_json::to_string(sources).unwrap_or_default();
        self.conn
            .execute(
                "INSERT INTO meta (key, value) VALUES ('sources', ?1), ('settings', ?2), ('format', ?3)",
                params![meta, settings, FORMAT],
            )
            .map_err(self.err())?;
        self.conn.execute_batch("COMMIT;").map_err(self.err())?;
        let (path, tmp) = (self.path.clone(), self.tmp.clone());
        self.finished = true;
        drop(self);
        std::fs::rename(&tmp, &path).map_err(|source| StoreError::File {
            path: path.clone(),
            source,
        })?;
        CatalogueIndex::open(&path)
    }
}

impl CatalogueIndex {
    /// Open an index to read.
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|source: rusqlite::Error| StoreError::Database {
            store: path.to_path_buf().display().to_string(),
            source: source.into(),
        })?;
        Ok(CatalogueIndex {
            conn,
            path: path.to_path_buf(),
        })
    }

    fn err(&self) -> impl Fn(rusqlite::Error) -> StoreError + '_ {
        |source: rusqlite::Error| StoreError::Database {
            store: self.path.clone().display().to_string(),
            source: source.into(),
        }
    }

    /// Whether the index was built from exactly these files and settings.
    pub fn is_current(&self, sources: &[SourceFile], settings: &str) -> bool {
        let get = |key: &str| -> Option<String> {
            self.conn
                .query_row("SELECT value FROM meta WHERE key = ?1", [key], |r| r.get(0))
                .ok()
        };
        let recorded: Option<Vec<SourceFile>> =
            get("sources").and_then(|s| serde_json::from_str(&s).ok());
        recorded.as_deref() == Some(sources)
            && get("settings").as_deref() == Some(settings)
            && get("format").as_deref() == Some(FORMAT)
    }

    pub fn count(&self) -> Result<u64, StoreError> {
        self.conn
            .query_row("SELECT count(*) FROM stars", [], |r| r.get::<_, i64>(0))
            .map(|n| n.max(0) as u64)
            .map_err(self.err())
    }

    /// Every star within `radius_deg` of (ra, dec) at its catalogue position, as the fit
    /// needs it: read from the R*Tree alone.
    pub fn cone_positions(
        &self,
        ra: f64,
        dec: f64,
        radius_deg: f64,
    ) -> Result<Vec<ConeStar>, StoreError> {
        if !(ra.is_finite() && dec.is_finite() && radius_deg.is_finite()) {
            return Ok(Vec::new());
        }
        let r = radius_deg.clamp(0.0, 180.0);
        let c = unit(ra, dec);
        let chord = 2.0 * (r.to_radians() / 2.0).sin() + 1e-6;
        let mut q = self
            .conn
            .prepare_cached(
                "SELECT id, ra, dec, pm_ra, pm_dec, epoch, mag FROM stars_xyz
                 WHERE x1 >= ?1 AND x0 <= ?2 AND y1 >= ?3 AND y0 <= ?4 AND z1 >= ?5 AND z0 <= ?6",
            )
            .map_err(self.err())?;
        let rows = q
            .query_map(
                params![
                    c[0] - chord,
                    c[0] + chord,
                    c[1] - chord,
                    c[1] + chord,
                    c[2] - chord,
                    c[2] + chord
                ],
                |row| {
                    Ok(ConeStar {
                        row: row.get(0)?,
                        ra_deg: row.get(1)?,
                        dec_deg: row.get(2)?,
                        pm_ra_mas_yr: row.get(3)?,
                        pm_dec_mas_yr: row.get(4)?,
                        epoch: row.get(5)?,
                        mag: row.get(6)?,
                    })
                },
            )
            .map_err(self.err())?;
        let mut out = Vec::new();
        for (n, s) in rows.enumerate() {
            if n >= MAX_CONE_STARS {
                return Err(StoreError::TooMany {
                    path: self.path.clone(),
                    limit: MAX_CONE_STARS,
                });
            }
            let s = s.map_err(self.err())?;
            if crate::astrometry::separation_deg((ra, dec), (s.ra_deg, s.dec_deg)) <= r {
                out.push(s);
            }
        }
        Ok(out)
    }

    /// The whole catalogue rows of these stars, in the order given.
    pub fn stars(&self, rows: &[i64]) -> Result<Vec<CatalogueStar>, StoreError> {
        let mut q = self
            .conn
            .prepare_cached(
                "SELECT name, ra, dec, pm_ra, pm_dec, epoch, mags FROM stars WHERE id = ?1",
            )
            .map_err(self.err())?;
        rows.iter()
            .map(|&id| {
                q.query_row([id], |row| {
                    let mags: String = row.get(6)?;
                    Ok(CatalogueStar {
                        id: row.get(0)?,
                        ra_deg: row.get(1)?,
                        dec_deg: row.get(2)?,
                        pm_ra_mas_yr: row.get(3)?,
                        pm_dec_mas_yr: row.get(4)?,
                        epoch: row.get(5)?,
                        mags: serde_json::from_str(&mags).unwrap_or_default(),
                    })
                })
                .map_err(self.err())
            })
            .collect()
    }

    /// Every star within `radius_deg` of (ra, dec) at its catalogue position, whole.
    pub fn cone(
        &self,
        ra: f64,
        dec: f64,
        radius_deg: f64,
    ) -> Result<Vec<CatalogueStar>, StoreError> {
        let rows: Vec<i64> = self
            .cone_positions(ra, dec, radius_deg)?
            .iter()
            .map(|s| s.row)
            .collect();
        self.stars(&rows)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_cone_returns_exactly_the_stars_inside_it() {
        let dir = std::env::temp_dir().join(format!("subwatch-idx-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("index.sqlite");
        let mut w = IndexWriter::create(&path).unwrap();
        // A grid across RA = 0 near the pole and the equator.
        let mut stars = Vec::new();
        for i in 0..200 {
            for dec in [0.0, 89.5] {
                stars.push(CatalogueStar {
                    id: format!("{i}-{dec}"),
                    ra_deg: (f64::from(i) * 0.01 - 1.0).rem_euclid(360.0),
                    dec_deg: dec,
                    pm_ra_mas_yr: None,
                    pm_dec_mas_yr: None,
                    epoch: 2000.0,
                    mags: vec![("V".into(), 12.0)],
                });
            }
        }
        w.add(&stars).unwrap();
        let idx = w.finish(&[], "s").unwrap();
        assert!(idx.is_current(&[], "s"));
        assert!(!idx.is_current(&[], "t"));
        let got = idx.cone(0.0, 0.0, 0.105).unwrap();
        // RA from 359.895 to 0.105 at the equator: i from 90 to 110 (21 stars; the
        // ends at exactly 0.105 deg by arithmetic may fall either side).
        assert!((19..=21).contains(&got.len()), "{}", got.len());
        assert!(got.iter().all(|s| s.dec_deg == 0.0));
        // Closed before its folder goes: Windows removes no file that is open.
        drop(idx);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn rows_of_one_star_in_several_bands_become_one_star_within_a_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("index.sqlite");
        let text = "id,ra_deg,dec_deg,mag,band\nK-1,84.25,27.6,11.5,V\nK-1,84.25,27.6,10.9,I\nK-2,84.3,27.6,12.0,V\nK-1,84.25,27.6,11.7,V\nK-2,10.0,5.0,9.0,V\n";
        let cols = crate::catalogue::Columns::default();
        let mut w = IndexWriter::create(&path).unwrap();
        for _ in 0..2 {
            // The same file twice: a second file's rows never join the first's.
            let mut r = crate::catalogue::Reader::open("c.csv", text.as_bytes(), &cols).unwrap();
            w.begin_file(r.has_ids()).unwrap();
            w.add(&r.next_batch(2).unwrap()).unwrap();
            w.add(&r.next_batch(10).unwrap()).unwrap();
        }
        let idx = w.finish(&[], "s").unwrap();
        // Per file: K-1 (V 11.5, I 10.9; the second V keeps the first), K-2 at 84.3,
        // and K-2 at RA 10, too far to be the same star.
        assert_eq!(idx.count().unwrap(), 6);
        let near = idx.cone(84.25, 27.6, 0.001).unwrap();
        assert_eq!(near.len(), 2);
        assert_eq!(
            near[0].mags,
            vec![("V".to_string(), 11.5), ("I".to_string(), 10.9)]
        );
    }
}
