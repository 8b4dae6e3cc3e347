"""Frames made without subwatch's renderer, measured by subwatch against their truth.

The frames are drawn here with numpy alone: elliptical Gaussian and Moffat (1969)
profiles integrated over each pixel by 8x8 oversampling, Poisson photon noise, Gaussian
read noise, a bias, a gain, rounding to whole ADU, written by astropy. The truth is
worked out here too, independently of subwatch:
  - sky level = bias + sky/gain; noise = sqrt(sky + read noise^2)/gain, plus 1/12 ADU^2
    from the rounding (variance of a uniform step; analytic);
  - the FWHM the pixels sample: the profile averaged over a 1x1 pixel and its
    half-maximum found along the major and minor axes; the geometric mean of the two
    (the contract's FWHM). For a Gaussian this comes within about 0.1 % of
    sqrt(FWHM^2 + 8 ln 2 / 12) (the pixel adds 1/12 px^2 of variance, analytic; the
    blurred profile is nearly but not exactly Gaussian), which is checked first;
  - star positions: each star is drawn at (x0, y0) in numpy pixel coordinates, where the
    centre of array element [row, col] is at x0 = col, y0 = row (checked here on a
    noise-free star by its first moment). They are turned into FITS pixel coordinates
    by astropy.wcs with origin=0 (numpy) on a linear WCS that maps FITS pixel p to world
    value p; in the FITS convention the centre of the first pixel is 1.0 on every axis
    and x runs along NAXIS1 (Greisen & Calabretta 2002, A&A 395, 1061, sec. 2.1.4;
    from memory). So x_fits = col + 1 and y_fits = row + 1, worked out without
    subwatch, and a half-pixel or one-pixel shift, or x and y swapped, cannot pass;
  - per-star SNR by the CCD equation (Merline & Howell 1995, from memory)
    N / sqrt(N + n_pix (sky + read noise^2 + gain^2/12)) in electrons, over the pixels
    whose centre lies within one sampled FWHM of the star (the aperture in which the
    project states its SNR thresholds; a project convention, not a published figure).
Targets as for rendered frames (DEVELOPERS.md): FWHM within 3 %, eccentricity within
0.05, background within 0.5 sigma, noise within 5 %, centroid RMS <= 0.1 px over bright
(SNR > 50) isolated stars, recall >= 0.9 of the stars with SNR > 20; and the median
position offset, in x and in y separately, within 0.05 px of zero. One case is a
frame three times wider than tall with every star further right than the frame is tall,
and one is three times taller than wide with every star further down than the frame is
wide: a position with x and y exchanged would lie outside the frame.

usage: python independent_render_crosscheck.py path/to/subwatch
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import tempfile

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

from common import Checks, nearest

OVER = 8
MATCH_RADIUS = 1.5      # px: a measured star within this of a truth star is that star (as measure_crosscheck.py)
BRIGHT_SNR = 50.0       # centroid targets hold for stars above this SNR (DEVELOPERS.md)
RECALL_SNR = 20.0       # recall target holds for stars above this SNR (DEVELOPERS.md)
TARGET_RMS = 0.10       # px, radial centroid RMS (DEVELOPERS.md)
TARGET_RECALL = 0.90    # DEVELOPERS.md
TARGET_OFFSET = 0.05    # px, |median offset| in x and in y separately (our limit: well under a
                        # half-pixel or one-pixel error, well over the median's scatter here)
MIN_BRIGHT = 20         # fewer bright isolated stars than this and the centroid checks cannot judge


def profile(psf: str, fwhm: float, beta: float, ecc: float, theta: float):
    """Unit-flux profile f(dx, dy) with geometric-mean FWHM `fwhm` and eccentricity `ecc`."""
    q = math.sqrt(1.0 - ecc * ecc)  # axis ratio b/a
    fa, fb = fwhm / math.sqrt(q), fwhm * math.sqrt(q)
    c, s = math.cos(theta), math.sin(theta)

    def f(dx, dy):
        u, v = c * dx + s * dy, -s * dx + c * dy
        if psf == "gaussian":
            sa, sb = fa / 2.3548200450309493, fb / 2.3548200450309493
            return np.exp(-0.5 * ((u / sa) ** 2 + (v / sb) ** 2)) / (2 * math.pi * sa * sb)
        k = math.sqrt(2 ** (1 / beta) - 1)
        aa, ab = fa / (2 * k), fb / (2 * k)
        return (beta - 1) / (math.pi * aa * ab) * (1 + (u / aa) ** 2 + (v / ab) ** 2) ** (-beta)

    return f


def sampled_axes(f, fwhm: float, theta: float) -> tuple[float, float]:
    """Half-maximum widths along the major and minor axes of f averaged over a pixel
    (the pixel average by a 20x20 midpoint rule, radii on a 0.002 px grid)."""
    sub = (np.arange(20) + 0.5) / 20 - 0.5
    ox, oy = np.meshgrid(sub, sub)

    def averaged(x, y):
        return f(x[:, None, None] + ox[None], y[:, None, None] + oy[None]).mean(axis=(1, 2))

    centre = averaged(np.zeros(1), np.zeros(1))[0]
    widths = []
    for ang in (theta, theta + math.pi / 2):
        r = np.arange(0, 3 * fwhm, 0.002)
        line = averaged(r * math.cos(ang), r * math.sin(ang))
        i = int(np.argmax(line < 0.5 * centre))
        t = (line[i - 1] - 0.5 * centre) / (line[i - 1] - line[i])
        widths.append(2 * (r[i - 1] + t * 0.002))
    return widths[0], widths[1]


def draw_star(img: np.ndarray, f, x0: float, y0: float, flux: float, reach: int, r_snr: float) -> tuple[float, int]:
    """Add a star of `flux` electrons centred at numpy pixel coordinates (x0 = column,
    y0 = row; the centre of img[row, col] is at (col, row)), each pixel the mean of
    OVER x OVER sub-pixel samples. Returns the electrons and the number of pixels whose
    centre lies within r_snr of the star (the SNR aperture)."""
    height, width = img.shape
    sub = (np.arange(OVER) + 0.5) / OVER - 0.5
    ix, iy = int(round(x0)), int(round(y0))
    yy, xx = np.mgrid[iy - reach:iy + reach + 1, ix - reach:ix + reach + 1]  # yy: rows, xx: columns
    dx = xx[..., None, None] + sub[None, None, None, :] - x0
    dy = yy[..., None, None] + sub[None, None, :, None] - y0
    pix = flux * f(dx, dy).mean(axis=(2, 3))
    inside = (yy >= 0) & (yy < height) & (xx >= 0) & (xx < width)
    img[yy[inside], xx[inside]] += pix[inside]
    core = inside & (np.hypot(xx - x0, yy - y0) <= r_snr)
    return float(pix[core].sum()), int(core.sum())


def render(rng, psf, fwhm, beta, ecc, theta, r_snr, width=1024, height=1024, n=250, xlo=20.0, ylo=20.0,
           sky_e=600.0, gain=1.5, rn=5.0, bias=1000.0):
    """A frame of `height` rows and `width` columns (NAXIS1 = width, NAXIS2 = height) with
    n stars uniform in xlo <= x0 < width - 20, ylo <= y0 < height - 20 (numpy pixel
    coordinates). Returns the ADU array, the sky level, the noise, the profile and the
    stars as rows of (x0, y0, flux e-, SNR, saturated)."""
    f = profile(psf, fwhm, beta, ecc, theta)
    img = np.zeros((height, width))
    reach = int(6 * fwhm) + 3
    stars = []
    for _ in range(n):
        x0, y0 = rng.uniform((xlo, ylo), (width - 20, height - 20))
        flux = 10 ** rng.uniform(3.0, 5.3)  # electrons
        core_e, n_pix = draw_star(img, f, x0, y0, flux, reach, r_snr)
        sky_var_e = sky_e + rn * rn + gain * gain / 12.0
        stars.append([x0, y0, flux, core_e / math.sqrt(core_e + n_pix * sky_var_e), 0.0])
    for s in stars:
        # saturated: the noise-free level reaches the 16-bit ceiling within a pixel of the centre
        ix, iy = int(round(s[0])), int(round(s[1]))
        s[4] = float(bias + (img[iy - 1:iy + 2, ix - 1:ix + 2].max() + sky_e) / gain >= 65535)
    electrons = rng.poisson(img + sky_e) + rng.normal(0.0, rn, img.shape)
    adu = np.clip(np.round(bias + electrons / gain), 0, 65535).astype(np.uint16)
    noise = math.sqrt((sky_e + rn * rn) / gain ** 2 + 1.0 / 12.0)
    return adu, bias + sky_e / gain, noise, f, np.array(stars, float).reshape(-1, 5)


def fits_pixel(x0: np.ndarray, y0: np.ndarray) -> np.ndarray:
    """numpy pixel coordinates (centre of element [row, col] at (col, row)) to FITS pixel
    coordinates, by astropy.wcs: a linear WCS with CRPIX = CRVAL = 1 and CDELT = 1 gives
    world = FITS pixel coordinate, and origin=0 declares the input numpy-style."""
    w = WCS(naxis=2)
    w.wcs.crpix = [1.0, 1.0]
    w.wcs.crval = [1.0, 1.0]
    w.wcs.cdelt = [1.0, 1.0]
    xw, yw = w.wcs_pix2world(np.asarray(x0, float), np.asarray(y0, float), 0)
    return np.column_stack([xw, yw])


def isolated(xy: np.ndarray, flux: np.ndarray, fwhm: float, width: int, height: int) -> np.ndarray:
    """Stars whose centroid a perfect method could recover (our selection, the same as
    measure_crosscheck.py's clean stars): >= 3 FWHM from the edges, no other star brighter
    than 1 % of its flux within 3 FWHM nor brighter than 10 % of it within 6 FWHM."""
    x, y = xy[:, 0], xy[:, 1]
    ok = (x > 0.5 + 3 * fwhm) & (x < width + 0.5 - 3 * fwhm) & (y > 0.5 + 3 * fwhm) & (y < height + 0.5 - 3 * fwhm)
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    np.fill_diagonal(d, np.inf)
    ratio = flux[None, :] / flux[:, None]
    return ok & ~(((d < 3 * fwhm) & (ratio > 0.01)) | ((d < 6 * fwhm) & (ratio > 0.1))).any(axis=1)


def harness_checks(checks: Checks) -> None:
    """The conventions the position truth rests on, checked before anything is measured."""
    # The Gaussian sampled width two ways: numeric against the analytic sum of variances
    # (exact for the variance, within about 0.1 % for the half-maximum width), so the
    # numeric truth for Moffat profiles can be trusted.
    f = profile("gaussian", 2.5, 0.0, 0.0, 0.0)
    numeric = sampled_axes(f, 2.5, 0.0)[0]
    analytic = math.sqrt(2.5 ** 2 + 8 * math.log(2) / 12)
    checks.record("numeric pixel-sampled FWHM of a Gaussian matches the analytic one",
                  abs(numeric / analytic - 1) < 0.002, f"{numeric:.4f} vs {analytic:.4f} px")
    # A noise-free elongated star drawn at (x0, y0) in a 64-row x 96-column array: its
    # first moment over the array is (x0, y0) with x along the columns (axis 1). For a
    # point-symmetric profile integrated over pixels the pixel-sampled first moment equals
    # the centre up to an aliasing term that is negligible at this width (analytic).
    img = np.zeros((64, 96))
    x0, y0 = 40.3, 21.7
    draw_star(img, profile("gaussian", 3.0, 0.0, 0.3, 0.6), x0, y0, 1e4, 21, 3.0)
    rows, cols = np.indices(img.shape)
    mx, my = (img * cols).sum() / img.sum(), (img * rows).sum() / img.sum()
    checks.record("harness: a star drawn at numpy (x0, y0) has its first moment at column x0, row y0",
                  abs(mx - x0) < 1e-3 and abs(my - y0) < 1e-3,
                  f"moment ({mx:.5f}, {my:.5f}) vs ({x0}, {y0}); total {img.sum():.1f} of 10000 e-")
    # astropy.wcs with origin=0 adds one pixel: the first array element's centre is FITS 1.0.
    p = fits_pixel(np.array([0.0, 95.0, 40.3]), np.array([0.0, 63.0, 21.7]))
    want = np.array([[1.0, 1.0], [96.0, 64.0], [41.3, 22.7]])
    checks.record("harness: astropy.wcs puts numpy [row 0, col 0] at FITS (1.0, 1.0), x along columns",
                  np.allclose(p, want, atol=1e-9, rtol=0), f"{p.tolist()}")
    # astropy writes a numpy array of shape (rows, columns) with NAXIS1 = columns.
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "axes.fits")
        fits.PrimaryHDU(np.zeros((3, 5), np.uint16)).writeto(path)
        hdr = fits.getheader(path)
    checks.record("harness: astropy writes a (3 rows, 5 columns) array as NAXIS1 = 5, NAXIS2 = 3",
                  (hdr["NAXIS1"], hdr["NAXIS2"]) == (5, 3), f"NAXIS1 {hdr['NAXIS1']}, NAXIS2 {hdr['NAXIS2']}")


def position_checks(checks: Checks, name: str, rec: dict, truth: np.ndarray, true_fwhm: float,
                    width: int, height: int) -> None:
    """Measured star positions against the truth (truth rows: x0, y0, flux, SNR, saturated)."""
    stars = rec.get("stars")
    if not isinstance(stars, list):
        for what in ("frame size and stars inside it", "median position offset", "centroid RMS", "recall"):
            checks.record(f"{name}: {what}", False, "no star list in the record")
        return
    mxy = np.array([[s.get("x") if s.get("x") is not None else np.nan,
                     s.get("y") if s.get("y") is not None else np.nan] for s in stars], float).reshape(-1, 2)
    n_null = int(np.sum(~np.all(np.isfinite(mxy), axis=1)))
    mxy = mxy[np.all(np.isfinite(mxy), axis=1)]
    txy = fits_pixel(truth[:, 0], truth[:, 1])
    flux, snr, sat = truth[:, 2], truth[:, 3], truth[:, 4] > 0

    # The frame is NAXIS1 = width columns by NAXIS2 = height rows; every star inside it
    # (FITS pixel coordinates run from 0.5 to NAXISn + 0.5).
    outside = int(np.sum((mxy[:, 0] < 0.5) | (mxy[:, 0] > width + 0.5) | (mxy[:, 1] < 0.5) | (mxy[:, 1] > height + 0.5)))
    ok = rec.get("width") == width and rec.get("height") == height and outside == 0 and n_null == 0
    checks.record(f"{name}: frame size and stars inside it", ok,
                  f"width {rec.get('width')} height {rec.get('height')} vs NAXIS1 {width} NAXIS2 {height}; "
                  f"{outside} of {len(mxy)} stars outside 0.5..NAXISn+0.5, {n_null} without a position")

    idx, _ = nearest(txy, mxy, MATCH_RADIUS)
    found = idx >= 0
    d = np.where(found[:, None], mxy[np.clip(idx, 0, None)] - txy if len(mxy) else np.nan, np.nan)
    bright = (snr > BRIGHT_SNR) & ~sat & isolated(txy, flux, true_fwhm, width, height)
    use = bright & found
    n_use = int(use.sum())
    if n_use >= MIN_BRIGHT:
        med_x, med_y = float(np.median(d[use, 0])), float(np.median(d[use, 1]))
        rms = float(np.sqrt(np.mean(np.sum(d[use] ** 2, axis=1))))
    else:
        med_x = med_y = rms = float("nan")
    checks.record(f"{name}: median position offset", abs(med_x) <= TARGET_OFFSET and abs(med_y) <= TARGET_OFFSET,
                  f"x {med_x:+.4f} px, y {med_y:+.4f} px (limit {TARGET_OFFSET}) over {n_use} matched of "
                  f"{int(bright.sum())} bright isolated stars (SNR > {BRIGHT_SNR:g}; at least {MIN_BRIGHT} needed)")
    checks.record(f"{name}: centroid RMS", rms <= TARGET_RMS,
                  f"{rms:.4f} px (limit {TARGET_RMS}) over the same {n_use} stars")
    # For the record only: every bright unsaturated star, blends included.
    every = (snr > BRIGHT_SNR) & ~sat & found
    if every.any():
        rms_all = float(np.sqrt(np.mean(np.sum(d[every] ** 2, axis=1))))
        checks.info(f"{name}: positions", f"radial RMS over all {int(every.sum())} matched stars with SNR > "
                    f"{BRIGHT_SNR:g}, neighbours included: {rms_all:.4f} px; median offset over the "
                    f"{int(found.sum())} matched stars: x {float(np.median(d[found, 0])):+.4f}, "
                    f"y {float(np.median(d[found, 1])):+.4f} px; {len(mxy)} stars listed")
    sel = (snr > RECALL_SNR) & ~sat
    recall = float(np.mean(found[sel])) if sel.any() else float("nan")
    checks.record(f"{name}: recall", recall >= TARGET_RECALL,
                  f"{recall:.3f} ({int(found[sel].sum())} of {int(sel.sum())} stars with SNR > {RECALL_SNR:g} "
                  f"found within {MATCH_RADIUS} px; limit {TARGET_RECALL})")


def main() -> int:
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("independent_render_crosscheck")
    harness_checks(checks)
    # (psf, FWHM, beta, eccentricity, angle, width = NAXIS1, height = NAXIS2, xlo, ylo)
    cases = [
        ("gaussian", 2.5, 0.0, 0.0, 0.0, 1024, 1024, 20.0, 20.0),
        ("gaussian", 5.0, 0.0, 0.3, 0.6, 1024, 1024, 20.0, 20.0),
        ("moffat", 3.0, 2.5, 0.0, 0.0, 1024, 1024, 20.0, 20.0),
        ("moffat", 4.0, 4.0, 0.5, 0.6, 1024, 1024, 20.0, 20.0),
        # Asymmetric: 1536 wide x 512 tall with every star at x0 >= 560 (> height), and
        # 512 wide x 1536 tall with every star at y0 >= 560 (> width), elongated off the axes.
        ("gaussian", 3.0, 0.0, 0.2, 0.3, 1536, 512, 560.0, 20.0),
        ("moffat", 3.5, 3.0, 0.3, -0.4, 512, 1536, 20.0, 560.0),
    ]
    rng = np.random.default_rng(2026)
    with tempfile.TemporaryDirectory() as tmp:
        for psf, fwhm, beta, ecc, theta, width, height, xlo, ylo in cases:
            name = f"{psf}_fwhm{fwhm}" + (f"_b{beta}" if psf == "moffat" else "") + f"_e{ecc}"
            if (width, height) != (1024, 1024):
                name += f"_{width}x{height}"
            f = profile(psf, fwhm, beta, ecc, theta)
            major, minor = sampled_axes(f, fwhm, theta)
            true_fwhm = math.sqrt(major * minor)
            true_ecc = math.sqrt(max(0.0, 1 - (minor / major) ** 2))
            data, bkg, noise, f, truth = render(rng, psf, fwhm, beta, ecc, theta, max(true_fwhm, 1.5),
                                                width=width, height=height, xlo=xlo, ylo=ylo)
            path = os.path.join(tmp, name + ".fits")
            fits.PrimaryHDU(data).writeto(path)
            out = subprocess.run([binary, "measure", "--json", "--stars", path], capture_output=True, text=True)
            try:
                rec = json.loads(out.stdout.splitlines()[0]) if out.stdout.strip() else {}
            except json.JSONDecodeError as exc:
                rec = {"status": f"unreadable output ({exc})"}
            if out.returncode != 0 or rec.get("status") != "ok":
                why = f"exit {out.returncode}, status {rec.get('status')}: {out.stderr.strip()[:200]}"
                for what in ("targets", "frame size and stars inside it", "median position offset",
                             "centroid RMS", "recall"):
                    checks.record(f"{name}: {what}", False, why)
                continue
            fwhm_err = rec["fwhm_px"] / true_fwhm - 1
            ecc_err = rec["eccentricity"] - true_ecc
            bkg_err = (rec["background_adu"] - bkg) / noise
            noise_err = rec["noise_adu"] / noise - 1
            detail = (f"FWHM {rec['fwhm_px']:.3f} vs {true_fwhm:.3f} px ({fwhm_err:+.2%}), eccentricity "
                      f"{rec['eccentricity']:.3f} vs {true_ecc:.3f}, background {bkg_err:+.3f} sigma, "
                      f"noise {noise_err:+.2%}, {rec['star_count']} stars")
            ok = abs(fwhm_err) <= 0.03 and abs(ecc_err) <= 0.05 and abs(bkg_err) <= 0.5 and abs(noise_err) <= 0.05
            checks.record(f"{name}: targets", ok, detail)
            position_checks(checks, name, rec, truth, true_fwhm, width, height)
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
