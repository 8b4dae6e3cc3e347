//! The tangent plane and angles on the sky, as the fit uses them: a plain TAN WCS
//! (Calabretta & Greisen 2002), standard coordinates about a point, and the angle
//! between two positions.

use crate::frame::wcs::Wcs;

/// Angular distance, degrees (haversine; stable at small separations).
pub fn separation_deg(a: (f64, f64), b: (f64, f64)) -> f64 {
    let (ra1, d1) = (a.0.to_radians(), a.1.to_radians());
    let (ra2, d2) = (b.0.to_radians(), b.1.to_radians());
    let h =
        ((d2 - d1) / 2.0).sin().powi(2) + d1.cos() * d2.cos() * ((ra2 - ra1) / 2.0).sin().powi(2);
    (2.0 * h.sqrt().min(1.0).asin()).to_degrees()
}

/// A plain TAN WCS at `crval` with this CD and CRPIX.
pub(super) fn tan(crpix: [f64; 2], crval: (f64, f64), cd: [[f64; 2]; 2]) -> Wcs {
    Wcs {
        crpix,
        crval: [crval.0, crval.1],
        cd,
        lonpole: 180.0,
        sip: None,
    }
}

/// The tangent plane at `c` in degrees: standard coordinates (ξ, η) as "pixels".
pub(super) fn plane(c: (f64, f64)) -> Wcs {
    tan([0.0, 0.0], c, [[1.0, 0.0], [0.0, 1.0]])
}

/// Standard coordinates (ξ, η) in degrees of a sky position on the tangent plane at `c`.
pub(super) fn standard(c: (f64, f64), p: (f64, f64)) -> Option<(f64, f64)> {
    plane(c).sky_to_pixel(p.0, p.1)
}
