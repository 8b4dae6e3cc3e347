//! The limits each group of a rig's night was judged against, kept beside the night's
//! verdicts whenever that rig's daemon judges a frame live (that group's, the night so
//! far) and when it judges the night as a whole (every group's): a site's summary
//! draws every rig's own limits (its `[[rules]]`, its group's medians), not the limits
//! the daemon writing the summary would draw.

use super::db::{values, DbError};
use super::{Store, StoreError};
use crate::contract::GroupLimits;
use crate::rules::Limit;

impl Store {
    /// Keep the limits this rig's groups of `night` were judged against, in place of
    /// those of an earlier judgement of the night (one transaction).
    pub fn set_night_limits(&self, night: &str, groups: &[GroupLimits]) -> Result<(), StoreError> {
        let c = &self.conn;
        c.transaction(|| {
            c.execute(
                "DELETE FROM night_limits WHERE rig = ?1 AND night = ?2",
                values![self.rig, night],
            )?;
            for g in groups {
                // A limit that is not a number draws no line and fires for no value.
                let drawn: Vec<&Limit> = g.limits.iter().filter(|l| l.value.is_finite()).collect();
                let json = serde_json::to_string(&drawn)
                    .map_err(|e| DbError::Other(format!("limits of night {night}: {e}")))?;
                c.execute(
                    "INSERT INTO night_limits (rig, night, target, filter, limits_json)
                     VALUES (?1, ?2, ?3, ?4, ?5)",
                    values![self.rig, night, g.target, g.filter, json],
                )?;
            }
            Ok::<_, DbError>(())
        })
        .map_err(|e| self.err(e))
    }

    /// Keep the limits one group of this rig's `night` was just judged against live (the
    /// night so far), in place of its earlier ones; the night judged as a whole replaces
    /// them all ([`Store::set_night_limits`]).
    pub fn set_group_limits(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
        limits: &[Limit],
    ) -> Result<(), StoreError> {
        let c = &self.conn;
        let drawn: Vec<&Limit> = limits.iter().filter(|l| l.value.is_finite()).collect();
        let json = serde_json::to_string(&drawn)
            .map_err(|e| self.err(DbError::Other(format!("limits of night {night}: {e}"))))?;
        c.transaction(|| {
            c.execute(
                "DELETE FROM night_limits WHERE rig = ?1 AND night = ?2
                   AND target IS NOT DISTINCT FROM ?3 AND filter IS NOT DISTINCT FROM ?4",
                values![self.rig, night, target, filter],
            )?;
            c.execute(
                "INSERT INTO night_limits (rig, night, target, filter, limits_json)
                 VALUES (?1, ?2, ?3, ?4, ?5)",
                values![self.rig, night, target, filter, json],
            )?;
            Ok::<_, DbError>(())
        })
        .map_err(|e| self.err(e))
    }

    /// The limits this rig's groups of `night` were judged against when its daemon last
    /// judged the night, each group named (not its rig); empty when it never did.
    pub fn night_limits(&self, night: &str) -> Result<Vec<GroupLimits>, StoreError> {
        let rows = self.rows(
            "SELECT target, filter, limits_json FROM night_limits
             WHERE rig = ?1 AND night = ?2 ORDER BY target, filter",
            values![self.rig, night],
        )?;
        rows.iter()
            .map(|r| {
                let (target, filter, json): (Option<String>, Option<String>, String) =
                    (r.get(0)?, r.get(1)?, r.get(2)?);
                let limits: Vec<Limit> = serde_json::from_str(&json).map_err(|e| {
                    DbError::Other(format!(
                        "the limits of night {night}, group {} {}, cannot be read: {e}",
                        target.as_deref().unwrap_or("(no target)"),
                        filter.as_deref().unwrap_or("(no filter)")
                    ))
                })?;
                Ok(GroupLimits {
                    rig: None,
                    target,
                    filter,
                    limits,
                    missing: None,
                })
            })
            .collect::<Result<_, DbError>>()
            .map_err(|e| self.err(e))
    }
}
