//! Trails: the streaks each frame's measurement found, as anomalies with their ends.

use super::{anomaly, Night};
use crate::night::detail::{Detail, TrailDetail};
use crate::night::{Anomaly, AnomalyKind, Detection};

pub(super) fn trails(night: &Night) -> Vec<Anomaly> {
    let frames = night.frames;
    let mut anomalies = Vec::new();
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
                Detail::Trail(TrailDetail {
                    trail: t.clone(),
                    start_radec_deg: ends.map(|e| [e.0 .0, e.0 .1]),
                    end_radec_deg: ends.map(|e| [e.1 .0, e.1 .1]),
                }),
            ));
        }
    }
    anomalies
}
