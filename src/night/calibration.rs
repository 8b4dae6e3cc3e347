//! Calibration frames judged with the night: flats per filter and binning (level in the
//! linear range, clipping, departure from the set's own shape), darks (exposure and
//! temperature against the night's lights, level, noise and hot pixels against the set,
//! a light leak), bias frames (level and read noise against the set), and for each group
//! of lights whether matching darks, flats and bias frames were taken. Every threshold is
//! a constant here with where it comes from; every reason comes with its values. Pure.
//!
//! Longer than most modules: darks, flats and bias frames are judged together (each
//! against its set and the night's lights), and what each group of lights lacks needs all
//! three; the rest is tests.

use crate::measure::calibration::CalibrationStats;
use crate::measure::stats::{median_f64, robust_sigma_f64};
use crate::record::{FrameRecord, FrameStatus};
use crate::rules::{Judgement, Verdict};

/// Flats: median level as a fraction of full scale. Inside the warn band is the linear
/// range (common practice: a third to a half of full scale, with margin); past the
/// reject limits a flat has too little signal or reaches the non-linear top.
pub const FLAT_LEVEL_WARN: (f64, f64) = (0.25, 0.65);
pub const FLAT_LEVEL_REJECT: (f64, f64) = (0.10, 0.85);
/// Flats: share of pixels at full scale (clipped) that rejects a flat.
pub const FLAT_CLIPPED_REJECT: f64 = 0.001;
/// Flats: largest block departure from the set's median shape (fraction).
pub const FLAT_DEPARTURE: (f64, f64) = (0.015, 0.03);
/// Darks: exposure equal to a light's within this fraction (common practice).
pub const DARK_EXPOSURE_TOLERANCE: f64 = 0.01;
/// Darks: sensor temperature within this of the lights' (common practice: about 1 °C).
pub const DARK_TEMPERATURE_TOLERANCE_C: f64 = 1.0;
/// Darks and bias: level this many robust σ from the set's median, or noise this many
/// times the set's median noise.
pub const SET_LEVEL_SIGMAS: f64 = 5.0;
pub const SET_NOISE_RATIO: f64 = 1.3;
/// Darks: hot pixels more than this many times the set's median count (and at least
/// `HOT_PIXELS_MIN_EXTRA` more): cooling that failed, or a sensor ageing.
pub const HOT_PIXELS_RATIO: f64 = 2.0;
pub const HOT_PIXELS_MIN_EXTRA: usize = 20;
/// Darks and bias: a light leak shows as lit patches (stars, a glow) or a gradient many
/// times a block's noise.
pub const LEAK_SOURCES: usize = 3;
pub const LEAK_GRADIENT_SIGMAS: f64 = 30.0;

/// What the user may set: how far back earlier nights count, and the flats' level band
/// (the linear range differs between cameras).
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationSettings {
    pub library_days: u32,
    pub flat_level_warn: (f64, f64),
    pub flat_level_reject: (f64, f64),
}

impl Default for CalibrationSettings {
    fn default() -> Self {
        Self {
            library_days: 60,
            flat_level_warn: FLAT_LEVEL_WARN,
            flat_level_reject: FLAT_LEVEL_REJECT,
        }
    }
}

/// The judgement of one calibration frame.
#[derive(Debug, Clone)]
pub struct CalibrationJudged {
    /// Index into the records given.
    pub index: usize,
    pub kind: &'static str,
    pub judgement: Judgement,
}

/// The night's calibration: each frame judged, and what is missing, in words.
#[derive(Debug, Clone, Default)]
pub struct CalibrationReport {
    pub frames: Vec<CalibrationJudged>,
    pub notes: Vec<String>,
}

/// The kind of a calibration record, if it is one.
pub fn kind_of(r: &FrameRecord) -> Option<&'static str> {
    if r.status != FrameStatus::Skipped {
        return None;
    }
    let said = r
        .calibration
        .as_ref()
        .map(|c| c.kind.clone())
        .unwrap_or_else(|| r.error.clone().unwrap_or_default().to_ascii_lowercase());
    ["dark", "flat", "bias"]
        .into_iter()
        .find(|k| said.contains(k))
}

struct Verdicts {
    verdict: Verdict,
    reasons: Vec<String>,
    explanations: Vec<String>,
}

impl Verdicts {
    fn new() -> Self {
        Verdicts {
            verdict: Verdict::Ok,
            reasons: Vec::new(),
            explanations: Vec::new(),
        }
    }
    fn add(&mut self, verdict: Verdict, reason: &str, explanation: String) {
        self.verdict = self.verdict.max(verdict);
        self.reasons.push(reason.to_string());
        self.explanations.push(explanation);
    }
    fn done(self) -> Judgement {
        Judgement {
            verdict: self.verdict,
            reasons: self.reasons,
            explanations: self.explanations,
        }
    }
}

fn header_f(
    r: &FrameRecord,
    f: impl Fn(&crate::record::HeaderFacts) -> Option<f64>,
) -> Option<f64> {
    r.header.as_ref().and_then(f)
}

/// Same camera settings where both headers say: binning, gain and offset.
fn same_settings(a: &FrameRecord, b: &FrameRecord) -> bool {
    let same = |f: fn(&crate::record::HeaderFacts) -> Option<f64>| match (
        header_f(a, f),
        header_f(b, f),
    ) {
        (Some(x), Some(y)) => (x - y).abs() < 1e-6,
        _ => true,
    };
    same(|h| h.binning) && same(|h| h.gain_setting) && same(|h| h.offset)
}

/// Judge the night's calibration frames among `records` (lights included, for the
/// darks' exposure and temperature and the matching check). `earlier`: calibration
/// frames of earlier nights (the library), for the darks' hot pixels and for lights
/// without calibration of their own tonight.
pub fn judge_calibration(
    records: &[&FrameRecord],
    earlier: &[&FrameRecord],
    settings: &CalibrationSettings,
) -> CalibrationReport {
    let lights: Vec<&FrameRecord> = records
        .iter()
        .copied()
        .filter(|r| r.status == FrameStatus::Ok)
        .collect();
    let mut out = CalibrationReport::default();
    let of_kind = |kind: &str| -> Vec<usize> {
        (0..records.len())
            .filter(|&i| kind_of(records[i]) == Some(kind))
            .collect()
    };

    // Flats, per filter and binning.
    let mut sets: Vec<Vec<usize>> = Vec::new();
    for i in of_kind("flat") {
        match sets.iter_mut().find(|s| {
            let a = records[s[0]];
            a.filter == records[i].filter && same_settings(a, records[i])
        }) {
            Some(s) => s.push(i),
            None => sets.push(vec![i]),
        }
    }
    for set in &sets {
        let grids: Vec<&[f32]> = set
            .iter()
            .filter_map(|&i| records[i].calibration.as_ref())
            .map(|c| c.grid.as_slice())
            .collect();
        let shape = crate::measure::calibration::median_grid(&grids);
        for &i in set {
            let mut v = Verdicts::new();
            if let Some(c) = &records[i].calibration {
                judge_flat(
                    c,
                    (set.len() >= 3).then_some(shape.as_slice()),
                    settings,
                    &mut v,
                );
            }
            out.frames.push(CalibrationJudged {
                index: i,
                kind: "flat",
                judgement: v.done(),
            });
        }
    }

    // Darks and bias frames against their own set.
    for kind in ["dark", "bias"] {
        let set = of_kind(kind);
        let medians = SetMedians::of(records, &set);
        for &i in &set {
            let r = records[i];
            let mut v = Verdicts::new();
            if let Some(c) = &r.calibration {
                if c.source_count >= LEAK_SOURCES || c.gradient_sigmas > LEAK_GRADIENT_SIGMAS {
                    v.add(
                        Verdict::Reject,
                        "light_leak",
                        format!(
                            "{} lit patch(es) and a gradient of {:.0} σ across the frame (reject at {LEAK_SOURCES} patches or {LEAK_GRADIENT_SIGMAS:.0} σ): light reached the sensor",
                            c.source_count, c.gradient_sigmas
                        ),
                    );
                }
                if set.len() >= 3 {
                    medians.judge(kind, c, &mut v);
                }
            }
            if kind == "dark" {
                dark_against_lights(r, &lights, &mut v);
                dark_against_earlier(r, earlier, &mut v);
            }
            out.frames.push(CalibrationJudged {
                index: i,
                kind: if kind == "dark" { "dark" } else { "bias" },
                judgement: v.done(),
            });
        }
    }
    out.frames.sort_by_key(|f| f.index);
    out.notes = missing(records, &lights, &out.frames, earlier);
    out
}

/// One flat's level against the band of `settings`, its clipped pixels, and (`shape`:
/// the set's median flat, in a set of three or more) its departure from its set.
fn judge_flat(
    c: &CalibrationStats,
    shape: Option<&[f32]>,
    settings: &CalibrationSettings,
    v: &mut Verdicts,
) {
    let (level_warn, level_reject) = (settings.flat_level_warn, settings.flat_level_reject);
    if let Some(level) = c.level_fraction {
        let pct = 100.0 * level;
        let band = format!(
            "(warn outside {:.0}–{:.0} %, reject below {:.0} % or above {:.0} %)",
            100.0 * level_warn.0,
            100.0 * level_warn.1,
            100.0 * level_reject.0,
            100.0 * level_reject.1
        );
        let words = format!(
            "level {:.0} ADU is {pct:.0} % of full scale {:.0} ADU {band}",
            c.median_adu,
            c.full_scale_adu.unwrap_or(f64::NAN)
        );
        if level < level_reject.0 {
            v.add(Verdict::Reject, "flat_level_low", words);
        } else if level > level_reject.1 {
            v.add(Verdict::Reject, "flat_level_high", words);
        } else if level < level_warn.0 {
            v.add(Verdict::Warn, "flat_level_low", words);
        } else if level > level_warn.1 {
            v.add(Verdict::Warn, "flat_level_high", words);
        }
    }
    if c.clipped_fraction > FLAT_CLIPPED_REJECT {
        v.add(
            Verdict::Reject,
            "flat_clipped",
            format!(
                "{:.2} % of pixels at full scale (reject above {:.1} %)",
                100.0 * c.clipped_fraction,
                100.0 * FLAT_CLIPPED_REJECT
            ),
        );
    }
    let Some(d) = shape.and_then(|s| crate::measure::calibration::grid_departure(&c.grid, s))
    else {
        return;
    };
    let words = format!(
        "its shape departs {:.1} % from the set's median flat somewhere (warn above {:.1} %, reject above {:.1} %): dust that moved, a flickering panel or a light leak",
        100.0 * d,
        100.0 * FLAT_DEPARTURE.0,
        100.0 * FLAT_DEPARTURE.1
    );
    if d > FLAT_DEPARTURE.1 {
        v.add(Verdict::Reject, "flat_departs", words);
    } else if d > FLAT_DEPARTURE.0 {
        v.add(Verdict::Warn, "flat_departs", words);
    }
}

/// A set of darks or bias frames as a whole: the medians of its levels, noises and hot
/// pixel counts, and the spread of its levels.
struct SetMedians {
    level: Option<f64>,
    noise: Option<f64>,
    hot: Option<f64>,
    spread: f64,
}

impl SetMedians {
    fn of(records: &[&FrameRecord], set: &[usize]) -> Self {
        let stats = |f: fn(&CalibrationStats) -> f64| -> Vec<f64> {
            set.iter()
                .filter_map(|&i| records[i].calibration.as_ref().map(f))
                .collect()
        };
        let levels = stats(|c| c.median_adu);
        let noise = median_f64(&stats(|c| c.noise_adu));
        // The spread of levels, with a floor of a tenth of the noise so a set of
        // identical frames does not make every tiny difference significant.
        let spread = robust_sigma_f64(&levels)
            .unwrap_or(0.0)
            .max(0.1 * noise.unwrap_or(0.0))
            .max(1e-6);
        SetMedians {
            level: median_f64(&levels),
            noise,
            hot: median_f64(&stats(|c| c.hot_pixel_count as f64)),
            spread,
        }
    }

    /// One frame of the set (`kind` "dark" or "bias") against the set: its level, its
    /// noise, and a dark's hot pixels.
    fn judge(&self, kind: &str, c: &CalibrationStats, v: &mut Verdicts) {
        if let Some(m) = self.level {
            let z = (c.median_adu - m) / self.spread;
            if z.abs() > SET_LEVEL_SIGMAS {
                v.add(
                    Verdict::Warn,
                    &format!("{kind}_level_off"),
                    format!(
                        "level {:.1} ADU is {z:+.0} σ from the set's median {m:.1} ADU (warn beyond {SET_LEVEL_SIGMAS:.0} σ)",
                        c.median_adu
                    ),
                );
            }
        }
        if let Some(n) = self.noise.filter(|n| *n > 0.0) {
            if c.noise_adu > SET_NOISE_RATIO * n {
                v.add(
                    Verdict::Warn,
                    &format!("{kind}_noise_high"),
                    format!(
                        "noise {:.2} ADU is {:.2} × the set's median {n:.2} ADU (warn above {SET_NOISE_RATIO} ×)",
                        c.noise_adu,
                        c.noise_adu / n
                    ),
                );
            }
        }
        if let (Some(h), "dark") = (self.hot, kind) {
            hot_pixels_against(
                c,
                h,
                &format!("the set's median {h:.0}"),
                "cooling that failed?",
                v,
            );
        }
    }
}

/// A dark with many more hot pixels than `median` of other darks (more than
/// `HOT_PIXELS_RATIO` times as many, and `HOT_PIXELS_MIN_EXTRA` more at least) is
/// warned, saying what the median is of (`against`) and the likely `cause`.
fn hot_pixels_against(
    c: &CalibrationStats,
    median: f64,
    against: &str,
    cause: &str,
    v: &mut Verdicts,
) {
    let count = c.hot_pixel_count as f64;
    if count > HOT_PIXELS_RATIO * median && count - median >= HOT_PIXELS_MIN_EXTRA as f64 {
        v.add(
            Verdict::Warn,
            "dark_hot_pixels",
            format!(
                "{} hot pixels against {against} (warn above {HOT_PIXELS_RATIO} ×): {cause}",
                c.hot_pixel_count
            ),
        );
    }
}

/// Nights between two night labels ("YYYY-MM-DD").
fn nights_between(earlier: &str, later: &str) -> Option<i64> {
    let d = |s: &str| chrono::NaiveDate::parse_from_str(s, "%Y-%m-%d").ok();
    Some((d(later)? - d(earlier)?).num_days())
}

/// A dark's hot pixels against the earlier nights' darks of the same exposure and
/// temperature: a sensor ageing, or cooling that failed tonight.
fn dark_against_earlier(dark: &FrameRecord, earlier: &[&FrameRecord], v: &mut Verdicts) {
    let Some(c) = &dark.calibration else {
        return;
    };
    if v.reasons.iter().any(|r| r == "dark_hot_pixels") {
        return;
    }
    let exposure = |r: &FrameRecord| header_f(r, |h| h.exposure_s);
    let temp = |r: &FrameRecord| header_f(r, |h| h.ccd_temp_c);
    let counts: Vec<f64> = earlier
        .iter()
        .filter(|e| kind_of(e) == Some("dark") && same_settings(e, dark))
        .filter(|e| match (exposure(e), exposure(dark)) {
            (Some(a), Some(b)) => (a - b).abs() <= DARK_EXPOSURE_TOLERANCE * a.max(b),
            _ => false,
        })
        .filter(|e| match (temp(e), temp(dark)) {
            (Some(a), Some(b)) => (a - b).abs() <= DARK_TEMPERATURE_TOLERANCE_C,
            _ => true,
        })
        .filter_map(|e| e.calibration.as_ref().map(|c| c.hot_pixel_count as f64))
        .collect();
    let n = counts.len();
    let Some(h) = median_f64(&counts) else {
        return;
    };
    hot_pixels_against(
        c,
        h,
        &format!("the median {h:.0} of {n} earlier nights' darks of this exposure and temperature"),
        "a sensor ageing, or cooling that failed?",
        v,
    );
}

/// A dark's exposure and temperature against the night's lights.
fn dark_against_lights(dark: &FrameRecord, lights: &[&FrameRecord], v: &mut Verdicts) {
    let exposure = |r: &FrameRecord| header_f(r, |h| h.exposure_s);
    let temp = |r: &FrameRecord| header_f(r, |h| h.ccd_temp_c);
    let Some(e) = exposure(dark) else {
        return;
    };
    let light_exposures: Vec<f64> = lights.iter().filter_map(|l| exposure(l)).collect();
    if light_exposures.is_empty() {
        return;
    }
    let matching: Vec<&&FrameRecord> = lights
        .iter()
        .filter(|l| {
            exposure(l).is_some_and(|x| (x - e).abs() <= DARK_EXPOSURE_TOLERANCE * x.max(e))
        })
        .collect();
    if matching.is_empty() {
        let mut shown: Vec<String> = light_exposures
            .iter()
            .map(|x| format!("{x:.0} s"))
            .collect();
        shown.sort();
        shown.dedup();
        v.add(
            Verdict::Warn,
            "dark_exposure_mismatch",
            format!(
                "exposure {e:.1} s matches no light of the night ({})",
                shown.join(", ")
            ),
        );
        return;
    }
    let (Some(t), Some(lt)) = (
        temp(dark),
        median_f64(&matching.iter().filter_map(|l| temp(l)).collect::<Vec<_>>()),
    ) else {
        return;
    };
    if (t - lt).abs() > DARK_TEMPERATURE_TOLERANCE_C {
        v.add(
            Verdict::Warn,
            "dark_temperature_mismatch",
            format!(
                "sensor at {t:.1} °C against the lights' {lt:.1} °C (warn beyond {DARK_TEMPERATURE_TOLERANCE_C:.0} °C)"
            ),
        );
    }
}

/// For each group of lights (target, filter, exposure), what calibration is missing.
fn missing(
    records: &[&FrameRecord],
    lights: &[&FrameRecord],
    judged: &[CalibrationJudged],
    earlier: &[&FrameRecord],
) -> Vec<String> {
    let tonight = lights
        .iter()
        .find_map(|l| l.night.clone())
        .unwrap_or_default();
    // The newest earlier frames of a kind that fit, as words: "5 from 2026-03-10, 4
    // nights before".
    let from_earlier = |kind: &str, fits: &dyn Fn(&FrameRecord) -> bool| -> Option<String> {
        let found: Vec<&&FrameRecord> = earlier
            .iter()
            .filter(|e| kind_of(e) == Some(kind) && fits(e))
            .collect();
        let night = found.iter().filter_map(|e| e.night.clone()).max()?;
        let n = found
            .iter()
            .filter(|e| e.night.as_deref() == Some(&night))
            .count();
        let age = nights_between(&night, &tonight)
            .map_or(String::new(), |d| format!(", {d} night(s) before"));
        Some(format!("{n} from {night}{age}"))
    };
    let usable = |kind: &str| -> Vec<&FrameRecord> {
        judged
            .iter()
            .filter(|j| j.kind == kind && j.judgement.verdict != Verdict::Reject)
            .map(|j| records[j.index])
            .collect()
    };
    let (darks, flats, bias) = (usable("dark"), usable("flat"), usable("bias"));
    let exposure = |r: &FrameRecord| header_f(r, |h| h.exposure_s);
    let temp = |r: &FrameRecord| header_f(r, |h| h.ccd_temp_c);
    let mut notes = Vec::new();
    // Lights of one target, filter and exposure.
    struct Lights<'a> {
        target: Option<String>,
        filter: Option<String>,
        exposure: Option<f64>,
        frames: Vec<&'a FrameRecord>,
    }
    let mut groups: Vec<Lights<'_>> = Vec::new();
    for l in lights {
        let e = exposure(l).map(|x| (x * 100.0).round() / 100.0);
        match groups
            .iter_mut()
            .find(|g| g.target == l.target && g.filter == l.filter && g.exposure == e)
        {
            Some(g) => g.frames.push(l),
            None => groups.push(Lights {
                target: l.target.clone(),
                filter: l.filter.clone(),
                exposure: e,
                frames: vec![l],
            }),
        }
    }
    for Lights {
        target,
        filter,
        exposure: e,
        frames,
    } in &groups
    {
        let heading = format!(
            "{} / {}",
            target.as_deref().unwrap_or(crate::text::NO_TARGET),
            filter.as_deref().unwrap_or(crate::text::NO_FILTER)
        );
        let first = frames[0];
        let t = median_f64(&frames.iter().filter_map(|l| temp(l)).collect::<Vec<_>>());
        if let Some(e) = e {
            let ok = darks.iter().any(|d| {
                exposure(d).is_some_and(|x| (x - e).abs() <= DARK_EXPOSURE_TOLERANCE * x.max(*e))
                    && match (temp(d), t) {
                        (Some(a), Some(b)) => (a - b).abs() <= DARK_TEMPERATURE_TOLERANCE_C,
                        _ => true,
                    }
                    && same_settings(d, first)
            });
            if !ok {
                let fits = |d: &FrameRecord| {
                    exposure(d)
                        .is_some_and(|x| (x - e).abs() <= DARK_EXPOSURE_TOLERANCE * x.max(*e))
                        && match (temp(d), t) {
                            (Some(a), Some(b)) => (a - b).abs() <= DARK_TEMPERATURE_TOLERANCE_C,
                            _ => true,
                        }
                        && same_settings(d, first)
                };
                notes.push(format!(
                    "{heading}: no usable darks of {e:.0} s{} tonight for its {} light(s){}",
                    t.map_or(String::new(), |t| format!(" at {t:.0} °C")),
                    frames.len(),
                    from_earlier("dark", &fits).map_or(String::new(), |w| format!(
                        "; earlier darks that match: {w}"
                    ))
                ));
            }
        }
        if !flats
            .iter()
            .any(|f| f.filter == *filter && same_settings(f, first))
        {
            let fits = |f: &FrameRecord| f.filter == *filter && same_settings(f, first);
            notes.push(format!(
                "{heading}: no usable flats for {} tonight{}",
                filter.as_deref().map_or(
                    format!("the frames with {}", crate::text::NO_FILTER),
                    |f| format!("filter {f}")
                ),
                from_earlier("flat", &fits).map_or(String::new(), |w| format!(
                    "; earlier flats that match: {w}"
                ))
            ));
        }
        if !bias.iter().any(|b| same_settings(b, first)) {
            let fits = |b: &FrameRecord| same_settings(b, first);
            notes.push(format!(
                "{heading}: no usable bias frames tonight{}",
                from_earlier("bias", &fits).map_or(String::new(), |w| format!(
                    "; earlier bias frames that match: {w}"
                ))
            ));
        }
    }
    notes
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::calibration::CalibrationStats;
    use crate::record::{HeaderFacts, Identity};

    fn record(
        kind: &str,
        name: &str,
        exposure: f64,
        temp: f64,
        stats: CalibrationStats,
    ) -> FrameRecord {
        let mut r = FrameRecord::failed(
            Identity {
                path: name.into(),
                size: 1,
                mtime_ns: 1,
            },
            "",
        );
        r.status = if kind == "light" {
            FrameStatus::Ok
        } else {
            FrameStatus::Skipped
        };
        r.error = (kind != "light").then(|| format!("{kind} frame (IMAGETYP)"));
        r.filter = Some("L".into());
        r.target = Some("Kestrel Field A".into());
        r.header = Some(HeaderFacts {
            exposure_s: Some(exposure),
            ccd_temp_c: Some(temp),
            ..Default::default()
        });
        r.calibration = (kind != "light").then(|| CalibrationStats {
            kind: kind.into(),
            ..stats
        });
        r
    }

    fn stats(level: f64, noise: f64) -> CalibrationStats {
        CalibrationStats {
            median_adu: level,
            noise_adu: noise,
            full_scale_adu: Some(65535.0),
            level_fraction: Some(level / 65535.0),
            grid: vec![1.0; 16],
            grid_width: 4,
            grid_height: 4,
            ..Default::default()
        }
    }

    #[test]
    fn each_fault_is_found_and_a_clean_set_passes() {
        let mut rs = vec![
            record("light", "l1", 120.0, -10.0, stats(0.0, 0.0)),
            record("light", "l2", 120.0, -10.2, stats(0.0, 0.0)),
        ];
        for k in 0..5 {
            rs.push(record(
                "flat",
                &format!("f{k}"),
                2.0,
                -10.0,
                stats(25000.0, 150.0),
            ));
            rs.push(record(
                "dark",
                &format!("d{k}"),
                120.0,
                -10.0,
                stats(1000.0, 12.0),
            ));
            rs.push(record(
                "bias",
                &format!("b{k}"),
                0.0,
                -10.0,
                stats(990.0, 8.0),
            ));
        }
        let all: Vec<&FrameRecord> = rs.iter().collect();
        let clean = judge_calibration(&all, &[], &CalibrationSettings::default());
        assert_eq!(clean.frames.len(), 15);
        assert!(
            clean
                .frames
                .iter()
                .all(|f| f.judgement.verdict == Verdict::Ok),
            "{clean:?}"
        );
        assert!(clean.notes.is_empty(), "{:?}", clean.notes);

        // 8 % and 95 % of full scale; a moved dust shadow; a warm dark; a short dark; a
        // leaking dark.
        rs.push(record(
            "flat",
            "low",
            2.0,
            -10.0,
            stats(0.08 * 65535.0, 40.0),
        ));
        rs.push(record(
            "flat",
            "high",
            2.0,
            -10.0,
            stats(0.95 * 65535.0, 200.0),
        ));
        let mut dust = stats(25000.0, 150.0);
        dust.grid[5] = 0.95;
        rs.push(record("flat", "dust", 2.0, -10.0, dust));
        rs.push(record("dark", "warm", 120.0, -4.0, stats(1000.0, 12.0)));
        rs.push(record("dark", "short", 60.0, -10.0, stats(1000.0, 12.0)));
        let mut leak = stats(1000.0, 12.0);
        leak.source_count = 12;
        rs.push(record("dark", "leak", 120.0, -10.0, leak));
        let all: Vec<&FrameRecord> = rs.iter().collect();
        let r = judge_calibration(&all, &[], &CalibrationSettings::default());
        let reasons = |name: &str| -> Vec<String> {
            let f = r
                .frames
                .iter()
                .find(|f| all[f.index].identity.path == name)
                .unwrap();
            f.judgement.reasons.clone()
        };
        assert_eq!(reasons("low"), ["flat_level_low"]);
        assert_eq!(reasons("high"), ["flat_level_high"]);
        assert_eq!(reasons("dust"), ["flat_departs"]);
        assert_eq!(reasons("warm"), ["dark_temperature_mismatch"]);
        assert_eq!(reasons("short"), ["dark_exposure_mismatch"]);
        assert_eq!(reasons("leak"), ["light_leak"]);
        let flagged = r
            .frames
            .iter()
            .filter(|f| f.judgement.verdict != Verdict::Ok)
            .count();
        assert_eq!(flagged, 6, "no false warning on the clean frames: {r:?}");
    }

    #[test]
    fn earlier_nights_stand_in_for_missing_calibration_and_judge_hot_pixels() {
        let mut light = record("light", "l1", 120.0, -10.0, stats(0.0, 0.0));
        light.night = Some("2026-03-14".into());
        let mut tonight_dark = stats(1000.0, 12.0);
        tonight_dark.hot_pixel_count = 400;
        let mut dark = record("dark", "d1", 120.0, -10.0, tonight_dark);
        dark.night = Some("2026-03-14".into());
        let mut earlier = Vec::new();
        for (k, night) in ["2026-03-10", "2026-03-10", "2026-03-02"]
            .iter()
            .enumerate()
        {
            let mut s = stats(1000.0, 12.0);
            s.hot_pixel_count = 40 + k;
            let mut e = record("dark", &format!("e{k}"), 120.0, -10.3, s);
            e.night = Some(night.to_string());
            earlier.push(e);
            let mut f = record("flat", &format!("f{k}"), 2.0, -10.0, stats(25000.0, 150.0));
            f.night = Some(night.to_string());
            earlier.push(f);
        }
        let rs = [light, dark];
        let all: Vec<&FrameRecord> = rs.iter().collect();
        let before: Vec<&FrameRecord> = earlier.iter().collect();
        let r = judge_calibration(&all, &before, &CalibrationSettings::default());
        let d = r.frames.iter().find(|f| f.kind == "dark").unwrap();
        assert_eq!(d.judgement.reasons, ["dark_hot_pixels"], "{r:?}");
        assert!(
            d.judgement.explanations[0].contains("3 earlier nights' darks"),
            "{r:?}"
        );
        // Tonight's dark is only warned, so it stands; the flats come from 4 nights before.
        assert!(
            r.notes
                .iter()
                .any(|n| n
                    .contains("earlier flats that match: 2 from 2026-03-10, 4 night(s) before")),
            "{:?}",
            r.notes
        );
        assert!(
            r.notes.iter().all(|n| !n.contains("darks")),
            "{:?}",
            r.notes
        );
    }

    #[test]
    fn missing_calibration_is_named_per_group_of_lights() {
        let rs = [
            record("light", "l1", 300.0, -10.0, stats(0.0, 0.0)),
            record("dark", "d1", 120.0, -10.0, stats(1000.0, 12.0)),
        ];
        let all: Vec<&FrameRecord> = rs.iter().collect();
        let notes = judge_calibration(&all, &[], &CalibrationSettings::default()).notes;
        assert_eq!(notes.len(), 3, "{notes:?}");
        assert!(
            notes[0].contains("no usable darks of 300 s at -10 °C"),
            "{notes:?}"
        );
        assert!(notes[1].contains("no usable flats for filter L"));
        assert!(notes[2].contains("no usable bias frames"));
    }
}
