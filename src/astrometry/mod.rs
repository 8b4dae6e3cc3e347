//! Fitting a frame to the sky from a star catalogue, pure.
//!
//! 1. The catalogue stars around the header's pointing are projected onto a tangent
//!    plane at the plate scale the header's optics give, for both parities.
//! 2. The frame's stars are matched to them by triangle invariants and a consensus
//!    similarity transform (`night::register`: Groth 1986; Valdes et al. 1995), tile by
//!    tile outward from the pointing, so a pointing off by a degree still finds its field.
//! 3. A TAN projection (Calabretta & Greisen 2002) is fitted to every matched star by
//!    weighted least squares, with SIP distortion (Shupe et al. 2005) of order 2 or 3
//!    where the Bayesian information criterion (Schwarz 1978) prefers it.
//! 4. **The decision rule.** A fit is accepted only when at least [`MIN_MATCHED`] stars
//!    match within the tolerance and the probability that as many matches arise by chance
//!    is below 10^[`MAX_CHANCE_LOG10`] after counting every hypothesis tried: each of the
//!    frame's N stars lands within r px of one of the M catalogue stars inside the frame
//!    with probability p = M·πr²/area by chance, so matches by chance follow a binomial
//!    law (N, p); the three stars that fix a hypothesis are not counted, and the tail
//!    probability is multiplied by the number of hypotheses (tiles × parities × the
//!    star-pair transforms each consensus search tries).
//!
//! `photometric` turns matched stars into a zero point and a limiting magnitude.

pub mod photometric;

use crate::frame::wcs::{Sip, Wcs};
use crate::night::register::{register_brightest, Placed};

/// Fewest matched stars for an accepted fit.
pub const MIN_MATCHED: usize = 8;
/// Largest accepted log10 chance probability of the matches (trials counted).
pub const MAX_CHANCE_LOG10: f64 = -6.0;
/// Matches are counted within this many pixels of the fitted position.
pub const MATCH_TOLERANCE_PX: f64 = 1.5;
/// A header WCS further than this from the fit (px, anywhere on the frame) is reported
/// as disagreeing with the sky.
pub const HEADER_DISAGREEMENT_PX: f64 = 3.0;

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

/// A bare point for registration.
#[derive(Debug, Clone, Copy)]
struct Pt {
    x: f64,
    y: f64,
    flux: f64,
    snr: f64,
}

impl Placed for Pt {
    fn xy(&self) -> (f64, f64) {
        (self.x, self.y)
    }
    fn flux(&self) -> f64 {
        self.flux
    }
    fn snr(&self) -> f64 {
        self.snr
    }
}

/// Brightness for ordering: catalogue stars without a magnitude come last.
fn brightness(s: &SkyStar) -> f64 {
    s.mag.map_or(0.0, |m| 10f64.powf(-0.4 * m))
}

/// Angular distance, degrees (haversine; stable at small separations).
pub fn separation_deg(a: (f64, f64), b: (f64, f64)) -> f64 {
    let (ra1, d1) = (a.0.to_radians(), a.1.to_radians());
    let (ra2, d2) = (b.0.to_radians(), b.1.to_radians());
    let h =
        ((d2 - d1) / 2.0).sin().powi(2) + d1.cos() * d2.cos() * ((ra2 - ra1) / 2.0).sin().powi(2);
    (2.0 * h.sqrt().min(1.0).asin()).to_degrees()
}

/// A plain TAN WCS at `centre` with this CD and CRPIX.
fn tan(crpix: [f64; 2], crval: (f64, f64), cd: [[f64; 2]; 2]) -> Wcs {
    Wcs {
        crpix,
        crval: [crval.0, crval.1],
        cd,
        lonpole: 180.0,
        sip: None,
    }
}

/// Standard coordinates (ξ, η) in degrees of a sky position on the tangent plane at `c`.
fn standard(c: (f64, f64), p: (f64, f64)) -> Option<(f64, f64)> {
    tan([0.0, 0.0], c, [[1.0, 0.0], [0.0, 1.0]]).sky_to_pixel(p.0, p.1)
}

/// ln of the binomial tail P(K ≥ k) for K ~ Bin(n, p).
fn ln_binomial_tail(n: usize, p: f64, k: usize) -> f64 {
    if k == 0 {
        return 0.0;
    }
    if k > n || p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return 0.0;
    }
    let ln_choose = |n: usize, j: usize| ln_factorial(n) - ln_factorial(j) - ln_factorial(n - j);
    let term = |j: usize| ln_choose(n, j) + j as f64 * p.ln() + (n - j) as f64 * (-p).ln_1p();
    // Sum of terms j = k..n in log space, largest first for stability.
    let terms: Vec<f64> = (k..=n).map(term).collect();
    let max = terms.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    max + terms.iter().map(|t| (t - max).exp()).sum::<f64>().ln()
}

fn ln_factorial(n: usize) -> f64 {
    if n < 2 {
        return 0.0;
    }
    if n < 64 {
        return (2..=n).map(|i| (i as f64).ln()).sum();
    }
    // Stirling's series (Abramowitz & Stegun 6.1.41), exact to ~1e-12 here.
    let x = n as f64;
    x * x.ln() - x + 0.5 * (2.0 * std::f64::consts::PI * x).ln() + 1.0 / (12.0 * x)
        - 1.0 / (360.0 * x.powi(3))
}

/// Pairs (frame star, catalogue star) within `tol` px under `wcs`, each star once,
/// nearest first. `cat_px` holds each catalogue star's pixel position (or `None`).
fn match_stars(
    frame: &[(f64, f64)],
    cat_px: &[Option<(f64, f64)>],
    tol: f64,
) -> Vec<(usize, usize, f64)> {
    let cell = tol.max(0.5) * 2.0;
    let mut grid: std::collections::HashMap<(i64, i64), Vec<usize>> =
        std::collections::HashMap::new();
    let sane = |p: &(f64, f64)| p.0.abs() < 1e9 && p.1.abs() < 1e9;
    for (j, q) in cat_px.iter().enumerate() {
        if let Some(q) = q.filter(|q| sane(q)) {
            grid.entry(((q.0 / cell).floor() as i64, (q.1 / cell).floor() as i64))
                .or_default()
                .push(j);
        }
    }
    let mut cand = Vec::new();
    for (i, p) in frame.iter().enumerate().filter(|(_, p)| sane(p)) {
        let (cx, cy) = ((p.0 / cell).floor() as i64, (p.1 / cell).floor() as i64);
        for gx in cx - 1..=cx + 1 {
            for gy in cy - 1..=cy + 1 {
                for &j in grid.get(&(gx, gy)).into_iter().flatten() {
                    let Some(q) = cat_px[j] else { continue };
                    let d = (q.0 - p.0).hypot(q.1 - p.1);
                    if d <= tol {
                        cand.push((i, j, d));
                    }
                }
            }
        }
    }
    cand.sort_by(|a, b| a.2.total_cmp(&b.2));
    let mut used_f = vec![false; frame.len()];
    let mut used_c = vec![false; cat_px.len()];
    cand.retain(|&(i, j, _)| {
        if used_f[i] || used_c[j] {
            return false;
        }
        used_f[i] = true;
        used_c[j] = true;
        true
    });
    cand
}

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

/// Solve the normal equations M·c = b (symmetric positive definite) by Gaussian
/// elimination with partial pivoting; `None` when singular.
fn solve_linear(mut m: Vec<Vec<f64>>, mut b: Vec<f64>) -> Option<Vec<f64>> {
    let n = b.len();
    for col in 0..n {
        let piv = (col..n).max_by(|&a, &c| m[a][col].abs().total_cmp(&m[c][col].abs()))?;
        if m[piv][col].abs() < 1e-300 {
            return None;
        }
        m.swap(col, piv);
        b.swap(col, piv);
        for r in col + 1..n {
            let f = m[r][col] / m[col][col];
            if f != 0.0 {
                for c in col..n {
                    m[r][c] -= f * m[col][c];
                }
                b[r] -= f * b[col];
            }
        }
    }
    let mut x = vec![0.0; n];
    for r in (0..n).rev() {
        let s: f64 = (r + 1..n).map(|c| m[r][c] * x[c]).sum();
        x[r] = (b[r] - s) / m[r][r];
        if !x[r].is_finite() {
            return None;
        }
    }
    Some(x)
}

/// One matched star for the fit: pixel offset from CRPIX, sky position, weight.
struct FitPoint {
    u: f64,
    v: f64,
    sky: (f64, f64),
    w: f64,
}

/// Weighted least-squares TAN (+SIP of `order` ≥ 2) fit with CRPIX fixed; CRVAL is
/// moved until the constant terms vanish. Returns the WCS and the weighted sum of
/// squared residuals in pixels² (for the information criterion).
fn fit_tan(
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
        let mut m = vec![vec![0.0; t.len()]; t.len()];
        let mut bx = vec![0.0; t.len()];
        let mut by = vec![0.0; t.len()];
        for p in points {
            let (xi, eta) = standard(crval, p.sky)?;
            let (un, vn) = (p.u / norm, p.v / norm);
            let row: Vec<f64> = t
                .iter()
                .map(|&(a, b)| un.powi(a as i32) * vn.powi(b as i32))
                .collect();
            for i in 0..t.len() {
                for j in 0..t.len() {
                    m[i][j] += p.w * row[i] * row[j];
                }
                bx[i] += p.w * row[i] * xi;
                by[i] += p.w * row[i] * eta;
            }
        }
        let cx = solve_linear(m.clone(), bx)?;
        let cy = solve_linear(m, by)?;
        // Done when the constant terms vanish: the coefficients then belong to this
        // reference point. Otherwise move it onto their sky position and fit again.
        if cx[0].hypot(cy[0]) < 1e-10 {
            coef = Some((cx, cy));
            break;
        }
        crval = tan([0.0, 0.0], crval, [[1.0, 0.0], [0.0, 1.0]]).pixel_to_sky(cx[0], cy[0]);
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
}

/// Catalogue stars (index, pixel position) inside the frame under `wcs`, margin `m` px.
fn in_frame(wcs: &Wcs, cat: &[SkyStar], w: usize, h: usize, m: f64) -> Vec<Option<(f64, f64)>> {
    cat.iter()
        .map(|s| {
            wcs.sky_to_pixel(s.ra_deg, s.dec_deg).filter(|&(x, y)| {
                x > 0.5 - m && y > 0.5 - m && x < w as f64 + 0.5 + m && y < h as f64 + 0.5 + m
            })
        })
        .collect()
}

/// From a first WCS, match every star and fit; the accepted fit or `None`.
fn refine<S: Placed>(
    frame: &FrameStars<'_, S>,
    cat: &[SkyStar],
    start: &Wcs,
    trials: f64,
) -> Option<Solution> {
    let pos: Vec<(f64, f64)> = frame.stars.iter().map(|s| s.xy()).collect();
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
        pairs = match_stars(&pos, &cat_px, tol);
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
        let start = (wcs.crval[0], wcs.crval[1]);
        // Orders by the information criterion, on the last rounds only (early matches
        // hold mismatches that a polynomial would bend to).
        let orders: &[u32] = if round >= 2 { &[1, 2, 3] } else { &[1] };
        let n = (2 * points.len()) as f64;
        let total_w: f64 = points.iter().map(|p| p.w).sum::<f64>().max(1e-300);
        let mut best: Option<(f64, Wcs)> = None;
        for &order in orders {
            let Some((fit, rss)) = fit_tan(&points, crpix, start, order) else {
                continue;
            };
            let k = (2 * terms(order).len()) as f64;
            // Weighted RSS scaled to a mean per-point variance.
            let bic = n * (rss / total_w * points.len() as f64 / n).max(1e-12).ln() + k * n.ln();
            if best.as_ref().is_none_or(|(b, _)| bic < *b) {
                best = Some((bic, fit));
            }
        }
        wcs = best?.1;
    }
    // The decision rule (module documentation); the fit fixed 3 stars' worth of freedom.
    let chance_log10 = chance_log10(&pos, cat, &wcs, frame.width, frame.height, trials, 3)?;
    let k = pairs.len();
    let sq: f64 = pairs.iter().map(|&(_, _, d)| d * d).sum();
    let scale = wcs.scale_arcsec();
    Some(Solution {
        fit: SkyFit {
            source: FitSource::Fitted,
            matched: k,
            rms_arcsec: (sq / k as f64).sqrt() * scale,
            chance_log10,
            header_offset_px: None,
            wcs,
        },
        pairs: pairs.iter().map(|&(i, j, _)| (i, j)).collect(),
    })
}

/// log10 of the probability that as many of the frame's stars fall within the match
/// tolerance of a catalogue star by chance, `trials` hypotheses counted; `None` when
/// the fit fails the decision rule. Only the brightest m = max(3N, 100) catalogue stars
/// inside the frame take part, so a catalogue far deeper than the frame does not make
/// chance matches likely; `fitted` stars' worth of matches are not counted (they fixed
/// the hypothesis).
fn chance_log10(
    pos: &[(f64, f64)],
    cat: &[SkyStar],
    wcs: &Wcs,
    width: usize,
    height: usize,
    trials: f64,
    fitted: usize,
) -> Option<f64> {
    let mut cat_px = in_frame(wcs, cat, width, height, 0.0);
    let mut inside: Vec<usize> = (0..cat.len()).filter(|&j| cat_px[j].is_some()).collect();
    inside.sort_by(|&a, &b| brightness(&cat[b]).total_cmp(&brightness(&cat[a])));
    let m = inside.len().min((3 * pos.len()).max(100));
    for &j in &inside[m..] {
        cat_px[j] = None;
    }
    let k = match_stars(pos, &cat_px, MATCH_TOLERANCE_PX).len();
    let area = (width * height) as f64;
    // Poisson: the chance that a random point lies within r of one of m stars.
    let p = -(-(m as f64) * std::f64::consts::PI * MATCH_TOLERANCE_PX.powi(2) / area).exp_m1();
    let n = pos.len().saturating_sub(fitted);
    let c = (ln_binomial_tail(n, p, k.saturating_sub(fitted)) / std::f64::consts::LN_10
        + trials.max(1.0).log10())
    .clamp(-999.0, 0.0);
    (k >= MIN_MATCHED && c <= MAX_CHANCE_LOG10).then_some(c)
}

/// Hypotheses one consensus search tries (pairs of its strongest 25 correspondences).
const HYPOTHESES_PER_SEARCH: f64 = 300.0;

/// Fit the frame to the sky. `cat` holds the catalogue stars around the hint (out to
/// [`cone_radius_deg`]), at the frame's epoch; `priors` are WCSs to try first (the
/// header's).
pub fn solve<S: Placed>(
    frame: &FrameStars<'_, S>,
    cat: &[SkyStar],
    hint: Hint,
    priors: &[&Wcs],
) -> Option<Solution> {
    if frame.stars.len() < MIN_MATCHED || cat.len() < MIN_MATCHED || hint.scale_arcsec <= 0.0 {
        return None;
    }
    let s = hint.scale_arcsec / 3600.0;
    let (w, h) = (frame.width as f64, frame.height as f64);
    let half_diag = 0.5 * w.hypot(h) * s;
    let crpix = frame.centre();
    let frame_pts: Vec<Pt> = frame
        .stars
        .iter()
        .map(|st| {
            let (x, y) = st.xy();
            Pt {
                x,
                y,
                flux: st.flux(),
                snr: st.snr(),
            }
        })
        .chain(frame.saturated.iter().map(|&(x, y)| Pt {
            x,
            y,
            flux: f64::MAX,
            snr: 100.0,
        }))
        .collect();
    // A WCS already at hand (the header's) is tried first, as one hypothesis.
    let planned_tiles = tile_centres(&hint, crpix, s, w, h);
    let trials = priors.len() as f64
        + planned_tiles.len() as f64 * SEARCHES_PER_TILE as f64 * HYPOTHESES_PER_SEARCH;
    for prior in priors {
        if let Some(sol) = refine(frame, cat, prior, trials) {
            return Some(sol);
        }
    }
    // The catalogue on the hint's tangent plane (degrees), bucketed, so each tile finds
    // its stars without scanning the whole cone.
    let hint_wcs = tan(
        crpix,
        (hint.ra_deg, hint.dec_deg),
        [[-1.0, 0.0], [0.0, 1.0]],
    );
    let cell = (half_diag * 1.1).max(1e-6);
    let mut grid: std::collections::HashMap<(i64, i64), Vec<usize>> =
        std::collections::HashMap::new();
    for (j, star) in cat.iter().enumerate() {
        if let Some((x, y)) = hint_wcs.sky_to_pixel(star.ra_deg, star.dec_deg) {
            if x.is_finite() && y.is_finite() && x.abs() < 1e6 && y.abs() < 1e6 {
                grid.entry(((x / cell).floor() as i64, (y / cell).floor() as i64))
                    .or_default()
                    .push(j);
            }
        }
    }
    for &centre in &planned_tiles {
        let Some((cx, cy)) = hint_wcs.sky_to_pixel(centre.0, centre.1) else {
            continue;
        };
        let (gx, gy) = ((cx / cell).floor() as i64, (cy / cell).floor() as i64);
        let near: Vec<usize> = (gx - 1..=gx + 1)
            .flat_map(|x| (gy - 1..=gy + 1).map(move |y| (x, y)))
            .filter_map(|key| grid.get(&key))
            .flatten()
            .copied()
            .filter(|&j| separation_deg(centre, (cat[j].ra_deg, cat[j].dec_deg)) <= half_diag * 1.1)
            .collect();
        if near.len() < MIN_MATCHED {
            continue;
        }
        // The brightest in both lists first; then deeper lists, for frames whose brightest
        // stars the catalogue orders otherwise (another band, saturation).
        for parity in [-1.0, 1.0] {
            let tile_wcs = tan(crpix, centre, [[parity * s, 0.0], [0.0, s]]);
            let mut tile: Vec<Pt> = near
                .iter()
                .filter_map(|&j| {
                    let (x, y) = tile_wcs.sky_to_pixel(cat[j].ra_deg, cat[j].dec_deg)?;
                    Some(Pt {
                        x,
                        y,
                        flux: brightness(&cat[j]),
                        snr: 100.0,
                    })
                })
                .collect();
            tile.sort_by(|a, b| b.flux.total_cmp(&a.flux));
            for n in [40, 80] {
                let Some(reg) = register_brightest(&tile, &frame_pts, n) else {
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
                if let Some(sol) = refine(frame, cat, &start, trials) {
                    return Some(sol);
                }
            }
        }
    }
    None
}

/// Searches one tile makes: two parities, each with the 40 and then the 80 brightest.
const SEARCHES_PER_TILE: usize = 4;
/// Rings of tiles around the pointing at most (a pointing further off than 12
/// half-frames is not found).
const MAX_RINGS: f64 = 12.0;

/// Tile centres: the hint, then rings outward half a frame apart, out to the search
/// radius.
fn tile_centres(hint: &Hint, crpix: [f64; 2], s: f64, w: f64, h: f64) -> Vec<(f64, f64)> {
    let step = (0.5 * w.min(h) * s).max(1e-6);
    let rings = (hint.search_deg / step).ceil().clamp(0.0, MAX_RINGS) as i32;
    let hint_wcs = tan(
        crpix,
        (hint.ra_deg, hint.dec_deg),
        [[-1.0, 0.0], [0.0, 1.0]],
    );
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
    centres
}

/// How far from the hint the catalogue must reach for every tile: the search radius, a
/// tile step and a tile's radius.
pub fn cone_radius_deg(hint: &Hint, width: usize, height: usize) -> f64 {
    let s = hint.scale_arcsec / 3600.0;
    let (w, h) = (width as f64, height as f64);
    hint.search_deg + 0.5 * w.min(h) * s + 1.15 * 0.5 * w.hypot(h) * s
}

/// Check a WCS (the header's) against the catalogue without fitting: the same matching
/// and decision rule with one hypothesis. `None` when it does not match the sky.
pub fn check<S: Placed>(frame: &FrameStars<'_, S>, cat: &[SkyStar], wcs: &Wcs) -> Option<Solution> {
    let pos: Vec<(f64, f64)> = frame.stars.iter().map(|s| s.xy()).collect();
    let cat_px = in_frame(wcs, cat, frame.width, frame.height, 0.0);
    let pairs = match_stars(&pos, &cat_px, MATCH_TOLERANCE_PX);
    let chance_log10 = chance_log10(&pos, cat, wcs, frame.width, frame.height, 1.0, 0)?;
    let k = pairs.len();
    let sq: f64 = pairs.iter().map(|&(_, _, d)| d * d).sum();
    Some(Solution {
        fit: SkyFit {
            source: FitSource::Header,
            matched: k,
            rms_arcsec: (sq / k as f64).sqrt() * wcs.scale_arcsec(),
            chance_log10,
            header_offset_px: None,
            wcs: wcs.clone(),
        },
        pairs: pairs.iter().map(|&(i, j, _)| (i, j)).collect(),
    })
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
    use super::*;

    #[derive(Clone, Copy)]
    struct S {
        x: f64,
        y: f64,
        f: f64,
    }
    impl Placed for S {
        fn xy(&self) -> (f64, f64) {
            (self.x, self.y)
        }
        fn flux(&self) -> f64 {
            self.f
        }
        fn snr(&self) -> f64 {
            self.f.sqrt()
        }
    }

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
        let w = tan([0.0, 0.0], centre, [[1.0, 0.0], [0.0, 1.0]]);
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

    fn observe(truth: &Wcs, cat: &[SkyStar], w: usize, h: usize) -> Vec<S> {
        cat.iter()
            .filter_map(|s| {
                let (x, y) = truth.sky_to_pixel(s.ra_deg, s.dec_deg)?;
                let inside = x > 1.0 && y > 1.0 && x < w as f64 && y < h as f64;
                let m = s.mag?;
                (inside && m < 15.0).then_some(S {
                    x,
                    y,
                    f: 1e6 * 10f64.powf(-0.4 * (m - 9.0)),
                })
            })
            .collect()
    }

    #[test]
    fn solves_a_field_with_a_hint_a_degree_off_and_its_scale_8_percent_off() {
        let centre = (84.25, 27.6);
        let cat = sky_field(7, centre, 2.0, 9000);
        let truth = tan([512.5, 384.5], centre, crate::sim::base_cd(1.94, 33.0));
        let stars = observe(&truth, &cat, 1024, 768);
        assert!(stars.len() > 40, "{}", stars.len());
        let frame = FrameStars {
            stars: &stars,
            saturated: &[],
            width: 1024,
            height: 768,
        };
        let hint = Hint {
            ra_deg: centre.0 + 0.8,
            dec_deg: centre.1 - 0.5,
            scale_arcsec: 1.94 * 1.08,
            search_deg: 1.2,
        };
        let sol = solve(&frame, &cat, hint, &[]).expect("solved");
        assert!(
            sol.fit.matched >= stars.len() * 9 / 10,
            "{}",
            sol.fit.matched
        );
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
        let stars = observe(&truth, &cat, 800, 600);
        let frame = FrameStars {
            stars: &stars,
            saturated: &[],
            width: 800,
            height: 600,
        };
        let hint = Hint {
            ra_deg: centre.0,
            dec_deg: centre.1,
            scale_arcsec: 2.5,
            search_deg: 0.5,
        };
        let sol = solve(&frame, &cat, hint, &[]).expect("solved");
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
            let stars = observe(&truth, &other, 800, 600);
            let frame = FrameStars {
                stars: &stars,
                saturated: &[],
                width: 800,
                height: 600,
            };
            let hint = Hint {
                ra_deg: centre.0,
                dec_deg: centre.1,
                scale_arcsec: 2.0,
                search_deg: 0.5,
            };
            accepted += usize::from(solve(&frame, &cat, hint, &[]).is_some());
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
        let stars = observe(&truth, &cat, 1024, 1024);
        let frame = FrameStars {
            stars: &stars,
            saturated: &[],
            width: 1024,
            height: 1024,
        };
        let hint = Hint {
            ra_deg: centre.0,
            dec_deg: centre.1,
            scale_arcsec: 1.5,
            search_deg: 0.3,
        };
        let sol = solve(&frame, &cat, hint, &[]).expect("solved");
        assert!(sol.fit.wcs.sip.is_some());
        let off = disagreement_px(&truth, &sol.fit.wcs, 1024, 1024);
        assert!(off < 0.05, "{off}");
    }

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

    #[test]
    fn binomial_tail_matches_a_direct_sum() {
        // P(K ≥ 2) for Bin(3, 0.5) = 4/8.
        assert!((ln_binomial_tail(3, 0.5, 2).exp() - 0.5).abs() < 1e-12);
        assert!((ln_factorial(100) - 363.739_375_555_563_5).abs() < 1e-9);
    }
}
