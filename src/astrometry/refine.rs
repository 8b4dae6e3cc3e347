//! From a first WCS to an accepted fit: rounds of matching every star and fitting, the
//! tolerance tightening, then the decision rule.

use super::chance::chance_log10;
use super::fit::{fit_best_order, FitPoint};
use super::{in_frame, solution, FitSource, FrameStars, SkyStar, Solution};
use super::{MATCH_TOLERANCE_PX, MIN_MATCHED};
use crate::frame::wcs::Wcs;
use crate::night::register::Placed;
use crate::pairs::nearest_pairs;

/// From a first WCS, match every star and fit; the accepted fit or `None`. `trials` is
/// the number of hypotheses the search tries in all, for the decision rule.
pub(super) fn refine<S: Placed>(
    frame: &FrameStars<'_, S>,
    cat: &[SkyStar],
    start: &Wcs,
    trials: f64,
) -> Option<Solution> {
    let pos = frame.positions();
    let crpix = frame.centre();
    let mut wcs = start.clone();
    let mut pairs = Vec::new();
    let weight = |i: usize| {
        let snr = frame.stars[i].snr().max(1.0);
        // Centroid error ∝ 1/SNR, with a floor for the catalogue's own errors.
        1.0 / (1.0 / (snr * snr) + 1.0e-4)
    };
    for (round, tol) in [4.0, 2.5, MATCH_TOLERANCE_PX, MATCH_TOLERANCE_PX]
        .into_iter()
        .enumerate()
    {
        let cat_px = in_frame(&wcs, cat, frame.width, frame.height, tol);
        pairs = nearest_pairs(&pos, &cat_px, tol);
        if pairs.len() < MIN_MATCHED {
            return None;
        }
        let points: Vec<FitPoint> = pairs
            .iter()
            .map(|&(i, j, _)| FitPoint {
                u: pos[i].0 - crpix[0],
                v: pos[i].1 - crpix[1],
                sky: (cat[j].ra_deg, cat[j].dec_deg),
                w: weight(i),
            })
            .collect();
        // Distortion only on the last rounds: early matches hold mismatches that a
        // polynomial would bend to.
        let orders: &[u32] = if round >= 2 { &[1, 2, 3] } else { &[1] };
        wcs = fit_best_order(&points, crpix, (wcs.crval[0], wcs.crval[1]), orders)?;
    }
    // The decision rule (module documentation); the fit fixed 3 stars' worth of freedom.
    let chance_log10 = chance_log10(&pos, cat, &wcs, frame.width, frame.height, trials, 3)?;
    Some(solution(FitSource::Fitted, wcs, &pairs, chance_log10))
}
