//! One measured frame fitted to the sky: the catalogue stars around its pointing from
//! the index, then `astrometry` (the fit, or the check of the header's WCS) and
//! `astrometry::photometric` (zero point and depth). The cone query is the only I/O.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use crate::astrometry::{
    self, check, disagreement_px, photometric, solve, FrameStars, Hint, SkyStar, Solution,
};
use crate::catalogue::CatalogueStar;
use crate::frame::FrameHeader;
use crate::record::FrameRecord;
use crate::store::catalogue_index::CatalogueIndex;
use crate::store::StoreError;

/// Plate scales outside this range (arcsec per pixel) are header mistakes, not optics.
const MIN_SCALE_ARCSEC: f64 = 0.05;
const MAX_SCALE_ARCSEC: f64 = 600.0;
/// No frame's search needs a cone wider than this (degrees).
const MAX_CONE_DEG: f64 = 30.0;

/// What fitting frames to the sky needs from the configuration.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct SkyOptions {
    pub index: PathBuf,
    pub search_deg: f64,
    /// Frame filter → catalogue band.
    pub filter_bands: Vec<(String, String)>,
}

/// Julian year of a Unix time (J2000.0 = 2000-01-01T12:00 at Unix 946,728,000 s; the
/// difference between UTC and TT, about a minute, does not matter for proper motion).
pub fn julian_year(unix: f64) -> f64 {
    2000.0 + (unix - 946_728_000.0) / (365.25 * 86_400.0)
}

/// Where the frame points and at what scale, from its WCS or its pointing keywords and
/// optics.
/// Where to search the catalogue, from the header: its WCS, else its pointing and the
/// plate scale. The reason in words when the header does not say enough.
fn hint_of(
    m: &crate::record::Metrics,
    header: &FrameHeader,
    search_deg: f64,
) -> Result<Hint, String> {
    let centre = ((m.width as f64 + 1.0) / 2.0, (m.height as f64 + 1.0) / 2.0);
    let (ra, dec, scale) = match &header.wcs {
        Some(w) => {
            let (ra, dec) = w.pixel_to_sky(centre.0, centre.1);
            (ra, dec, w.scale_arcsec())
        }
        None => {
            let (Some(ra), Some(dec)) = (header.ra_deg, header.dec_deg) else {
                return Err("the header gives no pointing (RA and DEC, or a WCS) to search the catalogue around".into());
            };
            let Some(scale) = m.plate_scale_arcsec else {
                return Err("the plate scale is unknown (no FOCALLEN and XPIXSZ in the header, nor [optics] in the config)".into());
            };
            (ra, dec, scale)
        }
    };
    if !(ra.is_finite() && dec.is_finite() && (-90.0..=90.0).contains(&dec)) {
        return Err(format!(
            "the header's pointing ({ra}, {dec}) is not a place on the sky"
        ));
    }
    if !(MIN_SCALE_ARCSEC..=MAX_SCALE_ARCSEC).contains(&scale) {
        return Err(format!(
            "the plate scale {scale:.3}″/px is outside the {MIN_SCALE_ARCSEC} to {MAX_SCALE_ARCSEC}″/px the fit searches"
        ));
    }
    Ok(Hint {
        ra_deg: ra.rem_euclid(360.0),
        dec_deg: dec,
        scale_arcsec: scale,
        search_deg,
    })
}

/// The band that calibrates a filter: the configured one, else the band of the filter's
/// own name, else the catalogue's first.
fn band_for(filter: Option<&str>, opts: &SkyOptions, cat: &[CatalogueStar]) -> Option<String> {
    if let Some(f) = filter {
        if let Some((_, b)) = opts
            .filter_bands
            .iter()
            .find(|(k, _)| k.eq_ignore_ascii_case(f))
        {
            return Some(b.clone());
        }
        if cat
            .iter()
            .any(|s| s.mags.iter().any(|(b, _)| b.eq_ignore_ascii_case(f)))
        {
            return Some(f.to_string());
        }
    }
    cat.iter()
        .find_map(|s| s.mags.first())
        .map(|(b, _)| b.clone())
}

/// Fit `rec` to the sky and record the fit, the stars' positions, the zero point and
/// the depth. A frame that cannot be fitted keeps its header's WCS, if any, and its
/// metrics say why it was not fitted (`sky_fit_note`).
pub fn fit_record(
    rec: &mut FrameRecord,
    header: &FrameHeader,
    index: &CatalogueIndex,
    opts: &SkyOptions,
    gain_e_per_adu: Option<f64>,
) -> Result<(), StoreError> {
    let Some(m) = rec.metrics.as_mut() else {
        return Ok(());
    };
    let hint = match hint_of(m, header, opts.search_deg) {
        Ok(h) => h,
        Err(why) => {
            m.sky_fit_note = Some(why);
            return Ok(());
        }
    };
    let (w, h) = (m.width, m.height);
    let cone = index.cone_positions(
        hint.ra_deg,
        hint.dec_deg,
        astrometry::cone_radius_deg(&hint, w, h).min(MAX_CONE_DEG),
    )?;
    let year = rec.time_unix.map_or(2000.0, julian_year);
    let sky: Vec<SkyStar> = cone
        .iter()
        .map(|s| {
            let (ra, dec) = crate::catalogue::propagate(
                (s.ra_deg, s.dec_deg),
                (s.pm_ra_mas_yr, s.pm_dec_mas_yr),
                s.epoch,
                year,
            );
            SkyStar {
                ra_deg: ra,
                dec_deg: dec,
                mag: s.mag,
            }
        })
        .collect();
    let saturated: Vec<(f64, f64)> = rec
        .rejected
        .iter()
        .filter(|r| r.kind == crate::measure::RejectKind::Saturated)
        .map(|r| (r.x, r.y))
        .collect();
    let frame = FrameStars {
        stars: &rec.stars,
        saturated: &saturated,
        width: w,
        height: h,
    };
    let priors: Vec<&crate::frame::wcs::Wcs> = header.wcs.iter().collect();
    // Writers differ on whether XPIXSZ is binned already: a binned frame that does not
    // fit at the scale its header gives is tried at that scale over the binning.
    let binning = header.x_binning.unwrap_or(1.0);
    let found = solve(&frame, &sky, hint, &priors).or_else(|| {
        (binning > 1.0 && header.wcs.is_none()).then(|| {
            let hint = Hint {
                scale_arcsec: hint.scale_arcsec / binning,
                ..hint
            };
            solve(&frame, &sky, hint, &[])
        })?
    });
    let solution: Option<Solution> = match found {
        Some(mut sol) => {
            if let Some(hw) = &header.wcs {
                sol.fit.header_offset_px = Some(disagreement_px(&sol.fit.wcs, hw, w, h));
            }
            Some(sol)
        }
        None => header.wcs.as_ref().and_then(|hw| check(&frame, &sky, hw)),
    };
    let Some(sol) = solution else {
        let note = if sky.is_empty() {
            format!(
                "the catalogue holds no star within {:.2}° of the pointing ({:.4}, {:+.4})",
                astrometry::cone_radius_deg(&hint, w, h).min(MAX_CONE_DEG),
                hint.ra_deg,
                hint.dec_deg
            )
        } else {
            format!(
                "too few of the frame's {} stars matched the catalogue's {} around the pointing ({:.4}, {:+.4}) to rule out chance",
                rec.stars.len(),
                sky.len(),
                hint.ra_deg,
                hint.dec_deg
            )
        };
        if let Some(m) = rec.metrics.as_mut() {
            m.sky_fit_note = Some(note);
        }
        return Ok(());
    };
    // The matched stars' whole rows, for their magnitudes in every band.
    let matched = index.stars(
        &sol.pairs
            .iter()
            .map(|&(_, j)| cone[j].row)
            .collect::<Vec<_>>(),
    )?;
    let band = band_for(rec.filter.as_deref(), opts, &matched);
    let pairs: Vec<(f64, f64, f64)> = sol
        .pairs
        .iter()
        .zip(&matched)
        .filter_map(|(&(i, _), star)| {
            let s = &rec.stars[i];
            Some((s.flux, s.snr, star.mag(band.as_deref())?))
        })
        .collect();
    let exposure = rec.header.as_ref().and_then(|hf| hf.exposure_s);
    let zp = photometric::zero_point(&pairs, exposure);
    for s in &mut rec.stars {
        let (ra, dec) = sol.fit.wcs.pixel_to_sky(s.x, s.y);
        s.ra_deg = Some(ra);
        s.dec_deg = Some(dec);
    }
    rec.wcs = Some(sol.fit.wcs.clone());
    let m = rec.metrics.as_mut().expect("checked above");
    if let Some(zp) = &zp {
        m.zero_point_mag = Some(zp.mag);
        m.zero_point_err_mag = Some(zp.err_mag);
        m.zero_point_stars = zp.stars;
        m.zero_point_band = band.clone();
        m.limit_mag = m.fwhm_px.and_then(|fwhm| {
            photometric::limit_mag(photometric::DepthInputs {
                zero_point_mag: zp.mag,
                exposure_s: exposure,
                fwhm_px: fwhm,
                noise_adu: m.noise_adu,
                gain_e_per_adu,
            })
        });
    }
    if m.plate_scale_arcsec.is_none() {
        m.plate_scale_arcsec = Some(sol.fit.wcs.scale_arcsec());
        m.fwhm_arcsec = m.fwhm_px.map(|f| f * sol.fit.wcs.scale_arcsec());
    }
    m.sky_fit = Some(sol.fit);
    Ok(())
}

/// The nearest catalogue star to a sky position within `radius_arcsec`.
pub fn nearest(
    index: &CatalogueIndex,
    ra: f64,
    dec: f64,
    radius_arcsec: f64,
    year: f64,
) -> Result<Option<(CatalogueStar, f64)>, StoreError> {
    let near = index.cone(ra, dec, (radius_arcsec / 3600.0 + 0.01).min(1.0))?;
    Ok(near
        .into_iter()
        .map(|s| {
            let d = astrometry::separation_deg((ra, dec), s.position_at(year)) * 3600.0;
            (s, d)
        })
        .filter(|(_, d)| *d <= radius_arcsec)
        .min_by(|a, b| a.1.total_cmp(&b.1)))
}
