//! Verdicts written when a night is judged again (the morning, an archive): each frame's
//! verdict and reasons, and which of them changed.

use crate::rules::Verdict;
use crate::store::db::{values, DbError};
use crate::store::{Store, StoreError};

/// A frame whose stored judgement changed when its night was judged again.
#[derive(Debug, Clone, PartialEq)]
pub struct VerdictChange {
    pub path: String,
    /// The verdict before; `None` when the frame had none stored yet.
    pub before: Option<Verdict>,
    pub after: Verdict,
}

impl Store {
    /// Record a frame's verdict and reasons.
    pub fn set_verdict(
        &self,
        id: i64,
        verdict: Verdict,
        reasons: &[String],
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3 WHERE id = ?1",
            values![
                id,
                verdict.as_str(),
                serde_json::to_string(reasons).unwrap_or_default()
            ],
        )
    }

    /// Store verdicts judged again for the whole night (path, verdict, reasons), in one
    /// transaction. Returns the frames whose verdict or reasons changed.
    pub fn update_verdicts(
        &mut self,
        verdicts: &[(String, Verdict, Vec<String>)],
    ) -> Result<Vec<VerdictChange>, StoreError> {
        let c = &self.conn;
        let rig = &self.rig;
        c.transaction(|| {
            let mut changed = Vec::new();
            for (p, verdict, reasons) in verdicts {
                let reasons = serde_json::to_string(reasons).unwrap_or_default();
                let was: Option<String> = match c.query_opt(
                    "SELECT verdict FROM frames WHERE rig = ?2 AND path = ?1",
                    values![p, rig],
                )? {
                    Some(row) => row.get(0)?,
                    None => None,
                };
                let updated = c.execute(
                    "UPDATE frames SET verdict = ?2, reasons_json = ?3
                     WHERE rig = ?4 AND path = ?1
                       AND (verdict IS DISTINCT FROM ?2 OR reasons_json IS DISTINCT FROM ?3)",
                    values![p, verdict.as_str(), reasons, rig],
                )?;
                if updated > 0 {
                    changed.push(VerdictChange {
                        path: p.clone(),
                        before: was.as_deref().and_then(Verdict::from_name),
                        after: *verdict,
                    });
                }
            }
            Ok::<_, DbError>(changed)
        })
        .map_err(|e| self.err(e))
    }

    /// The verdicts this rig's frames of `night` hold in the store, by path: (verdict,
    /// reasons). A frame not judged yet is left out.
    pub fn stored_verdicts(
        &self,
        night: &str,
    ) -> Result<std::collections::HashMap<String, (Verdict, Vec<String>)>, StoreError> {
        let rows = self.rows(
            "SELECT path, verdict, reasons_json FROM frames
             WHERE night = ?1 AND rig = ?2 AND verdict IS NOT NULL",
            values![night, self.rig],
        )?;
        let mut out = std::collections::HashMap::new();
        for r in &rows {
            let read = || -> Result<(String, String, Option<String>), DbError> {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            };
            let (path, verdict, reasons) = read().map_err(|e| self.err(e))?;
            if let Some(v) = Verdict::from_name(&verdict) {
                let reasons = reasons
                    .and_then(|j| serde_json::from_str(&j).ok())
                    .unwrap_or_default();
                out.insert(path, (v, reasons));
            }
        }
        Ok(out)
    }
}
