//! The TAN (+SIP) fit to matched stars: weighted least squares of the standard
//! coordinates on polynomials of the pixel offsets (Calabretta & Greisen 2002; SIP:
//! Shupe et al. 2005), with the tangent point moved until the constant terms vanish.

use super::projection::{plane, standard};
use crate::frame::wcs::{Sip, Wcs};
use crate::linalg::CholeskyDyn;

/// Polynomial terms (p, q) with p + q ≤ order, the linear ones first.
fn terms(order: u32) -> Vec<(u32, u32)> {
    let mut t = vec![(0, 0), (1, 0), (0, 1)];
    for total in 2..=order {
        for p in (0..=total).rev() {
            t.push((p, total - p));
        }
    }
    t
}

/// One matched star for the fit: pixel offset from CRPIX, sky position, weight.
pub(super) struct FitPoint {
    pub u: f64,
    pub v: f64,
    pub sky: (f64, f64),
    pub w: f64,
}

/// Weighted least-squares TAN (+SIP of `order` ≥ 2) fit with CRPIX fixed; CRVAL is
/// moved until the constant terms vanish. Returns the WCS and the weighted sum of
/// squared residuals in pixels² (for the information criterion).
pub(super) fn fit_tan(
    points: &[FitPoint],
    crpix: [f64; 2],
    start: (f64, f64),
    order: u32,
) -> Option<(Wcs, f64)> {
    let t = terms(order);
    // A polynomial needs three stars per term to be trusted; the linear fit, five.
    let needed = if order >= 2 { 3 * t.len() } else { t.len() + 2 };
    if points.len() < needed {
        return None;
    }
    // Scale the offsets so the normal equations stay well conditioned.
    let norm = points
        .iter()
        .map(|p| p.u.abs().max(p.v.abs()))
        .fold(1.0, f64::max);
    let mut crval = start;
    let mut coef = None;
    for _ in 0..8 {
        let nt = t.len();
        // The normal matrix, row by row.
        let mut m = vec![0.0; nt * nt];
        let mut bx = vec![0.0; t.len()];
        let mut by = vec![0.0; t.len()];
        for p in points {
            let (xi, eta) = standard(crval, p.sky)?;
            let (un, vn) = (p.u / norm, p.v / norm);
            let row: Vec<f64> = t
                .iter()
                .map(|&(a, b)| un.powi(a as i32) * vn.powi(b as i32))
                .collect();
            for i in 0..nt {
                for j in 0..nt {
                    m[i * nt + j] += p.w * row[i] * row[j];
                }
                bx[i] += p.w * row[i] * xi;
                by[i] += p.w * row[i] * eta;
            }
        }
        let normal = CholeskyDyn::new(&m, nt)?;
        let (cx, cy) = (normal.solve(&bx), normal.solve(&by));
        if !cx.iter().chain(&cy).all(|c| c.is_finite()) {
            return None;
        }
        // Done when the constant terms vanish: the coefficients then belong to this
        // reference point. Otherwise move it onto their sky position and fit again.
        if cx[0].hypot(cy[0]) < 1e-10 {
            coef = Some((cx, cy));
            break;
        }
        crval = plane(crval).pixel_to_sky(cx[0], cy[0]);
    }
    let (cx, cy) = coef?;
    let cd = [[cx[1] / norm, cx[2] / norm], [cy[1] / norm, cy[2] / norm]];
    let det = cd[0][0] * cd[1][1] - cd[0][1] * cd[1][0];
    if !det.is_finite() || det.abs() < 1e-30 {
        return None;
    }
    let sip = (order >= 2).then(|| {
        // Higher terms in intermediate coordinates → pixel offsets through CD⁻¹.
        let inv = [
            [cd[1][1] / det, -cd[0][1] / det],
            [-cd[1][0] / det, cd[0][0] / det],
        ];
        let mut a = Vec::new();
        let mut b = Vec::new();
        for (k, &(p, q)) in t.iter().enumerate().skip(3) {
            let s = norm.powi((p + q) as i32);
            let (gx, gy) = (cx[k] / s, cy[k] / s);
            a.push((p, q, inv[0][0] * gx + inv[0][1] * gy));
            b.push((p, q, inv[1][0] * gx + inv[1][1] * gy));
        }
        Sip { a, b }
    });
    // A distortion that moves the frame's corners by more than 3 % of their distance is
    // a polynomial bent to mismatches, not optics.
    if let Some(sip) = &sip {
        for (u, v) in [(norm, norm), (-norm, norm), (norm, -norm), (-norm, -norm)] {
            let (du, dv) = sip.apply(u, v);
            let shift = (du - u).hypot(dv - v);
            if shift.is_nan() || shift > 0.03 * norm * std::f64::consts::SQRT_2 {
                return None;
            }
        }
    }
    let wcs = Wcs {
        crpix,
        crval: [crval.0, crval.1],
        cd,
        lonpole: 180.0,
        sip,
    };
    let mut rss = 0.0;
    for p in points {
        let (x, y) = wcs.sky_to_pixel(p.sky.0, p.sky.1)?;
        rss += p.w * ((x - crpix[0] - p.u).powi(2) + (y - crpix[1] - p.v).powi(2));
    }
    Some((wcs, rss))
}

/// The fit of the order among `orders` that the Bayesian information criterion
/// (Schwarz 1978) prefers, with the weighted residuals scaled to a mean per-point
/// variance; `None` when no order fits.
pub(super) fn fit_best_order(
    points: &[FitPoint],
    crpix: [f64; 2],
    start: (f64, f64),
    orders: &[u32],
) -> Option<Wcs> {
    let n = (2 * points.len()) as f64;
    let total_w: f64 = points.iter().map(|p| p.w).sum::<f64>().max(1e-300);
    let mut best: Option<(f64, Wcs)> = None;
    for &order in orders {
        let Some((fit, rss)) = fit_tan(points, crpix, start, order) else {
            continue;
        };
        let k = (2 * terms(order).len()) as f64;
        let bic = n * (rss / total_w * points.len() as f64 / n).max(1e-12).ln() + k * n.ln();
        if best.as_ref().is_none_or(|(b, _)| bic < *b) {
            best = Some((bic, fit));
        }
    }
    best.map(|(_, wcs)| wcs)
}
