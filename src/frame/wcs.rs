//! Celestial WCS for the gnomonic (TAN) projection, with optional SIP distortion:
//! FITS pixel (1-based) ↔ (RA, Dec) in degrees. Pure maths on header values.
//!
//! Greisen & Calabretta (2002, A&A 395, 1061) for the linear part (CDi_j, or PCi_j with
//! CDELTi, or CDELTi with CROTA2); Calabretta & Greisen (2002, A&A 395, 1077) for the
//! zenithal projection and the spherical rotation; Shupe et al. (2005, ASP Conf. 347,
//! 491) for SIP. Other projections are not read: a frame with one has no WCS here.

use super::cards::{CardValue, Cards, HeaderCard};

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Wcs {
    pub crpix: [f64; 2],
    /// Reference sky position (RA, Dec), degrees.
    pub crval: [f64; 2],
    /// Linear transform: intermediate world coordinates (deg) = cd · (pixel − crpix).
    pub cd: [[f64; 2]; 2],
    /// Native longitude of the celestial pole (LONPOLE), degrees.
    pub lonpole: f64,
    pub sip: Option<Sip>,
}

/// Simple Imaging Polynomial: forward terms A, B (pixel offsets → corrected offsets).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Sip {
    pub a: Vec<(u32, u32, f64)>,
    pub b: Vec<(u32, u32, f64)>,
}

impl Sip {
    pub fn apply(&self, u: f64, v: f64) -> (f64, f64) {
        let poly = |terms: &[(u32, u32, f64)]| {
            terms
                .iter()
                .map(|&(p, q, c)| c * u.powi(p as i32) * v.powi(q as i32))
                .sum::<f64>()
        };
        (u + poly(&self.a), v + poly(&self.b))
    }
}

fn read_sip(cards: &[HeaderCard]) -> Option<Sip> {
    let terms = |prefix: &str| {
        let order = cards.number(&format!("{prefix}_ORDER"))? as u32;
        if order > 9 {
            return None;
        }
        let mut t = Vec::new();
        for p in 0..=order {
            for q in 0..=(order - p) {
                if let Some(c) = cards.number(&format!("{prefix}_{p}_{q}")) {
                    t.push((p, q, c));
                }
            }
        }
        Some(t)
    };
    Some(Sip {
        a: terms("A")?,
        b: terms("B")?,
    })
}

impl Wcs {
    /// Read a TAN WCS from header cards; `None` when absent, of another projection, or
    /// degenerate (a singular matrix).
    pub fn from_cards(cards: &[HeaderCard]) -> Option<Self> {
        let c1 = cards.text("CTYPE1")?;
        let c2 = cards.text("CTYPE2")?;
        let is_tan = |c: &str, axis: &str| c.starts_with(axis) && c.get(4..8) == Some("-TAN");
        let (swap, ok) = if is_tan(&c1, "RA--") && is_tan(&c2, "DEC-") {
            (false, true)
        } else if is_tan(&c2, "RA--") && is_tan(&c1, "DEC-") {
            (true, true)
        } else {
            (false, false)
        };
        if !ok || swap {
            // Transposed axes are legal but unseen from cameras; not supported.
            return None;
        }
        let crpix = [cards.number("CRPIX1")?, cards.number("CRPIX2")?];
        let crval = [cards.number("CRVAL1")?, cards.number("CRVAL2")?];
        let cd = if cards.card("CD1_1").is_some() || cards.card("CD2_2").is_some() {
            let g = |k: &str| cards.number(k).unwrap_or(0.0);
            [[g("CD1_1"), g("CD1_2")], [g("CD2_1"), g("CD2_2")]]
        } else {
            let cdelt1 = cards.number("CDELT1")?;
            let cdelt2 = cards.number("CDELT2")?;
            let has_pc = ["PC1_1", "PC1_2", "PC2_1", "PC2_2"]
                .iter()
                .any(|k| cards.card(k).is_some());
            let pc = if has_pc {
                let g = |k: &str, d: f64| cards.number(k).unwrap_or(d);
                [
                    [g("PC1_1", 1.0), g("PC1_2", 0.0)],
                    [g("PC2_1", 0.0), g("PC2_2", 1.0)],
                ]
            } else {
                // CROTA2 (the AIPS convention, Greisen & Calabretta 2002 §6.1).
                let rho = cards.number("CROTA2").unwrap_or(0.0).to_radians();
                let (s, c) = rho.sin_cos();
                let lambda = cdelt2 / cdelt1;
                [[c, -lambda * s], [s / lambda, c]]
            };
            [
                [cdelt1 * pc[0][0], cdelt1 * pc[0][1]],
                [cdelt2 * pc[1][0], cdelt2 * pc[1][1]],
            ]
        };
        let det = cd[0][0] * cd[1][1] - cd[0][1] * cd[1][0];
        if !det.is_finite() || det.abs() < 1e-30 {
            return None;
        }
        let lonpole = match cards.card("LONPOLE") {
            Some(CardValue::Number(v)) => *v,
            // For zenithal projections with δ0 = θ0 = 90° the default is 180°.
            _ => 180.0,
        };
        let sip = if c1.ends_with("-SIP") {
            read_sip(cards)
        } else {
            None
        };
        Some(Wcs {
            crpix,
            crval,
            cd,
            lonpole,
            sip,
        })
    }

    /// FITS pixel (1-based x, y) to (RA, Dec) in degrees, RA in [0, 360).
    pub fn pixel_to_sky(&self, x: f64, y: f64) -> (f64, f64) {
        let (mut u, mut v) = (x - self.crpix[0], y - self.crpix[1]);
        if let Some(sip) = &self.sip {
            (u, v) = sip.apply(u, v);
        }
        let xi = self.cd[0][0] * u + self.cd[0][1] * v;
        let eta = self.cd[1][0] * u + self.cd[1][1] * v;
        // Native spherical coordinates for TAN (C&G 2002 eqs. 12-14, 54).
        let r = xi.hypot(eta);
        let phi = xi.atan2(-eta);
        let theta = (180.0 / std::f64::consts::PI).atan2(r);
        let (alpha, delta) = native_to_celestial(phi, theta, self.crval, self.lonpole);
        (alpha.rem_euclid(360.0), delta)
    }

    /// (RA, Dec) in degrees to FITS pixel (1-based). `None` for the hemisphere the
    /// projection cannot show (90° or more from the reference point).
    pub fn sky_to_pixel(&self, ra: f64, dec: f64) -> Option<(f64, f64)> {
        let (phi, theta) = celestial_to_native(ra, dec, self.crval, self.lonpole);
        if theta <= 0.0 {
            return None;
        }
        let r = (180.0 / std::f64::consts::PI) / theta.tan();
        let xi = r * phi.sin();
        let eta = -r * phi.cos();
        let det = self.cd[0][0] * self.cd[1][1] - self.cd[0][1] * self.cd[1][0];
        let u = (self.cd[1][1] * xi - self.cd[0][1] * eta) / det;
        let v = (-self.cd[1][0] * xi + self.cd[0][0] * eta) / det;
        let (u, v) = match &self.sip {
            None => (u, v),
            Some(sip) => {
                // Invert the forward polynomial by fixed-point iteration; the
                // distortion is a small correction, so this converges quickly.
                let (mut pu, mut pv) = (u, v);
                for _ in 0..50 {
                    let (fu, fv) = sip.apply(pu, pv);
                    let (du, dv) = (u - fu, v - fv);
                    pu += du;
                    pv += dv;
                    if du.abs() < 1e-10 && dv.abs() < 1e-10 {
                        break;
                    }
                }
                (pu, pv)
            }
        };
        Some((u + self.crpix[0], v + self.crpix[1]))
    }

    /// Mean plate scale, arcsec per pixel, from the determinant of the linear part.
    pub fn scale_arcsec(&self) -> f64 {
        let det = self.cd[0][0] * self.cd[1][1] - self.cd[0][1] * self.cd[1][0];
        det.abs().sqrt() * 3600.0
    }
}

/// C&G 2002 eq. 2 with (φ, θ) in radians-free degrees handled internally.
fn native_to_celestial(phi: f64, theta: f64, crval: [f64; 2], lonpole: f64) -> (f64, f64) {
    let (ap, dp) = (crval[0].to_radians(), crval[1].to_radians());
    let pp = lonpole.to_radians();
    let th = theta;
    let dphi = phi - pp;
    let sin_d = th.sin() * dp.sin() + th.cos() * dp.cos() * dphi.cos();
    let y = -th.cos() * dphi.sin();
    let x = th.sin() * dp.cos() - th.cos() * dp.sin() * dphi.cos();
    let alpha = ap + y.atan2(x);
    (
        alpha.to_degrees(),
        sin_d.clamp(-1.0, 1.0).asin().to_degrees(),
    )
}

/// C&G 2002 eq. 5; returns (φ, θ) in radians.
fn celestial_to_native(ra: f64, dec: f64, crval: [f64; 2], lonpole: f64) -> (f64, f64) {
    let (a, d) = (ra.to_radians(), dec.to_radians());
    let (ap, dp) = (crval[0].to_radians(), crval[1].to_radians());
    let da = a - ap;
    let y = -d.cos() * da.sin();
    let x = d.sin() * dp.cos() - d.cos() * dp.sin() * da.cos();
    let phi = lonpole.to_radians() + y.atan2(x);
    let theta = (d.sin() * dp.sin() + d.cos() * dp.cos() * da.cos())
        .clamp(-1.0, 1.0)
        .asin();
    (phi, theta)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::frame::cards::parse_card;

    /// "KEY = value" written as a fixed-format card (keyword padded to 8 columns).
    fn cards(lines: &[&str]) -> Vec<HeaderCard> {
        lines
            .iter()
            .filter_map(|l| {
                let (k, v) = l.split_once('=')?;
                parse_card(&format!("{:<8}= {:<70}", k.trim(), v.trim()))
            })
            .collect()
    }

    fn wcs(lines: &[&str]) -> Wcs {
        Wcs::from_cards(&cards(lines)).unwrap()
    }

    const BASE: [&str; 6] = [
        "CTYPE1  = 'RA---TAN'",
        "CTYPE2  = 'DEC--TAN'",
        "CRPIX1  = 512.5",
        "CRPIX2  = 512.5",
        "CRVAL1  = 84.2",
        "CRVAL2  = 27.6",
    ];

    #[test]
    fn reference_pixel_maps_to_reference_value() {
        let mut c = BASE.to_vec();
        c.extend([
            "CD1_1 = -0.0004",
            "CD1_2 = 0.0",
            "CD2_1 = 0.0",
            "CD2_2 = 0.0004",
        ]);
        let w = wcs(&c);
        let (ra, dec) = w.pixel_to_sky(512.5, 512.5);
        assert!((ra - 84.2).abs() < 1e-12 && (dec - 27.6).abs() < 1e-12);
    }

    #[test]
    fn gnomonic_offset_along_declination_is_arctan() {
        // Analytic: with RA fixed, a pixel offset n along +Dec gives the native
        // angle atan(n · cdelt in radians) (gnomonic projection, C&G 2002 eq. 54).
        let mut c = BASE.to_vec();
        c.extend(["CDELT1 = -0.001", "CDELT2 = 0.001"]);
        let w = wcs(&c);
        let (ra, dec) = w.pixel_to_sky(512.5, 512.5 + 1000.0);
        let expected = 27.6 + (1.0f64.to_radians()).atan().to_degrees();
        assert!((ra - 84.2).abs() < 1e-9);
        assert!((dec - expected).abs() < 1e-9, "{dec} vs {expected}");
    }

    #[test]
    fn round_trip_with_rotation_and_near_the_pole() {
        let mut c = vec![
            "CTYPE1  = 'RA---TAN'",
            "CTYPE2  = 'DEC--TAN'",
            "CRPIX1  = 100.0",
            "CRPIX2  = 200.0",
            "CRVAL1  = 10.0",
            "CRVAL2  = 89.5",
        ];
        c.extend(["CDELT1 = -0.0005", "CDELT2 = 0.0005", "CROTA2 = 33.0"]);
        let w = wcs(&c);
        for &(x, y) in &[(1.0, 1.0), (2000.0, 50.0), (1500.0, 3000.0)] {
            let (ra, dec) = w.pixel_to_sky(x, y);
            let (x2, y2) = w.sky_to_pixel(ra, dec).unwrap();
            assert!(
                (x - x2).abs() < 1e-7 && (y - y2).abs() < 1e-7,
                "{x},{y} -> {x2},{y2}"
            );
        }
    }

    #[test]
    fn other_projections_are_not_read() {
        assert!(Wcs::from_cards(&cards(&["CTYPE1 = 'RA---SIN'", "CTYPE2 = 'DEC--SIN'"])).is_none());
    }
}
