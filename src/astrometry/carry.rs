//! A reference frame's fit carried to a frame registered on it, so a frame that did not
//! fit on its own (clouds, a short exposure) still has a WCS.

use super::fit::{fit_tan, FitPoint};
use crate::frame::wcs::Wcs;

/// A reference frame's WCS carried to a frame registered on it: `frame → reference` is
/// the affine transform p_ref = A·p + t. Exact for TAN; for a SIP fit the polynomial
/// stays in the reference's pixel grid, so it is re-fitted on points of that grid.
pub fn carry(
    reference: &Wcs,
    a: [[f64; 2]; 2],
    t: [f64; 2],
    width: usize,
    height: usize,
) -> Option<Wcs> {
    if reference.sip.is_none() {
        // p_ref − crpix_ref = A·(p − p0) with p0 = A⁻¹(crpix_ref − t): the same tangent
        // point, CD·A and CRPIX p0.
        let det = a[0][0] * a[1][1] - a[0][1] * a[1][0];
        if !det.is_finite() || det.abs() < 1e-12 {
            return None;
        }
        let d = [reference.crpix[0] - t[0], reference.crpix[1] - t[1]];
        let cd = reference.cd;
        return Some(Wcs {
            crpix: [
                (a[1][1] * d[0] - a[0][1] * d[1]) / det,
                (-a[1][0] * d[0] + a[0][0] * d[1]) / det,
            ],
            cd: [
                [
                    cd[0][0] * a[0][0] + cd[0][1] * a[1][0],
                    cd[0][0] * a[0][1] + cd[0][1] * a[1][1],
                ],
                [
                    cd[1][0] * a[0][0] + cd[1][1] * a[1][0],
                    cd[1][0] * a[0][1] + cd[1][1] * a[1][1],
                ],
            ],
            ..reference.clone()
        });
    }
    let map = |x: f64, y: f64| {
        (
            a[0][0] * x + a[0][1] * y + t[0],
            a[1][0] * x + a[1][1] * y + t[1],
        )
    };
    let crpix = [(width as f64 + 1.0) / 2.0, (height as f64 + 1.0) / 2.0];
    let mut points = Vec::new();
    for i in 0..=10 {
        for j in 0..=10 {
            let x = 0.5 + width as f64 * f64::from(i) / 10.0;
            let y = 0.5 + height as f64 * f64::from(j) / 10.0;
            let (rx, ry) = map(x, y);
            points.push(FitPoint {
                u: x - crpix[0],
                v: y - crpix[1],
                sky: reference.pixel_to_sky(rx, ry),
                w: 1.0,
            });
        }
    }
    let (rx, ry) = map(crpix[0], crpix[1]);
    fit_tan(&points, crpix, reference.pixel_to_sky(rx, ry), 3).map(|(w, _)| w)
}

#[cfg(test)]
mod tests {
    use super::super::projection::{separation_deg, tan};
    use super::*;

    #[test]
    fn carrying_a_fit_through_a_registration_is_exact_for_tan() {
        let reference = tan(
            [512.5, 384.5],
            (84.25, 27.6),
            crate::sim::base_cd(1.94, 12.0),
        );
        let (s, c) = 0.7f64.to_radians().sin_cos();
        let a = [[c, -s], [s, c]];
        let t = [14.5, -9.25];
        let carried = carry(&reference, a, t, 1024, 768).unwrap();
        for (x, y) in [(1.0, 1.0), (1024.0, 768.0), (300.0, 700.0)] {
            let p = (
                a[0][0] * x + a[0][1] * y + t[0],
                a[1][0] * x + a[1][1] * y + t[1],
            );
            let d = separation_deg(carried.pixel_to_sky(x, y), reference.pixel_to_sky(p.0, p.1));
            assert!(d * 3600.0 < 1e-6, "{d}");
        }
    }
}
