//! Each target's catalogue of persistent sources per filter and night, against which
//! later nights look for new sources, and other filters' nights for colors.

use rusqlite::params;

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
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        tx.execute(
            "DELETE FROM catalog WHERE target = ?1 AND filter = ?2 AND night = ?3",
            params![target, filter, night],
        )
        .map_err(err)?;
        tx.execute(
            "INSERT OR REPLACE INTO catalog_nights (target, filter, night, limit_mag, footprint_json) VALUES (?1, ?2, ?3, ?4, ?5)",
            params![target, filter, night, limit_mag, serde_json::to_string(footprint).ok()],
        )
        .map_err(err)?;
        {
            let mut st = tx
                .prepare_cached("INSERT INTO catalog (target, filter, night, ra_deg, dec_deg, mag) VALUES (?1, ?2, ?3, ?4, ?5, ?6)")
                .map_err(err)?;
            for s in sources {
                st.execute(params![target, filter, night, s.ra_deg, s.dec_deg, s.mag])
                    .map_err(err)?;
            }
        }
        tx.commit().map_err(err)
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
    /// each with its filter ('' where it was not recorded).
    pub fn catalogs_before(
        &self,
        target: &str,
        night: &str,
    ) -> Result<Vec<(String, crate::night::EarlierNight)>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT filter, night, limit_mag, footprint_json FROM catalog_nights
                 WHERE target = ?1 AND night < ?2 ORDER BY night DESC, filter",
            )
            .map_err(|e| self.err(e))?;
        let nights: Vec<(String, String, f64, Option<String>)> = st
            .query_map(params![target, night], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
            })
            .map_err(|e| self.err(e))?
            .collect::<Result<_, _>>()
            .map_err(|e| self.err(e))?;
        let mut out = Vec::new();
        for (filter, n, limit_mag, footprint) in nights {
            let footprint: Vec<(f64, f64)> = footprint
                .and_then(|f| serde_json::from_str(&f).ok())
                .unwrap_or_default();
            let mut q = self
                .conn
                .prepare_cached(
                    "SELECT ra_deg, dec_deg, mag FROM catalog
                     WHERE target = ?1 AND filter = ?2 AND night = ?3",
                )
                .map_err(|e| self.err(e))?;
            let sources = q
                .query_map(params![target, filter, n], |r| {
                    Ok(crate::night::CatalogSource {
                        ra_deg: r.get(0)?,
                        dec_deg: r.get(1)?,
                        mag: r.get(2)?,
                    })
                })
                .map_err(|e| self.err(e))?
                .collect::<Result<_, _>>()
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
