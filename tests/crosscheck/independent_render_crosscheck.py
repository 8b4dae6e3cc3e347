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
    blurred profile is nearly but not exactly Gaussian), which is checked first.
Targets as for rendered frames: FWHM within 3 %, eccentricity within 0.05, background
within 0.5 sigma, noise within 5 %.

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

from common import Checks

OVER = 8


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


def render(rng, psf, fwhm, beta, ecc, theta, size=1024, n=250, sky_e=600.0, gain=1.5, rn=5.0, bias=1000.0):
    f = profile(psf, fwhm, beta, ecc, theta)
    img = np.zeros((size, size))
    sub = (np.arange(OVER) + 0.5) / OVER - 0.5
    reach = int(6 * fwhm) + 3
    for _ in range(n):
        x0, y0 = rng.uniform(20, size - 20, 2)
        flux = 10 ** rng.uniform(3.0, 5.3)  # electrons
        ix, iy = int(round(x0)), int(round(y0))
        yy, xx = np.mgrid[iy - reach:iy + reach + 1, ix - reach:ix + reach + 1]
        dx = xx[..., None, None] + sub[None, None, None, :] - x0
        dy = yy[..., None, None] + sub[None, None, :, None] - y0
        pix = f(dx, dy).mean(axis=(2, 3))
        ys = slice(max(iy - reach, 0), min(iy + reach + 1, size))
        xs = slice(max(ix - reach, 0), min(ix + reach + 1, size))
        img[ys, xs] += flux * pix[ys.start - (iy - reach):ys.stop - (iy - reach), xs.start - (ix - reach):xs.stop - (ix - reach)]
    electrons = rng.poisson(img + sky_e) + rng.normal(0.0, rn, img.shape)
    adu = np.clip(np.round(bias + electrons / gain), 0, 65535).astype(np.uint16)
    noise = math.sqrt((sky_e + rn * rn) / gain ** 2 + 1.0 / 12.0)
    return adu, bias + sky_e / gain, noise, f


def main() -> int:
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("independent_render_crosscheck")
    # The Gaussian sampled width two ways: numeric against the analytic sum of variances
    # (exact for the variance, within about 0.1 % for the half-maximum width), so the
    # numeric truth for Moffat profiles can be trusted.
    f = profile("gaussian", 2.5, 0.0, 0.0, 0.0)
    numeric = sampled_axes(f, 2.5, 0.0)[0]
    analytic = math.sqrt(2.5 ** 2 + 8 * math.log(2) / 12)
    checks.record("numeric pixel-sampled FWHM of a Gaussian matches the analytic one",
                  abs(numeric / analytic - 1) < 0.002, f"{numeric:.4f} vs {analytic:.4f} px")
    cases = [
        ("gaussian", 2.5, 0.0, 0.0, 0.0),
        ("gaussian", 5.0, 0.0, 0.3, 0.6),
        ("moffat", 3.0, 2.5, 0.0, 0.0),
        ("moffat", 4.0, 4.0, 0.5, 0.6),
    ]
    rng = np.random.default_rng(2026)
    with tempfile.TemporaryDirectory() as tmp:
        for psf, fwhm, beta, ecc, theta in cases:
            name = f"{psf}_fwhm{fwhm}" + (f"_b{beta}" if psf == "moffat" else "") + f"_e{ecc}"
            data, bkg, noise, f = render(rng, psf, fwhm, beta, ecc, theta)
            path = os.path.join(tmp, name + ".fits")
            fits.PrimaryHDU(data).writeto(path)
            major, minor = sampled_axes(f, fwhm, theta)
            true_fwhm = math.sqrt(major * minor)
            true_ecc = math.sqrt(max(0.0, 1 - (minor / major) ** 2))
            out = subprocess.run([binary, "measure", "--json", path], capture_output=True, text=True)
            rec = json.loads(out.stdout.splitlines()[0]) if out.stdout else {}
            if rec.get("status") != "ok":
                checks.record(f"{name}: measured", False, out.stderr.strip()[:200])
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
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
