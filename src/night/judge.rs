//! One judgement of a night. The daemon's live verdict, `subwatch night`, `report` and
//! the morning summary all judge through here, so they cannot disagree about a frame:
//! the same reference frame, the same registration and transparency, the same rules,
//! the same sky. Pure: records in, judgements out.
//!
//! The model, per target-and-filter group, frames in time order:
//! 1. The reference is, among the first [`REFERENCE_WINDOW`] readable frames, the one
//!    with the most stars (the earliest on a tie). Later frames never change it, so a
//!    frame's registration, once the window is full, never changes either.
//! 2. Each frame is registered on the reference ([`place`]): the transform, its RMS, and
//!    the frame's brightness offset, the median magnitude difference of the stars with
//!    SNR > 20 in both (frame minus reference).
//! 3. A frame's transparency loss is its offset above the clearest frame's (the lowest
//!    offset of the frames judged).
//! 4. The rules judge each frame against the group's medians (`rules`), with the Sun's
//!    altitude at mid-exposure when the site is known.
//!
//! **The live rule.** A frame is judged when it lands by this same model applied to the
//! night so far: the frames of its group recorded until then. What is relative to the
//! night (the group's medians, the clearest frame, and the reference while fewer than
//! ten frames exist) is then taken over the frames so far; the morning takes it over the
//! whole night. That is the one way a frame's live verdict can differ from its morning
//! verdict; `tests/live_and_morning.rs` asserts it frame by frame.

use super::classify::{self, Findings};
use super::register::{register, Placement};
use super::{EarlierNight, FrameInput};
use crate::measure::stats::median_f64;
use crate::record::{FrameRecord, FrameStatus, StarRecord};
use crate::rules::{group_limits, judge_group_with, FrameFacts, Judgement, Limit, RuleSpec};
use crate::sky::FrameSky;

/// The reference is chosen among this many first readable frames of a group.
pub const REFERENCE_WINDOW: usize = 10;

/// A site: latitude, east longitude (degrees), elevation (m).
pub type Site = (f64, f64, f64);

/// What the model says of one frame.
#[derive(Debug, Clone)]
pub struct FrameJudgement {
    pub judgement: Judgement,
    pub placement: Option<Placement>,
    pub transparency_loss_mag: Option<f64>,
    pub sky: Option<FrameSky>,
}

/// A group's frames in time order (DATE-OBS, then path): the order every judgement uses.
pub fn time_order(frames: &[&FrameRecord]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..frames.len()).collect();
    order.sort_by(|&a, &b| {
        frames[a]
            .time_unix
            .unwrap_or(f64::NEG_INFINITY)
            .total_cmp(&frames[b].time_unix.unwrap_or(f64::NEG_INFINITY))
            .then_with(|| frames[a].identity.path.cmp(&frames[b].identity.path))
    });
    order
}

fn readable(r: &FrameRecord) -> bool {
    r.status == FrameStatus::Ok && r.metrics.is_some()
}

/// The reference of a group whose frames are in time order: among the first
/// [`REFERENCE_WINDOW`] readable frames, the one with the most stars, the earliest on a
/// tie. `None` without a readable frame.
pub fn reference(frames: &[&FrameRecord]) -> Option<usize> {
    frames
        .iter()
        .enumerate()
        .filter(|(_, r)| readable(r))
        .take(REFERENCE_WINDOW)
        .max_by(|(ia, a), (ib, b)| {
            let count = |r: &FrameRecord| r.metrics.as_ref().map_or(0, |m| m.star_count);
            count(a).cmp(&count(b)).then(ib.cmp(ia))
        })
        .map(|(i, _)| i)
}

/// Place a frame's stars on the reference frame's stars; the reference itself is placed
/// on itself exactly. Each side is (path, stars).
pub fn place(reference: (&str, &[StarRecord]), frame: (&str, &[StarRecord])) -> Placement {
    let ((reference_path, reference), (frame_path, frame)) = (reference, frame);
    if reference_path == frame_path {
        return Placement {
            reference: reference_path.to_string(),
            registered: true,
            transform: Some([1.0, 0.0, 0.0, 1.0, 0.0, 0.0]),
            rms_px: Some(0.0),
            matched: frame.len(),
            offset_mag: Some(0.0),
        };
    }
    let mut p = Placement {
        reference: reference_path.to_string(),
        ..Default::default()
    };
    let Some(reg) = register(reference, frame) else {
        return p;
    };
    let t = reg.transform;
    p.registered = true;
    p.transform = Some([t.a[0][0], t.a[0][1], t.a[1][0], t.a[1][1], t.t[0], t.t[1]]);
    p.rms_px = Some(reg.rms_px);
    p.matched = reg.matched;
    let bright = |s: &&StarRecord| s.snr > 20.0 && s.flux > 0.0;
    let diffs: Vec<f64> = frame
        .iter()
        .filter(bright)
        .filter_map(|s| {
            let (x, y) = t.apply((s.x, s.y));
            let m = reference
                .iter()
                .filter(bright)
                .find(|q| (q.x - x).hypot(q.y - y) < 1.5)?;
            Some(-2.5 * (s.flux / m.flux).log10())
        })
        .collect();
    if diffs.len() >= 3 {
        p.offset_mag = median_f64(&diffs);
    }
    p
}

/// Which frames of a group (time order) must be placed again: those with no placement,
/// or one made on another reference than the group's now. Returns the reference's index
/// and those frames' indices.
pub fn to_place(
    frames: &[&FrameRecord],
    known: &[Option<Placement>],
) -> Option<(usize, Vec<usize>)> {
    let r = reference(frames)?;
    let path = &frames[r].identity.path;
    let stale = (0..frames.len())
        .filter(|&i| readable(frames[i]))
        .filter(|&i| {
            known
                .get(i)
                .and_then(|k| k.as_ref())
                .is_none_or(|k| &k.reference != path)
        })
        .collect();
    Some((r, stale))
}

/// Sky context at mid-exposure (the target at the WCS centre, when there is one).
pub fn sky_of(r: &FrameRecord, site: Option<Site>) -> Option<FrameSky> {
    let (lat, lon, _) = site?;
    let start = r.time_unix?;
    let half = r.header.as_ref().and_then(|h| h.exposure_s).unwrap_or(0.0) / 2.0;
    let target =
        r.wcs.as_ref().zip(r.metrics.as_ref()).map(|(w, m)| {
            w.pixel_to_sky((m.width as f64 + 1.0) / 2.0, (m.height as f64 + 1.0) / 2.0)
        });
    Some(crate::sky::frame_sky(start + half, lat, lon, target))
}

/// Judge a group whose frames are in time order, with each readable frame's placement on
/// the group's reference (`None` for unreadable frames).
pub fn judge_group(
    frames: &[&FrameRecord],
    placements: &[Option<Placement>],
    rules: &[RuleSpec],
    site: Option<Site>,
) -> Vec<FrameJudgement> {
    judge_group_and_limits(frames, placements, rules, site).0
}

/// A group's judgements and the limits they were judged against.
fn judge_group_and_limits(
    frames: &[&FrameRecord],
    placements: &[Option<Placement>],
    rules: &[RuleSpec],
    site: Option<Site>,
) -> (Vec<FrameJudgement>, Vec<Limit>) {
    let offset = |i: usize| placements.get(i)?.as_ref()?.offset_mag;
    let clearest = (0..frames.len()).filter_map(offset).min_by(f64::total_cmp);
    let loss: Vec<Option<f64>> = (0..frames.len())
        .map(|i| Some(offset(i)? - clearest?))
        .collect();
    let skies: Vec<Option<FrameSky>> = frames.iter().map(|r| sky_of(r, site)).collect();
    let facts: Vec<FrameFacts> = frames
        .iter()
        .enumerate()
        .map(|(i, r)| {
            let metrics = r.metrics.as_ref().filter(|_| readable(r));
            let placement = placements.get(i).and_then(|p| p.as_ref());
            let mut f = match metrics {
                Some(m) => FrameFacts {
                    readable: true,
                    fwhm_px: m.fwhm_px,
                    eccentricity: m.eccentricity,
                    background_adu: Some(m.background_adu),
                    noise_adu: Some(m.noise_adu),
                    star_count: Some(m.star_count),
                    trails: m.trails.len(),
                    fwhm_arcsec: m.fwhm_arcsec,
                    snr_median: m.snr_median,
                    hfr_px: m.hfr_px,
                    limit_mag: m.limit_mag,
                    zero_point_mag: m.zero_point_mag,
                    registered: placement.map(|p| p.registered),
                    ..Default::default()
                },
                None => FrameFacts::default(),
            };
            f.transparency_loss_mag = loss[i];
            f.sun_alt_deg = skies[i].as_ref().map(|s| s.sun_alt_deg);
            f
        })
        .collect();
    let judged = judge_group_with(&facts, rules)
        .into_iter()
        .enumerate()
        .map(|(i, judgement)| FrameJudgement {
            judgement,
            placement: placements.get(i).cloned().flatten(),
            transparency_loss_mag: loss[i],
            sky: skies[i],
        })
        .collect();
    (judged, group_limits(&facts, rules))
}

/// Place every readable frame of a group (time order) on its reference.
pub fn place_all(frames: &[&FrameRecord]) -> Vec<Option<Placement>> {
    let Some(r) = reference(frames) else {
        return vec![None; frames.len()];
    };
    let reference = (frames[r].identity.path.as_str(), frames[r].stars.as_slice());
    frames
        .iter()
        .map(|f| readable(f).then(|| place(reference, (&f.identity.path, &f.stars))))
        .collect()
}

/// A whole night of one group: each frame's judgement (in the order given) and what is
/// unusual in it.
#[derive(Debug, Clone)]
pub struct NightJudgement {
    pub frames: Vec<FrameJudgement>,
    pub findings: Findings,
    /// The frames the findings' detections index: positions in the input of the
    /// readable frames.
    pub readable: Vec<usize>,
    /// The limits the group's frames were judged against.
    pub limits: Vec<Limit>,
}

/// Judge a whole night of one group (frames with their stars, any order), with earlier
/// nights' catalogues of the target for new sources.
pub fn judge_night(
    frames: &[&FrameRecord],
    earlier: &[EarlierNight],
    rules: &[RuleSpec],
    site: Option<Site>,
) -> NightJudgement {
    let order = time_order(frames);
    let sorted: Vec<&FrameRecord> = order.iter().map(|&i| frames[i]).collect();
    let placements = place_all(&sorted);
    let (judged, limits) = judge_group_and_limits(&sorted, &placements, rules, site);
    // Back to the caller's order.
    let mut by_input: Vec<Option<FrameJudgement>> = vec![None; frames.len()];
    for (k, j) in judged.into_iter().enumerate() {
        by_input[order[k]] = Some(j);
    }
    let frames_out: Vec<FrameJudgement> = by_input
        .into_iter()
        .map(|j| j.expect("every frame judged"))
        .collect();
    // What is unusual: the readable frames, placed on the same reference.
    let readable_idx: Vec<usize> = (0..frames.len()).filter(|&i| readable(frames[i])).collect();
    let inputs: Vec<FrameInput> = readable_idx
        .iter()
        .map(|&i| FrameInput::of(frames[i]))
        .collect();
    let placed: Vec<Option<Placement>> = readable_idx
        .iter()
        .map(|&i| frames_out[i].placement.clone())
        .collect();
    let losses: Vec<Option<f64>> = readable_idx
        .iter()
        .map(|&i| frames_out[i].transparency_loss_mag)
        .collect();
    let reference = reference(&sorted).and_then(|r| {
        let path = &sorted[r].identity.path;
        readable_idx
            .iter()
            .position(|&i| &frames[i].identity.path == path)
    });
    let findings = match reference {
        Some(r) => classify::analyse(&inputs, &placed, &losses, r, earlier),
        None => Findings::default(),
    };
    NightJudgement {
        frames: frames_out,
        findings,
        readable: readable_idx,
        limits,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::{Identity, Metrics};

    fn frame(path: &str, t: f64, stars: usize, fwhm: f64) -> FrameRecord {
        let mut r = FrameRecord::failed(
            Identity {
                path: path.into(),
                size: 1,
                mtime_ns: 1,
            },
            "",
        );
        r.status = FrameStatus::Ok;
        r.error = None;
        r.time_unix = Some(t);
        r.metrics = Some(Metrics {
            width: 100,
            height: 100,
            star_count: stars,
            fwhm_px: Some(fwhm),
            fwhm_arcsec: None,
            eccentricity: Some(0.1),
            background_adu: 1000.0,
            noise_adu: 10.0,
            snr_median: Some(50.0),
            hfr_px: None,
            saturated_count: 0,
            sharp_count: 0,
            background_range_adu: 1.0,
            plate_scale_arcsec: None,
            trails: Vec::new(),
            sky_fit: None,
            sky_fit_note: None,
            zero_point_mag: None,
            zero_point_err_mag: None,
            zero_point_stars: 0,
            zero_point_band: None,
            limit_mag: None,
            bright_snr: Vec::new(),
        });
        r
    }

    #[test]
    fn the_reference_is_the_richest_of_the_first_ten_and_later_frames_never_move_it() {
        let mut frames: Vec<FrameRecord> = (0..15)
            .map(|k| frame(&format!("f{k:02}"), k as f64, 50 + k, 3.0))
            .collect();
        frames[4].metrics.as_mut().unwrap().star_count = 90;
        frames[12].metrics.as_mut().unwrap().star_count = 500;
        let refs: Vec<&FrameRecord> = frames.iter().collect();
        assert_eq!(reference(&refs), Some(4));
        // Live, the reference so far: frame 2 after three frames, frame 4 from the fifth.
        assert_eq!(reference(&refs[..3]), Some(2));
        assert_eq!(reference(&refs[..5]), Some(4));
        assert_eq!(reference(&refs[..13]), Some(4));
        // An unreadable frame does not count towards the window.
        frames[0].status = FrameStatus::Error;
        let refs: Vec<&FrameRecord> = frames.iter().collect();
        assert_eq!(reference(&refs), Some(4));
    }

    #[test]
    fn a_frame_judged_live_is_judged_as_the_morning_judges_the_night_so_far() {
        // Soft focus in frame 3: relative to the medians of what exists.
        let frames: Vec<FrameRecord> = (0..6)
            .map(|k| {
                frame(
                    &format!("f{k}"),
                    k as f64,
                    80,
                    if k == 3 { 4.2 } else { 3.0 },
                )
            })
            .collect();
        let refs: Vec<&FrameRecord> = frames.iter().collect();
        let none = vec![None; refs.len()];
        let morning = judge_group(&refs, &none, &[], None);
        for i in 0..refs.len() {
            let live = judge_group(&refs[..=i], &none[..=i], &[], None);
            assert_eq!(
                live[i].judgement.verdict, morning[i].judgement.verdict,
                "frame {i}"
            );
        }
        assert!(morning[3]
            .judgement
            .reasons
            .contains(&"fwhm_high".to_string()));
    }

    #[test]
    fn transparency_is_measured_from_the_clearest_frame() {
        let frames: Vec<FrameRecord> = (0..4)
            .map(|k| frame(&format!("f{k}"), k as f64, 80, 3.0))
            .collect();
        let refs: Vec<&FrameRecord> = frames.iter().collect();
        let placed = |o: f64| {
            Some(Placement {
                reference: "f0".into(),
                registered: true,
                offset_mag: Some(o),
                ..Default::default()
            })
        };
        let p = vec![placed(0.0), placed(-0.1), placed(0.9), placed(0.2)];
        let j = judge_group(&refs, &p, &[], None);
        let loss: Vec<f64> = j.iter().map(|f| f.transparency_loss_mag.unwrap()).collect();
        for (got, want) in loss.iter().zip([0.1, 0.0, 1.0, 0.3]) {
            assert!((got - want).abs() < 1e-12, "{loss:?}");
        }
        assert_eq!(j[2].judgement.verdict, crate::rules::Verdict::Reject);
    }
}
