//! Tonight's catalogue and what earlier nights did not have: every persistent source with
//! its sky position (from each frame's WCS) and its magnitude on the reference frame's
//! scale, and what was seen but not measured (so a later night does not call it new);
//! the reference's limit and footprint; and the sources that an earlier night, deep
//! enough and looking there, did not see.

use super::ensemble::{mag, Ensemble};
use super::{anomaly, detections_of, Findings, Night};
use crate::measure::stats::median_f64;
use crate::night::detail::{Detail, NewSourceDetail};
use crate::night::tracks::{TrackPoint, Tracks};
use crate::night::{Anomaly, AnomalyKind, CatalogSource, Detection, EarlierNight};

/// The catalogue and the reference's limit and footprint, and the new sources.
pub(super) fn catalogue(
    night: &Night,
    ensemble: &Ensemble,
    earlier: &[EarlierNight],
) -> (Findings, Vec<Anomaly>) {
    let Night {
        frames,
        order,
        transforms,
        sources,
        persistent,
        limits,
        ..
    } = night;
    let (reference, fwhm, radius) = (night.reference, night.fwhm, night.radius);
    let zp = &ensemble.zp;
    let mut anomalies = Vec::new();
    // Tonight's catalogue (sky positions need a WCS) and new sources against earlier nights.
    let ref_wcs = frames[reference].wcs.as_ref();
    let ref_limit = limits[reference].map(|l| -2.5 * l.log10());
    let mut result = Findings {
        limit_mag: ref_limit,
        ..Default::default()
    };
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
            if !crate::night::inside_footprint(
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
                    Detail::NewSource(NewSourceDetail {
                        absent_on: e.night.clone(),
                        instrumental_mag: m,
                        earlier_limit_mag: e.limit_mag + offset,
                    }),
                ));
            }
        }
    }
    result.catalog = catalog.into_iter().map(|(_, c)| c).collect();
    // Also keep what was seen but not measured as a persistent star: sources found in
    // two or more frames, and extended objects seen twice or more. A later night must
    // not call these new.
    for (s, p) in sources.iter().zip(persistent.iter()) {
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
    for &i in order.iter() {
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
    (result, anomalies)
}
