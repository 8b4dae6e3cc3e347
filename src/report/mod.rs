//! The morning summary: a model built from the night document (pure), and its plain
//! text (`text`), HTML (`html`, every value from a header escaped) and CSV forms. Plots
//! and cutouts are PNG bytes made in `plots`; the HTML takes them as references (`cid:`
//! in mail, data URIs in the stand-alone file).
//!
//! What a reader needs first leads: the counts, then every warned and rejected frame with
//! the plain-words explanation of each reason, then what in the sky deserves a look.
//! Hot pixels are summarised as positions and cosmic-ray hits counted.
//!
//! Its length past 600 lines is tests; the wording is `words`, the CSV `csv`.

mod csv;
mod html;
pub mod plots;
pub mod preview;
pub mod season;
mod text;
mod words;

use std::collections::BTreeMap;

use chrono_tz::Tz;

use crate::contract::{AnomalyRecord, NightDocument, NightFrameRecord};
use crate::measure::stats::median_f64;
use crate::night::{AnomalyKind, Detail};
use crate::rules::{Limit, Verdict};

pub use csv::{csv, csv_text};
pub use html::html;
pub use text::text;
use words::kind_label;
pub use words::{
    brightness_words, catalogue_words, episodes_sentence, instrumental_mag, minutes, plural,
    sexagesimal, subject, to_stack, what, with_uncertainty,
};

/// How the summary is made: the site's clock, and whether frames that only warned go
/// into the lists of frames to stack (marked there) or are left out.
#[derive(Debug, Clone, Copy)]
pub struct Settings {
    pub tz: Tz,
    pub stack_warned: bool,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            tz: chrono_tz::UTC,
            stack_warned: true,
        }
    }
}

/// One frame of a group as the summary shows it: when, the verdict, and why.
#[derive(Debug, Clone)]
pub struct FrameLine {
    pub path: String,
    pub file: String,
    /// Start of the exposure on the site's clock, "HH:MM:SS".
    pub local_time: Option<String>,
    pub verdict: Verdict,
    pub reasons: Vec<String>,
    /// One sentence per reason with the values that fired it.
    pub explanations: Vec<String>,
}

/// A frame in the list to stack; `warned` marks one that only warned.
#[derive(Debug, Clone)]
pub struct StackEntry {
    pub path: String,
    pub warned: bool,
}

/// One target-and-filter group of the night.
#[derive(Debug, Clone)]
pub struct GroupSummary {
    pub target: Option<String>,
    pub filter: Option<String>,
    pub frames: usize,
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
    /// Reason code → frames.
    pub reasons: BTreeMap<String, usize>,
    /// Exposure of the frames to stack, seconds.
    pub usable_seconds: f64,
    pub median_fwhm_arcsec: Option<f64>,
    pub median_fwhm_px: Option<f64>,
    /// Median limiting magnitude and zero point of the frames to stack, with the band
    /// (with a catalogue).
    pub median_limit_mag: Option<f64>,
    pub median_zero_point_mag: Option<f64>,
    pub zero_point_band: Option<String>,
    pub best: Option<String>,
    pub worst: Option<String>,
    /// Every frame, in time order.
    pub lines: Vec<FrameLine>,
    /// The frames to stack, in time order.
    pub stack: Vec<StackEntry>,
    /// Frames that only warned and were left out of the stack by the setting.
    pub warned_left_out: usize,
    /// The limits the group was judged against (for the plots).
    pub limits: Vec<Limit>,
    /// Why no limits are drawn, where the group's are not known (another rig's group
    /// its daemon has judged no frame of).
    pub limits_missing: Option<String>,
    /// Reasons that held over consecutive frames, as episodes, in time order.
    pub episodes: Vec<Episode>,
    /// With a catalogue: why frames were not placed on the sky, each with how many.
    pub unplaced: Vec<(String, usize)>,
}

/// Consecutive frames of a group flagged for one cause: cloud, twilight, elongated
/// stars...
#[derive(Debug, Clone, PartialEq)]
pub struct Episode {
    pub cause: &'static str,
    pub frames: usize,
    /// Site clock "HH:MM" of the first and last frame.
    pub start: String,
    pub end: String,
    /// Whether it began with the group's first frame, or lasted to its last.
    pub from_start: bool,
    pub to_end: bool,
}

/// The cause a reason code stands for in an episode; `None` for reasons that are one
/// frame's own (a streak, an unreadable file) or a configured rule's.
fn cause_of(reason: &str) -> Option<&'static str> {
    Some(match reason {
        "fwhm_high" => "soft stars (FWHM)",
        "eccentricity_high" => "elongated stars (wind or tracking)",
        "background_high" => "a bright sky",
        "star_count_low" | "transparency_low" | "depth_low" => "cloud",
        "twilight" => "twilight",
        _ => return None,
    })
}

/// Runs of consecutive frames (in time order) flagged for the same cause: two frames or
/// more, twilight from one.
fn episodes(lines: &[FrameLine]) -> Vec<Episode> {
    let causes: Vec<Vec<&'static str>> = lines
        .iter()
        .map(|l| {
            let mut c: Vec<&'static str> = if l.verdict == Verdict::Ok {
                Vec::new()
            } else {
                l.reasons.iter().filter_map(|r| cause_of(r)).collect()
            };
            c.dedup();
            c
        })
        .collect();
    let hhmm = |l: &FrameLine| {
        l.local_time
            .as_deref()
            .map_or("--:--".to_string(), |t| t.chars().take(5).collect())
    };
    let mut found: Vec<(usize, Episode)> = Vec::new();
    let mut seen: Vec<&'static str> = causes.iter().flatten().copied().collect();
    seen.sort_unstable();
    seen.dedup();
    for cause in seen {
        let mut k = 0;
        while k < lines.len() {
            if !causes[k].contains(&cause) {
                k += 1;
                continue;
            }
            let start = k;
            while k < lines.len() && causes[k].contains(&cause) {
                k += 1;
            }
            let n = k - start;
            if n >= 2 || cause == "twilight" {
                found.push((
                    start,
                    Episode {
                        cause,
                        frames: n,
                        start: hhmm(&lines[start]),
                        end: hhmm(&lines[k - 1]),
                        from_start: start == 0,
                        to_end: k == lines.len(),
                    },
                ));
            }
        }
    }
    found.sort_by_key(|(start, e)| (*start, e.cause));
    found.into_iter().map(|(_, e)| e).collect()
}

impl GroupSummary {
    /// "target / filter", with words for what the headers did not say.
    pub fn heading(&self) -> String {
        group_heading(self.target.as_deref(), self.filter.as_deref())
    }

    pub fn is(&self, target: Option<&str>, filter: Option<&str>) -> bool {
        self.target.as_deref() == target && self.filter.as_deref() == filter
    }

    /// The frames that warned or were rejected, in time order.
    pub fn flagged(&self) -> impl Iterator<Item = &FrameLine> {
        self.lines.iter().filter(|f| f.verdict != Verdict::Ok)
    }
}

/// "target / filter" of a group; a frame without FILTER (a one-shot-color camera, or
/// none set) reads "no filter".
pub fn group_heading(target: Option<&str>, filter: Option<&str>) -> String {
    format!(
        "{} / {}",
        target.unwrap_or(crate::text::NO_TARGET),
        filter.unwrap_or(crate::text::NO_FILTER)
    )
}

/// A hot pixel: where it sits on the detector and how often it showed.
#[derive(Debug, Clone)]
pub struct HotPixelSpot {
    pub x: f64,
    pub y: f64,
    pub frames: usize,
    pub frames_total: usize,
    pub heading: String,
}

#[derive(Debug, Clone)]
pub struct Summary {
    pub night: String,
    pub tz: Tz,
    pub groups: Vec<GroupSummary>,
    /// What deserves a look, most interesting first (see [`look_order`]).
    pub notable: Vec<AnomalyRecord>,
    pub hot_pixels: Vec<HotPixelSpot>,
    /// Cosmic-ray hits: (file, x, y), in the order found.
    pub cosmic_rays: Vec<(String, f64, f64)>,
    pub frames: usize,
    pub ok: usize,
    pub warned: usize,
    pub rejected: usize,
    pub calibration: CalibrationSummary,
    /// One line per planned target (`[[targets]]`) imaged this night: how far its plan
    /// is (`season::plan`); filled by the shell that reads the store.
    pub plans: Vec<String>,
}

/// The night's calibration frames: how many of each kind and how they fared, the ones
/// that warned or were rejected with why, and what the lights lack.
#[derive(Debug, Clone, Default)]
pub struct CalibrationSummary {
    /// (kind, frames, warned, rejected), in the order dark, flat, bias.
    pub counts: Vec<(&'static str, usize, usize, usize)>,
    pub flagged: Vec<FrameLine>,
    pub notes: Vec<String>,
}

impl CalibrationSummary {
    pub fn is_empty(&self) -> bool {
        self.counts.is_empty() && self.notes.is_empty()
    }
}

impl Summary {
    /// Anomalies per kind, in the order they are listed (cosmic-ray hits and PSF-shaped
    /// transients apart).
    pub fn kind_counts(&self) -> Vec<(&'static str, usize)> {
        let mut counts: Vec<(&'static str, usize)> = Vec::new();
        for a in &self.notable {
            let name = kind_label(a);
            match counts.iter_mut().find(|(n, _)| *n == name) {
                Some(c) => c.1 += 1,
                None => counts.push((name, 1)),
            }
        }
        if !self.hot_pixels.is_empty() {
            counts.push(("hot_pixel", self.hot_pixels.len()));
        }
        if !self.cosmic_rays.is_empty() {
            counts.push(("cosmic ray", self.cosmic_rays.len()));
        }
        counts
    }
}

/// The order anomalies are listed in: what may be new in the sky first, then what moves
/// or changes, then flashes, then satellite and aircraft trails.
pub fn look_order(kind: AnomalyKind) -> usize {
    match kind {
        AnomalyKind::NewSource => 0,
        AnomalyKind::Moving => 1,
        AnomalyKind::Variable => 2,
        AnomalyKind::Color => 3,
        AnomalyKind::Transient => 4,
        AnomalyKind::Trail => 5,
        AnomalyKind::HotPixel => 6,
    }
}

/// The file name of a path, for people to find it.
pub fn file_name(path: &str) -> String {
    std::path::Path::new(path)
        .file_name()
        .map_or(path.to_string(), |n| n.to_string_lossy().into_owned())
}

/// A moment on the site's clock, "HH:MM:SS".
pub fn local_clock(t_unix: f64, tz: Tz) -> Option<String> {
    let t = chrono::DateTime::from_timestamp(t_unix.floor() as i64, 0)?;
    Some(t.with_timezone(&tz).format("%H:%M:%S").to_string())
}

/// Build the summary of a night document.
pub fn summarise(night: &str, doc: &NightDocument, settings: Settings) -> Summary {
    // A site's night (several rigs) has a group per rig, target and filter, each headed
    // by its rig; one rig's night is headed as before.
    type Key = (Option<String>, Option<String>, Option<String>);
    let mut groups: BTreeMap<Key, Vec<&NightFrameRecord>> = BTreeMap::new();
    for f in &doc.frames {
        groups
            .entry((f.rig.clone(), f.target.clone(), f.filter.clone()))
            .or_default()
            .push(f);
    }
    let rigs: std::collections::BTreeSet<&Option<String>> = groups.keys().map(|k| &k.0).collect();
    let several_rigs = rigs.len() > 1;
    let groups = groups
        .into_iter()
        .map(|((rig, target, filter), mut frames)| {
            frames.sort_by(|a, b| {
                a.time_unix
                    .unwrap_or(f64::MAX)
                    .total_cmp(&b.time_unix.unwrap_or(f64::MAX))
                    .then(a.path.cmp(&b.path))
            });
            let judged = doc
                .limits
                .iter()
                .find(|l| l.rig == rig && l.target == target && l.filter == filter);
            let limits = judged.map(|l| l.limits.clone()).unwrap_or_default();
            let limits_missing = judged.and_then(|l| l.missing.clone());
            let heading = match (&rig, several_rigs) {
                (Some(r), true) => Some(format!(
                    "{r}: {}",
                    target.as_deref().unwrap_or(crate::text::NO_TARGET)
                )),
                _ => target,
            };
            GroupSummary {
                limits_missing,
                ..group(heading, filter, &frames, limits, settings)
            }
        })
        .collect::<Vec<_>>();
    let mut notable: Vec<AnomalyRecord> = doc
        .anomalies
        .iter()
        .filter(|a| a.kind != AnomalyKind::HotPixel && !a.detail.is_cosmic_ray())
        .cloned()
        .collect();
    // Within a kind, what the catalogue does not know first (a new source absent from
    // the catalogue heads the list).
    notable.sort_by_key(|a| {
        (
            look_order(a.kind),
            a.catalogue.is_some() || a.catalogue_depth_mag.is_none(),
        )
    });
    let hot_pixels = doc
        .anomalies
        .iter()
        .filter_map(|a| match &a.detail {
            Detail::HotPixel(h) => Some(HotPixelSpot {
                x: h.detector_x,
                y: h.detector_y,
                frames: h.frames,
                frames_total: h.frames_total,
                heading: group_heading(a.target.as_deref(), a.filter.as_deref()),
            }),
            _ => None,
        })
        .collect();
    let cosmic_rays = doc
        .anomalies
        .iter()
        .filter(|a| a.detail.is_cosmic_ray())
        .filter_map(|a| a.detections.first())
        .map(|d| (file_name(&d.path), d.x, d.y))
        .collect();
    let count = |v: Verdict| doc.frames.iter().filter(|f| f.verdict == v).count();
    Summary {
        night: night.to_string(),
        tz: settings.tz,
        frames: doc.frames.len(),
        ok: count(Verdict::Ok),
        warned: count(Verdict::Warn),
        rejected: count(Verdict::Reject),
        groups,
        notable,
        hot_pixels,
        cosmic_rays,
        calibration: calibration_summary(doc, settings.tz),
        plans: Vec::new(),
    }
}

fn calibration_summary(doc: &NightDocument, tz: Tz) -> CalibrationSummary {
    let mut c = CalibrationSummary {
        notes: doc.calibration_notes.clone(),
        ..Default::default()
    };
    for kind in ["dark", "flat", "bias"] {
        let of: Vec<&NightFrameRecord> =
            doc.calibration.iter().filter(|f| f.kind == kind).collect();
        if of.is_empty() {
            continue;
        }
        let n = |v: Verdict| of.iter().filter(|f| f.verdict == v).count();
        c.counts
            .push((kind, of.len(), n(Verdict::Warn), n(Verdict::Reject)));
    }
    c.flagged = doc
        .calibration
        .iter()
        .filter(|f| f.verdict != Verdict::Ok)
        .map(|f| FrameLine {
            path: f.path.clone(),
            file: file_name(&f.path),
            local_time: f.time_unix.and_then(|t| local_clock(t, tz)),
            verdict: f.verdict,
            reasons: f.reasons.clone(),
            explanations: f.explanations.clone(),
        })
        .collect();
    c
}

fn group(
    target: Option<String>,
    filter: Option<String>,
    frames: &[&NightFrameRecord],
    limits: Vec<Limit>,
    settings: Settings,
) -> GroupSummary {
    let count = |v: Verdict| frames.iter().filter(|f| f.verdict == v).count();
    let mut reasons = BTreeMap::new();
    for f in frames {
        for r in &f.reasons {
            *reasons.entry(r.clone()).or_insert(0) += 1;
        }
    }
    let stacked = |f: &&&NightFrameRecord| {
        f.status == "ok"
            && match f.verdict {
                Verdict::Ok => true,
                Verdict::Warn => settings.stack_warned,
                Verdict::Reject => false,
            }
    };
    let usable: Vec<&&NightFrameRecord> = frames.iter().filter(stacked).collect();
    let fwhm = |f: &NightFrameRecord| f.metrics.as_ref().and_then(|m| m.fwhm_px);
    let mut ranked: Vec<&&NightFrameRecord> = frames.iter().filter(|f| fwhm(f).is_some()).collect();
    ranked.sort_by(|a, b| {
        fwhm(a)
            .unwrap_or(f64::MAX)
            .total_cmp(&fwhm(b).unwrap_or(f64::MAX))
    });
    let lines: Vec<FrameLine> = frames
        .iter()
        .map(|f| {
            let mut explanations = f.explanations.clone();
            // An unreadable frame's explanation names what was wrong with the file.
            if let (Some(e), Some(k)) = (&f.error, f.reasons.iter().position(|r| r == "unreadable"))
            {
                if let Some(text) = explanations.get_mut(k) {
                    *text = format!("{text}: {e}");
                }
            }
            FrameLine {
                path: f.path.clone(),
                file: file_name(&f.path),
                local_time: f.time_unix.and_then(|t| local_clock(t, settings.tz)),
                verdict: f.verdict,
                reasons: f.reasons.clone(),
                explanations,
            }
        })
        .collect();
    GroupSummary {
        target,
        filter,
        frames: frames.len(),
        ok: count(Verdict::Ok),
        warn: count(Verdict::Warn),
        reject: count(Verdict::Reject),
        reasons,
        usable_seconds: usable.iter().filter_map(|f| f.exposure_s).sum(),
        median_fwhm_arcsec: median_f64(
            &usable
                .iter()
                .filter_map(|f| f.metrics.as_ref().and_then(|m| m.fwhm_arcsec))
                .collect::<Vec<_>>(),
        ),
        median_fwhm_px: median_f64(&usable.iter().filter_map(|f| fwhm(f)).collect::<Vec<_>>()),
        median_limit_mag: median_f64(
            &usable
                .iter()
                .filter_map(|f| f.metrics.as_ref().and_then(|m| m.limit_mag))
                .collect::<Vec<_>>(),
        ),
        median_zero_point_mag: median_f64(
            &usable
                .iter()
                .filter_map(|f| f.metrics.as_ref().and_then(|m| m.zero_point_mag))
                .collect::<Vec<_>>(),
        ),
        zero_point_band: usable
            .iter()
            .find_map(|f| f.metrics.as_ref().and_then(|m| m.zero_point_band.clone())),
        best: ranked.first().map(|f| file_name(&f.path)),
        worst: ranked.last().map(|f| file_name(&f.path)),
        episodes: episodes(&lines),
        unplaced: {
            let mut notes: BTreeMap<String, usize> = BTreeMap::new();
            for f in frames {
                if let Some(n) = f.metrics.as_ref().and_then(|m| m.sky_fit_note.as_ref()) {
                    *notes.entry(n.clone()).or_default() += 1;
                }
            }
            notes.into_iter().collect()
        },
        lines,
        stack: usable
            .iter()
            .map(|f| StackEntry {
                path: f.path.clone(),
                warned: f.verdict == Verdict::Warn,
            })
            .collect(),
        warned_left_out: if settings.stack_warned {
            0
        } else {
            count(Verdict::Warn)
        },
        limits,
        limits_missing: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_cells_from_headers_cannot_become_formulas() {
        // OWASP, "CSV Injection": cells starting with = + - @ tab or CR are neutralised.
        for (cell, written) in [
            (
                "=HYPERLINK(\"http://x\")",
                "\"'=HYPERLINK(\"\"http://x\"\")\"",
            ),
            ("+1", "'+1"),
            ("-2+3", "'-2+3"),
            ("@SUM(A1)", "'@SUM(A1)"),
            ("\tx", "'\tx"),
            ("Kestrel Field A", "Kestrel Field A"),
            ("a,b", "\"a,b\""),
        ] {
            assert_eq!(csv_text(cell), written, "{cell:?}");
        }
    }

    use crate::contract::DetectionRecord;
    use crate::night::detail::{HotPixelDetail, MovingDetail, NewSourceDetail, TransientDetail};

    fn frame(
        name: &str,
        target: &str,
        filter: Option<&str>,
        minute: f64,
        verdict: Verdict,
        why: &[(&str, &str)],
    ) -> NightFrameRecord {
        NightFrameRecord {
            path: format!("/srv/capture/{name}"),
            rig: None,
            kind: "light",
            status: if why.iter().any(|w| w.0 == "unreadable") {
                "error"
            } else {
                "ok"
            },
            error: why
                .iter()
                .any(|w| w.0 == "unreadable")
                .then(|| "truncated: 2880 of 5760 bytes".into()),
            metrics: None,
            verdict,
            reasons: why.iter().map(|w| w.0.to_string()).collect(),
            explanations: why.iter().map(|w| w.1.to_string()).collect(),
            night: Some("2026-03-14".into()),
            target: Some(target.into()),
            filter: filter.map(String::from),
            // 2026-03-14 23:00 UTC, plus minutes.
            time_unix: Some(1_773_529_200.0 + 60.0 * minute),
            exposure_s: Some(120.0),
            registered: true,
            registration_rms_px: None,
            registration_transform: None,
            sky: None,
            transparency_loss_mag: None,
            instrument: None,
        }
    }

    fn anomaly(kind: AnomalyKind, detail: Detail) -> AnomalyRecord {
        AnomalyRecord {
            kind,
            ra_deg: Some(84.25),
            dec_deg: Some(27.6),
            detections: vec![DetectionRecord {
                path: "/srv/capture/a1.fits".into(),
                x: 10.0,
                y: 20.0,
            }],
            detail,
            target: Some("Field A".into()),
            filter: Some("L".into()),
            catalogue: None,
            catalogue_depth_mag: None,
            mag: None,
            mag_err: None,
            mag_band: None,
        }
    }

    fn night() -> NightDocument {
        let hot = |x: f64| {
            anomaly(
                AnomalyKind::HotPixel,
                Detail::HotPixel(HotPixelDetail {
                    detector_x: x,
                    detector_y: 7.0,
                    frames: 4,
                    frames_total: 4,
                }),
            )
        };
        let cosmic = anomaly(
            AnomalyKind::Transient,
            Detail::Transient(TransientDetail::cosmic_ray()),
        );
        NightDocument {
            frames: vec![
                frame(
                    "a2.fits",
                    "Field A",
                    Some("L"),
                    40.0,
                    Verdict::Warn,
                    &[("trail", "a streak crosses the frame")],
                ),
                frame("a1.fits", "Field A", Some("L"), 30.0, Verdict::Ok, &[]),
                frame(
                    "a3.fits",
                    "Field A",
                    Some("L"),
                    50.0,
                    Verdict::Reject,
                    &[("unreadable", "the file could not be measured")],
                ),
                frame("b1.fits", "<script>Field B", None, 35.0, Verdict::Ok, &[]),
            ],
            anomalies: vec![
                hot(3.0),
                anomaly(
                    AnomalyKind::Moving,
                    Detail::Moving(MovingDetail {
                        rate_arcsec_per_min: Some(4.5),
                        position_angle_deg: Some(290.0),
                        rate_px_per_min: 2.0,
                        frames: 3,
                        instrumental_mag: Some(-11.0),
                    }),
                ),
                cosmic.clone(),
                anomaly(
                    AnomalyKind::NewSource,
                    Detail::NewSource(NewSourceDetail {
                        absent_on: "2026-03-13".into(),
                        instrumental_mag: -12.0,
                        earlier_limit_mag: -8.0,
                    }),
                ),
                hot(5.0),
                cosmic,
            ],
            limits: Vec::new(),
            calibration: Vec::new(),
            calibration_notes: Vec::new(),
        }
    }

    #[test]
    fn the_summary_leads_with_what_was_flagged_and_why() {
        let settings = Settings {
            tz: chrono_tz::Europe::Madrid,
            stack_warned: true,
        };
        let s = summarise("2026-03-14", &night(), settings);
        assert_eq!((s.frames, s.ok, s.warned, s.rejected), (4, 2, 1, 1));
        let a = &s.groups[1];
        assert_eq!(a.heading(), "Field A / L");
        // Flagged frames in time order, on the site's clock (UTC+1 in March, IANA tz
        // database), each reason in words; an unreadable file's reason names the fault.
        let flagged: Vec<_> = a.flagged().collect();
        assert_eq!(flagged.len(), 2);
        assert_eq!(flagged[0].file, "a2.fits");
        assert_eq!(flagged[0].local_time.as_deref(), Some("00:40:00"));
        assert_eq!(
            flagged[1].explanations,
            vec!["the file could not be measured: truncated: 2880 of 5760 bytes".to_string()]
        );
        // The stack holds the ok and the warned frame, the warned one marked.
        let stack: Vec<(&str, bool)> = a
            .stack
            .iter()
            .map(|e| (e.path.as_str(), e.warned))
            .collect();
        assert_eq!(
            stack,
            vec![
                ("/srv/capture/a1.fits", false),
                ("/srv/capture/a2.fits", true)
            ]
        );
        // A frame without FILTER reads "no filter".
        assert_eq!(s.groups[0].heading(), "<script>Field B / no filter");
        // New sources first, then moving objects; hot pixels and cosmic rays apart.
        let kinds: Vec<&str> = s.notable.iter().map(|a| a.kind.name()).collect();
        assert_eq!(kinds, vec!["new_source", "moving"]);
        assert_eq!(s.hot_pixels.len(), 2);
        assert_eq!(s.cosmic_rays.len(), 2);
        assert_eq!(
            s.kind_counts(),
            vec![
                ("new_source", 1),
                ("moving", 1),
                ("hot_pixel", 2),
                ("cosmic ray", 2)
            ]
        );
        let t = text(&s, false);
        assert!(
            t.starts_with("Night 2026-03-14: 4 frames: 2 ok, 1 warn, 1 reject."),
            "{t}"
        );
        assert!(
            t.contains("Hot pixels: 2 (detector x, y): (3, 7) (5, 7)"),
            "{t}"
        );
        assert!(
            t.contains("Cosmic-ray hits: 2\n") && !t.contains("sharper than the PSF"),
            "{t}"
        );
        let h = html(&s, &|_| None);
        assert!(
            h.contains("&lt;script&gt;Field B / no filter") && !h.contains("<script>"),
            "{h}"
        );
        assert!(
            h.contains("/srv/capture/a2.fits <span class=\"warn\">(warned)</span>"),
            "{h}"
        );
        // With warned frames kept out of the stack, the summary says so.
        let strict = summarise(
            "2026-03-14",
            &night(),
            Settings {
                stack_warned: false,
                ..settings
            },
        );
        assert_eq!(strict.groups[1].stack.len(), 1);
        assert_eq!(strict.groups[1].warned_left_out, 1);
        assert!(text(&strict, false).contains("1 warned frame(s) left out of the frames to stack"));
    }

    #[test]
    fn sexagesimal_of_known_positions() {
        assert_eq!(sexagesimal(84.25, 27.6), "05h37m00.00s +27°36′00.0″");
        assert_eq!(sexagesimal(201.3, -12.4), "13h25m12.00s -12°24′00.0″");
    }
}
