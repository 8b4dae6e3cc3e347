//! The whole search for a frame's place on the sky: the WCSs already at hand first (the
//! header's), then the tiles around the pointing, every hypothesis counted for the
//! decision rule.

use super::refine::refine;
use super::tiles::Tiles;
use super::{FrameStars, Hint, SkyStar, Solution, MIN_MATCHED};
use crate::frame::wcs::Wcs;
use crate::night::register::Placed;

/// Fit the frame to the sky. `cat` holds the catalogue stars around the hint (out to
/// [`super::cone_radius_deg`]), at the frame's epoch; `priors` are WCSs to try first
/// (the header's).
pub fn solve<S: Placed>(
    frame: &FrameStars<'_, S>,
    cat: &[SkyStar],
    hint: Hint,
    priors: &[&Wcs],
) -> Option<Solution> {
    if frame.stars.len() < MIN_MATCHED || cat.len() < MIN_MATCHED || hint.scale_arcsec <= 0.0 {
        return None;
    }
    let tiles = Tiles::plan(&hint, frame);
    // A WCS already at hand is tried first, as one hypothesis each.
    let trials = priors.len() as f64 + tiles.hypotheses();
    for prior in priors {
        if let Some(sol) = refine(frame, cat, prior, trials) {
            return Some(sol);
        }
    }
    tiles.search(frame, cat, trials)
}

#[cfg(test)]
mod tests {
    use super::super::disagreement_px;
    use super::super::projection::{plane, tan};
    use super::*;
    use crate::frame::wcs::Sip;
    use crate::night::register::Point;

    /// A deterministic pseudo-random sequence in [0, 1) (SplitMix64).
    fn rng(seed: u64) -> impl FnMut() -> f64 {
        let mut s = seed;
        move || {
            s = s.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = s;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
        }
    }

    fn sky_field(seed: u64, centre: (f64, f64), radius: f64, n: usize) -> Vec<SkyStar> {
        let mut r = rng(seed);
        let w = plane(centre);
        (0..n)
            .map(|_| {
                let (x, y) = ((r() * 2.0 - 1.0) * radius, (r() * 2.0 - 1.0) * radius);
                let (ra, dec) = w.pixel_to_sky(x, y);
                SkyStar {
                    ra_deg: ra,
                    dec_deg: dec,
                    mag: Some(9.0 + 7.0 * r().powf(0.4)),
                }
            })
            .collect()
    }

    fn observe(truth: &Wcs, cat: &[SkyStar], w: usize, h: usize) -> Vec<Point> {
        cat.iter()
            .filter_map(|s| {
                let (x, y) = truth.sky_to_pixel(s.ra_deg, s.dec_deg)?;
                let inside = x > 1.0 && y > 1.0 && x < w as f64 && y < h as f64;
                let m = s.mag?;
                let flux = 1e6 * 10f64.powf(-0.4 * (m - 9.0));
                (inside && m < 15.0).then_some(Point {
                    x,
                    y,
                    flux,
                    snr: flux.sqrt(),
                })
            })
            .collect()
    }

    /// The stars a `w` × `h` frame of WCS `truth` sees of `sky`, and that frame solved
    /// against `cat` from `hint`.
    fn solve_seen(
        truth: &Wcs,
        sky: &[SkyStar],
        cat: &[SkyStar],
        (w, h): (usize, usize),
        hint: Hint,
    ) -> (usize, Option<Solution>) {
        let stars = observe(truth, sky, w, h);
        let frame = FrameStars {
            stars: &stars,
            saturated: &[],
            width: w,
            height: h,
        };
        (stars.len(), solve(&frame, cat, hint, &[]))
    }

    /// A hint at `centre` with this scale and search radius.
    fn hint(centre: (f64, f64), scale_arcsec: f64, search_deg: f64) -> Hint {
        Hint {
            ra_deg: centre.0,
            dec_deg: centre.1,
            scale_arcsec,
            search_deg,
        }
    }

    #[test]
    fn solves_a_field_with_a_hint_a_degree_off_and_its_scale_8_percent_off() {
        let centre = (84.25, 27.6);
        let cat = sky_field(7, centre, 2.0, 9000);
        let truth = tan([512.5, 384.5], centre, crate::sim::base_cd(1.94, 33.0));
        let off = hint((centre.0 + 0.8, centre.1 - 0.5), 1.94 * 1.08, 1.2);
        let (seen, sol) = solve_seen(&truth, &cat, &cat, (1024, 768), off);
        assert!(seen > 40, "{seen}");
        let sol = sol.expect("solved");
        assert!(sol.fit.matched >= seen * 9 / 10, "{}", sol.fit.matched);
        assert!(disagreement_px(&truth, &sol.fit.wcs, 1024, 768) < 1e-3);
        assert!(sol.fit.chance_log10 < -50.0, "{}", sol.fit.chance_log10);
    }

    #[test]
    fn a_mirrored_frame_is_solved_with_its_parity() {
        let centre = (200.0, -41.0);
        let cat = sky_field(11, centre, 1.0, 3000);
        let mut cd = crate::sim::base_cd(2.5, -70.0);
        cd[0][0] = -cd[0][0];
        cd[1][0] = -cd[1][0];
        let truth = tan([400.5, 300.5], centre, cd);
        let (_, sol) = solve_seen(&truth, &cat, &cat, (800, 600), hint(centre, 2.5, 0.5));
        let sol = sol.expect("solved");
        assert!(disagreement_px(&truth, &sol.fit.wcs, 800, 600) < 1e-3);
    }

    #[test]
    fn no_fit_is_accepted_on_a_field_of_another_part_of_the_sky() {
        let mut accepted = 0;
        for seed in 0..12u64 {
            let centre = (30.0 * seed as f64, 10.0);
            let cat = sky_field(100 + seed, centre, 1.0, 3000);
            let other = sky_field(500 + seed, centre, 1.0, 3000);
            let truth = tan([400.5, 300.5], centre, crate::sim::base_cd(2.0, 10.0));
            let (_, sol) = solve_seen(&truth, &other, &cat, (800, 600), hint(centre, 2.0, 0.5));
            accepted += usize::from(sol.is_some());
        }
        assert_eq!(accepted, 0);
    }

    #[test]
    fn sip_distortion_is_fitted_where_the_residuals_call_for_it() {
        let centre = (84.25, 27.6);
        let cat = sky_field(3, centre, 1.2, 12000);
        let mut truth = tan([512.5, 512.5], centre, crate::sim::base_cd(1.5, 5.0));
        // Barrel-like distortion: ~3 px at the corners.
        truth.sip = Some(Sip {
            a: vec![(3, 0, 4e-9), (1, 2, 4e-9)],
            b: vec![(2, 1, 4e-9), (0, 3, 4e-9)],
        });
        let (_, sol) = solve_seen(&truth, &cat, &cat, (1024, 1024), hint(centre, 1.5, 0.3));
        let sol = sol.expect("solved");
        assert!(sol.fit.wcs.sip.is_some());
        let off = disagreement_px(&truth, &sol.fit.wcs, 1024, 1024);
        assert!(off < 0.05, "{off}");
    }
}
