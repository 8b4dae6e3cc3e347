//! A WCS already at hand (the header's) checked against the catalogue without fitting,
//! and how far two WCSs disagree over a frame.

use super::chance::chance_log10;
use super::{in_frame, solution, FitSource, FrameStars, SkyStar, Solution, MATCH_TOLERANCE_PX};
use crate::frame::wcs::Wcs;
use crate::night::register::Placed;
use crate::pairs::nearest_pairs;

/// A header WCS further than this from the fit (px, anywhere on the frame) is reported
/// as disagreeing with the sky.
pub const HEADER_DISAGREEMENT_PX: f64 = 3.0;

/// Check a WCS (the header's) against the catalogue without fitting: the same matching
/// and decision rule with one hypothesis. `None` when it does not match the sky.
pub fn check<S: Placed>(frame: &FrameStars<'_, S>, cat: &[SkyStar], wcs: &Wcs) -> Option<Solution> {
    let pos = frame.positions();
    let cat_px = in_frame(wcs, cat, frame.width, frame.height, 0.0);
    let pairs = nearest_pairs(&pos, &cat_px, MATCH_TOLERANCE_PX);
    let chance_log10 = chance_log10(&pos, cat, wcs, frame.width, frame.height, 1.0, 0)?;
    Some(solution(
        FitSource::Header,
        wcs.clone(),
        &pairs,
        chance_log10,
    ))
}

/// What [`disagreement_px`] reports for WCSs that do not even map the same sky.
pub const DISAGREES_ENTIRELY_PX: f64 = 1.0e9;

/// The largest distance, px, between where two WCSs put the same sky over the frame.
pub fn disagreement_px(a: &Wcs, b: &Wcs, width: usize, height: usize) -> f64 {
    let mut worst: f64 = 0.0;
    for i in 0..=8 {
        for j in 0..=8 {
            let x = 0.5 + width as f64 * f64::from(i) / 8.0;
            let y = 0.5 + height as f64 * f64::from(j) / 8.0;
            let (ra, dec) = a.pixel_to_sky(x, y);
            match b
                .sky_to_pixel(ra, dec)
                .map(|(bx, by)| (bx - x).hypot(by - y))
            {
                Some(d) if d.is_finite() => worst = worst.max(d),
                // Off the projection, or a distortion that does not invert.
                _ => return DISAGREES_ENTIRELY_PX,
            }
        }
    }
    worst
}
