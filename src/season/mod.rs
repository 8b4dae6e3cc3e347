//! A target across nights, pure: per filter, the nights it was imaged, the verdicts its
//! nights gave (the frames to stack are the ones they keep, and their exposure is the
//! usable time), its quality night by night, every frame judged again against the
//! target's whole record, and the frames ranked by their weight (`weight`) with the best
//! fraction or hours chosen. `plan` says how far a target's plan is. The record comes
//! from the store; this module reads no store, file or clock.
//!
//! **Against the whole record.** A night's verdicts compare each frame with that
//! night's medians, so a night that was soft from dusk to dawn keeps its frames. Here
//! the same rules (built in and configured) judge every frame of a target's filter as
//! one group, the group being every night of it: a uniformly soft night's frames are
//! then soft against the record, and its row says so. That judgement does not change
//! what the nights keep (nor the usable time); it keeps such frames out of the best.

mod filter;
pub mod plan;
pub mod weight;

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::rules::{RuleSpec, Verdict};

/// The metrics a target's record reads of each frame: part of its stored metrics.
#[derive(Debug, Clone, Default, Deserialize)]
pub struct FrameQuality {
    #[serde(default)]
    pub star_count: Option<usize>,
    #[serde(default)]
    pub fwhm_px: Option<f64>,
    #[serde(default)]
    pub fwhm_arcsec: Option<f64>,
    #[serde(default)]
    pub eccentricity: Option<f64>,
    #[serde(default)]
    pub background_adu: Option<f64>,
    #[serde(default)]
    pub noise_adu: Option<f64>,
    #[serde(default)]
    pub snr_median: Option<f64>,
    #[serde(default)]
    pub hfr_px: Option<f64>,
    #[serde(default)]
    pub limit_mag: Option<f64>,
    #[serde(default)]
    pub zero_point_mag: Option<f64>,
    #[serde(default)]
    pub saturated_count: usize,
    /// The brightest unsaturated stars' SNR (`weight::bright_snr`); `None` for a frame
    /// recorded before subwatch kept it (its stars give it then).
    #[serde(default)]
    pub bright_snr: Option<Vec<f64>>,
}

/// One light frame of a target as the store holds it.
#[derive(Debug, Clone)]
pub struct TargetFrame {
    pub id: i64,
    pub path: String,
    /// The rig that recorded it ('' unnamed).
    pub rig: String,
    pub night: String,
    pub filter: Option<String>,
    pub time_unix: Option<f64>,
    pub exposure_s: Option<f64>,
    /// Measured (status ok, with metrics).
    pub readable: bool,
    /// Its night's verdict; `None` while it is not judged.
    pub verdict: Option<Verdict>,
    pub quality: Option<FrameQuality>,
}

/// A target the store holds light frames of (`report --list-targets`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TargetNights {
    pub target: String,
    pub nights: i64,
    pub frames: i64,
    pub first_night: Option<String>,
    pub last_night: Option<String>,
}

/// Which of the frames to stack make the best list.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Best {
    /// All of them.
    All,
    /// This fraction (0 to 1] of them, best first.
    Fraction(f64),
    /// The best, up to this many hours of exposure.
    Hours(f64),
}

impl Serialize for Best {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let (rule, value) = match self {
            Best::All => ("all", None),
            Best::Fraction(f) => ("fraction", Some(*f)),
            Best::Hours(h) => ("hours", Some(*h)),
        };
        let mut m = s.serialize_map(Some(2))?;
        m.serialize_entry("rule", rule)?;
        m.serialize_entry("value", &value)?;
        m.end()
    }
}

/// What a target's summary is made with.
#[derive(Debug, Clone, Copy)]
pub struct Settings<'a> {
    /// Warned frames are stacked (`[actions] stack_warned`).
    pub stack_warned: bool,
    /// The configured rules, for the judgement against the record.
    pub rules: &'a [RuleSpec],
    pub best: Best,
    /// The target's plan, when `[[targets]]` has one.
    pub plan: Option<&'a plan::TargetPlan>,
}

/// Frames by verdict.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct Counts {
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
    /// Recorded but not judged yet.
    pub unjudged: usize,
}

impl Counts {
    fn add(&mut self, v: Option<Verdict>) {
        match v {
            Some(Verdict::Ok) => self.ok += 1,
            Some(Verdict::Warn) => self.warn += 1,
            Some(Verdict::Reject) => self.reject += 1,
            None => self.unjudged += 1,
        }
    }

    pub fn total(&self) -> usize {
        self.ok + self.warn + self.reject + self.unjudged
    }
}

/// Medians of a set of frames (a night, or the whole record).
#[derive(Debug, Clone, Copy, Default, Serialize)]
pub struct Quality {
    pub fwhm_px: Option<f64>,
    pub fwhm_arcsec: Option<f64>,
    pub eccentricity: Option<f64>,
    pub background_adu: Option<f64>,
    pub limit_mag: Option<f64>,
    /// The median weight per second of exposure.
    pub weight_per_s: Option<f64>,
}

/// One night of a target's filter.
#[derive(Debug, Clone, Serialize)]
pub struct NightSummary {
    pub night: String,
    pub frames: Counts,
    pub usable_s: f64,
    #[serde(flatten)]
    pub quality: Quality,
    /// The night's median weight per second over the record's.
    pub relative_weight: Option<f64>,
    /// The judgement of its frames against the target's whole record.
    pub against_record: Counts,
    /// Reasons the record found, with how many of the night's frames each.
    pub record_reasons: BTreeMap<String, usize>,
    /// In words: what the record says of most of the night's frames.
    pub notes: Vec<String>,
}

/// A frame its night keeps, with its weight and the record's judgement.
#[derive(Debug, Clone, Serialize)]
pub struct StackFrame {
    pub path: String,
    pub rig: Option<String>,
    pub night: String,
    pub time_unix: Option<f64>,
    pub exposure_s: Option<f64>,
    pub verdict: Verdict,
    pub weight: Option<f64>,
    pub weight_per_s: Option<f64>,
    /// Weight per second over the median of the filter's frames to stack.
    pub relative_weight: Option<f64>,
    pub record_verdict: Verdict,
    pub record_reasons: Vec<String>,
    /// In the best list.
    pub best: bool,
}

/// The best list's size.
#[derive(Debug, Clone, Copy, Default, Serialize)]
pub struct BestList {
    pub frames: usize,
    pub exposure_s: f64,
}

/// One filter of a target across its nights.
#[derive(Debug, Clone, Serialize)]
pub struct FilterSummary {
    pub filter: Option<String>,
    pub nights: usize,
    pub frames: Counts,
    /// Summed exposure of the frames the nights keep.
    pub usable_s: f64,
    pub planned_s: Option<f64>,
    pub to_go_s: Option<f64>,
    /// Medians over every measured frame of every night.
    pub record: Quality,
    pub per_night: Vec<NightSummary>,
    /// The flux rank where the weight's reference stars start (`weight::window_start`).
    pub reference_rank: usize,
    /// The frames the nights keep, best first (by weight per second).
    pub stack: Vec<StackFrame>,
    pub best: BestList,
}

/// A target across its nights (`report --target --json`).
#[derive(Debug, Clone, Serialize)]
pub struct TargetDocument {
    pub target: String,
    pub nights: usize,
    pub first_night: Option<String>,
    pub last_night: Option<String>,
    pub frames: Counts,
    pub usable_s: f64,
    pub stack_warned: bool,
    pub best_rule: Best,
    /// How frames are weighted, in words.
    pub weight_method: &'static str,
    pub filters: Vec<FilterSummary>,
}

pub const WEIGHT_METHOD: &str = "w = SNR^2 of the reference stars (inverse-variance weighting, Bevington & Robinson 2003, eq. 4.17; SNR by the CCD equation, Merline & Howell 1995), ranked per second of exposure";

/// A target's summary from every light frame of it the store holds.
pub fn summarise(target: &str, frames: &[TargetFrame], settings: Settings) -> TargetDocument {
    let mut by_filter: BTreeMap<Option<String>, Vec<&TargetFrame>> = BTreeMap::new();
    for f in frames {
        by_filter.entry(f.filter.clone()).or_default().push(f);
    }
    // Planned filters not imaged yet still show, with nothing done.
    if let Some(p) = settings.plan {
        for (f, _) in &p.hours {
            by_filter.entry(Some(f.clone())).or_default();
        }
    }
    let filters: Vec<FilterSummary> = by_filter
        .into_iter()
        .map(|(filter, mut frames)| {
            frames.sort_by(|a, b| {
                a.time_unix
                    .unwrap_or(f64::NEG_INFINITY)
                    .total_cmp(&b.time_unix.unwrap_or(f64::NEG_INFINITY))
                    .then_with(|| a.path.cmp(&b.path))
            });
            filter::filter_summary(filter, &frames, settings)
        })
        .collect();
    let mut nights: Vec<&str> = frames.iter().map(|f| f.night.as_str()).collect();
    nights.sort_unstable();
    nights.dedup();
    let mut counts = Counts::default();
    for f in frames {
        counts.add(f.verdict);
    }
    TargetDocument {
        target: target.to_string(),
        nights: nights.len(),
        first_night: nights.first().map(|n| n.to_string()),
        last_night: nights.last().map(|n| n.to_string()),
        frames: counts,
        usable_s: filters.iter().map(|f| f.usable_s).fold(0.0, |a, b| a + b),
        stack_warned: settings.stack_warned,
        best_rule: settings.best,
        weight_method: WEIGHT_METHOD,
        filters,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A frame of night `night` with FWHM `fwhm`, its reference stars at `snr`.
    fn frame(
        k: usize,
        night: &str,
        filter: &str,
        fwhm: f64,
        snr: f64,
        verdict: Verdict,
    ) -> TargetFrame {
        TargetFrame {
            id: k as i64,
            path: format!("/frames/{night}/f{k:03}.fits"),
            rig: String::new(),
            night: night.into(),
            filter: Some(filter.into()),
            time_unix: Some(1.0e9 + k as f64 * 300.0),
            exposure_s: Some(300.0),
            readable: true,
            verdict: Some(verdict),
            quality: Some(FrameQuality {
                star_count: Some(300),
                fwhm_px: Some(fwhm),
                eccentricity: Some(0.1),
                background_adu: Some(1000.0),
                noise_adu: Some(10.0),
                saturated_count: 2,
                bright_snr: Some(vec![snr; 40]),
                ..Default::default()
            }),
        }
    }

    fn settings(best: Best) -> Settings<'static> {
        Settings {
            stack_warned: true,
            rules: &[],
            best,
            plan: None,
        }
    }

    /// Three nights of 20 frames; the second soft all night (FWHM 1.6 × the others')
    /// and so kept whole by its own medians, with its reference stars' SNR down by
    /// the seeing (sky-limited SNR goes as 1/FWHM).
    fn season() -> Vec<TargetFrame> {
        let mut out = Vec::new();
        for (n, night) in ["2026-03-10", "2026-03-11", "2026-03-12"]
            .iter()
            .enumerate()
        {
            let fwhm = if n == 1 { 4.8 } else { 3.0 };
            for k in 0..20 {
                let i = n * 20 + k;
                // One frame of the first night rejected by its night.
                let v = if i == 3 { Verdict::Reject } else { Verdict::Ok };
                out.push(frame(
                    i,
                    night,
                    "L",
                    fwhm + 0.01 * k as f64,
                    150.0 * 3.0 / fwhm,
                    v,
                ));
            }
        }
        out
    }

    #[test]
    fn a_uniformly_soft_night_shows_against_the_whole_record() {
        let doc = summarise("Kestrel Field A", &season(), settings(Best::Fraction(0.5)));
        let l = &doc.filters[0];
        assert_eq!(l.nights, 3);
        assert_eq!((l.frames.ok, l.frames.reject), (59, 1));
        // Its own night kept every soft frame: the usable time is what the nights keep.
        assert_eq!(l.per_night[1].frames.ok, 20);
        assert_eq!(l.usable_s, 59.0 * 300.0);
        // Against the record (median FWHM 3.1 px) each is 1.55 × too wide: rejected,
        // as the built-in rule rejects above 1.5 × the median; the night says so.
        assert_eq!(l.per_night[1].against_record.reject, 20);
        assert_eq!(l.per_night[1].record_reasons["fwhm_high"], 20);
        assert!(
            l.per_night[1].notes[0].contains("fwhm_high in 20 of 20 frames"),
            "{:?}",
            l.per_night[1].notes
        );
        assert!(l.per_night[0].notes.is_empty());
        // Its weight is (3.0 / 4.8)² of a sharp night's.
        let rel = l.per_night[1].relative_weight.unwrap();
        assert!((rel - (3.0f64 / 4.8).powi(2)).abs() < 0.01, "{rel}");
        // The best half of the 39 frames to stack that the record does not reject.
        assert_eq!(l.best.frames, 20);
        assert!(l
            .stack
            .iter()
            .filter(|s| s.best)
            .all(|s| s.night != "2026-03-11"));
        assert_eq!(l.stack.len(), 59);
        assert_eq!(l.stack.last().unwrap().night, "2026-03-11");
    }

    #[test]
    fn the_best_hours_stop_before_the_limit_and_all_means_every_frame_kept() {
        let frames = season();
        let hours = summarise("T", &frames, settings(Best::Hours(1.4)));
        // 300 s frames: 16 fit in 1.4 h (5040 s), the 17th would pass it.
        assert_eq!(hours.filters[0].best.frames, 16);
        assert_eq!(hours.filters[0].best.exposure_s, 4800.0);
        let all = summarise("T", &frames, settings(Best::All));
        assert_eq!(all.filters[0].best.frames, 59);
        assert_eq!(all.usable_s, all.filters[0].best.exposure_s);
    }

    #[test]
    fn warned_frames_count_as_usable_only_when_they_are_stacked() {
        let mut frames = season();
        frames[5].verdict = Some(Verdict::Warn);
        frames[6].verdict = None;
        let with = summarise("T", &frames, settings(Best::All));
        let without = summarise(
            "T",
            &frames,
            Settings {
                stack_warned: false,
                ..settings(Best::All)
            },
        );
        assert_eq!(with.frames.warn, 1);
        assert_eq!(with.frames.unjudged, 1);
        assert_eq!(with.usable_s, 58.0 * 300.0);
        assert_eq!(without.usable_s, 57.0 * 300.0);
    }

    #[test]
    fn a_planned_filter_not_imaged_yet_shows_with_its_plan() {
        let plan = plan::TargetPlan {
            name: "T".into(),
            hours: vec![("L".into(), 10.0), ("R".into(), 3.0)],
        };
        let doc = summarise(
            "T",
            &season(),
            Settings {
                plan: Some(&plan),
                ..settings(Best::All)
            },
        );
        let r = doc
            .filters
            .iter()
            .find(|f| f.filter.as_deref() == Some("R"))
            .unwrap();
        assert_eq!(
            (r.nights, r.usable_s, r.to_go_s),
            (0, 0.0, Some(3.0 * 3600.0))
        );
        let l = doc
            .filters
            .iter()
            .find(|f| f.filter.as_deref() == Some("L"))
            .unwrap();
        assert_eq!(l.to_go_s, Some(10.0 * 3600.0 - 59.0 * 300.0));
    }
}
