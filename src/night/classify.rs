//! What is unusual in a night: follow every source across the frames (placed on the
//! group's reference by `judge`), and classify what does not behave as a star should
//! (see `AnomalyKind`); keep tonight's catalogue for later nights.

use serde_json::json;

use super::judge::Placement;
use super::register::Affine;
use super::tracks::{covers, Source, TrackPoint, Tracks};
use super::{Anomaly, AnomalyKind, CatalogSource, Detection, EarlierNight, FrameInput};

/// What a night holds besides its verdicts.
#[derive(Debug, Clone, Default)]
pub struct Findings {
    pub anomalies: Vec<Anomaly>,
    /// Tonight's persistent sources, for comparing later nights.
    pub catalog: Vec<CatalogSource>,
    /// Faintest instrumental magnitude reliably detected in the reference frame.
    pub limit_mag: Option<f64>,
    /// The reference frame's corners on the sky (RA, Dec degrees), when it has a WCS:
    /// what tonight could have seen.
    pub footprint: Vec<(f64, f64)>,
}
use crate::measure::stats::{median_f64, MAD_TO_SIGMA};

/// Faintest flux a frame detects reliably: 7 × the median flux-per-SNR of its fainter
/// stars (for background-limited stars SNR grows in proportion to flux).
fn limiting_flux(f: &FrameInput) -> Option<f64> {
    let ratios: Vec<f64> = f
        .stars
        .iter()
        .filter(|s| s.snr > 5.0 && s.snr < 40.0)
        .map(|s| s.flux / s.snr)
        .collect();
    median_f64(&ratios).map(|r| 7.0 * r)
}

fn robust_sigma(v: &[f64]) -> Option<f64> {
    let m = median_f64(v)?;
    let dev: Vec<f64> = v.iter().map(|x| (x - m).abs()).collect();
    median_f64(&dev).map(|d| d * MAD_TO_SIGMA)
}

/// Upper-tail probability of χ² with k degrees of freedom, by the cube-root normal
/// approximation of Wilson & Hilferty (1931, PNAS 17, 684) and the complementary error
/// function (Abramowitz & Stegun 7.1.26).
pub fn chi2_tail(chi2: f64, k: f64) -> f64 {
    if k <= 0.0 || chi2 <= 0.0 {
        return 1.0;
    }
    let z = ((chi2 / k).cbrt() - (1.0 - 2.0 / (9.0 * k))) / (2.0 / (9.0 * k)).sqrt();
    0.5 * erfc(z / std::f64::consts::SQRT_2)
}

fn erfc(x: f64) -> f64 {
    let t = 1.0 / (1.0 + 0.327_591_1 * x.abs());
    let y = (((((1.061_405_429 * t - 1.453_152_027) * t) + 1.421_413_741) * t - 0.284_496_736) * t
        + 0.254_829_592)
        * t
        * (-x * x).exp();
    if x >= 0.0 {
        y
    } else {
        2.0 - y
    }
}

fn sky_of(frames: &[FrameInput], d: &Detection) -> Option<(f64, f64)> {
    frames[d.frame]
        .wcs
        .as_ref()
        .map(|w| w.pixel_to_sky(d.x, d.y))
}

fn anomaly(
    frames: &[FrameInput],
    kind: AnomalyKind,
    detections: Vec<Detection>,
    detail: serde_json::Value,
) -> Anomaly {
    let sky: Vec<(f64, f64)> = detections
        .iter()
        .filter_map(|d| sky_of(frames, d))
        .collect();
    let (ra, dec) = match sky.first() {
        Some(&(ra0, _)) => {
            // Mean position, RA unwrapped around the first detection.
            let n = sky.len() as f64;
            let ra = sky
                .iter()
                .map(|s| ra0 + ((s.0 - ra0 + 540.0).rem_euclid(360.0) - 180.0))
                .sum::<f64>()
                / n;
            let dec = sky.iter().map(|s| s.1).sum::<f64>() / n;
            (Some(ra.rem_euclid(360.0)), Some(dec))
        }
        None => (None, None),
    };
    Anomaly {
        kind,
        ra_deg: ra,
        dec_deg: dec,
        detections,
        detail,
    }
}

/// Every detection of a source, as anomaly detections.
fn detections_of(s: &Source) -> Vec<Detection> {
    s.points
        .iter()
        .map(|p| Detection {
            frame: p.frame,
            x: p.x,
            y: p.y,
        })
        .collect()
}

fn distance_to_trail(t: &crate::measure::detect::Trail, x: f64, y: f64) -> f64 {
    let (dx, dy) = (t.x1 - t.x0, t.y1 - t.y0);
    let len2 = (dx * dx + dy * dy).max(1e-9);
    let u = (((x - t.x0) * dx + (y - t.y0) * dy) / len2).clamp(0.0, 1.0);
    (x - (t.x0 + u * dx)).hypot(y - (t.y0 + u * dy))
}

/// Classify what is unusual in the readable frames of one group, each placed on the
/// group's reference (`reference` indexes `frames`), with each frame's transparency loss.
pub fn analyse(
    frames: &[FrameInput],
    placements: &[Option<Placement>],
    transparency_loss: &[Option<f64>],
    reference: usize,
    earlier: &[EarlierNight],
) -> Findings {
    let n = frames.len();
    let mut result = Findings::default();
    if n == 0 {
        return result;
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| {
        frames[a]
            .time_unix
            .unwrap_or(0.0)
            .total_cmp(&frames[b].time_unix.unwrap_or(0.0))
            .then(a.cmp(&b))
    });
    let position_in_time: Vec<usize> = {
        let mut p = vec![0; n];
        for (k, &i) in order.iter().enumerate() {
            p[i] = k;
        }
        p
    };
    let transforms: Vec<Option<Affine>> = placements
        .iter()
        .map(|p| p.as_ref().and_then(|p| p.affine()))
        .collect();

    let fwhm =
        median_f64(&frames.iter().filter_map(|f| f.fwhm_px).collect::<Vec<_>>()).unwrap_or(3.0);
    let radius = (0.8 * fwhm).max(1.5);
    let mut tracks = Tracks::new(radius);
    for &i in &order {
        let Some(t) = transforms[i] else { continue };
        let points: Vec<TrackPoint> = frames[i]
            .stars
            .iter()
            .map(|s| {
                let (xr, yr) = t.apply((s.x, s.y));
                TrackPoint {
                    frame: i,
                    x: s.x,
                    y: s.y,
                    xr,
                    yr,
                    flux: s.flux,
                    flux_err: s.flux_err,
                    snr: s.snr,
                    fwhm_px: s.fwhm_px,
                    rgb: super::rgb(s),
                    blended: s.blended,
                }
            })
            .collect();
        tracks.add_frame(&points);
    }
    let sources = tracks.sources;
    let covering = |s: &Source, margin: f64| -> Vec<usize> {
        (0..n)
            .filter(|&i| {
                transforms[i].is_some_and(|t| {
                    covers(&t, frames[i].width, frames[i].height, s.xr, s.yr, margin)
                })
            })
            .collect()
    };
    let edge = 2.0 * fwhm;
    let persistent: Vec<bool> = sources
        .iter()
        .map(|s| {
            let cover = covering(s, edge).len();
            s.points.len() >= 3 && s.points.len() as f64 >= 0.5 * cover as f64
        })
        .collect();

    let mut anomalies = Vec::new();
    let limits: Vec<Option<f64>> = frames.iter().map(limiting_flux).collect();

    // Trails, as measured.
    for (i, f) in frames.iter().enumerate() {
        for t in f.trails {
            let mid = Detection {
                frame: i,
                x: 0.5 * (t.x0 + t.x1),
                y: 0.5 * (t.y0 + t.y1),
            };
            let ends = f
                .wcs
                .as_ref()
                .map(|w| (w.pixel_to_sky(t.x0, t.y0), w.pixel_to_sky(t.x1, t.y1)));
            anomalies.push(anomaly(
                frames,
                AnomalyKind::Trail,
                vec![mid],
                json!({
                    "x0": t.x0, "y0": t.y0, "x1": t.x1, "y1": t.y1,
                    "angle_deg": t.angle_deg, "width_px": t.width_px, "length_px": t.length_px,
                    "start_radec_deg": ends.map(|e| [e.0 .0, e.0 .1]),
                    "end_radec_deg": ends.map(|e| [e.1 .0, e.1 .1]),
                }),
            ));
        }
    }
    // Inside the streak's own band (its measured width) and a pixel beyond.
    let near_trail = |i: usize, x: f64, y: f64| {
        frames[i]
            .trails
            .iter()
            .any(|t| distance_to_trail(t, x, y) < 0.5 * t.width_px.max(fwhm) + 1.0)
    };

    // Sharp detections: fixed on the detector across frames whose pointing moved →
    // hot pixels; alone → cosmic rays.
    let mut sharp_groups: Vec<Vec<(usize, f64, f64)>> = Vec::new();
    for (i, f) in frames.iter().enumerate() {
        for &(x, y, peak) in &f.sharp {
            // Faint "sharp" fits are noise, not hits on the detector.
            if near_trail(i, x, y) || peak < 8.0 * f.noise_adu {
                continue;
            }
            match sharp_groups
                .iter_mut()
                .find(|g| (g[0].1 - x).abs() <= 1.5 && (g[0].2 - y).abs() <= 1.5)
            {
                Some(g) => {
                    if !g.iter().any(|p| p.0 == i) {
                        g.push((i, x, y));
                    }
                }
                None => sharp_groups.push(vec![(i, x, y)]),
            }
        }
    }
    for g in sharp_groups {
        let frames_in: Vec<usize> = g.iter().map(|p| p.0).collect();
        // Did the sky move under this detector position between these frames?
        let sky_moved = {
            let refs: Vec<(f64, f64)> = g
                .iter()
                .filter_map(|&(i, x, y)| transforms[i].map(|t| t.apply((x, y))))
                .collect();
            refs.iter()
                .any(|a| refs.iter().any(|b| (a.0 - b.0).hypot(a.1 - b.1) > 2.0))
        };
        let dets: Vec<Detection> = g
            .iter()
            .map(|&(frame, x, y)| Detection { frame, x, y })
            .collect();
        // A defect shows in most frames; two cosmic rays may share a pixel by chance.
        if frames_in.len() >= 3 && 2 * frames_in.len() >= n && sky_moved {
            let (x, y) = (g[0].1, g[0].2);
            anomalies.push(Anomaly {
                kind: AnomalyKind::HotPixel,
                ra_deg: None,
                dec_deg: None,
                detections: dets,
                detail: json!({"detector_x": x, "detector_y": y, "frames": frames_in.len(), "frames_total": n}),
            });
        } else {
            for d in dets {
                // Where a star stands in the other frames, a "sharp" fit is that star
                // measured badly (undersampled, or hit), not a new event.
                let on_star = transforms[d.frame].is_some_and(|t| {
                    let (xr, yr) = t.apply((d.x, d.y));
                    sources
                        .iter()
                        .zip(&persistent)
                        .any(|(s, p)| *p && (s.xr - xr).hypot(s.yr - yr) < radius)
                });
                if !on_star {
                    anomalies.push(anomaly(
                        frames,
                        AnomalyKind::Transient,
                        vec![d],
                        json!({"cosmic_ray": true, "reason": "sharper than the PSF"}),
                    ));
                }
            }
        }
    }

    // Orphans: sources seen in one or two frames. Steady motion across three or more
    // frames makes a moving object; a single deep-enough detection, a transient.
    let mut orphans: Vec<TrackPoint> = sources
        .iter()
        .zip(&persistent)
        .filter(|(s, p)| !**p && s.points.len() <= 2)
        .flat_map(|(s, _)| s.points.iter().copied())
        .filter(|p| p.snr >= 7.0 && !near_trail(p.frame, p.x, p.y))
        .collect();
    orphans.sort_by_key(|p| position_in_time[p.frame]);
    let times: Vec<f64> = frames
        .iter()
        .enumerate()
        .map(|(i, f)| f.time_unix.unwrap_or(i as f64 * 60.0))
        .collect();
    let mut used = vec![false; orphans.len()];
    loop {
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
        let Some(members) = best else { break };
        for &k in &members {
            used[k] = true;
        }
        let pts: Vec<&TrackPoint> = members.iter().map(|&k| &orphans[k]).collect();
        // Rate from a least-squares line through the reference positions against time.
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
        // Sky rate from the WCS of the first and last detections.
        let (first, last) = (dets[0], dets[dets.len() - 1]);
        let rate = match (sky_of(frames, &first), sky_of(frames, &last)) {
            (Some(a), Some(b)) if times[last.frame] > times[first.frame] => {
                let dra = ((b.0 - a.0 + 540.0).rem_euclid(360.0) - 180.0) * a.1.to_radians().cos();
                let ddec = b.1 - a.1;
                let minutes = (times[last.frame] - times[first.frame]) / 60.0;
                Some((
                    dra.hypot(ddec) * 3600.0 / minutes,
                    dra.atan2(ddec).to_degrees().rem_euclid(360.0),
                ))
            }
            _ => None,
        };
        anomalies.push(anomaly(
            frames,
            AnomalyKind::Moving,
            dets,
            json!({
                "rate_arcsec_per_min": rate.map(|r| r.0),
                "position_angle_deg": rate.map(|r| r.1),
                "rate_px_per_min": vx.hypot(vy) * 60.0,
                "frames": pts.len(),
                "instrumental_mag": median_f64(&pts.iter().map(|p| -2.5 * p.flux.max(1e-30).log10()).collect::<Vec<_>>()),
            }),
        ));
    }
    // Transients: one detection, PSF-shaped, where the frames just before and after
    // covered the place and were deep enough to have seen it.
    for (k, o) in orphans.iter().enumerate() {
        if used[k] {
            continue;
        }
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
            continue;
        }
        let frame_fwhm = frames[o.frame].fwhm_px.unwrap_or(fwhm);
        if !(0.6 * frame_fwhm..=1.6 * frame_fwhm).contains(&o.fwhm_px) {
            continue;
        }
        // Right beside a persistent star it is more likely a piece of that star (split
        // by deblending in a poor frame) than a flash.
        let beside_star = sources
            .iter()
            .zip(&persistent)
            .any(|(s, p)| *p && (s.xr - o.xr).hypot(s.yr - o.yr) < 2.5 * frame_fwhm.max(fwhm));
        // Deblended out of a brighter star's light: a split of that star, most likely.
        if beside_star || o.blended {
            continue;
        }
        let pos = position_in_time[o.frame];
        let neighbours: Vec<usize> = [pos.checked_sub(1), Some(pos + 1)]
            .into_iter()
            .flatten()
            .filter(|&p| p < n)
            .map(|p| order[p])
            .collect();
        let deep = !neighbours.is_empty()
            && neighbours.iter().all(|&j| {
                transforms[j].is_some_and(|t| {
                    covers(&t, frames[j].width, frames[j].height, o.xr, o.yr, edge)
                }) && limits[j].is_some_and(|l| l < 0.5 * o.flux)
            });
        if deep {
            anomalies.push(anomaly(
                frames,
                AnomalyKind::Transient,
                vec![Detection { frame: o.frame, x: o.x, y: o.y }],
                json!({"cosmic_ray": false, "reason": "PSF-shaped, in one frame only", "snr": o.snr, "flux_adu": o.flux, "fwhm_px": o.fwhm_px, "instrumental_mag": -2.5 * o.flux.max(1e-30).log10()}),
            ));
        }
    }

    // Differential photometry of persistent sources against the ensemble.
    let bright: Vec<usize> = (0..sources.len())
        .filter(|&s| {
            persistent[s]
                && median_f64(&sources[s].points.iter().map(|p| p.snr).collect::<Vec<_>>())
                    .unwrap_or(0.0)
                    >= 30.0
        })
        .collect();
    let mag = |p: &TrackPoint| -2.5 * p.flux.max(1e-30).log10();
    // 2.5 / ln 10 × relative flux error.
    let mag_err = |p: &TrackPoint| 1.085_736 * p.flux_err / p.flux.max(1e-30);
    let mut zp = vec![0.0f64; n];
    let mut mean_mag: Vec<f64> = bright
        .iter()
        .map(|&s| median_f64(&sources[s].points.iter().map(mag).collect::<Vec<_>>()).unwrap_or(0.0))
        .collect();
    for _ in 0..3 {
        for (i, z) in zp.iter_mut().enumerate() {
            let d: Vec<f64> = bright
                .iter()
                .zip(&mean_mag)
                .filter_map(|(&s, m)| sources[s].in_frame(i).map(|p| mag(p) - m))
                .collect();
            *z = median_f64(&d).unwrap_or(0.0);
        }
        for (k, &s) in bright.iter().enumerate() {
            mean_mag[k] = median_f64(
                &sources[s]
                    .points
                    .iter()
                    .map(|p| mag(p) - zp[p.frame])
                    .collect::<Vec<_>>(),
            )
            .unwrap_or(0.0);
        }
    }
    // Extra scatter of each frame beyond photon noise (cloud, seeing, focus).
    let extra: Vec<f64> = (0..n)
        .map(|i| {
            let (res, phot): (Vec<f64>, Vec<f64>) = bright
                .iter()
                .zip(&mean_mag)
                .filter_map(|(&s, m)| {
                    sources[s]
                        .in_frame(i)
                        .map(|p| (mag(p) - zp[i] - m, mag_err(p)))
                })
                .unzip();
            match (robust_sigma(&res), median_f64(&phot)) {
                (Some(r), Some(ph)) if res.len() >= 5 => (r * r - ph * ph).max(0.0),
                _ => 0.01,
            }
        })
        .collect();
    let trials = bright.len().max(1) as f64;
    // Points fit for photometry: not blended, not cut by the frame's edge, well above
    // the noise, and not from frames that lost much of their light.
    let usable = |p: &TrackPoint| {
        let f = &frames[p.frame];
        let margin = 2.5 * f.fwhm_px.unwrap_or(fwhm) + 3.0;
        !p.blended
            && p.snr >= 10.0
            && p.x > margin
            && p.y > margin
            && p.x < f.width as f64 - margin
            && p.y < f.height as f64 - margin
            && transparency_loss[p.frame].is_none_or(|l| l < 0.5)
            // In a soft frame the aperture (2.5 × FWHM) reaches faint neighbours that
            // sharp frames leave out; such frames are not used to judge variability.
            && f.fwhm_px.is_none_or(|w| w <= 1.3 * fwhm)
    };
    for (k, &s) in bright.iter().enumerate() {
        let pts: Vec<&TrackPoint> = sources[s].points.iter().filter(|p| usable(p)).collect();
        if pts.len() < 8 {
            continue;
        }
        let terms: Vec<(f64, f64)> = pts
            .iter()
            .map(|p| {
                let r = mag(p) - zp[p.frame] - mean_mag[k];
                let var = mag_err(p).powi(2) + extra[p.frame] + 0.003f64.powi(2);
                (r, var)
            })
            .collect();
        let chi2: f64 = terms.iter().map(|(r, v)| r * r / v).sum();
        // Robust to a few bad frames (a neighbour creeping into the aperture, a hit on
        // the star): the test must also pass without the worst tenth of the points. A real
        // variable deviates in many frames; a glitch in a few.
        let mut contributions: Vec<f64> = terms.iter().map(|(r, v)| r * r / v).collect();
        contributions.sort_by(|a, b| b.total_cmp(a));
        let drop = (terms.len() / 10).max(1);
        let worst: f64 = contributions[..drop].iter().sum();
        let dof = (terms.len() - 1) as f64;
        let fap = chi2_tail(chi2, dof) * trials;
        let fap_without_worst = chi2_tail(chi2 - worst, dof - drop as f64) * trials;
        let mut residuals: Vec<f64> = terms.iter().map(|t| t.0).collect();
        let pts = &pts;
        residuals.sort_by(f64::total_cmp);
        let q = |f: f64| residuals[((residuals.len() - 1) as f64 * f).round() as usize];
        let amplitude = q(0.95) - q(0.05);
        if fap < 1e-3 && fap_without_worst < 1e-3 && amplitude > 0.05 {
            let dets: Vec<Detection> = detections_of(&sources[s]);
            anomalies.push(anomaly(
                frames,
                AnomalyKind::Variable,
                dets,
                json!({
                    "amplitude_mag": amplitude,
                    "index": "reduced chi-square of differential magnitudes against the ensemble",
                    "chi2_reduced": chi2 / dof,
                    "false_alarm_probability": fap.min(1.0),
                    "frames": pts.len(),
                    "mean_instrumental_mag": mean_mag[k],
                    "instrumental_mag": mean_mag[k],
                    "light_curve": pts.iter().zip(&terms).map(|(p, t)| json!({
                        "time_unix": frames[p.frame].time_unix,
                        "delta_mag": t.0,
                        "error_mag": t.1.sqrt(),
                    })).collect::<Vec<_>>(),
                }),
            ));
        }
    }

    // Colour: one-shot-colour frames, persistent bright sources far from the field's locus.
    let colours: Vec<(usize, f64, f64)> = bright
        .iter()
        .filter_map(|&s| {
            let (c1, c2): (Vec<f64>, Vec<f64>) = sources[s]
                .points
                .iter()
                .filter_map(|p| {
                    let c = p.rgb?;
                    (c[0] > 0.0 && c[1] > 0.0 && c[2] > 0.0)
                        .then(|| (-2.5 * (c[0] / c[1]).log10(), -2.5 * (c[2] / c[1]).log10()))
                })
                .unzip();
            Some((s, median_f64(&c1)?, median_f64(&c2)?))
        })
        .collect();
    if colours.len() >= 8 {
        let c1: Vec<f64> = colours.iter().map(|c| c.1).collect();
        let c2: Vec<f64> = colours.iter().map(|c| c.2).collect();
        let (m1, m2) = (
            median_f64(&c1).unwrap_or(0.0),
            median_f64(&c2).unwrap_or(0.0),
        );
        let (s1, s2) = (
            robust_sigma(&c1).unwrap_or(1.0).max(0.02),
            robust_sigma(&c2).unwrap_or(1.0).max(0.02),
        );
        for &(s, a, b) in &colours {
            let (z1, z2) = ((a - m1) / s1, (b - m2) / s2);
            if z1.abs() > 5.0 || z2.abs() > 5.0 {
                let dets: Vec<Detection> = detections_of(&sources[s]);
                anomalies.push(anomaly(
                    frames,
                    AnomalyKind::Color,
                    dets,
                    json!({"instrumental_mag": median_f64(&sources[s].points.iter().map(mag).collect::<Vec<_>>()), "color_rg_mag": a, "color_bg_mag": b, "z_rg": z1, "z_bg": z2, "field_rg_mag": m1, "field_bg_mag": m2,
                           "index": "-2.5 log10(R/G) and -2.5 log10(B/G), robust z-score against the field"}),
                ));
            }
        }
    }

    // Tonight's catalogue (sky positions need a WCS) and new sources against earlier nights.
    let ref_wcs = frames[reference].wcs.as_ref();
    let ref_limit = limits[reference].map(|l| -2.5 * l.log10());
    result.limit_mag = ref_limit;
    // Median sky position of a source's detections (frame, x, y), from the WCS of each
    // frame; RA unwrapped around the first detection.
    let sky_median = |pts: &[(usize, f64, f64)]| -> Option<(f64, f64)> {
        let sky: Vec<(f64, f64)> = pts
            .iter()
            .filter_map(|&(i, x, y)| frames[i].wcs.as_ref().map(|w| w.pixel_to_sky(x, y)))
            .collect();
        let &(ra0, _) = sky.first()?;
        let ra = median_f64(
            &sky.iter()
                .map(|p| ra0 + ((p.0 - ra0 + 540.0).rem_euclid(360.0) - 180.0))
                .collect::<Vec<_>>(),
        )?;
        Some((
            ra.rem_euclid(360.0),
            median_f64(&sky.iter().map(|p| p.1).collect::<Vec<_>>())?,
        ))
    };
    // Every persistent source with a sky position (from the WCS of each frame it was
    // seen in) and its magnitude on the reference frame's scale.
    let catalog: Vec<(usize, CatalogSource)> = (0..sources.len())
        .filter(|&s| persistent[s])
        .filter_map(|s| {
            let pts: Vec<(usize, f64, f64)> = sources[s]
                .points
                .iter()
                .map(|p| (p.frame, p.x, p.y))
                .collect();
            let (ra, dec) = sky_median(&pts)?;
            let m = median_f64(
                &sources[s]
                    .points
                    .iter()
                    .map(|p| mag(p) - zp[p.frame] + zp[reference])
                    .collect::<Vec<_>>(),
            )?;
            Some((
                s,
                CatalogSource {
                    ra_deg: ra,
                    dec_deg: dec,
                    mag: Some(m),
                },
            ))
        })
        .collect();
    if let Some(w) = ref_wcs {
        let f = &frames[reference];
        let (wf, hf) = (f.width as f64, f.height as f64);
        result.footprint = [
            (0.5, 0.5),
            (wf + 0.5, 0.5),
            (wf + 0.5, hf + 0.5),
            (0.5, hf + 0.5),
        ]
        .iter()
        .map(|&(x, y)| w.pixel_to_sky(x, y))
        .collect();
    }
    let scale = ref_wcs.map_or(1.0, |w| w.scale_arcsec());
    let match_arcsec = (1.5 * fwhm * scale).max(2.0);
    let sep = |a: &CatalogSource, b: &CatalogSource| {
        let dra = ((a.ra_deg - b.ra_deg + 540.0).rem_euclid(360.0) - 180.0)
            * a.dec_deg.to_radians().cos();
        dra.hypot(a.dec_deg - b.dec_deg) * 3600.0
    };
    for e in earlier {
        // The zero-point offset between the nights from matched sources.
        let offsets: Vec<f64> = catalog
            .iter()
            .filter_map(|(_, c)| {
                e.sources
                    .iter()
                    .find(|o| sep(c, o) < match_arcsec)
                    .and_then(|o| Some(c.mag? - o.mag?))
            })
            .collect();
        if offsets.len() < 5 {
            continue;
        }
        let offset = median_f64(&offsets).unwrap_or(0.0);
        for (s, c) in &catalog {
            if e.sources.iter().any(|o| sep(c, o) < match_arcsec) {
                continue;
            }
            // A blend can be measured as one star one night and set aside as extended
            // the next: only isolated, clear sources count as new.
            let pts = &sources[*s].points;
            let isolated = pts.iter().filter(|p| !p.blended).count() * 2 > pts.len();
            let clear =
                median_f64(&pts.iter().map(|p| p.snr).collect::<Vec<_>>()).unwrap_or(0.0) >= 10.0;
            if !isolated || !clear {
                continue;
            }
            // Only where that night looked, away from its edges.
            if !super::inside_footprint(
                &e.footprint,
                c.ra_deg,
                c.dec_deg,
                3.0 * fwhm * scale / 3600.0,
            ) {
                continue;
            }
            // Would that night have seen it? Its limit, moved to tonight's scale.
            let Some(m) = c.mag else { continue };
            if m + 0.75 < e.limit_mag + offset {
                let dets: Vec<Detection> = detections_of(&sources[*s]);
                anomalies.push(anomaly(
                    frames,
                    AnomalyKind::NewSource,
                    dets,
                    json!({"absent_on": e.night, "instrumental_mag": m, "earlier_limit_mag": e.limit_mag + offset}),
                ));
            }
        }
    }
    result.catalog = catalog.into_iter().map(|(_, c)| c).collect();
    // Also keep what was seen but not measured as a persistent star: sources found in
    // two or more frames, and extended objects seen twice or more. A later night must
    // not call these new.
    for (s, p) in sources.iter().zip(&persistent) {
        if !*p && s.points.len() >= 2 {
            let pts: Vec<(usize, f64, f64)> =
                s.points.iter().map(|p| (p.frame, p.x, p.y)).collect();
            if let Some((ra, dec)) = sky_median(&pts) {
                result.catalog.push(CatalogSource {
                    ra_deg: ra,
                    dec_deg: dec,
                    mag: None,
                });
            }
        }
    }
    let mut extended = Tracks::new(radius.max(2.0));
    for &i in &order {
        let Some(t) = transforms[i] else { continue };
        let pts: Vec<TrackPoint> = frames[i]
            .extended
            .iter()
            .map(|&(x, y)| {
                let (xr, yr) = t.apply((x, y));
                TrackPoint {
                    frame: i,
                    x,
                    y,
                    xr,
                    yr,
                    flux: 0.0,
                    flux_err: 0.0,
                    snr: 0.0,
                    fwhm_px: 0.0,
                    rgb: None,
                    blended: false,
                }
            })
            .collect();
        extended.add_frame(&pts);
    }
    for s in extended.sources.iter().filter(|s| s.points.len() >= 2) {
        let pts: Vec<(usize, f64, f64)> = s.points.iter().map(|p| (p.frame, p.x, p.y)).collect();
        if let Some((ra, dec)) = sky_median(&pts) {
            result.catalog.push(CatalogSource {
                ra_deg: ra,
                dec_deg: dec,
                mag: None,
            });
        }
    }
    anomalies.sort_by_key(|a| a.kind);
    result.anomalies = anomalies;
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn variability_index_of_a_worked_series() {
        // Residuals 0.10, −0.10, 0.05, −0.05 mag with σ = 0.05 mag each (worked by hand):
        // χ² = 4 + 4 + 1 + 1 = 10 with 3 degrees of freedom; P(χ²₃ > 10) = 0.0186
        // (closed form for 3 d.o.f., 2Q(√x) + 2φ(√x)√x with Q the normal tail and φ its
        // density: 2·0.000783 + 2·0.002688·3.1623 = 0.0186; the identity from memory).
        let chi2: f64 = [0.10f64, -0.10, 0.05, -0.05]
            .iter()
            .map(|r| (r / 0.05).powi(2))
            .sum();
        assert!((chi2 - 10.0).abs() < 1e-12);
        assert!(
            (chi2_tail(chi2, 3.0) - 0.0186).abs() < 0.002,
            "{}",
            chi2_tail(chi2, 3.0)
        );
    }

    #[test]
    fn chi_square_tail_matches_tables() {
        // χ²₀.₉₅ with 10 d.o.f. is 18.307 and χ²₀.₉₉₉ with 20 d.o.f. is 45.315
        // (standard tables, e.g. Abramowitz & Stegun table 26.8).
        assert!((chi2_tail(18.307, 10.0) - 0.05).abs() < 0.002);
        assert!((chi2_tail(45.315, 20.0) - 0.001).abs() < 0.0003);
        assert!((chi2_tail(10.0, 10.0) - 0.4405).abs() < 0.01);
    }
}
