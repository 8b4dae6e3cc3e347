//! Point-spread-function fitting on a small stamp: an elliptical Gaussian and an
//! elliptical Moffat (1969, A&A 3, 455) profile, both fitted by Levenberg–Marquardt
//! (Levenberg 1944; Marquardt 1963) with analytic derivatives.
//!
//! The models are evaluated at pixel centres and fitted to pixel values, so the fitted
//! width is the PSF as the pixels sample it (the optical PSF averaged over each pixel),
//! which is what the measurement contract asks for.
//!
//! Shape is the quadratic form u = qa·dx² + 2·qb·dx·dy + qc·dy²:
//! Gaussian  m = sky + A·exp(−u/2),        FWHM along an axis with eigenvalue λ = 2·sqrt(2 ln 2 / λ)
//! Moffat    m = sky + A·(1 + u)^(−β),     FWHM along an axis with eigenvalue λ = 2·sqrt((2^(1/β) − 1) / λ)
//! (the second is Moffat's 2α·sqrt(2^(1/β) − 1) with α = 1/sqrt(λ)).
//!
//! Longer than most modules: the two models share the stamp, the fit, the covariance and
//! the sampled widths, which only make sense together. The linear algebra under the fit
//! is `linalg`'s.

use crate::linalg::{self, Cholesky};

/// Pixels to fit: 0-based centre coordinates and values; masked pixels are left out.
#[derive(Debug, Clone, Default)]
pub struct Stamp {
    pub x: Vec<f64>,
    pub y: Vec<f64>,
    pub v: Vec<f64>,
    /// Bounds of the stamp (inclusive), for keeping the centre inside.
    pub x_range: (f64, f64),
    pub y_range: (f64, f64),
    /// 3: the model is averaged over each pixel (3×3 Gauss–Legendre points), so the fit
    /// gives the optical PSF and the pixel's own blur is added back exactly afterwards;
    /// needed for narrow PSFs, whose point-sampled fits depend on where the star falls
    /// within its pixel. 1 (or 0): the model is evaluated at pixel centres.
    pub subsample: usize,
    /// Side of the pixel the reported widths are sampled with, in stamp pixels (0 means
    /// 1). A color mosaic is fitted on 2×2 superpixels but reports widths as its own
    /// pixels sample the star: 0.5.
    pub report_pixel: f64,
    /// Pixels farther than this from the centre are fitted at their centres even when
    /// `subsample` > 1: the wings are smooth enough (0 = no limit).
    pub core_radius: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum PsfModel {
    Gaussian,
    Moffat,
}

#[derive(Debug, Clone, Copy)]
pub struct PsfFit {
    pub model: PsfModel,
    pub sky: f64,
    pub amplitude: f64,
    pub x0: f64,
    pub y0: f64,
    pub q: [f64; 3],
    pub beta: f64,
    /// Sum of squared residuals and number of pixels fitted.
    pub ssr: f64,
    pub n: usize,
    /// Covariance of (qa, qb, qc) at the solution (sandwich estimator).
    pub q_cov: [[f64; 3]; 3],
    /// Standard errors of x0 and y0.
    pub pos_err: (f64, f64),
    /// (major, minor) FWHM of the fitted profile as the pixels sample it.
    pub sampled_axes: (f64, f64),
}

impl PsfFit {
    fn width_factor(&self) -> f64 {
        match self.model {
            PsfModel::Gaussian => 2.0 * std::f64::consts::LN_2,
            PsfModel::Moffat => 2f64.powf(1.0 / self.beta) - 1.0,
        }
    }

    /// Eigenvalues of the shape form, (largest, smallest).
    fn eigen(&self) -> (f64, f64) {
        let [a, b, c] = self.q;
        let mean = 0.5 * (a + c);
        let d = (0.25 * (a - c).powi(2) + b * b).sqrt();
        (mean + d, mean - d)
    }

    /// (major, minor) FWHM of the fitted model itself, pixels.
    pub fn model_axes(&self) -> (f64, f64) {
        let (big, small) = self.eigen();
        let k = self.width_factor();
        (2.0 * (k / small).sqrt(), 2.0 * (k / big).sqrt())
    }

    /// (major, minor) FWHM as the pixels sample the star, pixels.
    pub fn fwhm_axes(&self) -> (f64, f64) {
        self.sampled_axes
    }

    /// Profile of unit amplitude at offset (dx, dy).
    fn shape_at(&self, dx: f64, dy: f64) -> f64 {
        let [a, b, c] = self.q;
        let u = a * dx * dx + 2.0 * b * dx * dy + c * dy * dy;
        match self.model {
            PsfModel::Gaussian => (-0.5 * u).exp(),
            PsfModel::Moffat => (1.0 + u).powf(-self.beta),
        }
    }

    /// FWHM along the model's principal axes of the model averaged over a pixel of side
    /// `pixel`: half-maximum found by bisection (to 2⁻²⁴ of the search range, far below a
    /// thousandth of a pixel), the pixel average by 4×4-point Gauss–Legendre quadrature
    /// (exact for polynomials of degree 7 along each axis).
    fn pixel_averaged_axes(&self, pixel: f64) -> (f64, f64) {
        let average = |x: f64, y: f64| {
            let mut s = 0.0;
            for &(ox, wx) in &GL4 {
                for &(oy, wy) in &GL4 {
                    s += wx * wy * self.shape_at(x + pixel * ox, y + pixel * oy);
                }
            }
            s
        };
        let half = 0.5 * average(0.0, 0.0);
        let (major, _) = self.model_axes();
        let theta = self.angle_deg().to_radians();
        let half_width = |dx: f64, dy: f64| {
            let (mut lo, mut hi) = (0.0, 2.0 * major + 2.0);
            for _ in 0..24 {
                let mid = 0.5 * (lo + hi);
                if average(mid * dx, mid * dy) > half {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            lo + hi
        };
        let (s, c) = theta.sin_cos();
        (half_width(c, s), half_width(-s, c))
    }

    /// The widths as the stamp's pixels sample the profile: the model's own where the
    /// model was fitted to pixel centres, the pixel-averaged model's where it was
    /// averaged over each pixel.
    fn sampled_on(mut self, stamp: &Stamp) -> Self {
        if stamp.subsample > 1 {
            let pixel = if stamp.report_pixel > 0.0 {
                stamp.report_pixel
            } else {
                1.0
            };
            self.sampled_axes = self.pixel_averaged_axes(pixel);
        }
        self
    }

    /// Geometric mean of the axes: the star's FWHM by the contract.
    pub fn fwhm(&self) -> f64 {
        let (a, b) = self.fwhm_axes();
        (a * b).sqrt()
    }

    /// Position angle of the major axis, degrees from +x towards +y, in [0, 180).
    pub fn angle_deg(&self) -> f64 {
        let [a, b, c] = self.q;
        // The major axis is the eigenvector of the smallest eigenvalue.
        let theta = 0.5 * (2.0 * b).atan2(a - c) + std::f64::consts::FRAC_PI_2;
        theta.to_degrees().rem_euclid(180.0)
    }

    /// sqrt(1 − (b/a)²) of the star as sampled, without noise-bias correction.
    pub fn eccentricity_raw(&self) -> f64 {
        let (major, minor) = self.sampled_axes;
        (1.0 - (minor / major).powi(2)).max(0.0).sqrt()
    }

    /// Eccentricity of this star alone, with the fit noise's upward bias removed.
    ///
    /// The shape components e1 = (qa − qc)/(qa + qc), e2 = 2qb/(qa + qc) carry noise, so
    /// `shape::debiased_eccentricity` takes their bias away, with the variances of e1 and
    /// e2 propagated from the fit covariance. A frame's stars share its PSF, and
    /// `shape::shrink` uses that to do better for each star of a frame.
    pub fn eccentricity(&self) -> f64 {
        let (e1, e2) = self.shape_components();
        super::shape::debiased_eccentricity(e1, e2, self.shape_variance())
    }

    /// Variance of each of the sampled shape components (e1, e2), propagated from the fit
    /// covariance of (qa, qb, qc) and scaled as the pixel sampling scales |e|.
    pub fn shape_variance(&self) -> f64 {
        let [a, b, c] = self.q;
        let t = a + c;
        // Gradients of the model's e1 and e2 with respect to (qa, qb, qc).
        let g1 = [2.0 * c / (t * t), 0.0, -2.0 * a / (t * t)];
        let g2 = [-2.0 * b / (t * t), 2.0 / t, -2.0 * b / (t * t)];
        let var = |g: [f64; 3]| {
            let mut s = 0.0;
            for i in 0..3 {
                for j in 0..3 {
                    s += g[i] * self.q_cov[i][j] * g[j];
                }
            }
            s.max(0.0)
        };
        let model = (((a - c) / t).powi(2) + (2.0 * b / t).powi(2)).sqrt();
        let (e1, e2) = self.shape_components();
        let sampled = e1.hypot(e2);
        // Sampling by the pixel shrinks |e| by a factor that hardly depends on |e|;
        // near round the ratio is taken as 1.
        let scale = if model > 1e-6 {
            (sampled / model).min(1.0)
        } else {
            1.0
        };
        0.5 * (var(g1) + var(g2)) * scale * scale
    }

    /// Shape components (e1, e2) of the star as sampled: |e| = (1 − q²)/(1 + q²) with
    /// q the axis ratio, oriented at twice the position angle.
    pub fn shape_components(&self) -> (f64, f64) {
        let (major, minor) = self.sampled_axes;
        let q2 = (minor / major).powi(2);
        let e = (1.0 - q2) / (1.0 + q2);
        let two_theta = 2.0 * self.angle_deg().to_radians();
        (e * two_theta.cos(), e * two_theta.sin())
    }

    /// Integral of the fitted profile above the sky over the whole plane, ADU.
    /// Gaussian: 2πA / sqrt(det Q); Moffat: πA / ((β − 1) sqrt(det Q)).
    pub fn total_flux(&self) -> f64 {
        let [a, b, c] = self.q;
        let det = (a * c - b * b).max(1e-300);
        match self.model {
            PsfModel::Gaussian => 2.0 * std::f64::consts::PI * self.amplitude / det.sqrt(),
            PsfModel::Moffat if self.beta > 1.0 => {
                std::f64::consts::PI * self.amplitude / ((self.beta - 1.0) * det.sqrt())
            }
            PsfModel::Moffat => f64::INFINITY,
        }
    }

    /// Root-mean-square residual per pixel.
    pub fn rms_residual(&self) -> f64 {
        (self.ssr / self.n.max(1) as f64).sqrt()
    }
}

/// Starting point for a fit.
#[derive(Debug, Clone, Copy)]
pub struct Guess {
    pub sky: f64,
    pub amplitude: f64,
    pub x0: f64,
    pub y0: f64,
    pub fwhm: f64,
}

/// Fit an elliptical Gaussian. `None` when the fit fails or leaves the allowed region.
pub fn fit_gaussian(stamp: &Stamp, guess: Guess) -> Option<PsfFit> {
    let sigma = guess.fwhm / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt());
    let q = 1.0 / (sigma * sigma);
    let p0 = [guess.sky, guess.amplitude, guess.x0, guess.y0, q, 0.0, q];
    fit(stamp, PsfModel::Gaussian, p0, gaussian_at).map(|f| f.sampled_on(stamp))
}

/// The better-fitting profile: a Gaussian, then, when `try_moffat` says the Gaussian's
/// star is worth it, a Moffat started from it, kept when its residuals are smaller.
/// The pixel-sampled widths are worked out for the chosen fit only.
pub fn fit_profile(
    stamp: &Stamp,
    guess: Guess,
    try_moffat: impl FnOnce(&PsfFit) -> bool,
) -> Option<PsfFit> {
    let sigma = guess.fwhm / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt());
    let q = 1.0 / (sigma * sigma);
    let p0 = [guess.sky, guess.amplitude, guess.x0, guess.y0, q, 0.0, q];
    let gauss = fit(stamp, PsfModel::Gaussian, p0, gaussian_at)?;
    let chosen = if try_moffat(&gauss) {
        match moffat_from(stamp, &gauss) {
            Some(m) if m.ssr < gauss.ssr => m,
            _ => gauss,
        }
    } else {
        gauss
    };
    Some(chosen.sampled_on(stamp))
}

/// Fit an elliptical Moffat profile, starting from a Gaussian fit's shape (widths as
/// the model's own; `fit_profile` adds the pixel sampling).
fn moffat_from(stamp: &Stamp, from: &PsfFit) -> Option<PsfFit> {
    let beta = 3.0;
    // Same FWHM as the Gaussian: λ_m = λ_g · (2^(1/β) − 1) / (2 ln 2).
    let scale = (2f64.powf(1.0 / beta) - 1.0) / (2.0 * std::f64::consts::LN_2);
    let p0 = [
        from.sky,
        from.amplitude,
        from.x0,
        from.y0,
        from.q[0] * scale,
        from.q[1] * scale,
        from.q[2] * scale,
        1.0 / beta,
    ];
    fit(stamp, PsfModel::Moffat, p0, moffat_at)
}

/// 4-point Gauss–Legendre nodes and weights on [−½, ½] (Abramowitz & Stegun 25.4.30,
/// halved from [−1, 1]).
const GL4: [(f64, f64); 4] = [
    (-0.430_568_155_797_026_3, 0.173_927_422_568_726_9),
    (-0.169_990_521_792_428_1, 0.326_072_577_431_273_1),
    (0.169_990_521_792_428_1, 0.326_072_577_431_273_1),
    (0.430_568_155_797_026_3, 0.173_927_422_568_726_9),
];

/// 3-point Gauss–Legendre nodes and weights on [−½, ½].
const GL3: [(f64, f64); 3] = [
    (-0.387_298_334_620_741_7, 5.0 / 18.0),
    (0.0, 8.0 / 18.0),
    (0.387_298_334_620_741_7, 5.0 / 18.0),
];

/// The gradient entries both profiles share, for a profile of unit amplitude `shape`
/// whose model derivative with respect to u is `dm_du`.
#[inline(always)]
fn shared_gradient(p: &[f64], dx: f64, dy: f64, shape: f64, dm_du: f64, grad: &mut [f64]) {
    let (qa, qb, qc) = (p[4], p[5], p[6]);
    grad[0] = 1.0;
    grad[1] = shape;
    grad[2] = dm_du * (-2.0 * (qa * dx + qb * dy));
    grad[3] = dm_du * (-2.0 * (qb * dx + qc * dy));
    grad[4] = dm_du * dx * dx;
    grad[5] = dm_du * 2.0 * dx * dy;
    grad[6] = dm_du * dy * dy;
}

#[inline(always)]
fn quadratic_form(p: &[f64], x: f64, y: f64) -> (f64, f64, f64) {
    let dx = x - p[2];
    let dy = y - p[3];
    (
        dx,
        dy,
        p[4] * dx * dx + 2.0 * p[5] * dx * dy + p[6] * dy * dy,
    )
}

/// Gaussian value and gradient; parameters (sky, A, x0, y0, qa, qb, qc).
#[inline(always)]
fn gaussian_at(p: &[f64; 7], x: f64, y: f64, grad: &mut [f64; 7]) -> f64 {
    let (dx, dy, u) = quadratic_form(p, x, y);
    let e = (-0.5 * u).exp();
    shared_gradient(p, dx, dy, e, -0.5 * p[1] * e, grad);
    p[0] + p[1] * e
}

/// Moffat value and gradient; parameters (sky, A, x0, y0, qa, qb, qc, 1/β).
///
/// The fit runs in 1/β: as β grows the profile tends to a Gaussian whose width form is
/// 2β times the Moffat's, so along the valley of near-equal fits the shape form varies
/// linearly in 1/β (and hyperbolically in β), which Gauss–Newton steps follow far better.
#[inline(always)]
fn moffat_at(p: &[f64; 8], x: f64, y: f64, grad: &mut [f64; 8]) -> f64 {
    let (dx, dy, u) = quadratic_form(p, x, y);
    let (amp, beta) = (p[1], 1.0 / p[7]);
    let l = u.ln_1p();
    let s = (-beta * l).exp();
    // ∂m/∂(1/β) = ∂m/∂β · (−β²), with ∂m/∂β = −A·s·ln(1 + u).
    grad[7] = amp * s * l * beta * beta;
    shared_gradient(p, dx, dy, s, -amp * beta * s / (1.0 + u), grad);
    p[0] + amp * s
}

/// Model value and gradient for the pixel centred at (x, y): point-sampled, or averaged
/// over the pixel (3×3 Gauss–Legendre points) when `averaged`.
#[inline(always)]
fn pixel_model<const NP: usize>(
    at: impl Fn(&[f64; NP], f64, f64, &mut [f64; NP]) -> f64,
    p: &[f64; NP],
    x: f64,
    y: f64,
    averaged: bool,
    grad: &mut [f64; NP],
) -> f64 {
    if !averaged {
        return at(p, x, y, grad);
    }
    let mut g = [0.0; NP];
    let mut value = 0.0;
    *grad = [0.0; NP];
    for &(ox, wx) in &GL3 {
        for &(oy, wy) in &GL3 {
            let w = wx * wy;
            value += w * at(p, x + ox, y + oy, &mut g);
            for (a, b) in grad.iter_mut().zip(&g) {
                *a += w * b;
            }
        }
    }
    value
}

fn allowed(model: PsfModel, p: &[f64], stamp: &Stamp) -> bool {
    let (amp, x0, y0, qa, qb, qc) = (p[1], p[2], p[3], p[4], p[5], p[6]);
    if !p.iter().all(|v| v.is_finite()) || amp <= 0.0 || qa <= 0.0 || qc <= 0.0 {
        return false;
    }
    if qa * qc - qb * qb <= 0.0 {
        return false;
    }
    if x0 < stamp.x_range.0 || x0 > stamp.x_range.1 || y0 < stamp.y_range.0 || y0 > stamp.y_range.1
    {
        return false;
    }
    let k = match model {
        PsfModel::Gaussian => 2.0 * std::f64::consts::LN_2,
        PsfModel::Moffat => {
            let beta = 1.0 / p[7];
            if !(1.01..=60.0).contains(&beta) {
                return false;
            }
            2f64.powf(1.0 / beta) - 1.0
        }
    };
    let mean = 0.5 * (qa + qc);
    let d = (0.25 * (qa - qc).powi(2) + qb * qb).sqrt();
    let (big, small) = (mean + d, mean - d);
    let minor = 2.0 * (k / big).sqrt();
    let major = 2.0 * (k / small).sqrt();
    let span = (stamp.x_range.1 - stamp.x_range.0).max(stamp.y_range.1 - stamp.y_range.0);
    // Narrower than half a pixel is no longer a width the pixels can show; wider than
    // twice the stamp is no longer constrained by it.
    minor >= 0.5 && major <= 2.0 * span.max(1.0)
}

/// Levenberg–Marquardt on the stamp for a model with `NP` parameters, `at` giving its
/// value and gradient at a point. The parameter count is a constant so the normal
/// equations live in fixed-size arrays the compiler can unroll.
fn fit<const NP: usize>(
    stamp: &Stamp,
    model: PsfModel,
    p0: [f64; NP],
    at: impl Fn(&[f64; NP], f64, f64, &mut [f64; NP]) -> f64 + Copy,
) -> Option<PsfFit> {
    let n = stamp.v.len();
    if n <= NP + 2 || stamp.x.len() != n || stamp.y.len() != n {
        return None;
    }
    let mut p = p0;
    if !allowed(model, &p, stamp) {
        return None;
    }
    let averaged = stamp.subsample > 1;
    let core2 = if stamp.core_radius > 0.0 {
        stamp.core_radius * stamp.core_radius
    } else {
        f64::INFINITY
    };
    let evaluate = |p: &[f64; NP]| {
        let mut jtj = [[0.0; NP]; NP];
        let mut jtr = [0.0; NP];
        let mut grad = [0.0; NP];
        let mut ssr = 0.0;
        for ((&x, &y), &v) in stamp.x.iter().zip(&stamp.y).zip(&stamp.v) {
            let inner = averaged && (x - p[2]).powi(2) + (y - p[3]).powi(2) <= core2;
            let r = v - pixel_model(at, p, x, y, inner, &mut grad);
            ssr += r * r;
            for a in 0..NP {
                jtr[a] += grad[a] * r;
                for b in a..NP {
                    jtj[a][b] += grad[a] * grad[b];
                }
            }
        }
        for a in 0..NP {
            for b in 0..a {
                jtj[a][b] = jtj[b][a];
            }
        }
        (ssr, jtj, jtr)
    };
    let (mut ssr, mut jtj, mut jtr) = evaluate(&p);
    // Damping as Marquardt (1963), scaled by the diagonal of JᵀJ, updated from the gain
    // ratio (actual over predicted decrease) as in Nielsen (1999) and Madsen, Nielsen &
    // Tingleff (2004, "Methods for non-linear least squares problems", section 3.2):
    // a fixed up-and-down schedule zigzags on the Moffat's curved β-width valley.
    let mut lambda = 1e-3;
    let mut nu = 2.0;
    for _ in 0..60 {
        let mut a = jtj;
        for i in 0..NP {
            a[i][i] += lambda * jtj[i][i].max(1e-12);
        }
        let step = linalg::solve(&a, &jtr);
        let mut trial = p;
        if let Some(step) = step {
            for i in 0..NP {
                trial[i] += step[i];
            }
        }
        let Some(step) = step.filter(|_| allowed(model, &trial, stamp)) else {
            lambda *= nu;
            nu *= 2.0;
            if lambda > 1e10 {
                break;
            }
            continue;
        };
        // Predicted decrease of the sum of squares for this step: hᵀ(Jᵀr + λ·D·h).
        let predicted: f64 = (0..NP)
            .map(|i| step[i] * (jtr[i] + lambda * jtj[i][i].max(1e-12) * step[i]))
            .sum();
        let (trial_ssr, trial_jtj, trial_jtr) = evaluate(&trial);
        if trial_ssr < ssr {
            // Converged when χ² fell by less than 0.01, with the pixel variance taken
            // from the fit itself: the parameters then sit within a few hundredths of
            // their own standard errors of the minimum.
            let settled = ssr - trial_ssr < 0.01 * trial_ssr / (n - NP) as f64;
            let rho = (ssr - trial_ssr) / predicted.max(1e-300);
            (p, ssr, jtj, jtr) = (trial, trial_ssr, trial_jtj, trial_jtr);
            lambda = (lambda * (1.0 / 3.0f64).max(1.0 - (2.0 * rho - 1.0).powi(3))).max(1e-12);
            nu = 2.0;
            if settled {
                break;
            }
        } else {
            lambda *= nu;
            nu *= 2.0;
            if lambda > 1e10 {
                // No downhill step left: at a minimum (or against a bound).
                break;
            }
        }
    }
    if !ssr.is_finite() {
        return None;
    }
    let (q_cov, pos_err) = covariance(stamp, &p, at, averaged, core2, &jtj)?;
    let mut fit = PsfFit {
        model,
        sky: p[0],
        amplitude: p[1],
        x0: p[2],
        y0: p[3],
        q: [p[4], p[5], p[6]],
        beta: if model == PsfModel::Moffat {
            1.0 / p[7]
        } else {
            f64::INFINITY
        },
        ssr,
        n,
        q_cov,
        pos_err,
        sampled_axes: (0.0, 0.0),
    };
    fit.sampled_axes = fit.model_axes();
    Some(fit)
}

/// The covariance of the shape form (qa, qb, qc).
type ShapeCovariance = [[f64; 3]; 3];

/// The fit's covariance of the shape form (qa, qb, qc) and the position errors (x, y),
/// by the heteroscedasticity-consistent "sandwich" estimator of White (1980,
/// Econometrica 48, 817): (JᵀJ)⁻¹ (Σ rᵢ² jᵢ jᵢᵀ) (JᵀJ)⁻¹. Pixel noise grows with the
/// star's own light (Poisson), so one variance for all pixels would understate the
/// errors that matter most, those of the core.
fn covariance<const NP: usize>(
    stamp: &Stamp,
    p: &[f64; NP],
    at: impl Fn(&[f64; NP], f64, f64, &mut [f64; NP]) -> f64 + Copy,
    averaged: bool,
    core2: f64,
    jtj: &[[f64; NP]; NP],
) -> Option<(ShapeCovariance, (f64, f64))> {
    let inv = Cholesky::new(jtj)?.inverse();
    let mut meat = [[0.0; NP]; NP];
    let mut grad = [0.0; NP];
    for ((&x, &y), &v) in stamp.x.iter().zip(&stamp.y).zip(&stamp.v) {
        // The same model as the fit: averaged over the pixel in the core only.
        let inner = averaged && (x - p[2]).powi(2) + (y - p[3]).powi(2) <= core2;
        let m = pixel_model(at, p, x, y, inner, &mut grad);
        // Leverage h = jᵀ(JᵀJ)⁻¹j: the core pixels that pin the shape down have high
        // leverage and small residuals; the HC3 form of MacKinnon & White (1985, J.
        // Econometrics 29, 305) divides their squared residuals by (1 − h)².
        let mut lev = 0.0;
        for a in 0..NP {
            let mut row = 0.0;
            for b in 0..NP {
                row += inv[a][b] * grad[b];
            }
            lev += grad[a] * row;
        }
        let r2 = (v - m).powi(2) / (1.0 - lev.min(0.99)).powi(2);
        for a in 0..NP {
            for b in a..NP {
                meat[a][b] += r2 * grad[a] * grad[b];
            }
        }
    }
    for a in 0..NP {
        for b in 0..a {
            meat[a][b] = meat[b][a];
        }
    }
    let cov = |i: usize, j: usize| {
        let mut s = 0.0;
        for a in 0..NP {
            for b in 0..NP {
                s += inv[i][a] * meat[a][b] * inv[b][j];
            }
        }
        s
    };
    let mut q_cov = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            q_cov[i][j] = cov(4 + i, 4 + j);
        }
    }
    Some((
        q_cov,
        (cov(2, 2).max(0.0).sqrt(), cov(3, 3).max(0.0).sqrt()),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stamp_from(f: impl Fn(f64, f64) -> f64, half: i64) -> Stamp {
        let mut s = Stamp {
            x_range: (0.0, (2 * half) as f64),
            y_range: (0.0, (2 * half) as f64),
            ..Default::default()
        };
        for y in 0..=2 * half {
            for x in 0..=2 * half {
                s.x.push(x as f64);
                s.y.push(y as f64);
                s.v.push(f(x as f64, y as f64));
            }
        }
        s
    }

    #[test]
    fn gaussian_fwhm_is_2_sqrt_2ln2_sigma() {
        // Analytic: FWHM = 2·sqrt(2 ln 2)·σ for a Gaussian.
        let sigma = 1.7;
        let s = stamp_from(
            |x, y| {
                10.0 + 500.0
                    * (-((x - 10.3).powi(2) + (y - 9.8).powi(2)) / (2.0 * sigma * sigma)).exp()
            },
            10,
        );
        let g = Guess {
            sky: 10.0,
            amplitude: 400.0,
            x0: 10.0,
            y0: 10.0,
            fwhm: 3.0,
        };
        let fit = fit_gaussian(&s, g).unwrap();
        let expected = 2.0 * (2.0 * std::f64::consts::LN_2).sqrt() * sigma;
        assert!(
            (fit.fwhm() - expected).abs() < 1e-6,
            "{} vs {expected}",
            fit.fwhm()
        );
        assert!((fit.x0 - 10.3).abs() < 1e-8 && (fit.y0 - 9.8).abs() < 1e-8);
        assert!(fit.eccentricity_raw() < 1e-3);
        // Flux: 2π A σ² (analytic integral).
        let flux = 2.0 * std::f64::consts::PI * 500.0 * sigma * sigma;
        assert!((fit.total_flux() - flux).abs() / flux < 1e-6);
    }

    #[test]
    fn moffat_fwhm_is_2_alpha_sqrt_2_pow_inv_beta_minus_1() {
        // Moffat (1969): FWHM = 2α·sqrt(2^(1/β) − 1); elongated along 30°.
        let (alpha_major, alpha_minor, beta, th) = (3.0f64, 2.0f64, 3.2f64, 30f64.to_radians());
        let (c, s) = (th.cos(), th.sin());
        let f = |x: f64, y: f64| {
            let (dx, dy) = (x - 12.2, y - 11.6);
            let u = (c * dx + s * dy) / alpha_major;
            let v = (-s * dx + c * dy) / alpha_minor;
            5.0 + 800.0 * (1.0 + u * u + v * v).powf(-beta)
        };
        let s = stamp_from(f, 12);
        let g = fit_gaussian(
            &s,
            Guess {
                sky: 5.0,
                amplitude: 700.0,
                x0: 12.0,
                y0: 12.0,
                fwhm: 4.0,
            },
        )
        .unwrap();
        let m = moffat_from(&s, &g).unwrap();
        assert!(m.ssr < g.ssr);
        let k = (2f64.powf(1.0 / beta) - 1.0).sqrt();
        let (maj, min) = m.fwhm_axes();
        assert!((maj - 2.0 * alpha_major * k).abs() < 1e-5, "{maj}");
        assert!((min - 2.0 * alpha_minor * k).abs() < 1e-5, "{min}");
        assert!((m.beta - beta).abs() < 1e-5);
        assert!((m.angle_deg() - 30.0).abs() < 1e-4, "{}", m.angle_deg());
        let ecc = (1.0 - (alpha_minor / alpha_major).powi(2)).sqrt();
        assert!((m.eccentricity_raw() - ecc).abs() < 1e-6);
    }
}
