//! The search over tiles of sky around the pointing: the catalogue stars of each tile
//! projected as the frame would see them (both parities), registered onto the frame's
//! stars (`night::register`), and each registration refined into a fit. Tiles run from
//! the hint outward in rings half a frame apart, so a pointing off by a degree still
//! finds its field.

use std::collections::HashMap;

use super::carry::carry;
use super::projection::{separation_deg, tan};
use super::refine::refine;
use super::{brightness, FrameStars, Hint, SkyStar, Solution, MIN_MATCHED};
use crate::frame::wcs::Wcs;
use crate::night::register::{register_brightest, Placed, Point};

/// Searches one tile makes: two parities, each with the 40 and then the 80 brightest.
const SEARCHES_PER_TILE: usize = 4;
/// Hypotheses one consensus search tries (pairs of its strongest 25 correspondences).
const HYPOTHESES_PER_SEARCH: f64 = 300.0;
/// Rings of tiles around the pointing at most (a pointing further off than 12
/// half-frames is not found).
const MAX_RINGS: f64 = 12.0;

/// The tiles a search visits, in order, and the geometry they share.
pub(super) struct Tiles {
    centres: Vec<(f64, f64)>,
    /// Plate scale, degrees per pixel.
    scale: f64,
    /// Half the frame's diagonal, degrees.
    half_diag: f64,
    crpix: [f64; 2],
    /// The hint's tangent plane, in degrees.
    hint_wcs: Wcs,
}

impl Tiles {
    /// The tiles for a frame of this size around the hint: the hint, then rings outward
    /// half a frame apart, out to the search radius.
    pub(super) fn plan<S: Placed>(hint: &Hint, frame: &FrameStars<'_, S>) -> Self {
        let s = hint.scale_arcsec / 3600.0;
        let (w, h) = (frame.width as f64, frame.height as f64);
        let crpix = frame.centre();
        let hint_wcs = tan(
            crpix,
            (hint.ra_deg, hint.dec_deg),
            [[-1.0, 0.0], [0.0, 1.0]],
        );
        let step = (0.5 * w.min(h) * s).max(1e-6);
        let rings = (hint.search_deg / step).ceil().clamp(0.0, MAX_RINGS) as i32;
        let mut centres = vec![(hint.ra_deg, hint.dec_deg)];
        for ring in 1..=rings {
            for gx in -ring..=ring {
                for gy in -ring..=ring {
                    if gx.abs().max(gy.abs()) != ring {
                        continue;
                    }
                    let (dx, dy) = (f64::from(gx) * step, f64::from(gy) * step);
                    if dx.hypot(dy) > hint.search_deg + step {
                        continue;
                    }
                    centres.push(hint_wcs.pixel_to_sky(crpix[0] - dx, crpix[1] + dy));
                }
            }
        }
        Tiles {
            centres,
            scale: s,
            half_diag: 0.5 * w.hypot(h) * s,
            crpix,
            hint_wcs,
        }
    }

    /// Hypotheses the whole search may try, for the decision rule.
    pub(super) fn hypotheses(&self) -> f64 {
        self.centres.len() as f64 * SEARCHES_PER_TILE as f64 * HYPOTHESES_PER_SEARCH
    }

    /// The first tile whose registration refines into an accepted fit.
    pub(super) fn search<S: Placed>(
        &self,
        frame: &FrameStars<'_, S>,
        cat: &[SkyStar],
        trials: f64,
    ) -> Option<Solution> {
        let frame_pts: Vec<Point> = frame
            .stars
            .iter()
            .map(|st| {
                let (x, y) = st.xy();
                Point {
                    x,
                    y,
                    flux: st.flux(),
                    snr: st.snr(),
                }
            })
            .chain(frame.saturated.iter().map(|&(x, y)| Point {
                x,
                y,
                flux: f64::MAX,
                snr: 100.0,
            }))
            .collect();
        let job = Job {
            frame,
            cat,
            frame_pts,
            trials,
        };
        let grid = self.bucket(cat);
        let cell = self.cell();
        for &centre in &self.centres {
            let Some((cx, cy)) = self.hint_wcs.sky_to_pixel(centre.0, centre.1) else {
                continue;
            };
            let (gx, gy) = ((cx / cell).floor() as i64, (cy / cell).floor() as i64);
            let near: Vec<usize> = (gx - 1..=gx + 1)
                .flat_map(|x| (gy - 1..=gy + 1).map(move |y| (x, y)))
                .filter_map(|key| grid.get(&key))
                .flatten()
                .copied()
                .filter(|&j| {
                    separation_deg(centre, (cat[j].ra_deg, cat[j].dec_deg)) <= self.half_diag * 1.1
                })
                .collect();
            if near.len() < MIN_MATCHED {
                continue;
            }
            for parity in [-1.0, 1.0] {
                let found = self.search_tile(&job, &near, centre, parity);
                if found.is_some() {
                    return found;
                }
            }
        }
        None
    }

    /// Cells of the catalogue's buckets, degrees: a tile's stars lie within one cell of
    /// its centre's.
    fn cell(&self) -> f64 {
        (self.half_diag * 1.1).max(1e-6)
    }

    /// The catalogue on the hint's tangent plane (degrees), bucketed, so each tile finds
    /// its stars without scanning the whole cone.
    fn bucket(&self, cat: &[SkyStar]) -> HashMap<(i64, i64), Vec<usize>> {
        let cell = self.cell();
        let mut grid: HashMap<(i64, i64), Vec<usize>> = HashMap::new();
        for (j, star) in cat.iter().enumerate() {
            if let Some((x, y)) = self.hint_wcs.sky_to_pixel(star.ra_deg, star.dec_deg) {
                if x.is_finite() && y.is_finite() && x.abs() < 1e6 && y.abs() < 1e6 {
                    grid.entry(((x / cell).floor() as i64, (y / cell).floor() as i64))
                        .or_default()
                        .push(j);
                }
            }
        }
        grid
    }

    /// One tile in one parity: its catalogue stars `near` as the frame would see them,
    /// registered onto the frame's stars, the brightest in both lists first; then deeper
    /// lists, for frames whose brightest stars the catalogue orders otherwise (another
    /// band, saturation).
    fn search_tile<S: Placed>(
        &self,
        job: &Job<'_, '_, S>,
        near: &[usize],
        centre: (f64, f64),
        parity: f64,
    ) -> Option<Solution> {
        let (frame, cat) = (job.frame, job.cat);
        let s = self.scale;
        let tile_wcs = tan(self.crpix, centre, [[parity * s, 0.0], [0.0, s]]);
        let mut tile: Vec<Point> = near
            .iter()
            .filter_map(|&j| {
                let (x, y) = tile_wcs.sky_to_pixel(cat[j].ra_deg, cat[j].dec_deg)?;
                Some(Point {
                    x,
                    y,
                    flux: brightness(&cat[j]),
                    snr: 100.0,
                })
            })
            .collect();
        tile.sort_by(|a, b| b.flux.total_cmp(&a.flux));
        for n in [40, 80] {
            let Some(reg) = register_brightest(&tile, &job.frame_pts, n) else {
                continue;
            };
            // Frame pixel p → tile pixel A·p + t → sky by the tile's WCS: the tile's
            // projection carried through the registration (exact for TAN).
            let Some(start) = carry(
                &tile_wcs,
                reg.transform.a,
                reg.transform.t,
                frame.width,
                frame.height,
            ) else {
                continue;
            };
            // Refined from the tile's own tangent point: re-centring it on the frame with
            // the tile's CD would turn it by Δα·sin δ, far too much near a pole.
            if let Some(sol) = refine(frame, cat, &start, job.trials) {
                return Some(sol);
            }
        }
        None
    }
}

/// What every tile of one search works on.
struct Job<'a, 'f, S: Placed> {
    frame: &'a FrameStars<'f, S>,
    cat: &'a [SkyStar],
    /// The frame's stars and saturated stars, for the registration.
    frame_pts: Vec<Point>,
    /// Hypotheses of the whole search, for the decision rule.
    trials: f64,
}

/// How far from the hint the catalogue must reach for every tile: the search radius, a
/// tile step and a tile's radius.
pub fn cone_radius_deg(hint: &Hint, width: usize, height: usize) -> f64 {
    let s = hint.scale_arcsec / 3600.0;
    let (w, h) = (width as f64, height as f64);
    hint.search_deg + 0.5 * w.min(h) * s + 1.15 * 0.5 * w.hypot(h) * s
}
