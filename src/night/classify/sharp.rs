//! Sharp detections (sharper than any PSF the frame shows): fixed on the detector across
//! frames whose pointing moved, a hot pixel; alone, a cosmic-ray hit, unless a star
//! stands there in the other frames (then it is that star, measured badly).

use super::{anomaly, Night};
use crate::night::detail::{Detail, HotPixelDetail, TransientDetail};
use crate::night::{Anomaly, AnomalyKind, Detection};

pub(super) fn hot_pixels_and_cosmic_rays(night: &Night) -> Vec<Anomaly> {
    let Night {
        frames,
        transforms,
        sources,
        persistent,
        ..
    } = night;
    let (n, radius) = (night.n, night.radius);
    let mut anomalies = Vec::new();
    // Sharp detections: fixed on the detector across frames whose pointing moved →
    // hot pixels; alone → cosmic rays.
    let mut sharp_groups: Vec<Vec<(usize, f64, f64)>> = Vec::new();
    for (i, f) in frames.iter().enumerate() {
        for &(x, y, peak) in &f.sharp {
            // Faint "sharp" fits are noise, not hits on the detector.
            if night.near_trail(i, x, y) || peak < 8.0 * f.noise_adu {
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
                detail: Detail::HotPixel(HotPixelDetail {
                    detector_x: x,
                    detector_y: y,
                    frames: frames_in.len(),
                    frames_total: n,
                }),
            });
        } else {
            for d in dets {
                // Where a star stands in the other frames, a "sharp" fit is that star
                // measured badly (undersampled, or hit), not a new event.
                let on_star = transforms[d.frame].is_some_and(|t| {
                    let (xr, yr) = t.apply((d.x, d.y));
                    sources
                        .iter()
                        .zip(persistent.iter())
                        .any(|(s, p)| *p && (s.xr - xr).hypot(s.yr - yr) < radius)
                });
                if !on_star {
                    anomalies.push(anomaly(
                        frames,
                        AnomalyKind::Transient,
                        vec![d],
                        Detail::Transient(TransientDetail::cosmic_ray()),
                    ));
                }
            }
        }
    }

    anomalies
}
