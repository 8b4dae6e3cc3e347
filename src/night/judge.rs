//! One judgement of a night. The daemon's live verdict, `subwatch night`, `report` and
//! the morning summary all judge through [`judge_group`], so they cannot disagree about a
//! frame: the same reference frame, the same registration and transparency, the same
//! rules, the same sky. Pure: records in, judgements out.
//!
//! The model, per target-and-filter group, frames in time order:
//! 1. The reference is, among the first [`REFERENCE_WINDOW`] readable frames, the one
//!    with the most stars (the earliest on a tie). Later frames never change it, so a
//!    frame's registration, once the window is full, never changes either.
//! 2. Each frame is registered on the reference (`place`): the transform, its RMS, and
//!    the frame's brightness offset, the median magnitude difference of the stars with
//!    SNR > 20 in both (frame minus reference).
//! 3. A frame's transparency loss is its offset above the clearest frame's (the lowest
//!    offset of the frames judged).
//! 4. The rules judge each frame against the group's medians (`rules`), with the Sun's
//!    altitude at mid-exposure when the site is known.
//!
//! Each record is named by an id ([`Held::id`]): the store's row id of the record, which
//! a rewritten file changes (its new version is a new record, with new stars). A
//! placement names its reference by that id, and a caller may hand back the placements
//! it kept: one is used again while the record it names is the group's reference, and
//! made again otherwise (the reference moved while the window filled, or its file was
//! rewritten). The batch, which keeps nothing, names records by their position in the
//! call. So a kept placement is always the one the model would make now.
//!
//! **The live rule.** A frame is judged when it lands by this same model applied to the
//! night so far: the frames of its group recorded until then, as they are then (the
//! daemon passes the placements it stored, and stores those made again). What is
//! relative to the night (the group's medians, the clearest frame, and the reference
//! while fewer than ten frames exist) is then taken over the frames so far; the morning
//! takes it over the whole night. That is the one way a frame's live verdict can differ
//! from its morning verdict (a test below shows a frame soft against the night's first
//! frames and not against the whole night); `tests/live_and_morning.rs` asserts it frame
//! by frame, a rewritten reference frame included.
//!
//! Longer than most modules for its tests (nearly half of it): the one model every path
//! judges through, with its cases kept beside it.

use std::borrow::Cow;

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

/// One frame of a group as the caller holds it.
#[derive(Debug, Clone, Copy)]
pub struct Held<'a> {
    /// Its record; the stars may be left out (they are asked for when needed).
    pub record: &'a FrameRecord,
    /// The record's id, unique among the frames of the call: the store's row id (a
    /// rewritten file is a new record with a new id), or, for records that have none,
    /// their position in the call.
    pub id: i64,
    /// Its placement from an earlier judgement, naming its reference by record id.
    pub known: Option<&'a Placement>,
}

/// A group judged by the model.
#[derive(Debug, Clone)]
pub struct GroupJudgement {
    /// Each frame's judgement, in the caller's order.
    pub frames: Vec<FrameJudgement>,
    /// The frames (positions in the caller's order) whose placement was made in this
    /// call, for the caller to keep; every other readable frame's known placement held.
    pub placed: Vec<usize>,
    /// The group's reference frame (a position in the caller's order).
    pub reference: Option<usize>,
    /// The limits the frames were judged against.
    pub limits: Vec<Limit>,
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

/// Judge one group (frames in any order) by the model: its reference, each readable
/// frame's placement on it (the known ones that name the reference's record kept, the
/// others made), transparency, the rules and the sky. `stars(i)` gives frame `i`'s stars;
/// it is asked only for the reference and the frames to place, so a caller whose records
/// come without stars (the store's) reads just those. Its error is the only one.
pub fn judge_group<'s, E>(
    frames: &[Held<'_>],
    mut stars: impl FnMut(usize) -> Result<Cow<'s, [StarRecord]>, E>,
    rules: &[RuleSpec],
    site: Option<Site>,
) -> Result<GroupJudgement, E> {
    let records: Vec<&FrameRecord> = frames.iter().map(|h| h.record).collect();
    let order = time_order(&records);
    let sorted: Vec<&FrameRecord> = order.iter().map(|&i| records[i]).collect();
    let reference = reference(&sorted).map(|k| order[k]);
    let mut placements: Vec<Option<Placement>> = vec![None; frames.len()];
    let mut placed = Vec::new();
    if let Some(r) = reference {
        let on = frames[r].id;
        for (i, h) in frames.iter().enumerate() {
            match h.known {
                _ if !readable(h.record) => {}
                Some(k) if k.reference == on => placements[i] = Some(k.clone()),
                _ => placed.push(i),
            }
        }
        if !placed.is_empty() {
            let reference_stars = stars(r)?;
            for &i in &placed {
                placements[i] = Some(if i == r {
                    on_itself(on, &reference_stars)
                } else {
                    place((on, &reference_stars), &stars(i)?)
                });
            }
        }
    }
    let in_time: Vec<Option<Placement>> = order.iter().map(|&i| placements[i].clone()).collect();
    let (judged, limits) = judge_placed(&sorted, &in_time, rules, site);
    // Back to the caller's order.
    let mut by_input: Vec<Option<FrameJudgement>> = vec![None; frames.len()];
    for (k, j) in judged.into_iter().enumerate() {
        by_input[order[k]] = Some(j);
    }
    Ok(GroupJudgement {
        frames: by_input.into_iter().flatten().collect(),
        placed,
        reference,
        limits,
    })
}

/// The reference placed on itself: exactly, by definition.
fn on_itself(on: i64, stars: &[StarRecord]) -> Placement {
    Placement {
        reference: on,
        registered: true,
        transform: Some([1.0, 0.0, 0.0, 1.0, 0.0, 0.0]),
        rms_px: Some(0.0),
        matched: stars.len(),
        offset_mag: Some(0.0),
    }
}

/// Place a frame's stars on the reference frame's (its record id and stars).
fn place((on, reference): (i64, &[StarRecord]), frame: &[StarRecord]) -> Placement {
    let mut p = Placement {
        reference: on,
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

/// A group whose frames are in time order judged with each readable frame's placement
/// on the group's reference (`None` for unreadable frames): its judgements and the
/// limits they were judged against.
fn judge_placed(
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

/// A whole night of one group: each frame's judgement (in the order given) and what is
/// unusual in it.
#[derive(Debug, Clone)]
pub struct NightJudgement {
    pub frames: Vec<FrameJudgement>,
    pub findings: Findings,
    /// The frames the findings' detections index: positions in the input of the
    /// readable frames.
    pub readable: Vec<usize>,
    /// The group's reference frame (a position in the input).
    pub reference: Option<usize>,
    /// The limits the group's frames were judged against.
    pub limits: Vec<Limit>,
}

/// [`judge_group`] with nothing kept: records that carry their stars, named by their
/// position, every frame placed afresh (the batch, and a check of the live rule).
pub fn judge_records(
    frames: &[&FrameRecord],
    rules: &[RuleSpec],
    site: Option<Site>,
) -> GroupJudgement {
    let held: Vec<Held> = frames
        .iter()
        .enumerate()
        .map(|(i, r)| Held {
            record: r,
            id: i as i64,
            known: None,
        })
        .collect();
    let with_stars = |i: usize| Ok::<_, std::convert::Infallible>(Cow::from(&frames[i].stars[..]));
    match judge_group(&held, with_stars, rules, site) {
        Ok(group) => group,
        Err(never) => match never {},
    }
}

/// Judge a whole night of one group (frames with their stars, any order), with earlier
/// nights' catalogues of the target for new sources: [`judge_records`], then what is
/// unusual.
pub fn judge_night(
    frames: &[&FrameRecord],
    earlier: &[EarlierNight],
    rules: &[RuleSpec],
    site: Option<Site>,
) -> NightJudgement {
    let group = judge_records(frames, rules, site);
    // What is unusual: the readable frames, placed on the same reference.
    let readable_idx: Vec<usize> = (0..frames.len()).filter(|&i| readable(frames[i])).collect();
    let inputs: Vec<FrameInput> = readable_idx
        .iter()
        .map(|&i| FrameInput::of(frames[i]))
        .collect();
    let placed: Vec<Option<Placement>> = readable_idx
        .iter()
        .map(|&i| group.frames[i].placement.clone())
        .collect();
    let losses: Vec<Option<f64>> = readable_idx
        .iter()
        .map(|&i| group.frames[i].transparency_loss_mag)
        .collect();
    let findings = match group
        .reference
        .and_then(|r| readable_idx.iter().position(|&i| i == r))
    {
        Some(r) => classify::analyse(&inputs, &placed, &losses, r, earlier),
        None => Findings::default(),
    };
    NightJudgement {
        frames: group.frames,
        findings,
        readable: readable_idx,
        reference: group.reference,
        limits: group.limits,
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

    /// A deterministic field of 60 stars (as `register`'s tests draw it), shifted by
    /// `(dx, dy)` pixels and `dimmed` mag fainter; every star well above SNR 20.
    fn field(dx: f64, dy: f64, dimmed: f64) -> Vec<StarRecord> {
        (0..60)
            .map(|i| {
                let f = i as f64;
                let flux = (1000.0 + (f * 37.0).rem_euclid(500.0)) * 10f64.powf(-0.4 * dimmed);
                StarRecord {
                    x: (f * 97.31).rem_euclid(900.0) + 50.0 + dx,
                    y: (f * 53.77 + f * f * 0.7).rem_euclid(700.0) + 40.0 + dy,
                    flux,
                    fwhm_px: 3.0,
                    eccentricity: 0.1,
                    snr: 100.0,
                    flux_err: flux / 100.0,
                    hfr_px: None,
                    fwhm_major_px: 3.0,
                    fwhm_minor_px: 3.0,
                    angle_deg: 0.0,
                    psf_flux: flux,
                    psf_model: crate::measure::psf::PsfModel::Gaussian,
                    moffat_beta: None,
                    peak_adu: f64::NAN,
                    blended: false,
                    ra_deg: None,
                    dec_deg: None,
                    rgb: None,
                }
            })
            .collect()
    }

    /// Frames with their stars, each named by its position (ids 0, 1, …), nothing known.
    fn held(frames: &[FrameRecord]) -> Vec<Held<'_>> {
        frames
            .iter()
            .enumerate()
            .map(|(i, record)| Held {
                record,
                id: i as i64,
                known: None,
            })
            .collect()
    }

    /// The model on frames that carry their stars.
    fn judged(frames: &[Held]) -> GroupJudgement {
        let stars = |i: usize| Ok::<_, ()>(Cow::from(&frames[i].record.stars[..]));
        judge_group(frames, stars, &[], None).unwrap()
    }

    #[test]
    fn a_frame_judged_live_is_judged_as_the_morning_judges_the_night_so_far() {
        // Soft focus in frame 3: relative to the medians of what exists.
        let frames: Vec<FrameRecord> = (0..6)
            .map(|k| {
                let mut f = frame(
                    &format!("f{k}"),
                    k as f64,
                    80,
                    if k == 3 { 4.2 } else { 3.0 },
                );
                f.stars = field(k as f64, -(k as f64), 0.0);
                f
            })
            .collect();
        let all = held(&frames);
        let morning = judged(&all);
        for i in 0..frames.len() {
            let live = judged(&all[..=i]);
            assert_eq!(
                live.frames[i].judgement.verdict, morning.frames[i].judgement.verdict,
                "frame {i}"
            );
        }
        assert!(morning.frames[3]
            .judgement
            .reasons
            .contains(&"fwhm_high".to_string()));
    }

    #[test]
    fn a_frame_soft_against_the_night_so_far_is_warned_live_and_kept_in_the_morning() {
        // The live rule: the group's medians are taken over the frames so far. Seeing
        // worsens from frame 3 on (FWHM 3.0 px, then 3.9 px for the rest of the night).
        // When frame 3 lands, the median of the night so far is 3.0 px and 3.9 px is 1.3 ×
        // that (warn above 1.25 ×); in the morning the night's median is 3.9 px, and frame
        // 3 is as sharp as most of the night.
        let frames: Vec<FrameRecord> = (0..10)
            .map(|k| {
                let mut f = frame(
                    &format!("f{k}"),
                    k as f64,
                    80,
                    if k < 3 { 3.0 } else { 3.9 },
                );
                f.stars = field(0.5 * k as f64, 0.0, 0.0);
                f
            })
            .collect();
        let all = held(&frames);
        let live = judged(&all[..=3]).frames.remove(3).judgement;
        let morning = judged(&all).frames.remove(3).judgement;
        assert_eq!(live.verdict, crate::rules::Verdict::Warn);
        assert_eq!(live.reasons, vec!["fwhm_high".to_string()]);
        assert_eq!(morning.verdict, crate::rules::Verdict::Ok);
        assert!(morning.reasons.is_empty(), "{:?}", morning.reasons);
    }

    #[test]
    fn known_placements_on_the_reference_record_are_kept_and_those_on_another_are_made_again() {
        // Frame 1 is the richest, so the reference; its stars 0.5 mag fainter than the
        // others'. Each frame shifted by a few pixels.
        let mut frames: Vec<FrameRecord> = (0..4)
            .map(|k| {
                let mut f = frame(&format!("f{k}"), k as f64, 80, 3.0);
                f.stars = field(2.0 * k as f64, 1.0, if k == 1 { 0.5 } else { 0.0 });
                f
            })
            .collect();
        frames[1].metrics.as_mut().unwrap().star_count = 90;
        let fresh = judged(&held(&frames));
        assert_eq!(fresh.reference, Some(1));
        assert_eq!(fresh.placed, vec![0, 1, 2, 3]);
        let kept: Vec<Placement> = fresh
            .frames
            .iter()
            .map(|j| j.placement.clone().unwrap())
            .collect();
        assert!(kept.iter().all(|p| p.reference == 1 && p.registered));
        let offset = kept[0].offset_mag.unwrap();
        assert!((offset + 0.5).abs() < 1e-9, "{offset}");

        // Known placements naming the reference's record are used again: the stars are
        // never asked for. A frame without one (just landed) is placed.
        let mut again = held(&frames);
        for (h, p) in again.iter_mut().zip(&kept).take(3) {
            h.known = Some(p);
        }
        let mut asked = Vec::new();
        let stars = |i: usize| {
            asked.push(i);
            Ok::<_, ()>(Cow::from(&frames[i].stars[..]))
        };
        let g = judge_group(&again, stars, &[], None).unwrap();
        assert_eq!(g.placed, vec![3]);
        assert_eq!(asked, vec![1, 3]);

        // The reference's file rewritten: a new record (id 7), its stars now as bright as
        // the others'. Every placement named the old record, so every one is made again
        // on the new stars, and the offsets follow them.
        let mut rewritten = frames.clone();
        rewritten[1].stars = field(2.0, 1.0, 0.0);
        let mut after = held(&rewritten);
        after[1].id = 7;
        for (h, p) in after.iter_mut().zip(&kept) {
            h.known = Some(p);
        }
        let g = judged(&after);
        assert_eq!(g.placed, vec![0, 1, 2, 3]);
        for j in &g.frames {
            let p = j.placement.as_ref().unwrap();
            assert_eq!(p.reference, 7);
            assert!(p.offset_mag.unwrap().abs() < 1e-9, "{p:?}");
        }
    }

    #[test]
    fn transparency_is_measured_from_the_clearest_frame() {
        let frames: Vec<FrameRecord> = (0..4)
            .map(|k| frame(&format!("f{k}"), k as f64, 80, 3.0))
            .collect();
        let placed = |o: f64| Placement {
            reference: 0,
            registered: true,
            offset_mag: Some(o),
            ..Default::default()
        };
        let p = [placed(0.0), placed(-0.1), placed(0.9), placed(0.2)];
        let mut known = held(&frames);
        for (h, p) in known.iter_mut().zip(&p) {
            h.known = Some(p);
        }
        // Every placement names the reference (frame 0, the earliest of equals): kept.
        let no_stars = |_: usize| -> Result<Cow<'static, [StarRecord]>, ()> { Err(()) };
        let j = judge_group(&known, no_stars, &[], None).unwrap().frames;
        let loss: Vec<f64> = j.iter().map(|f| f.transparency_loss_mag.unwrap()).collect();
        for (got, want) in loss.iter().zip([0.1, 0.0, 1.0, 0.3]) {
            assert!((got - want).abs() < 1e-12, "{loss:?}");
        }
        assert_eq!(j[2].judgement.verdict, crate::rules::Verdict::Reject);
    }
}
