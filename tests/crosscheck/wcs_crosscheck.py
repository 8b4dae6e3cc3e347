#!/usr/bin/env python3
"""Cross-check the celestial coordinates that `subwatch measure --json --stars`
gives each star against astropy.wcs (Greisen & Calabretta 2002, A&A 395, 1061;
Calabretta & Greisen 2002, A&A 395, 1077; SIP: Shupe et al. 2005, ASP Conf.
Ser. 347, 491 -- references from memory) evaluated at the same pixel position.

One synthetic frame is rendered with `subwatch render`.  Its pixels are then
saved under several WCS headers built with astropy (CD matrix with rotation
and skew, PC + CDELT with mirrored parity, CDELT + CROTA2, a field containing
the celestial pole, a field across RA = 0, a non-default LONPOLE, TAN-SIP,
southern field) so that every header has real stars to convert.  For each
header and each star: angular separation between subwatch's (ra_deg, dec_deg)
and astropy's all_pix2world(x, y, 1) must be below 0.01 arcsec.

Usage: wcs_crosscheck.py PATH/TO/subwatch
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
import warnings

import numpy as np
from astropy.coordinates import angular_separation
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import common as C  # noqa: E402

TOL_ARCSEC = 0.01          # required agreement (project target)
SCALE_REL_TOL = 0.005      # fwhm_arcsec vs fwhm_px * pixel scale
RENDER = dict(seed=4242, width=640, height=480, stars=120, psf="gaussian", fwhm=3.0,
              eccentricity=0.0, angle=0.0, sky=900.0, hot_pixels=0, cosmic_rays=0)

# Nominal optics keywords (common practice: plate scale = 206.265 * pixel um /
# focal mm).  subwatch may prefer them to the WCS scale, so they are removed
# from the constructed headers whose fwhm_arcsec is checked against the WCS.
OPTICS_KEYS = ("FOCALLEN", "XPIXSZ", "YPIXSZ")

WCS_KEY_PREFIXES = ("CTYPE", "CRPIX", "CRVAL", "CDELT", "CUNIT", "CD1_", "CD2_", "PC1_", "PC2_",
                    "CROTA", "LONPOLE", "LATPOLE", "RADESYS", "EQUINOX", "EPOCH", "WCSAXES",
                    "A_", "B_", "AP_", "BP_", "MJD-OBS", "DATE-OBS", "PV1_", "PV2_", "WCSNAME")


def strip_wcs(header: fits.Header) -> fits.Header:
    out = fits.Header()
    for card in C.carried_header(header).cards:
        if card.keyword.startswith(WCS_KEY_PREFIXES):
            continue
        out.append(card, end=True)
    return out


def rot_cd(scale_deg: float, rot_deg: float, flip_x: bool = True, skew: float = 0.0) -> dict:
    """CD matrix for a pixel scale, a rotation and an optional skew (the usual
    north-up/east-left parity when flip_x; the rotation follows the CROTA2
    form of Calabretta & Greisen 2002, sec. 6.1, from memory).  astropy is
    the judge either way: only agreement with it is checked."""
    r = math.radians(rot_deg)
    sx = -scale_deg if flip_x else scale_deg
    sy = scale_deg
    return {
        "CD1_1": sx * math.cos(r), "CD1_2": -sy * math.sin(r) + skew * scale_deg,
        "CD2_1": sx * math.sin(r), "CD2_2": sy * math.cos(r),
    }


def tan(ctype_suffix: str = "") -> dict:
    return {"CTYPE1": "RA---TAN" + ctype_suffix, "CTYPE2": "DEC--TAN" + ctype_suffix,
            "CUNIT1": "deg", "CUNIT2": "deg"}


def constructed_cases(w: int, h: int) -> list[tuple[str, dict]]:
    a = 1.0 / 3600.0
    cases = []
    cases.append(("cd_rotation_skew", {**tan(), "RADESYS": "ICRS", "CRPIX1": 200.3, "CRPIX2": 310.7,
                                       "CRVAL1": 83.633, "CRVAL2": -5.391,
                                       **rot_cd(1.05 * a, 37.0, skew=0.01)}))
    r = math.radians(-115.0)
    cases.append(("pc_cdelt_mirrored", {**tan(), "RADESYS": "ICRS", "CRPIX1": w / 2 + 0.5, "CRPIX2": h / 2 + 0.5,
                                        "CRVAL1": 250.42, "CRVAL2": 36.46,
                                        "CDELT1": 1.26 * a, "CDELT2": 1.26 * a,  # CDELT1 > 0: mirrored parity
                                        "PC1_1": math.cos(r), "PC1_2": -math.sin(r),
                                        "PC2_1": math.sin(r), "PC2_2": math.cos(r)}))
    cases.append(("cdelt_crota2", {**tan(), "RADESYS": "FK5", "EQUINOX": 2000.0, "CRPIX1": 100.0, "CRPIX2": 400.0,
                                   "CRVAL1": 10.68, "CRVAL2": 41.27, "CDELT1": -0.0005, "CDELT2": 0.0005,
                                   "CROTA2": 33.0}))
    # 12"/px: the 640x480 field spans ~2.1 x 1.6 deg around dec 89.7, so the
    # pole (and every RA) lies inside it.
    cases.append(("celestial_pole_in_field", {**tan(), "RADESYS": "ICRS", "CRPIX1": w / 2 + 0.5, "CRPIX2": h / 2 + 0.5,
                                              "CRVAL1": 200.0, "CRVAL2": 89.7, **rot_cd(12.0 * a, 20.0)}))
    cases.append(("ra_wraps_zero", {**tan(), "RADESYS": "ICRS", "CRPIX1": w / 2 + 0.5, "CRPIX2": h / 2 + 0.5,
                                    "CRVAL1": 0.02, "CRVAL2": -30.0, **rot_cd(2.0 * a, -8.0)}))
    cases.append(("lonpole_170", {**tan(), "RADESYS": "ICRS", "CRPIX1": 321.0, "CRPIX2": 17.5,
                                  "CRVAL1": 120.0, "CRVAL2": 60.0, "LONPOLE": 170.0, **rot_cd(3.0 * a, 0.0)}))
    cases.append(("south_pc_unit", {**tan(), "RADESYS": "ICRS", "CRPIX1": -50.0, "CRPIX2": 600.0,
                                    "CRVAL1": 300.0, "CRVAL2": -65.0, "CDELT1": -4.0 * a, "CDELT2": 4.0 * a,
                                    "PC1_1": 1.0, "PC1_2": 0.0, "PC2_1": 0.0, "PC2_2": 1.0}))
    # TAN-SIP (Shupe et al. 2005): a few pixels of distortion at the corners.
    sip = {**tan("-SIP"), "RADESYS": "ICRS", "CRPIX1": w / 2 + 0.5, "CRPIX2": h / 2 + 0.5,
           "CRVAL1": 150.11, "CRVAL2": 2.2, **rot_cd(1.5 * a, 12.0),
           "A_ORDER": 3, "B_ORDER": 3,
           "A_2_0": 2.0e-5, "A_1_1": -1.0e-5, "A_0_2": 8.0e-6, "A_3_0": 1.0e-8, "A_1_2": -2.0e-8,
           "B_2_0": -6.0e-6, "B_1_1": 1.5e-5, "B_0_2": 1.0e-5, "B_0_3": 1.5e-8, "B_2_1": 1.0e-8}
    cases.append(("tan_sip", sip))
    return cases


def compare(rec: dict, header: fits.Header) -> tuple[bool, str, dict]:
    stars = rec.get("stars") or []
    if rec.get("status") != "ok":
        return False, f"status={rec.get('status')} error={rec.get('error')}", {}
    if not stars:
        return False, "no stars listed", {}
    xy = np.array([[C.num(s.get("x")), C.num(s.get("y"))] for s in stars])
    ra = np.array([C.num(s.get("ra_deg")) for s in stars])
    de = np.array([C.num(s.get("dec_deg")) for s in stars])
    have = np.isfinite(ra) & np.isfinite(de) & np.all(np.isfinite(xy), axis=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        w = WCS(header)
    a_ra, a_de = w.all_pix2world(xy[:, 0], xy[:, 1], 1)   # origin 1: FITS pixel convention
    sep = np.full(len(stars), np.inf)
    # astropy.coordinates.angular_separation uses the Vincenty formula (astropy docs), accurate at tiny separations
    sep[have] = np.degrees(angular_separation(np.radians(ra[have]), np.radians(de[have]),
                                              np.radians(a_ra[have]), np.radians(a_de[have]))) * 3600.0
    worst = float(np.max(sep)) if len(sep) else float("nan")
    ok = bool(have.all()) and worst <= TOL_ARCSEC
    detail = (f"{int(have.sum())}/{len(stars)} stars with ra/dec; max separation "
              f"{C.fmt(worst, '.2e')} arcsec (median {C.fmt(float(np.median(sep[have])) if have.any() else float('nan'), '.2e')})"
              f"; RA {np.nanmin(a_ra):.4f}..{np.nanmax(a_ra):.4f}, Dec {np.nanmin(a_de):.4f}..{np.nanmax(a_de):.4f}")
    if not have.all():
        detail += f"; {int((~have).sum())} stars lack ra_deg/dec_deg"
    if have.any() and worst > TOL_ARCSEC:
        i = int(np.argmax(sep))
        detail += (f"; worst star x={xy[i, 0]:.3f} y={xy[i, 1]:.3f}: subwatch ({ra[i]:.7f}, {de[i]:.7f}) "
                   f"astropy ({a_ra[i]:.7f}, {a_de[i]:.7f})")
    return ok, detail, dict(w=w)


def pixel_scale_arcsec(w: WCS) -> float:
    """sqrt(|det CD|) in arcsec/px (linear part only; common practice for the
    mean pixel scale)."""
    m = w.celestial.pixel_scale_matrix
    return math.sqrt(abs(np.linalg.det(m))) * 3600.0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("binary")
    args = ap.parse_args()
    checks = C.Checks("wcs_crosscheck")
    binary = os.path.abspath(args.binary)
    if not (os.path.isfile(binary) and os.access(binary, os.X_OK)):
        checks.record("binary present", False, f"{binary} is missing or not executable")
        return checks.finish()
    t0 = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="subwatch_wcs_") as tmp:
        frame = os.path.join(tmp, "frame.fits")
        try:
            C.render(binary, frame, os.path.join(tmp, "truth.json"), **RENDER)
            data, hdr0 = C.read_image(frame)
            data = data.astype(np.uint16) if data.dtype != np.uint16 else data
        except Exception as exc:
            checks.record("render frame for WCS checks", False, str(exc))
            return checks.finish()
        h, w = data.shape
        base_optics = strip_wcs(hdr0)
        base = base_optics.copy()
        for k in OPTICS_KEYS:
            base.remove(k, ignore_missing=True, remove_all=True)

        files: list[tuple[str, str, bool]] = []   # (case, path, counted)
        files.append(("rendered_header", frame, True))
        rice = os.path.join(tmp, "rendered_rice.fits")
        comp = fits.CompImageHDU(data=data, header=C.carried_header(hdr0), compression_type="RICE_1")
        fits.HDUList([fits.PrimaryHDU(), comp]).writeto(rice)
        files.append(("rendered_header_rice_extension", rice, True))
        for name, keys in constructed_cases(w, h):
            hd = base.copy()
            for k, v in keys.items():
                hd[k] = v
            p = os.path.join(tmp, f"{name}.fits")
            C.write_uint16(p, data, hd)
            files.append((name, p, True))
        # Not counted: a projection other than TAN (subwatch reads TAN/TAN-SIP only).
        hd = base.copy()
        for k, v in {"CTYPE1": "RA---SIN", "CTYPE2": "DEC--SIN", "CRPIX1": w / 2, "CRPIX2": h / 2,
                     "CRVAL1": 45.0, "CRVAL2": 30.0, **rot_cd(2.0 / 3600, 0.0)}.items():
            hd[k] = v
        p = os.path.join(tmp, "sin_projection.fits")
        C.write_uint16(p, data, hd)
        files.append(("sin_projection", p, False))
        # Not counted: nominal optics and a WCS that disagree on the scale.
        hd = base_optics.copy()
        for k, v in {**tan(), "CRPIX1": w / 2, "CRPIX2": h / 2, "CRVAL1": 45.0, "CRVAL2": 30.0,
                     **rot_cd(0.8 / 3600, 0.0)}.items():
            hd[k] = v
        p = os.path.join(tmp, "optics_and_wcs_disagree.fits")
        C.write_uint16(p, data, hd)
        files.append(("optics_and_wcs_disagree", p, False))
        nowcs = os.path.join(tmp, "no_wcs.fits")
        C.write_uint16(nowcs, data, base)
        files.append(("no_wcs", nowcs, True))

        try:
            recs, rc, stderr = C.measure(binary, [p for _, p, _ in files])
            if len(recs) != len(files):
                raise C.BinaryError(f"{len(recs)} JSON lines for {len(files)} files (exit {rc}): {stderr.strip()[:300]}")
        except Exception as exc:
            for name, _, counted in files:
                if counted:
                    checks.record(f"wcs/{name}", False, f"measure failed: {exc}")
            return checks.finish()

        scale_rows = []
        for (name, path, counted), rec in zip(files, recs):
            header = C.read_image(path)[1]
            if name == "no_wcs":
                stars = rec.get("stars") or []
                leaked = [s for s in stars if s.get("ra_deg") is not None or s.get("dec_deg") is not None]
                ok = rec.get("status") == "ok" and len(stars) > 0 and not leaked and rec.get("fwhm_arcsec") is None
                checks.record(f"wcs/{name}: no ra/dec, fwhm_arcsec null", ok,
                              f"status={rec.get('status')} stars={len(stars)} with ra/dec={len(leaked)} "
                              f"fwhm_arcsec={rec.get('fwhm_arcsec')}")
                continue
            if name == "optics_and_wcs_disagree":
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", FITSFixedWarning)
                    ws = pixel_scale_arcsec(WCS(header))
                nominal = 206.264806 * float(header["XPIXSZ"]) * float(header.get("XBINNING", 1)) / float(header["FOCALLEN"])
                checks.info(f"wcs/{name}", f"plate_scale_arcsec {C.fmt(C.num(rec.get('plate_scale_arcsec')), '.4f')}; "
                                           f"WCS scale {ws:.4f}; FOCALLEN/XPIXSZ scale {nominal:.4f}")
                continue
            if not counted:
                stars = rec.get("stars") or []
                n_ra = sum(1 for s in stars if s.get("ra_deg") is not None)
                if n_ra:
                    ok, detail, _ = compare(rec, header)
                    checks.info(f"wcs/{name}", f"ra/dec given; agreement with astropy {'OK' if ok else 'NOT OK'}: {detail}")
                else:
                    checks.info(f"wcs/{name}", f"status={rec.get('status')}, {len(stars)} stars, none with ra/dec "
                                               f"(projection not read)")
                continue
            ok, detail, extra = compare(rec, header)
            checks.record(f"wcs/{name}", ok, detail)
            if "w" in extra and "SIP" not in str(header.get("CTYPE1", "")):
                if any(k in header for k in OPTICS_KEYS):
                    continue  # the rendered header also carries nominal optics
                fa, fp = C.num(rec.get("fwhm_arcsec")), C.num(rec.get("fwhm_px"))
                expect = fp * pixel_scale_arcsec(extra["w"])
                scale_rows.append((name, fa, expect))

        # fwhm_arcsec = fwhm_px * pixel scale (one check over all linear-TAN headers)
        bad = [(n, fa, e) for n, fa, e in scale_rows
               if not (math.isfinite(fa) and math.isfinite(e) and abs(fa / e - 1.0) <= SCALE_REL_TOL)]
        checks.record("wcs: fwhm_arcsec = fwhm_px * sqrt|det CD| * 3600 (headers without FOCALLEN/XPIXSZ)",
                      bool(scale_rows) and not bad,
                      f"{len(scale_rows) - len(bad)}/{len(scale_rows)} headers within {SCALE_REL_TOL:.1%}"
                      + "".join(f"; {n}: {C.fmt(fa, '.4f')} vs {C.fmt(e, '.4f')}" for n, fa, e in bad[:5]))
    print(f"wcs_crosscheck took {time.monotonic() - t0:.0f} s", flush=True)
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
