//! The JSON shapes of the command-line contract (`subwatch measure --json`): field names
//! and meanings other tools rely on. Built from measurements; no logic beyond unit
//! conversion. Non-finite numbers become `null`, so the output is always strict JSON.

use serde::Serialize;

use crate::finite::{finite, finite_num};
use crate::record::{HeaderFacts, Metrics, StarRecord};

/// `report --target --json` and `report --list-targets --json`: built by `season`, whose
/// types are the shapes.
pub use crate::season::{TargetDocument, TargetNights};

/// One line of `subwatch measure --json`.
#[derive(Debug, Clone, Serialize)]
pub struct MeasureRecord {
    pub path: String,
    pub status: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub metrics: Option<Metrics>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub header: Option<HeaderFacts>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stars: Option<Vec<StarRecord>>,
    /// Detections not counted as stars (hot pixels, cosmic rays, saturated, edge-clipped).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rejected: Option<Vec<crate::measure::Rejected>>,
}

impl MeasureRecord {
    pub fn error(path: &str, reason: String) -> Self {
        MeasureRecord {
            path: path.to_string(),
            status: "error",
            error: Some(reason),
            metrics: None,
            header: None,
            stars: None,
            rejected: None,
        }
    }
}

/// One frame of `subwatch night --json`: the measure fields plus the verdict.
#[derive(Debug, Clone, Serialize)]
pub struct NightFrameRecord {
    pub path: String,
    /// The rig that took the frame (`[rig] name`; null where unnamed).
    pub rig: Option<String>,
    /// "light", or the calibration frame's kind: "dark", "flat", "bias".
    pub kind: &'static str,
    pub status: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub metrics: Option<Metrics>,
    pub verdict: crate::rules::Verdict,
    pub reasons: Vec<String>,
    pub explanations: Vec<String>,
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    #[serde(serialize_with = "finite")]
    pub time_unix: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub exposure_s: Option<f64>,
    pub registered: bool,
    #[serde(serialize_with = "finite")]
    pub registration_rms_px: Option<f64>,
    /// Frame → reference transform [a00, a01, a10, a11, t0, t1] in FITS pixels.
    pub registration_transform: Option<[f64; 6]>,
    /// Sun, Moon, twilight and the target's altitude at mid-exposure (with a site).
    pub sky: Option<crate::sky::FrameSky>,
    #[serde(serialize_with = "finite")]
    pub transparency_loss_mag: Option<f64>,
    /// TELESCOP and INSTRUME as the header names them (for VOEvent documents; not part
    /// of the JSON document).
    #[serde(skip)]
    pub instrument: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct DetectionRecord {
    pub path: String,
    pub x: f64,
    pub y: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct AnomalyRecord {
    pub kind: crate::night::AnomalyKind,
    #[serde(serialize_with = "finite")]
    pub ra_deg: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub dec_deg: Option<f64>,
    pub detections: Vec<DetectionRecord>,
    pub detail: crate::night::Detail,
    pub target: Option<String>,
    pub filter: Option<String>,
    /// The nearest catalogue star within the match radius, or `null` (also when no
    /// catalogue is configured).
    pub catalogue: Option<CatalogueMatch>,
    /// When not catalogued: the faintest catalogue magnitude near it, so "not in the
    /// catalogue down to magnitude X".
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub catalogue_depth_mag: Option<f64>,
    /// Calibrated magnitude in `mag_band` through the first detection's frame zero point,
    /// with its 1σ uncertainty (zero point and photon noise).
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub mag: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub mag_err: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mag_band: Option<String>,
}

/// A catalogue star an anomaly lies on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CatalogueMatch {
    pub id: String,
    #[serde(serialize_with = "finite")]
    pub mag: Option<f64>,
    pub band: Option<String>,
    #[serde(serialize_with = "finite_num")]
    pub separation_arcsec: f64,
}

/// The document `subwatch night --json` prints: `frames` (the lights, then the
/// calibration frames, each with its `kind`), `anomalies`, and `calibration_notes` (what
/// calibration the lights lack, in words).
#[derive(Debug, Clone, Default)]
pub struct NightDocument {
    /// The light frames.
    pub frames: Vec<NightFrameRecord>,
    pub anomalies: Vec<AnomalyRecord>,
    /// Each group's limits, for the summary's plots (not part of the JSON document).
    pub limits: Vec<GroupLimits>,
    /// Darks, flats and bias frames, judged as calibration.
    pub calibration: Vec<NightFrameRecord>,
    pub calibration_notes: Vec<String>,
}

impl NightDocument {
    /// Name the rig that took every frame of the document ('' leaves them unnamed).
    pub fn set_rig(&mut self, rig: &str) {
        let rig = (!rig.is_empty()).then(|| rig.to_string());
        for f in self.frames.iter_mut().chain(&mut self.calibration) {
            f.rig = rig.clone();
        }
        for l in &mut self.limits {
            l.rig = rig.clone();
        }
    }

    /// Add another rig's night (a site's document): its frames, anomalies and limits,
    /// and its calibration notes named by its rig.
    pub fn append(&mut self, other: NightDocument) {
        let rig = other
            .frames
            .iter()
            .chain(&other.calibration)
            .find_map(|f| f.rig.clone());
        self.frames.extend(other.frames);
        self.anomalies.extend(other.anomalies);
        self.limits.extend(other.limits);
        self.calibration.extend(other.calibration);
        self.calibration_notes
            .extend(other.calibration_notes.into_iter().map(|n| match &rig {
                Some(r) => format!("{r}: {n}"),
                None => n,
            }));
    }
}

impl Serialize for NightDocument {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct;
        let mut d = s.serialize_struct("NightDocument", 3)?;
        let frames: Vec<&NightFrameRecord> = self.frames.iter().chain(&self.calibration).collect();
        d.serialize_field("frames", &frames)?;
        d.serialize_field("anomalies", &self.anomalies)?;
        d.serialize_field("calibration_notes", &self.calibration_notes)?;
        d.end()
    }
}

/// The limits one target-and-filter group was judged against.
#[derive(Debug, Clone)]
pub struct GroupLimits {
    /// The rig whose group this is, where it is named.
    pub rig: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    pub limits: Vec<crate::rules::Limit>,
    /// Why the group's limits are not known, where they are not (another rig's group its
    /// daemon has judged no frame of): none are drawn, and the summary says so.
    pub missing: Option<String>,
}
