//! Fitting a frame to the sky from a star catalogue, pure.
//!
//! 1. The catalogue stars around the header's pointing are projected onto a tangent
//!    plane at the plate scale the header's optics give, for both parities (`tiles`).
//! 2. The frame's stars are matched to them by triangle invariants and a consensus
//!    similarity transform (`night::register`: Groth 1986; Valdes et al. 1995), tile by
//!    tile outward from the pointing, so a pointing off by a degree still finds its field.
//! 3. A TAN projection (Calabretta & Greisen 2002) is fitted to every matched star by
//!    weighted least squares, with SIP distortion (Shupe et al. 2005) of order 2 or 3
//!    where the Bayesian information criterion (Schwarz 1978) prefers it (`fit`, in the
//!    rounds of matching and fitting of `refine`).
//! 4. **The decision rule.** A fit is accepted only when at least [`MIN_MATCHED`] stars
//!    match within the tolerance and the probability that as many matches arise by chance
//!    is below 10^[`MAX_CHANCE_LOG10`] after counting every hypothesis tried: each of the
//!    frame's N stars lands within r px of one of the M catalogue stars inside the frame
//!    with probability p = M·πr²/area by chance, so matches by chance follow a binomial
//!    law (N, p); the three stars that fix a hypothesis are not counted, and the tail
//!    probability is multiplied by the number of hypotheses (tiles × parities × the
//!    star-pair transforms each consensus search tries) (`chance`).
//!
//! `solve` runs the whole search; `header` checks a header's WCS by the same rule,
//! `carry` takes a reference frame's fit to a frame registered on it, and `photometric`
//! turns matched stars into a zero point and a limiting magnitude. This module holds what
//! they share: the inputs, the answer and the decision rule's constants.

mod carry;
mod chance;
mod fit;
mod header;
pub mod photometric;
mod projection;
mod refine;
mod solve;
mod tiles;

pub use carry::carry;
pub use header::{check, disagreement_px, DISAGREES_ENTIRELY_PX, HEADER_DISAGREEMENT_PX};
pub use projection::separation_deg;
pub use solve::solve;
pub use tiles::cone_radius_deg;

use crate::frame::wcs::Wcs;
use crate::night::register::Placed;

/// Fewest matched stars for an accepted fit.
pub const MIN_MATCHED: usize = 8;
/// Largest accepted log10 chance probability of the matches (trials counted).
pub const MAX_CHANCE_LOG10: f64 = -6.0;
/// Matches are counted within this many pixels of the fitted position.
pub const MATCH_TOLERANCE_PX: f64 = 1.5;

/// Where the frame is thought to point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Hint {
    pub ra_deg: f64,
    pub dec_deg: f64,
    /// Plate scale, arcsec per pixel (within about 20 %).
    pub scale_arcsec: f64,
    /// How far the true centre may be from the hint, degrees.
    pub search_deg: f64,
}

/// A catalogue star where the frame sees it (at the frame's epoch), with its brightness
/// for choosing the brightest.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SkyStar {
    pub ra_deg: f64,
    pub dec_deg: f64,
    pub mag: Option<f64>,
}

pub use crate::record::{FitSource, SkyFit};

/// A fit with the pairs behind it (frame star index, catalogue star index).
#[derive(Debug, Clone)]
pub struct Solution {
    pub fit: SkyFit,
    pub pairs: Vec<(usize, usize)>,
}

/// The frame's stars as the fit uses them.
pub struct FrameStars<'a, S: Placed> {
    pub stars: &'a [S],
    /// Saturated stars' positions: the brightest of the field, which a catalogue lists
    /// first, so they take part in the pattern search (not in the fit: their centres
    /// are rough).
    pub saturated: &'a [(f64, f64)],
    pub width: usize,
    pub height: usize,
}

impl<S: Placed> FrameStars<'_, S> {
    fn centre(&self) -> [f64; 2] {
        [
            (self.width as f64 + 1.0) / 2.0,
            (self.height as f64 + 1.0) / 2.0,
        ]
    }

    fn positions(&self) -> Vec<(f64, f64)> {
        self.stars.iter().map(|s| s.xy()).collect()
    }
}

/// Brightness for ordering: catalogue stars without a magnitude come last.
fn brightness(s: &SkyStar) -> f64 {
    s.mag.map_or(0.0, |m| 10f64.powf(-0.4 * m))
}

/// Each catalogue star's pixel position under `wcs` when it falls inside the frame
/// (margin `m` px), else `None`.
fn in_frame(wcs: &Wcs, cat: &[SkyStar], w: usize, h: usize, m: f64) -> Vec<Option<(f64, f64)>> {
    cat.iter()
        .map(|s| {
            wcs.sky_to_pixel(s.ra_deg, s.dec_deg).filter(|&(x, y)| {
                x > 0.5 - m && y > 0.5 - m && x < w as f64 + 0.5 + m && y < h as f64 + 0.5 + m
            })
        })
        .collect()
}

/// The answer for `pairs` (frame star, catalogue star, distance px) under `wcs`.
fn solution(
    source: FitSource,
    wcs: Wcs,
    pairs: &[crate::pairs::Pair],
    chance_log10: f64,
) -> Solution {
    let k = pairs.len();
    let sq: f64 = pairs.iter().map(|&(_, _, d)| d * d).sum();
    Solution {
        fit: SkyFit {
            source,
            matched: k,
            rms_arcsec: (sq / k as f64).sqrt() * wcs.scale_arcsec(),
            chance_log10,
            header_offset_px: None,
            wcs,
        },
        pairs: pairs.iter().map(|&(i, j, _)| (i, j)).collect(),
    }
}
