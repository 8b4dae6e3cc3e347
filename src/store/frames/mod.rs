//! Frames: one record per path and rig, its stars and rejected detections, in the table
//! `frames` and the tables hanging from it. This module reads a frame row back as a
//! record; each child holds one use of the table:
//! - `record`: recording a file (once per version), and the marks of files being read;
//! - `live`: a group's records for the live verdict, the placements it keeps and the
//!   verdicts it gives;
//! - `rejudge`: the verdicts a whole night judged again writes;
//! - `queries`: the queries of a night's frames (records, groups, counts).

use super::db::{values, DbError, Row, Value};
use super::{Store, StoreError};
use crate::measure::Rejected;
use crate::night::register::Placement;
use crate::record::{FrameRecord, FrameStatus, Identity, StarRecord};

mod live;
mod queries;
mod record;
mod rejudge;

pub use live::LiveFrame;
pub use queries::NightCounts;
pub use record::{Interrupted, Recorded};
pub use rejudge::VerdictChange;

/// What places a frame in its group, for judging it.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupKey {
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    pub ok: bool,
    pub skipped: bool,
}

/// A group's target and filter (either may be unknown).
pub type TargetFilter = (Option<String>, Option<String>);

/// A frame row's group, from columns night, target, filter, status at `at`.
fn group_key(r: &Row, at: usize) -> Result<GroupKey, DbError> {
    let status: String = r.get(at + 3)?;
    Ok(GroupKey {
        night: r.get(at)?,
        target: r.get(at + 1)?,
        filter: r.get(at + 2)?,
        ok: status == "ok",
        skipped: status == "skipped",
    })
}

/// The columns `frame_rows` reads, in the order `frame_from_row` expects.
const FRAME_COLUMNS: &str = "id, path, size, mtime_ns, status, error, night, target, filter,
    time_unix, metrics_json, wcs_json, header_json, placement_json, calibration_json";

/// A placement as the store keeps it (`placement_json`): naming its reference by the
/// reference's record id. One stored before placements did so names it by path; it
/// reads as none, so the next live verdict of its group places the frame again on the
/// reference's stars, as it would a frame never placed.
pub(in crate::store) fn stored_placement(json: &str) -> Option<Placement> {
    serde_json::from_str(json).ok()
}

fn frame_from_row(r: &Row) -> Result<(i64, FrameRecord, Option<Placement>), DbError> {
    let status: String = r.get(4)?;
    let json = |k: usize| -> Result<Option<String>, DbError> { r.get(k) };
    Ok((
        r.get(0)?,
        FrameRecord {
            identity: Identity {
                path: r.get(1)?,
                size: r.get::<i64>(2)? as u64,
                mtime_ns: r.get(3)?,
            },
            status: FrameStatus::from_name(&status),
            error: r.get(5)?,
            night: r.get(6)?,
            target: r.get(7)?,
            filter: r.get(8)?,
            time_unix: r.get(9)?,
            header: json(12)?.and_then(|h| serde_json::from_str(&h).ok()),
            metrics: json(10)?.and_then(|m| serde_json::from_str(&m).ok()),
            stars: Vec::new(),
            rejected: Vec::new(),
            wcs: json(11)?.and_then(|w| serde_json::from_str(&w).ok()),
            calibration: json(14)?.and_then(|c| serde_json::from_str(&c).ok()),
        },
        json(13)?.as_deref().and_then(stored_placement),
    ))
}

fn star_from_row(r: &Row) -> Result<StarRecord, DbError> {
    let flux: f64 = r.get::<Option<f64>>(2)?.unwrap_or(0.0);
    let fwhm: f64 = r.get::<Option<f64>>(3)?.unwrap_or(f64::NAN);
    let rgb: [Option<f64>; 3] = [r.get(8)?, r.get(9)?, r.get(10)?];
    Ok(StarRecord {
        x: r.get(0)?,
        y: r.get(1)?,
        flux,
        fwhm_px: fwhm,
        eccentricity: r.get::<Option<f64>>(4)?.unwrap_or(f64::NAN),
        snr: r.get::<Option<f64>>(5)?.unwrap_or(0.0),
        flux_err: r.get::<Option<f64>>(11)?.unwrap_or(f64::NAN),
        hfr_px: None,
        fwhm_major_px: fwhm,
        fwhm_minor_px: fwhm,
        angle_deg: 0.0,
        psf_flux: flux,
        psf_model: crate::measure::psf::PsfModel::Gaussian,
        moffat_beta: None,
        peak_adu: f64::NAN,
        blended: r.get::<Option<i64>>(12)?.unwrap_or(0) != 0,
        ra_deg: r.get(6)?,
        dec_deg: r.get(7)?,
        rgb: rgb.iter().any(|c| c.is_some()).then_some(rgb),
    })
}

impl Store {
    /// Frame rows as records (stars and rejected detections left empty), in time order.
    fn frame_rows(
        &self,
        filter: &str,
        values: &[Value],
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        self.rows(
            &format!(
                "SELECT {FRAME_COLUMNS} FROM frames {filter}
                 ORDER BY COALESCE(time_unix, recorded_at), id"
            ),
            values,
        )?
        .iter()
        .map(frame_from_row)
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    /// The stars of one frame. Star fields the store does not keep (half-flux radius,
    /// axes, angle, PSF model) come back as their simplest stand-ins.
    pub fn frame_star_records(&self, id: i64) -> Result<Vec<StarRecord>, StoreError> {
        self.rows(
            "SELECT x, y, flux, fwhm_px, eccentricity, snr, ra_deg, dec_deg, r, g, b, flux_err,
                blended
             FROM stars WHERE frame_id = ?1 ORDER BY seq",
            values![id],
        )?
        .iter()
        .map(star_from_row)
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    fn frame_rejected(&self, id: i64) -> Result<Vec<Rejected>, StoreError> {
        self.rows(
            "SELECT x, y, kind, peak_adu FROM rejected WHERE frame_id = ?1 ORDER BY seq",
            values![id],
        )?
        .iter()
        .map(|r| {
            let kind: String = r.get(2)?;
            Ok(Rejected {
                x: r.get(0)?,
                y: r.get(1)?,
                kind: crate::measure::RejectKind::from_name(&kind)
                    .unwrap_or(crate::measure::RejectKind::Unfit),
                peak_adu: r.get::<Option<f64>>(3)?.unwrap_or(0.0),
            })
        })
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }
}

#[cfg(test)]
mod tests {
    use super::stored_placement;

    #[test]
    fn a_placement_stored_with_its_reference_s_path_reads_as_none_and_one_with_its_id_reads() {
        let by_path = r#"{"reference":"/night/light_004.fits","registered":true,
            "transform":[1,0,0,1,2.5,-1],"rms_px":0.1,"matched":40,"offset_mag":0.02}"#;
        assert_eq!(stored_placement(by_path), None);
        let by_id = by_path.replace(r#""/night/light_004.fits""#, "17");
        let p = stored_placement(&by_id).unwrap();
        assert_eq!((p.reference, p.matched), (17, 40));
    }
}
