//! One detection into a star, or into the reason it is not one: its stamp (the pixels
//! nearer to it than to any other detection), a PSF fit, and the tests no PSF passes (a
//! single pixel far above its neighbours, a saturated core, a clipped edge, a fit that
//! wandered off); then, over the whole frame, what is sharper, wider or less certain
//! than the frame's own stars.

use ndarray::Array2;

use super::detect::Candidate;
use super::psf::{fit_profile, Guess, PsfFit, Stamp};
use super::stats::median_f64;
use super::{RejectKind, Rejected};

/// Candidates bucketed on a coarse grid, to find a stamp's neighbours quickly.
pub(super) struct CandidateGrid {
    cell: usize,
    nx: usize,
    buckets: Vec<Vec<usize>>,
}

impl CandidateGrid {
    pub(super) fn new(c: &[Candidate], w: usize, h: usize, cell: usize) -> Self {
        let nx = w.div_ceil(cell);
        let ny = h.div_ceil(cell);
        let mut buckets = vec![Vec::new(); nx * ny];
        for (i, k) in c.iter().enumerate() {
            buckets[(k.y / cell) * nx + k.x / cell].push(i);
        }
        Self { cell, nx, buckets }
    }

    fn near(&self, x: usize, y: usize, radius: usize) -> impl Iterator<Item = usize> + '_ {
        let ny = self.buckets.len() / self.nx;
        let (cx0, cx1) = (
            x.saturating_sub(radius) / self.cell,
            ((x + radius) / self.cell).min(self.nx - 1),
        );
        let (cy0, cy1) = (
            y.saturating_sub(radius) / self.cell,
            ((y + radius) / self.cell).min(ny - 1),
        );
        (cy0..=cy1).flat_map(move |cy| {
            (cx0..=cx1).flat_map(move |cx| self.buckets[cy * self.nx + cx].iter().copied())
        })
    }
}

pub(super) struct FittedStar {
    pub fit: PsfFit,
    pub peak: f64,
    pub blended: bool,
}

pub(super) enum Outcome {
    Fitted(FittedStar),
    Rejected(Rejected),
}

/// What every candidate of one frame is fitted with.
pub(super) struct Fitting<'a> {
    /// The frame with its background removed and sharp pixels cleaned.
    pub residual: &'a Array2<f32>,
    pub all: &'a [Candidate],
    pub grid: CandidateGrid,
    /// Stamp half-size, pixels.
    pub half: usize,
    /// A star whose centre is nearer the sensor's edge than this is clipped.
    pub edge_margin: f64,
    pub noise: f64,
    pub fwhm_guess: f64,
    /// Model samples per pixel side (see `psf::Stamp`).
    pub subsample: usize,
    /// See `MeasureParams::report_pixel`.
    pub report_pixel: f64,
    /// The Moffat profile is tried only on stars at least this far above the noise.
    pub moffat_min_snr: f64,
}

impl Fitting<'_> {
    /// Candidate `index` fitted, or the reason it is not a star. `saturation_residual` is
    /// the saturation level above the local sky there, when known.
    pub(super) fn candidate(&self, index: usize, saturation_residual: Option<f64>) -> Outcome {
        let Fitting {
            residual,
            all,
            edge_margin,
            noise,
            fwhm_guess,
            moffat_min_snr,
            ..
        } = self;
        let (edge_margin, noise, fwhm_guess) = (*edge_margin, *noise, *fwhm_guess);
        let c = &all[index];
        let (h, w) = residual.dim();
        // Brightest pixel near the filtered peak.
        let (mut px, mut py, mut peak) = (c.x, c.y, f32::NEG_INFINITY);
        for y in c.y.saturating_sub(1)..=(c.y + 1).min(h - 1) {
            for x in c.x.saturating_sub(1)..=(c.x + 1).min(w - 1) {
                let v = residual[(y, x)];
                if v.is_finite() && v > peak {
                    (px, py, peak) = (x, y, v);
                }
            }
        }
        let peak = f64::from(peak);
        let reject = |kind, x: f64, y: f64| {
            Outcome::Rejected(Rejected {
                x: x + 1.0,
                y: y + 1.0,
                kind,
                peak_adu: peak,
            })
        };
        if !peak.is_finite() {
            return reject(RejectKind::Unfit, c.x as f64, c.y as f64);
        }
        // Saturated: any pixel of the core at the saturation level.
        if let Some(sat) = saturation_residual {
            let r = 2usize;
            for y in py.saturating_sub(r)..=(py + r).min(h - 1) {
                for x in px.saturating_sub(r)..=(px + r).min(w - 1) {
                    if f64::from(residual[(y, x)]) >= sat - 0.5 {
                        return reject(RejectKind::Saturated, px as f64, py as f64);
                    }
                }
            }
        }
        // A single pixel far above all four of its side neighbours is no star: a Gaussian
        // star centred on a pixel has its centre 3.5 times its side neighbours at an
        // optical FWHM of 1.3 px, and 8 times only below 0.9 px (analytic, pixel-averaged
        // profile; see `sharp`). The Laplacian test of van Dokkum (2001) in its simplest
        // form, with the same limit as the cleaning before detection.
        let neighbours: Vec<f64> = [(0i64, -1i64), (0, 1), (-1, 0), (1, 0)]
            .iter()
            .filter_map(|&(dx, dy)| {
                let (x, y) = (px as i64 + dx, py as i64 + dy);
                (x >= 0 && y >= 0 && (x as usize) < w && (y as usize) < h)
                    .then(|| f64::from(residual[(y as usize, x as usize)]))
            })
            .filter(|v| v.is_finite())
            .collect();
        let max4 = neighbours.iter().copied().fold(0.0, f64::max);
        if peak > 5.0 * noise && peak > super::sharp::STAR_LIMIT * max4 + 2.0 * noise {
            return reject(RejectKind::Sharp, px as f64, py as f64);
        }
        let (fx, fy) = (px as f64, py as f64);
        // Distances to the physical edge of the sensor (pixel centres sit 0.5 px inside).
        if fx + 0.5 < edge_margin
            || fy + 0.5 < edge_margin
            || (w as f64 - 0.5) - fx < edge_margin
            || (h as f64 - 0.5) - fy < edge_margin
        {
            return reject(RejectKind::EdgeClipped, fx, fy);
        }
        let (stamp, others) = self.stamp(index, px, py);
        let guess = Guess {
            sky: 0.0,
            amplitude: peak.max(noise),
            x0: fx,
            y0: fy,
            fwhm: fwhm_guess,
        };
        // The Moffat profile's extra freedom (its wings) is only measurable on stars well
        // above the noise; stars fainter than the ones that vote on the frame's shape keep
        // the Gaussian, which halves the fitting time on a typical frame. The SNR here is
        // the Gaussian's flux over the noise in its optimal footprint, 4πσ_aσ_b pixels.
        let worth_moffat = |gauss: &PsfFit| {
            let (ga, gb) = gauss.model_axes();
            let footprint = 4.0 * std::f64::consts::PI * (ga / 2.3548) * (gb / 2.3548);
            gauss.total_flux() / (noise * footprint.max(1.0).sqrt()) >= *moffat_min_snr
        };
        let Some(fit) = fit_profile(&stamp, guess, worth_moffat) else {
            return reject(RejectKind::Unfit, fx, fy);
        };
        // A fit whose centre wandered off the detection found something else.
        if (fit.x0 - fx).hypot(fit.y0 - fy) > 0.5 * fwhm_guess + 1.5 {
            return reject(RejectKind::Unfit, fx, fy);
        }
        Outcome::Fitted(FittedStar {
            fit,
            peak,
            // Another detection inside the flux aperture (2.5 × FWHM) makes the aperture sum
            // not this star's alone. Sharing a detection component with a star farther away
            // (bright stars' components reach far) does not.
            blended: others
                .iter()
                .any(|&(ox, oy)| (ox - fx).hypot(oy - fy) <= 2.5 * fwhm_guess + 2.0),
        })
    }

    /// The stamp of candidate `index` around its brightest pixel (`px`, `py`): a round
    /// patch of the residual, leaving out pixels nearer to another detection than to this
    /// one; and the other detections near it (for the blend test).
    fn stamp(&self, index: usize, px: usize, py: usize) -> (Stamp, Vec<(f64, f64)>) {
        let (half, residual, all) = (self.half, self.residual, self.all);
        let (h, w) = residual.dim();
        let (fx, fy) = (px as f64, py as f64);
        let others: Vec<(f64, f64)> = self
            .grid
            .near(px, py, 2 * half)
            .filter(|&j| j != index)
            .map(|j| (all[j].x as f64, all[j].y as f64))
            .collect();
        let (x0, x1) = (px.saturating_sub(half), (px + half).min(w - 1));
        let (y0, y1) = (py.saturating_sub(half), (py + half).min(h - 1));
        let mut stamp = Stamp {
            x_range: (x0 as f64, x1 as f64),
            y_range: (y0 as f64, y1 as f64),
            subsample: self.subsample,
            report_pixel: self.report_pixel,
            core_radius: 1.5 * self.fwhm_guess,
            ..Default::default()
        };
        let reach2 = (half as f64 + 0.5).powi(2);
        for y in y0..=y1 {
            for x in x0..=x1 {
                let v = residual[(y, x)];
                if !v.is_finite() {
                    continue;
                }
                let (xf, yf) = (x as f64, y as f64);
                let d_self = (xf - fx).powi(2) + (yf - fy).powi(2);
                // A round stamp: the square's corners are sky a little farther out, which
                // adds fitting time (a fifth of the pixels) and little else.
                if d_self > reach2 {
                    continue;
                }
                if others
                    .iter()
                    .any(|&(ox, oy)| (xf - ox).powi(2) + (yf - oy).powi(2) < d_self)
                {
                    continue;
                }
                stamp.x.push(xf);
                stamp.y.push(yf);
                stamp.v.push(f64::from(v));
            }
        }
        (stamp, others)
    }
}

/// Sort the fitted candidates of a frame: sharper than any PSF the frame shows (a fitted
/// minor FWHM under half the typical one; van Dokkum 2001, PASP 113, 1420: a cosmic ray
/// or a hot pixel changes faster from pixel to pixel than the seeing allows), a position
/// known no better than a quarter of the FWHM, or much wider than the stars (a galaxy, a
/// blend) are rejected with their kind; the rest are stars. `rejected` already holds what
/// was rejected before fitting.
pub(super) fn sort_outcomes(
    outcomes: Vec<Outcome>,
    mut rejected: Vec<Rejected>,
    fwhm_guess: f64,
    subsample: usize,
) -> (Vec<FittedStar>, Vec<Rejected>) {
    // The floor sits just above the narrowest width a fit may take (0.5 px, see `psf`),
    // or at 0.8 px where the model is fitted to pixel centres (which then carry the
    // pixel's own width of ~0.7 px FWHM on top).
    let floor = if subsample > 1 { 0.55 } else { 0.8 };
    let typical = |keep: &dyn Fn(&FittedStar) -> bool, value: &dyn Fn(&FittedStar) -> f64| {
        median_f64(
            &outcomes
                .iter()
                .filter_map(|o| match o {
                    Outcome::Fitted(f) if !f.blended && keep(f) => Some(value(f)),
                    _ => None,
                })
                .collect::<Vec<_>>(),
        )
        .unwrap_or(fwhm_guess)
    };
    let typical_minor = typical(&|f| f.fit.model_axes().1 >= 1.5 * floor, &|f| {
        f.fit.model_axes().1
    });
    // Where the stars themselves are barely wider than the narrowest fit (undersampled
    // frames), a fitted width cannot tell a star from a spike: the pixel contrast tests
    // (`sharp`, and the single-pixel test above) decide alone there.
    let sharp_limit = if typical_minor >= 2.5 * floor {
        (0.5 * typical_minor).max(floor)
    } else {
        0.0
    };
    let starlike = |f: &FittedStar| f.fit.model_axes().1 >= sharp_limit;
    let typical_fwhm = typical(&starlike, &|f| f.fit.fwhm());
    let typical_major = typical(&starlike, &|f| f.fit.fwhm_axes().0);
    let mut fitted = Vec::new();
    for o in outcomes {
        let f = match o {
            Outcome::Rejected(r) => {
                rejected.push(r);
                continue;
            }
            Outcome::Fitted(f) => f,
        };
        let (minor, major) = (f.fit.model_axes().1, f.fit.fwhm_axes().0);
        // A track: as thin as a fit goes, and long (a cosmic ray crossing at an angle).
        let track = minor < 1.2 * floor && major > 1.6 * typical_major;
        let kind = if minor < sharp_limit || track {
            Some(RejectKind::Sharp)
        } else if f.fit.pos_err.0.hypot(f.fit.pos_err.1) > 0.25 * typical_fwhm {
            Some(RejectKind::Unfit)
        } else if f.fit.fwhm() > 1.5 * typical_fwhm || f.fit.fwhm_axes().0 > 1.6 * typical_major {
            Some(RejectKind::Extended)
        } else {
            None
        };
        match kind {
            Some(kind) => rejected.push(Rejected {
                x: f.fit.x0 + 1.0,
                y: f.fit.y0 + 1.0,
                kind,
                peak_adu: f.peak,
            }),
            None => fitted.push(f),
        }
    }
    (fitted, rejected)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A noiseless residual with Gaussian stars of FWHM `fwhm` at the given centres
    /// (0-based pixel coordinates), and the detections a matched filter would give.
    fn field(
        w: usize,
        h: usize,
        fwhm: f64,
        stars: &[(f64, f64, f64)],
    ) -> (Array2<f32>, Vec<Candidate>) {
        let s = fwhm / (8.0 * std::f64::consts::LN_2).sqrt();
        let img = Array2::from_shape_fn((h, w), |(y, x)| {
            stars
                .iter()
                .map(|&(cx, cy, a)| {
                    a * (-((x as f64 - cx).powi(2) + (y as f64 - cy).powi(2)) / (2.0 * s * s)).exp()
                })
                .sum::<f64>() as f32
        });
        let c = stars
            .iter()
            .map(|&(cx, cy, a)| Candidate {
                x: cx.round() as usize,
                y: cy.round() as usize,
                significance: a,
                area: 9,
                blended: false,
                component: 0,
            })
            .collect();
        (img, c)
    }

    fn fitting<'a>(img: &'a Array2<f32>, c: &'a [Candidate]) -> Fitting<'a> {
        Fitting {
            residual: img,
            all: c,
            grid: CandidateGrid::new(c, img.ncols(), img.nrows(), 32),
            half: 8,
            edge_margin: 1.5,
            noise: 1.0,
            fwhm_guess: 3.0,
            subsample: 1,
            report_pixel: 0.0,
            moffat_min_snr: 16.0,
        }
    }

    #[test]
    fn a_gaussian_star_is_fitted_at_its_place_and_width() {
        let (img, c) = field(40, 40, 3.0, &[(20.3, 19.6, 500.0)]);
        let Outcome::Fitted(f) = fitting(&img, &c).candidate(0, None) else {
            panic!("not fitted")
        };
        assert!((f.fit.x0 - 20.3).abs() < 0.02 && (f.fit.y0 - 19.6).abs() < 0.02);
        // Sampled at pixel centres, a Gaussian of FWHM 3 reads 3 (no pixel averaging here).
        assert!((f.fit.fwhm() - 3.0).abs() < 0.05, "{}", f.fit.fwhm());
        assert!(!f.blended);
    }

    #[test]
    fn what_no_star_can_be_is_rejected_with_its_kind() {
        let mut img = Array2::<f32>::zeros((40, 40));
        img[(20, 20)] = 400.0;
        let c = [Candidate {
            x: 20,
            y: 20,
            significance: 400.0,
            area: 1,
            blended: false,
            component: 0,
        }];
        let kind = |o: Outcome| match o {
            Outcome::Rejected(r) => Some(r.kind),
            Outcome::Fitted(_) => None,
        };
        assert_eq!(
            kind(fitting(&img, &c).candidate(0, None)),
            Some(RejectKind::Sharp)
        );
        let (img, c) = field(40, 40, 3.0, &[(0.2, 20.0, 500.0)]);
        assert_eq!(
            kind(fitting(&img, &c).candidate(0, None)),
            Some(RejectKind::EdgeClipped)
        );
        let (img, c) = field(40, 40, 3.0, &[(20.0, 20.0, 500.0)]);
        assert_eq!(
            kind(fitting(&img, &c).candidate(0, Some(450.0))),
            Some(RejectKind::Saturated)
        );
    }

    #[test]
    fn a_neighbour_inside_the_aperture_marks_a_blend() {
        let (img, c) = field(60, 40, 3.0, &[(20.0, 20.0, 500.0), (26.0, 20.0, 300.0)]);
        let Outcome::Fitted(f) = fitting(&img, &c).candidate(0, None) else {
            panic!("not fitted")
        };
        assert!(f.blended);
    }
}
