//! Verdicts: which frames to keep. Pure: a group's frame facts in, a verdict and the
//! reasons for each frame out. These are the defaults that work with no rules
//! configured; each reason says which test fired and with what values.

use serde::Serialize;

use crate::measure::stats::median_f64;

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    Ok,
    Warn,
    Reject,
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
}

#[derive(Debug, Clone, Serialize)]
pub struct Judgement {
    pub verdict: Verdict,
    /// Reason codes, e.g. "fwhm_high".
    pub reasons: Vec<String>,
    /// One sentence per reason with the values that fired it.
    pub explanations: Vec<String>,
}

struct Ctx {
    fwhm: Option<f64>,
    ecc: Option<f64>,
    background: Option<f64>,
    noise: Option<f64>,
    stars: Option<f64>,
}

/// Judge every frame of one target-and-filter group against the group's medians.
pub fn judge_group(frames: &[FrameFacts]) -> Vec<Judgement> {
    let med = |f: &dyn Fn(&FrameFacts) -> Option<f64>| {
        median_f64(
            &frames
                .iter()
                .filter(|x| x.readable)
                .filter_map(f)
                .collect::<Vec<_>>(),
        )
    };
    let ctx = Ctx {
        fwhm: med(&|f| f.fwhm_px),
        ecc: med(&|f| f.eccentricity),
        background: med(&|f| f.background_adu),
        noise: med(&|f| f.noise_adu),
        stars: med(&|f| f.star_count.map(|c| c as f64)),
    };
    frames.iter().map(|f| judge(f, &ctx)).collect()
}

fn judge(f: &FrameFacts, c: &Ctx) -> Judgement {
    let mut j = Judgement {
        verdict: Verdict::Ok,
        reasons: Vec::new(),
        explanations: Vec::new(),
    };
    let mut fire = |verdict: Verdict, code: &str, text: String| {
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
        let r = v / m;
        if r > 1.25 {
            let verdict = if r > 1.5 {
                Verdict::Reject
            } else {
                Verdict::Warn
            };
            fire(verdict, "fwhm_high", format!("FWHM {v:.2} px is {r:.2} × the night's median {m:.2} px (warn above 1.25 ×, reject above 1.5 ×)"));
        }
    }
    if let Some(v) = f.eccentricity {
        let m = c.ecc.unwrap_or(0.0);
        let (warn, reject) = ((m + 0.15).max(0.5), (m + 0.3).max(0.65));
        if v > warn {
            let verdict = if v > reject {
                Verdict::Reject
            } else {
                Verdict::Warn
            };
            fire(verdict, "eccentricity_high", format!("eccentricity {v:.2} against the night's median {m:.2} (warn above {warn:.2}, reject above {reject:.2})"));
        }
    }
    if let (Some(v), Some(m), Some(n)) = (f.background_adu, c.background, c.noise) {
        let excess = (v - m) / n.max(1e-9);
        if excess > 10.0 {
            let verdict = if excess > 50.0 {
                Verdict::Reject
            } else {
                Verdict::Warn
            };
            fire(verdict, "background_high", format!("sky {v:.1} ADU is {excess:.0} σ above the night's median {m:.1} ADU (warn above 10 σ, reject above 50 σ)"));
        }
    }
    if let (Some(v), Some(m)) = (f.star_count, c.stars) {
        let r = v as f64 / m.max(1.0);
        if r < 0.6 {
            let verdict = if r < 0.3 {
                Verdict::Reject
            } else {
                Verdict::Warn
            };
            fire(verdict, "star_count_low", format!("{v} stars, {:.0} % of the night's median {m:.0} (warn below 60 %, reject below 30 %)", 100.0 * r));
        }
    }
    if let Some(loss) = f.transparency_loss_mag {
        if loss > 0.3 {
            let verdict = if loss > 0.75 {
                Verdict::Reject
            } else {
                Verdict::Warn
            };
            fire(verdict, "transparency_low", format!("stars {loss:.2} mag fainter than in the reference frame (warn above 0.3, reject above 0.75)"));
        }
    }
    if f.trails > 0 {
        fire(
            Verdict::Warn,
            "trail",
            format!("{} streak(s) cross the frame", f.trails),
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
        }
    }

    #[test]
    fn each_default_rule_fires_on_its_fault_and_stays_quiet_otherwise() {
        let mut frames = vec![good(); 9];
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
        ];
        for (i, code, verdict) in expect {
            assert_eq!(j[i].reasons, vec![code.to_string()], "frame {i}");
            assert_eq!(j[i].verdict, verdict, "frame {i}");
        }
        assert_eq!(j[8].verdict, Verdict::Ok);
    }
}
