//! Each target's catalogue of persistent sources per filter and night, against which
//! later nights look for new sources, and other filters' nights for colors.

use super::db::{values, DbError};
use super::{Store, StoreError};

impl Store {
    /// Replace the catalogue of `target` through `filter` for `night`.
    pub fn save_catalog(
        &mut self,
        target: &str,
        filter: &str,
        night: &str,
        limit_mag: f64,
        footprint: &[(f64, f64)],
        sources: &[crate::night::CatalogSource],
    ) -> Result<(), StoreError> {
        let c = &self.conn;
        c.transaction(|| {
            c.execute(
                "INSERT INTO catalog_nights (target, filter, night, limit_mag, footprint_json, rig)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)
                 ON CONFLICT (target, filter, night, rig) DO UPDATE
                    SET limit_mag = excluded.limit_mag, footprint_json = excluded.footprint_json",
                values![
                    target,
                    filter,
                    night,
                    limit_mag,
                    serde_json::to_string(footprint).ok(),
                    self.rig
                ],
            )?;
            // After the night's row is this transaction's: two processes judging one night
            // at once (an archive's shares) write its catalogue one after the other, the
            // second deleting what the first wrote, so no source is kept twice.
            c.execute(
                "DELETE FROM catalog WHERE target = ?1 AND filter = ?2 AND night = ?3 AND rig = ?4",
                values![target, filter, night, self.rig],
            )?;
            let rows: Vec<Vec<super::db::Value>> = sources
                .iter()
                .enumerate()
                .map(|(seq, s)| {
                    values![target, filter, night, s.ra_deg, s.dec_deg, s.mag, self.rig, seq]
                        .to_vec()
                })
                .collect();
            c.insert_rows(
                "catalog",
                &[
                    "target", "filter", "night", "ra_deg", "dec_deg", "mag", "rig", "seq",
                ],
                &rows,
            )?;
            Ok::<_, DbError>(())
        })
        .map_err(|e| self.err(e))
    }

    /// Catalogues of `target` through `filter` from nights before `night`, newest first
    /// (with those recorded before catalogues named their filter).
    pub fn earlier_catalogs(
        &self,
        target: &str,
        filter: &str,
        night: &str,
    ) -> Result<Vec<crate::night::EarlierNight>, StoreError> {
        Ok(self
            .catalogs_before(target, night)?
            .into_iter()
            .filter(|(f, _)| f == filter || f.is_empty())
            .map(|(_, n)| n)
            .collect())
    }

    /// Every filter's catalogues of `target` from nights before `night`, newest first,
    /// each with its filter ('' where it was not recorded): every rig's, since a source
    /// new to one rig is checked against what any rig of the site saw of that target.
    pub fn catalogs_before(
        &self,
        target: &str,
        night: &str,
    ) -> Result<Vec<(String, crate::night::EarlierNight)>, StoreError> {
        let nights: Vec<(String, String, f64, Option<String>, String)> = self
            .rows(
                "SELECT filter, night, limit_mag, footprint_json, rig FROM catalog_nights
                 WHERE target = ?1 AND night < ?2 ORDER BY night DESC, filter, rig",
                values![target, night],
            )?
            .iter()
            .map(|r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)))
            .collect::<Result<_, DbError>>()
            .map_err(|e| self.err(e))?;
        let mut out = Vec::new();
        for (filter, n, limit_mag, footprint, rig) in nights {
            let footprint: Vec<(f64, f64)> = footprint
                .and_then(|f| serde_json::from_str(&f).ok())
                .unwrap_or_default();
            let sources = self
                .rows(
                    "SELECT ra_deg, dec_deg, mag FROM catalog
                     WHERE target = ?1 AND filter = ?2 AND night = ?3 AND rig = ?4
                     ORDER BY seq",
                    values![target, filter, n, rig],
                )?
                .iter()
                .map(|r| {
                    Ok(crate::night::CatalogSource {
                        ra_deg: r.get(0)?,
                        dec_deg: r.get(1)?,
                        mag: r.get(2)?,
                    })
                })
                .collect::<Result<_, DbError>>()
                .map_err(|e| self.err(e))?;
            out.push((
                filter,
                crate::night::EarlierNight {
                    night: n,
                    sources,
                    limit_mag,
                    footprint,
                },
            ));
        }
        Ok(out)
    }
}
