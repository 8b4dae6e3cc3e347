//! Verdicts: which frames to keep. Pure: a group's frame facts in, a verdict and the
//! reasons for each frame out. Built-in defaults work with no rules configured; rules
//! from the configuration (`[[rules]]` tables) add to them, or replace the default with
//! the same reason code. Each reason says which test fired and with what values.
//!
//! Longer than most modules: the built-in thresholds, the group's statistics, the limits
//! drawn and the judgement use the same numbers, and stay together so that a drawn limit
//! is the value judged against; the rest is tests.

use serde::{Deserialize, Serialize};

use crate::measure::stats::median_f64;

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    Ok,
    Warn,
    Reject,
}

impl Verdict {
    /// The verdict as the contract spells it.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Ok => "ok",
            Verdict::Warn => "warn",
            Verdict::Reject => "reject",
        }
    }

    pub fn from_name(name: &str) -> Option<Self> {
        [Verdict::Ok, Verdict::Warn, Verdict::Reject]
            .into_iter()
            .find(|v| v.as_str() == name)
    }
}

/// What the rules look at for one frame.
#[derive(Debug, Clone, Default)]
pub struct FrameFacts {
    pub readable: bool,
    pub fwhm_px: Option<f64>,
    pub eccentricity: Option<f64>,
    pub background_adu: Option<f64>,
    pub noise_adu: Option<f64>,
    pub star_count: Option<usize>,
    pub trails: usize,
    pub transparency_loss_mag: Option<f64>,
    pub registered: Option<bool>,
    pub fwhm_arcsec: Option<f64>,
    pub snr_median: Option<f64>,
    pub hfr_px: Option<f64>,
    /// Magnitude of a point source at SNR 5 (with a catalogue configured).
    pub limit_mag: Option<f64>,
    pub zero_point_mag: Option<f64>,
    /// The Sun's altitude at mid-exposure, when the site is known.
    pub sun_alt_deg: Option<f64>,
}

/// A per-frame quantity a rule can test.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Metric {
    FwhmPx,
    FwhmArcsec,
    Eccentricity,
    BackgroundAdu,
    NoiseAdu,
    StarCount,
    SnrMedian,
    HfrPx,
    TransparencyLossMag,
    LimitMag,
    ZeroPointMag,
}

impl Metric {
    /// Every metric a rule can test, for the configuration's messages (a test keeps it in
    /// step with the names the rules are read by).
    pub const ALL: [Metric; 11] = [
        Metric::FwhmPx,
        Metric::FwhmArcsec,
        Metric::Eccentricity,
        Metric::BackgroundAdu,
        Metric::NoiseAdu,
        Metric::StarCount,
        Metric::SnrMedian,
        Metric::HfrPx,
        Metric::TransparencyLossMag,
        Metric::LimitMag,
        Metric::ZeroPointMag,
    ];

    pub fn from_name(name: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|m| m.as_str() == name)
    }

    /// The metric's name in the configuration and the contract.
    pub fn as_str(self) -> &'static str {
        match self {
            Metric::FwhmPx => "fwhm_px",
            Metric::FwhmArcsec => "fwhm_arcsec",
            Metric::Eccentricity => "eccentricity",
            Metric::BackgroundAdu => "background_adu",
            Metric::NoiseAdu => "noise_adu",
            Metric::StarCount => "star_count",
            Metric::SnrMedian => "snr_median",
            Metric::HfrPx => "hfr_px",
            Metric::TransparencyLossMag => "transparency_loss_mag",
            Metric::LimitMag => "limit_mag",
            Metric::ZeroPointMag => "zero_point_mag",
        }
    }

    /// The unit a value of the metric is written with ("" for a pure number).
    pub fn unit(self) -> &'static str {
        match self {
            Metric::FwhmPx | Metric::HfrPx => " px",
            Metric::FwhmArcsec => "″",
            Metric::BackgroundAdu | Metric::NoiseAdu => " ADU",
            Metric::StarCount => " stars",
            Metric::TransparencyLossMag | Metric::LimitMag | Metric::ZeroPointMag => " mag",
            Metric::Eccentricity | Metric::SnrMedian => "",
        }
    }

    fn of(self, f: &FrameFacts) -> Option<f64> {
        match self {
            Metric::FwhmPx => f.fwhm_px,
            Metric::FwhmArcsec => f.fwhm_arcsec,
            Metric::Eccentricity => f.eccentricity,
            Metric::BackgroundAdu => f.background_adu,
            Metric::NoiseAdu => f.noise_adu,
            Metric::StarCount => f.star_count.map(|c| c as f64),
            Metric::SnrMedian => f.snr_median,
            Metric::HfrPx => f.hfr_px,
            Metric::TransparencyLossMag => f.transparency_loss_mag,
            Metric::LimitMag => f.limit_mag,
            Metric::ZeroPointMag => f.zero_point_mag,
        }
    }
}

/// How a rule compares.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Test {
    /// The value is above `value`.
    Above,
    /// The value is below `value`.
    Below,
    /// The value is above `value` × the median of the night so far (same target, filter).
    AboveMedianRatio,
    /// The value is below `value` × that median.
    BelowMedianRatio,
    /// The value is more than `value` robust σ (1.4826 × MAD) above the night's median.
    SigmasAbove,
    /// The value is more than `value` robust σ below the night's median.
    SigmasBelow,
    /// Over the last `frames` frames (this one included) the value rose by more than
    /// `value` (least-squares slope × span): focus drift, dew.
    Rising,
}

impl Test {
    /// Every test a rule can make, for the configuration's messages.
    pub const ALL: [Test; 7] = [
        Test::Above,
        Test::Below,
        Test::AboveMedianRatio,
        Test::BelowMedianRatio,
        Test::SigmasAbove,
        Test::SigmasBelow,
        Test::Rising,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Test::Above => "above",
            Test::Below => "below",
            Test::AboveMedianRatio => "above_median_ratio",
            Test::BelowMedianRatio => "below_median_ratio",
            Test::SigmasAbove => "sigmas_above",
            Test::SigmasBelow => "sigmas_below",
            Test::Rising => "rising",
        }
    }

    pub fn from_name(name: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|t| t.as_str() == name)
    }
}

/// One `[[rules]]` table of the configuration.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RuleSpec {
    /// The reason code it reports (e.g. "fwhm_high"); a default with the same code is
    /// replaced by this rule.
    pub reason: String,
    pub metric: Metric,
    pub test: Test,
    pub value: f64,
    pub verdict: Verdict,
    /// For `rising`: how many frames the trend spans (at least 3).
    #[serde(default)]
    pub frames: Option<usize>,
}

impl RuleSpec {
    /// Problems with the rule's values (its keys were checked when it was read).
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        if self.reason.trim().is_empty() {
            p.push("reason: must name a reason code".into());
        }
        if !self.value.is_finite() {
            p.push("value: must be a number".into());
        }
        if self.verdict == Verdict::Ok {
            p.push("verdict: must be \"warn\" or \"reject\"".into());
        }
        match (self.test, self.frames) {
            (Test::Rising, None) => {
                p.push("frames: a rising test needs the number of frames it spans".into())
            }
            (Test::Rising, Some(n)) if n < 3 => p.push("frames: at least 3".into()),
            (t, Some(_)) if t != Test::Rising => {
                p.push("frames: only for test = \"rising\"".into())
            }
            _ => {}
        }
        p
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct Judgement {
    pub verdict: Verdict,
    /// Reason codes, e.g. "fwhm_high".
    pub reasons: Vec<String>,
    /// One sentence per reason with the values that fired it.
    pub explanations: Vec<String>,
}

/// A line a metric must not cross in one group: drawn on the night's plots, and the
/// same value the judgement tests against.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Limit {
    /// The reason code that fires when it is crossed.
    pub reason: String,
    pub metric: Metric,
    pub verdict: Verdict,
    pub value: f64,
    /// Crossed from below (`true`: a value above it fires) or from above.
    pub above: bool,
}

// The built-in rules' thresholds, each in the unit its explanation names.
const FWHM_RATIO: (f64, f64) = (1.25, 1.5);
const ECCENTRICITY_OVER_MEDIAN: (f64, f64) = (0.15, 0.3);
const ECCENTRICITY_FLOOR: (f64, f64) = (0.5, 0.65);
const BACKGROUND_SIGMAS: (f64, f64) = (10.0, 50.0);
const STAR_FRACTION: (f64, f64) = (0.6, 0.3);
const TRANSPARENCY_MAG: (f64, f64) = (0.3, 0.75);
// A limiting magnitude this far above (brighter than) the night's median: half a
// magnitude costs the signal-to-noise ratio of a faint star a factor 10^0.2 = 1.6, as
// much as 60 % less exposure.
const DEPTH_LOSS_MAG: (f64, f64) = (0.5, 1.0);
// Astronomical twilight (Sun above −18°) brightens the sky; by nautical twilight (above
// −12°) a frame is rarely worth stacking.
const SUN_ALTITUDE_DEG: (f64, f64) = (-18.0, -12.0);

/// The group's medians the built-in rules compare with, and each configured rule's
/// median and robust σ of its metric.
struct GroupStats {
    fwhm: Option<f64>,
    ecc: Option<f64>,
    background: Option<f64>,
    noise: Option<f64>,
    stars: Option<f64>,
    depth: Option<f64>,
    /// Per configured rule: (median, robust σ) of its metric over readable frames.
    rules: Vec<(Option<f64>, Option<f64>)>,
}

impl GroupStats {
    fn of(frames: &[FrameFacts], rules: &[RuleSpec]) -> Self {
        let values = |f: &dyn Fn(&FrameFacts) -> Option<f64>| -> Vec<f64> {
            frames.iter().filter(|x| x.readable).filter_map(f).collect()
        };
        let med = |f: &dyn Fn(&FrameFacts) -> Option<f64>| median_f64(&values(f));
        GroupStats {
            fwhm: med(&|f| f.fwhm_px),
            ecc: med(&|f| f.eccentricity),
            background: med(&|f| f.background_adu),
            noise: med(&|f| f.noise_adu),
            stars: med(&|f| f.star_count.map(|c| c as f64)),
            depth: med(&|f| f.limit_mag),
            rules: rules
                .iter()
                .map(|r| {
                    let v = values(&|f| r.metric.of(f));
                    let m = median_f64(&v);
                    let sigma = m
                        .and_then(|m| {
                            median_f64(&v.iter().map(|x| (x - m).abs()).collect::<Vec<_>>())
                        })
                        .map(|d| d * 1.482_602_218_505_602);
                    (m, sigma)
                })
                .collect(),
        }
    }

    /// (warn, reject) eccentricity limits.
    fn eccentricity_limits(&self) -> (f64, f64) {
        let m = self.ecc.unwrap_or(0.0);
        (
            (m + ECCENTRICITY_OVER_MEDIAN.0).max(ECCENTRICITY_FLOOR.0),
            (m + ECCENTRICITY_OVER_MEDIAN.1).max(ECCENTRICITY_FLOOR.1),
        )
    }

    /// (warn, reject) star counts below which the star-count rule fires.
    fn star_limits(&self) -> Option<(f64, f64)> {
        let m = self.stars?.max(1.0);
        Some((STAR_FRACTION.0 * m, STAR_FRACTION.1 * m))
    }

    /// (warn, reject) limiting magnitudes below which the depth rule fires.
    fn depth_limits(&self) -> Option<(f64, f64)> {
        let m = self.depth?;
        Some((m - DEPTH_LOSS_MAG.0, m - DEPTH_LOSS_MAG.1))
    }

    /// (warn, reject) background levels, ADU.
    fn background_limits(&self) -> Option<(f64, f64)> {
        let (m, n) = (self.background?, self.noise?.max(1e-9));
        Some((m + BACKGROUND_SIGMAS.0 * n, m + BACKGROUND_SIGMAS.1 * n))
    }

    /// The built-in limits on plottable metrics, then the configured rules' (a
    /// configured rule replaces the built-in one with its reason code; a trend draws no
    /// line).
    fn limits(&self, rules: &[RuleSpec]) -> Vec<Limit> {
        let mut out = Vec::new();
        let mut pair = |reason: &str, metric: Metric, (warn, reject): (f64, f64), above: bool| {
            if rules.iter().any(|r| r.reason == reason) {
                return;
            }
            for (verdict, value) in [(Verdict::Warn, warn), (Verdict::Reject, reject)] {
                out.push(Limit {
                    reason: reason.into(),
                    metric,
                    verdict,
                    value,
                    above,
                });
            }
        };
        if let Some(m) = self.fwhm {
            pair(
                "fwhm_high",
                Metric::FwhmPx,
                (FWHM_RATIO.0 * m, FWHM_RATIO.1 * m),
                true,
            );
        }
        pair(
            "eccentricity_high",
            Metric::Eccentricity,
            self.eccentricity_limits(),
            true,
        );
        if let Some(l) = self.background_limits() {
            pair("background_high", Metric::BackgroundAdu, l, true);
        }
        if let Some(l) = self.star_limits() {
            pair("star_count_low", Metric::StarCount, l, false);
        }
        pair(
            "transparency_low",
            Metric::TransparencyLossMag,
            TRANSPARENCY_MAG,
            true,
        );
        if let Some(l) = self.depth_limits() {
            pair("depth_low", Metric::LimitMag, l, false);
        }
        for (r, &(median, sigma)) in rules.iter().zip(&self.rules) {
            let value = match r.test {
                Test::Above | Test::Below => Some(r.value),
                Test::AboveMedianRatio | Test::BelowMedianRatio => median.map(|m| r.value * m),
                Test::SigmasAbove => median.zip(sigma).map(|(m, s)| m + r.value * s),
                Test::SigmasBelow => median.zip(sigma).map(|(m, s)| m - r.value * s),
                Test::Rising => None,
            };
            if let Some(value) = value {
                out.push(Limit {
                    reason: r.reason.clone(),
                    metric: r.metric,
                    verdict: r.verdict,
                    value,
                    above: matches!(
                        r.test,
                        Test::Above | Test::AboveMedianRatio | Test::SigmasAbove
                    ),
                });
            }
        }
        out
    }
}

/// Judge every frame of one target-and-filter group against the group's medians, with
/// the built-in rules only.
pub fn judge_group(frames: &[FrameFacts]) -> Vec<Judgement> {
    judge_group_with(frames, &[])
}

/// The limits each metric of a group is judged against (built-in and configured), for
/// drawing beside the values.
pub fn group_limits(frames: &[FrameFacts], rules: &[RuleSpec]) -> Vec<Limit> {
    GroupStats::of(frames, rules).limits(rules)
}

/// Judge every frame of a group with the built-in rules and `rules` (a configured rule
/// replaces the built-in one with the same reason code). Frames are in time order; a
/// trend looks at the frames before each one.
pub fn judge_group_with(frames: &[FrameFacts], rules: &[RuleSpec]) -> Vec<Judgement> {
    let stats = GroupStats::of(frames, rules);
    let replaced: Vec<&str> = rules.iter().map(|r| r.reason.as_str()).collect();
    frames
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let mut j = judge(f, &stats, &replaced);
            if f.readable {
                for (r, &(median, sigma)) in rules.iter().zip(&stats.rules) {
                    if let Some(text) = fires(r, &frames[..=i], median, sigma) {
                        j.verdict = j.verdict.max(r.verdict);
                        if !j.reasons.contains(&r.reason) {
                            j.reasons.push(r.reason.clone());
                            j.explanations.push(text);
                        }
                    }
                }
            }
            j
        })
        .collect()
}

/// Whether a configured rule fires on the last of `upto`, and the sentence saying why.
fn fires(
    r: &RuleSpec,
    upto: &[FrameFacts],
    median: Option<f64>,
    sigma: Option<f64>,
) -> Option<String> {
    let f = upto.last()?;
    let v = r.metric.of(f)?;
    let name = r.metric.as_str();
    let unit = r.metric.unit();
    let limit = r.value;
    // Which configured rule fired, by its reason code, then the values with their units.
    let said = |words: String| format!("rule {} ([[rules]]): {words}", r.reason);
    let text = match r.test {
        Test::Above => (v > limit).then(|| format!("{name} {v:.3}{unit} is above {limit}{unit}")),
        Test::Below => (v < limit).then(|| format!("{name} {v:.3}{unit} is below {limit}{unit}")),
        Test::AboveMedianRatio => {
            let m = median?;
            (v > limit * m).then(|| {
                format!("{name} {v:.3}{unit} is above {limit} × the night's median {m:.3}{unit}")
            })
        }
        Test::BelowMedianRatio => {
            let m = median?;
            (v < limit * m).then(|| {
                format!("{name} {v:.3}{unit} is below {limit} × the night's median {m:.3}{unit}")
            })
        }
        Test::SigmasAbove | Test::SigmasBelow => {
            let (m, s) = (median?, sigma?);
            if s <= 0.0 {
                return None;
            }
            let z = (v - m) / s;
            let hit = if r.test == Test::SigmasAbove {
                z > limit
            } else {
                -z > limit
            };
            hit.then(|| format!("{name} {v:.3}{unit} is {z:+.1} robust σ from the night's median {m:.3}{unit} (limit {limit} σ)"))
        }
        Test::Rising => {
            let n = r.frames.unwrap_or(3);
            let window: Vec<f64> = upto
                .iter()
                .rev()
                .filter(|f| f.readable)
                .take(n)
                .filter_map(|f| r.metric.of(f))
                .collect();
            if window.len() < n {
                return None;
            }
            // Least-squares slope over the window, oldest first.
            let ys: Vec<f64> = window.into_iter().rev().collect();
            let mx = (n as f64 - 1.0) / 2.0;
            let my = ys.iter().sum::<f64>() / n as f64;
            let num: f64 = ys
                .iter()
                .enumerate()
                .map(|(k, y)| (k as f64 - mx) * (y - my))
                .sum();
            let den: f64 = (0..n).map(|k| (k as f64 - mx).powi(2)).sum();
            let rise = num / den * (n as f64 - 1.0);
            (rise > limit).then(|| {
                format!(
                    "{name} rose by {rise:.3}{unit} over the last {n} frames (limit {limit}{unit})"
                )
            })
        }
    };
    text.map(said)
}

/// The verdict a value earns against (warn, reject) limits, crossed upwards or downwards.
fn level(v: f64, (warn, reject): (f64, f64), above: bool) -> Option<Verdict> {
    let beyond = |limit: f64| if above { v > limit } else { v < limit };
    if beyond(reject) {
        Some(Verdict::Reject)
    } else if beyond(warn) {
        Some(Verdict::Warn)
    } else {
        None
    }
}

fn judge(f: &FrameFacts, c: &GroupStats, replaced: &[&str]) -> Judgement {
    let mut j = Judgement {
        verdict: Verdict::Ok,
        reasons: Vec::new(),
        explanations: Vec::new(),
    };
    let mut fire = |verdict: Verdict, code: &str, text: String| {
        if replaced.contains(&code) {
            return;
        }
        j.verdict = j.verdict.max(verdict);
        if !j.reasons.iter().any(|r| r == code) {
            j.reasons.push(code.to_string());
            j.explanations.push(text);
        }
    };
    if !f.readable {
        fire(
            Verdict::Reject,
            "unreadable",
            "the file could not be measured".into(),
        );
        return j;
    }
    if let (Some(v), Some(m)) = (f.fwhm_px, c.fwhm) {
        if let Some(verdict) = level(v, (FWHM_RATIO.0 * m, FWHM_RATIO.1 * m), true) {
            let (w, r) = FWHM_RATIO;
            // In arcseconds where the plate scale is known, the pixels beside.
            let both = |px: f64| match f.fwhm_arcsec.filter(|a| a.is_finite() && v > 0.0) {
                Some(a) => format!("{:.2}″ ({px:.2} px)", px * a / v),
                None => format!("{px:.2} px"),
            };
            fire(verdict, "fwhm_high", format!("FWHM {} is {:.2} × the night's median {} (warn above {w} ×, reject above {r} ×)", both(v), v / m, both(m)));
        }
    }
    if let Some(v) = f.eccentricity {
        let (warn, reject) = c.eccentricity_limits();
        if let Some(verdict) = level(v, (warn, reject), true) {
            let m = c.ecc.unwrap_or(0.0);
            fire(verdict, "eccentricity_high", format!("eccentricity {v:.2} against the night's median {m:.2} (warn above {warn:.2}, reject above {reject:.2})"));
        }
    }
    if let (Some(v), Some(limits), Some(m), Some(n)) = (
        f.background_adu,
        c.background_limits(),
        c.background,
        c.noise,
    ) {
        if let Some(verdict) = level(v, limits, true) {
            let excess = (v - m) / n.max(1e-9);
            let (w, r) = BACKGROUND_SIGMAS;
            fire(verdict, "background_high", format!("sky {v:.1} ADU is {excess:.0} σ above the night's median {m:.1} ADU (warn above {w} σ, reject above {r} σ)"));
        }
    }
    if let (Some(v), Some(limits), Some(m)) = (f.star_count, c.star_limits(), c.stars) {
        if let Some(verdict) = level(v as f64, limits, false) {
            let r = v as f64 / m.max(1.0);
            let (w, rj) = STAR_FRACTION;
            fire(verdict, "star_count_low", format!("{v} stars, {:.0} % of the night's median {m:.0} (warn below {:.0} %, reject below {:.0} %)", 100.0 * r, 100.0 * w, 100.0 * rj));
        }
    }
    if let Some(loss) = f.transparency_loss_mag {
        if let Some(verdict) = level(loss, TRANSPARENCY_MAG, true) {
            let (w, r) = TRANSPARENCY_MAG;
            fire(verdict, "transparency_low", format!("stars {loss:.2} mag fainter than in the reference frame (warn above {w}, reject above {r})"));
        }
    }
    if let (Some(v), Some(limits), Some(m)) = (f.limit_mag, c.depth_limits(), c.depth) {
        if let Some(verdict) = level(v, limits, false) {
            let (w, r) = DEPTH_LOSS_MAG;
            fire(verdict, "depth_low", format!("limiting magnitude {v:.2} is {:.2} mag brighter than the night's median {m:.2} (warn beyond {w}, reject beyond {r})", m - v));
        }
    }
    if let Some(sun) = f.sun_alt_deg {
        if let Some(verdict) = level(sun, SUN_ALTITUDE_DEG, true) {
            // Written with the minus sign, as the other explanations are.
            let deg = |a: f64| format!("{a}°").replace('-', "−");
            let (w, r) = SUN_ALTITUDE_DEG;
            fire(
                verdict,
                "twilight",
                format!(
                    "the Sun was at {} (warn above {}, reject above {})",
                    deg((sun * 10.0).round() / 10.0),
                    deg(w),
                    deg(r)
                ),
            );
        }
    }
    if f.trails > 0 {
        fire(
            Verdict::Warn,
            "trail",
            match f.trails {
                1 => "a streak crosses the frame".to_string(),
                n => format!("{n} streaks cross the frame"),
            },
        );
    }
    if f.registered == Some(false) {
        fire(
            Verdict::Warn,
            "unregistered",
            "its stars could not be matched to the night's reference frame".into(),
        );
    }
    j
}

#[cfg(test)]
mod tests {
    use super::*;

    fn good() -> FrameFacts {
        FrameFacts {
            readable: true,
            fwhm_px: Some(3.0),
            eccentricity: Some(0.2),
            background_adu: Some(1000.0),
            noise_adu: Some(10.0),
            star_count: Some(200),
            trails: 0,
            transparency_loss_mag: Some(0.0),
            registered: Some(true),
            fwhm_arcsec: Some(6.0),
            snr_median: Some(40.0),
            hfr_px: Some(1.6),
            limit_mag: Some(18.5),
            zero_point_mag: Some(23.0),
            sun_alt_deg: Some(-30.0),
        }
    }

    fn rule(text: &str) -> RuleSpec {
        toml::from_str(text).unwrap()
    }

    #[test]
    fn configured_rules_of_every_test_kind() {
        let mut frames = vec![good(); 8];
        for (k, f) in frames.iter_mut().enumerate() {
            f.hfr_px = Some(1.6 + 0.01 * k as f64);
            f.noise_adu = Some(10.0 + 0.1 * (k % 3) as f64);
        }
        frames[3].fwhm_arcsec = Some(9.5);
        frames[4].snr_median = Some(12.0);
        frames[5].noise_adu = Some(40.0);
        // A steady rise over the last four frames.
        frames[7].hfr_px = Some(2.4);
        frames[6].hfr_px = Some(2.1);
        frames[5].hfr_px = Some(1.9);
        let rules = vec![
            rule("reason = \"soft\"\nmetric = \"fwhm_arcsec\"\ntest = \"above\"\nvalue = 9.0\nverdict = \"reject\""),
            rule("reason = \"faint\"\nmetric = \"snr_median\"\ntest = \"below_median_ratio\"\nvalue = 0.5\nverdict = \"warn\""),
            rule("reason = \"noisy\"\nmetric = \"noise_adu\"\ntest = \"sigmas_above\"\nvalue = 5\nverdict = \"warn\""),
            rule("reason = \"drift\"\nmetric = \"hfr_px\"\ntest = \"rising\"\nframes = 4\nvalue = 0.6\nverdict = \"warn\""),
            // Replaces the built-in star-count rule: nothing fires on star count now.
            rule("reason = \"star_count_low\"\nmetric = \"star_count\"\ntest = \"below\"\nvalue = 1\nverdict = \"reject\""),
        ];
        assert!(rules.iter().all(|r| r.problems().is_empty()));
        frames[1].star_count = Some(10);
        let j = judge_group_with(&frames, &rules);
        assert!(
            j[0].reasons.is_empty() && j[1].reasons.is_empty(),
            "{:?}",
            j[1]
        );
        assert_eq!(
            (j[3].verdict, j[3].reasons.clone()),
            (Verdict::Reject, vec!["soft".to_string()])
        );
        assert_eq!(j[4].reasons, vec!["faint".to_string()]);
        assert_eq!(j[5].reasons, vec!["noisy".to_string()]);
        assert_eq!(j[7].reasons, vec!["drift".to_string()]);
        assert!(j[6].reasons.is_empty(), "{:?}", j[6]);
    }

    #[test]
    fn the_drawn_limits_are_the_ones_judged_against() {
        // Each built-in limit sits where its rule starts to fire: a frame a hair beyond
        // it gets that verdict, one a hair inside does not.
        let frames = vec![good(); 9];
        let limits = group_limits(&frames, &[]);
        let metrics = |l: &Limit| l.metric;
        for l in &limits {
            let eps = 1e-6 * l.value.abs().max(1.0);
            for (offset, fires) in [(eps, true), (-eps, false)] {
                let mut probe = frames.clone();
                let v = l.value + if l.above { offset } else { -offset };
                let f = &mut probe[0];
                match l.metric {
                    Metric::FwhmPx => f.fwhm_px = Some(v),
                    Metric::Eccentricity => f.eccentricity = Some(v),
                    Metric::BackgroundAdu => f.background_adu = Some(v),
                    Metric::StarCount => {
                        // Counts are whole: the first count past the limit.
                        let c = if l.above {
                            v.floor() + 1.0
                        } else {
                            v.ceil() - 1.0
                        };
                        let inside = if l.above { v.floor() } else { v.ceil() };
                        f.star_count = Some(if fires { c } else { inside } as usize);
                    }
                    Metric::TransparencyLossMag => f.transparency_loss_mag = Some(v),
                    Metric::LimitMag => f.limit_mag = Some(v),
                    other => panic!("no built-in limit on {other:?}"),
                }
                let j = &judge_group(&probe)[0];
                let at_least = j.verdict >= l.verdict && j.reasons.contains(&l.reason);
                assert_eq!(at_least, fires, "{l:?} at {v}: {j:?}");
            }
        }
        assert_eq!(
            limits.len(),
            12,
            "{:?}",
            limits.iter().map(metrics).collect::<Vec<_>>()
        );
        // A configured rule replaces the built-in one's lines with its own.
        let r = rule("reason = \"fwhm_high\"\nmetric = \"fwhm_px\"\ntest = \"above\"\nvalue = 4.5\nverdict = \"reject\"");
        let limits = group_limits(&frames, std::slice::from_ref(&r));
        let fwhm: Vec<&Limit> = limits.iter().filter(|l| l.reason == "fwhm_high").collect();
        assert_eq!(fwhm.len(), 1);
        assert_eq!((fwhm[0].value, fwhm[0].verdict), (4.5, Verdict::Reject));
    }

    #[test]
    fn bad_rule_values_are_reported() {
        let r = rule(
            "reason = \"x\"\nmetric = \"hfr_px\"\ntest = \"rising\"\nvalue = 1\nverdict = \"ok\"",
        );
        assert_eq!(r.problems().len(), 2);
        assert!(toml::from_str::<RuleSpec>(
            "reason = \"x\"\nmetric = \"color\"\ntest = \"above\"\nvalue = 1\nverdict = \"warn\""
        )
        .is_err());
    }

    #[test]
    fn each_default_rule_fires_on_its_fault_and_stays_quiet_otherwise() {
        let mut frames = vec![good(); 11];
        frames[9].sun_alt_deg = Some(-10.0);
        frames[10].limit_mag = Some(17.9);
        frames[1].fwhm_px = Some(4.8);
        frames[2].eccentricity = Some(0.7);
        frames[3].background_adu = Some(1200.0);
        frames[4].star_count = Some(40);
        frames[5].transparency_loss_mag = Some(1.2);
        frames[6].trails = 1;
        frames[7].readable = false;
        let j = judge_group(&frames);
        assert_eq!(j[0].verdict, Verdict::Ok);
        assert!(j[0].reasons.is_empty());
        let expect = [
            (1, "fwhm_high", Verdict::Reject),
            (2, "eccentricity_high", Verdict::Reject),
            (3, "background_high", Verdict::Warn),
            (4, "star_count_low", Verdict::Reject),
            (5, "transparency_low", Verdict::Reject),
            (6, "trail", Verdict::Warn),
            (7, "unreadable", Verdict::Reject),
            (9, "twilight", Verdict::Reject),
            (10, "depth_low", Verdict::Warn),
        ];
        for (i, code, verdict) in expect {
            assert_eq!(j[i].reasons, vec![code.to_string()], "frame {i}");
            assert_eq!(j[i].verdict, verdict, "frame {i}");
        }
        assert_eq!(j[8].verdict, Verdict::Ok);
    }

    /// The names the configuration's messages list are the names rules are read by.
    #[test]
    fn metric_and_test_names_are_the_rules_own() {
        for m in Metric::ALL {
            let read: Metric = serde_json::from_value(serde_json::json!(m.as_str())).unwrap();
            assert_eq!(read, m);
            assert_eq!(Metric::from_name(m.as_str()), Some(m));
        }
        for t in Test::ALL {
            let read: Test = serde_json::from_value(serde_json::json!(t.as_str())).unwrap();
            assert_eq!(read, t);
            assert_eq!(Test::from_name(t.as_str()), Some(t));
        }
        assert_eq!(Metric::from_name("seeing"), None);
        assert_eq!(Test::from_name("abov"), None);
    }
}
