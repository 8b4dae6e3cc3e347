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
use crate::night::FrameInput;
use crate::night::{Anomaly, AnomalyKind, CatalogSource, Detection, EarlierNight};

/// The catalogue and the reference's limit and footprint, and the new sources.
pub(super) fn catalogue(
    night: &Night,
    ensemble: &Ensemble,
    earlier: &[EarlierNight],
) -> (Findings, Vec<Anomaly>) {
    let reference = night.reference;
    // Tonight's catalogue (sky positions need a WCS) and new sources against earlier nights.
    let catalog = persistent_sources(night, &ensemble.zp);
    let anomalies = new_sources(night, &catalog, earlier);
    let mut result = Findings {
        limit_mag: night.limits[reference].map(|l| -2.5 * l.log10()),
        footprint: footprint(night),
        catalog: catalog.into_iter().map(|(_, c)| c).collect(),
        ..Default::default()
    };
    result.catalog.extend(seen_not_measured(night));
    (result, anomalies)
}

/// Median sky position of a source's detections (frame, x, y), from the WCS of each
/// frame; RA unwrapped around the first detection.
fn sky_median(frames: &[FrameInput], pts: &[(usize, f64, f64)]) -> Option<(f64, f64)> {
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
}

/// Every persistent source (with its index) with a sky position (from the WCS of each
/// frame it was seen in) and its magnitude on the reference frame's scale (`zp`: each
/// frame's zero-point offset).
fn persistent_sources(night: &Night, zp: &[f64]) -> Vec<(usize, CatalogSource)> {
    let (sources, reference) = (&night.sources, night.reference);
    (0..sources.len())
        .filter(|&s| night.persistent[s])
        .filter_map(|s| {
            let pts: Vec<(usize, f64, f64)> = sources[s]
                .points
                .iter()
                .map(|p| (p.frame, p.x, p.y))
                .collect();
            let (ra, dec) = sky_median(night.frames, &pts)?;
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
        .collect()
}

/// The reference frame's corners on the sky, when it has a WCS: what tonight could see.
fn footprint(night: &Night) -> Vec<(f64, f64)> {
    let f = &night.frames[night.reference];
    let Some(w) = f.wcs.as_ref() else {
        return Vec::new();
    };
    let (wf, hf) = (f.width as f64, f.height as f64);
    [
        (0.5, 0.5),
        (wf + 0.5, 0.5),
        (wf + 0.5, hf + 0.5),
        (0.5, hf + 0.5),
    ]
    .iter()
    .map(|&(x, y)| w.pixel_to_sky(x, y))
    .collect()
}

/// Tonight's persistent sources that an earlier night, deep enough and looking there,
/// did not see.
fn new_sources(
    night: &Night,
    catalog: &[(usize, CatalogSource)],
    earlier: &[EarlierNight],
) -> Vec<Anomaly> {
    let (frames, sources, fwhm) = (night.frames, &night.sources, night.fwhm);
    let scale = frames[night.reference]
        .wcs
        .as_ref()
        .map_or(1.0, |w| w.scale_arcsec());
    let match_arcsec = (1.5 * fwhm * scale).max(2.0);
    let sep = |a: &CatalogSource, b: &CatalogSource| {
        let dra = ((a.ra_deg - b.ra_deg + 540.0).rem_euclid(360.0) - 180.0)
            * a.dec_deg.to_radians().cos();
        dra.hypot(a.dec_deg - b.dec_deg) * 3600.0
    };
    let mut anomalies = Vec::new();
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
        for (s, c) in catalog {
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
    anomalies
}

/// What was seen but not measured as a persistent star, without a magnitude: sources
/// found in two or more frames, and extended objects seen twice or more. A later night
/// must not call these new.
fn seen_not_measured(night: &Night) -> Vec<CatalogSource> {
    let Night {
        frames,
        order,
        transforms,
        sources,
        persistent,
        ..
    } = night;
    let mut extended = Tracks::new(night.radius.max(2.0));
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
    let unmeasured = sources
        .iter()
        .zip(persistent.iter())
        .filter(|(s, p)| !**p && s.points.len() >= 2)
        .map(|(s, _)| s);
    let extended = extended.sources.iter().filter(|s| s.points.len() >= 2);
    unmeasured
        .chain(extended)
        .filter_map(|s| {
            let pts: Vec<(usize, f64, f64)> =
                s.points.iter().map(|p| (p.frame, p.x, p.y)).collect();
            let (ra, dec) = sky_median(frames, &pts)?;
            Some(CatalogSource {
                ra_deg: ra,
                dec_deg: dec,
                mag: None,
            })
        })
        .collect()
}
