//! Orphans, the sources seen in one or two frames: steady motion across three or more
//! frames makes a moving object (its rate from a least-squares line); a single detection,
//! PSF-shaped, where the frames just before and after covered the place deeply enough to
//! have seen it, a transient.

use super::{anomaly, Night};
use crate::measure::stats::median_f64;
use crate::night::detail::{Detail, MovingDetail, TransientDetail};
use crate::night::tracks::{covers, TrackPoint};
use crate::night::{Anomaly, AnomalyKind, Detection};

pub(super) fn moving_and_transients(night: &Night) -> Vec<Anomaly> {
    // Orphans: sources seen in one or two frames, in time order.
    let mut orphans: Vec<TrackPoint> = night
        .sources
        .iter()
        .zip(night.persistent.iter())
        .filter(|(s, p)| !**p && s.points.len() <= 2)
        .flat_map(|(s, _)| s.points.iter().copied())
        .filter(|p| p.snr >= 7.0 && !night.near_trail(p.frame, p.x, p.y))
        .collect();
    orphans.sort_by_key(|p| night.position_in_time[p.frame]);
    let mut anomalies = Vec::new();
    // The longest steady motion first, until none is left.
    let mut used = vec![false; orphans.len()];
    while let Some(members) = steadiest_motion(night, &orphans, &used) {
        for &k in &members {
            used[k] = true;
        }
        let pts: Vec<&TrackPoint> = members.iter().map(|&k| &orphans[k]).collect();
        anomalies.push(moving(night, &pts));
    }
    for (k, o) in orphans.iter().enumerate() {
        if !used[k] {
            anomalies.extend(transient(night, o));
        }
    }
    anomalies
}

/// The orphans not yet `used` that lie on the line through two of them (at most three
/// frames apart, moving a match radius to 150 px per frame), seen in three frames or
/// more: the line with the most members, or `None`.
fn steadiest_motion(night: &Night, orphans: &[TrackPoint], used: &[bool]) -> Option<Vec<usize>> {
    let (position_in_time, times, radius) = (&night.position_in_time, &night.times, night.radius);
    let mut best: Option<Vec<usize>> = None;
    for a in 0..orphans.len() {
        if used[a] {
            continue;
        }
        for b in a + 1..orphans.len() {
            if used[b] || orphans[b].frame == orphans[a].frame {
                continue;
            }
            let steps =
                position_in_time[orphans[b].frame].abs_diff(position_in_time[orphans[a].frame]);
            if steps > 3 {
                continue;
            }
            let dt = times[orphans[b].frame] - times[orphans[a].frame];
            if dt.abs() < 1e-6 {
                continue;
            }
            let v = (
                (orphans[b].xr - orphans[a].xr) / dt,
                (orphans[b].yr - orphans[a].yr) / dt,
            );
            let per_step = v.0.hypot(v.1) * dt.abs() / steps.max(1) as f64;
            if per_step < radius || per_step > 150.0 {
                continue;
            }
            let members: Vec<usize> = (0..orphans.len())
                .filter(|&k| !used[k])
                .filter(|&k| {
                    let o = &orphans[k];
                    let dtk = times[o.frame] - times[orphans[a].frame];
                    let px = orphans[a].xr + v.0 * dtk;
                    let py = orphans[a].yr + v.1 * dtk;
                    (o.xr - px).hypot(o.yr - py) < 2.5
                })
                .collect();
            let mut distinct: Vec<usize> = members.iter().map(|&k| orphans[k].frame).collect();
            distinct.sort_unstable();
            distinct.dedup();
            if distinct.len() >= 3 && best.as_ref().is_none_or(|b| members.len() > b.len()) {
                best = Some(members);
            }
        }
    }
    best
}

/// A moving object from its detections: the rate from a least-squares line through the
/// reference positions against time, on the sky through the WCS of the first and last
/// detections (without one, from the plate scale, and no direction on the sky then).
fn moving(night: &Night, pts: &[&TrackPoint]) -> Anomaly {
    let (frames, times) = (night.frames, &night.times);
    let tm: Vec<f64> = pts.iter().map(|p| times[p.frame]).collect();
    let mt = tm.iter().sum::<f64>() / tm.len() as f64;
    let fit = |v: Vec<f64>| {
        let mv = v.iter().sum::<f64>() / v.len() as f64;
        let num: f64 = tm.iter().zip(&v).map(|(t, x)| (t - mt) * (x - mv)).sum();
        let den: f64 = tm.iter().map(|t| (t - mt).powi(2)).sum();
        if den > 0.0 {
            num / den
        } else {
            0.0
        }
    };
    let vx = fit(pts.iter().map(|p| p.xr).collect());
    let vy = fit(pts.iter().map(|p| p.yr).collect());
    let dets: Vec<Detection> = pts
        .iter()
        .map(|p| Detection {
            frame: p.frame,
            x: p.x,
            y: p.y,
        })
        .collect();
    let (first, last) = (dets[0], dets[dets.len() - 1]);
    let rate_px_per_min = vx.hypot(vy) * 60.0;
    let rate = match (super::sky_of(frames, &first), super::sky_of(frames, &last)) {
        (Some(a), Some(b)) if times[last.frame] > times[first.frame] => {
            let dra = ((b.0 - a.0 + 540.0).rem_euclid(360.0) - 180.0) * a.1.to_radians().cos();
            let ddec = b.1 - a.1;
            let minutes = (times[last.frame] - times[first.frame]) / 60.0;
            Some((
                dra.hypot(ddec) * 3600.0 / minutes,
                Some(dra.atan2(ddec).to_degrees().rem_euclid(360.0)),
            ))
        }
        _ => frames[first.frame]
            .plate_scale_arcsec
            .map(|scale| (rate_px_per_min * scale, None)),
    };
    anomaly(
        frames,
        AnomalyKind::Moving,
        dets,
        Detail::Moving(MovingDetail {
            rate_arcsec_per_min: rate.map(|r| r.0),
            position_angle_deg: rate.and_then(|r| r.1),
            rate_px_per_min,
            frames: pts.len(),
            instrumental_mag: median_f64(
                &pts.iter()
                    .map(|p| -2.5 * p.flux.max(1e-30).log10())
                    .collect::<Vec<_>>(),
            ),
        }),
    )
}

/// A transient: one detection, PSF-shaped, where the frames just before and after
/// covered the place and were deep enough to have seen it; `None` for anything else.
fn transient(night: &Night, o: &TrackPoint) -> Option<Anomaly> {
    let Night {
        frames,
        order,
        position_in_time,
        transforms,
        sources,
        persistent,
        limits,
        ..
    } = night;
    let (n, fwhm, edge) = (night.n, night.fwhm, night.edge);
    let src_count = sources
        .iter()
        .filter(|s| {
            s.points
                .iter()
                .any(|p| p.frame == o.frame && p.x == o.x && p.y == o.y)
        })
        .map(|s| s.points.len())
        .next()
        .unwrap_or(1);
    if src_count != 1 || o.snr < 10.0 {
        return None;
    }
    let frame_fwhm = frames[o.frame].fwhm_px.unwrap_or(fwhm);
    if !(0.6 * frame_fwhm..=1.6 * frame_fwhm).contains(&o.fwhm_px) {
        return None;
    }
    // Right beside a persistent star it is more likely a piece of that star (split by
    // deblending in a poor frame) than a flash.
    let beside_star = sources
        .iter()
        .zip(persistent.iter())
        .any(|(s, p)| *p && (s.xr - o.xr).hypot(s.yr - o.yr) < 2.5 * frame_fwhm.max(fwhm));
    // Deblended out of a brighter star's light: a split of that star, most likely.
    if beside_star || o.blended {
        return None;
    }
    let pos = position_in_time[o.frame];
    let neighbours: Vec<usize> = [pos.checked_sub(1), Some(pos + 1)]
        .into_iter()
        .flatten()
        .filter(|&p| p < n)
        .map(|p| order[p])
        .collect();
    // Detected but set aside in a frame around it (saturated, on the edge, blended):
    // something was there all along.
    let there_around = neighbours.iter().any(|&j| {
        transforms[j].is_some_and(|t| {
            frames[j].set_aside.iter().any(|&p| {
                let (xr, yr) = t.apply(p);
                (xr - o.xr).hypot(yr - o.yr) < 2.5 * frame_fwhm.max(fwhm)
            })
        })
    });
    if there_around {
        return None;
    }
    let deep = !neighbours.is_empty()
        && neighbours.iter().all(|&j| {
            transforms[j]
                .is_some_and(|t| covers(&t, frames[j].width, frames[j].height, o.xr, o.yr, edge))
                && limits[j].is_some_and(|l| l < 0.5 * o.flux)
        });
    deep.then(|| {
        anomaly(
            frames,
            AnomalyKind::Transient,
            vec![Detection {
                frame: o.frame,
                x: o.x,
                y: o.y,
            }],
            Detail::Transient(TransientDetail {
                cosmic_ray: false,
                reason: "PSF-shaped, in one frame only",
                snr: Some(o.snr),
                flux_adu: Some(o.flux),
                fwhm_px: Some(o.fwhm_px),
                instrumental_mag: Some(-2.5 * o.flux.max(1e-30).log10()),
            }),
        )
    })
}
