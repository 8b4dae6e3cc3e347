"""Every FITS storage type subwatch reads, written by astropy (an outside writer).

The FITS standard stores an image as BITPIX 8, 16, 32, 64 (integers), -32 or -64
(IEEE floats), with physical value = BZERO + BSCALE x stored value and, for
integers, a BLANK value marking undefined pixels (FITS Standard 4.0, sections
4.4.2 and 5.3; section numbers from memory). One rendered star field is written
in each storage type with the same physical values, and subwatch must measure
every one of them exactly as it measures the float32 copy. astropy reads each
file back first, so a check can only fail on subwatch's side.

Pairs that cannot hold the same values as the float32 reference get their own
float32 twin: an 8-bit copy (quantised to steps of 256 ADU) and copies with
undefined pixels (BLANK in integers, NaN in floats).

usage: python storage_crosscheck.py path/to/subwatch
"""

from __future__ import annotations

import os
import sys
import tempfile

import numpy as np
from astropy.io import fits

import common as C

METRICS = ["star_count", "fwhm_px", "eccentricity", "background_adu", "noise_adu", "snr_median", "hfr_px"]


def write_stored(path: str, stored: np.ndarray, bscale: float | None = None, bzero: float | None = None,
                 blank: int | None = None) -> None:
    """Write `stored` as is, with the scaling keywords given (no rescaling by astropy)."""
    hdu = fits.PrimaryHDU(stored)
    if bscale is not None:
        hdu.header["BSCALE"] = bscale
    if bzero is not None:
        hdu.header["BZERO"] = bzero
    if blank is not None:
        hdu.header["BLANK"] = blank
    hdu.writeto(path, overwrite=True)


def physical(path: str) -> np.ndarray:
    """The physical values as astropy reads them (BLANK as NaN; uint=False, or astropy
    would read BITPIX 16 + BZERO 32768 as unsigned integers, where BLANK has no NaN)."""
    with fits.open(path, uint=False) as hdul:
        return np.array(hdul[0].data, dtype=np.float64)


def same_record(a: dict, b: dict) -> tuple[bool, str]:
    worst = ("", 0.0)
    for key in METRICS:
        x, y = a.get(key), b.get(key)
        if x is None or y is None:
            if x != y:
                return False, f"{key}: {x} vs {y}"
            continue
        d = abs(x - y) / max(abs(x), abs(y), 1e-12)
        if d > worst[1]:
            worst = (key, d)
    stars_a = [(s["x"], s["y"]) for s in a.get("stars", [])]
    stars_b = [(s["x"], s["y"]) for s in b.get("stars", [])]
    if len(stars_a) != len(stars_b) or not np.allclose(stars_a, stars_b, rtol=0, atol=1e-6):
        return False, f"star lists differ ({len(stars_a)} vs {len(stars_b)} stars)"
    ok = worst[1] <= 1e-9
    return ok, f"{a['star_count']} stars; worst relative difference {worst[1]:.1e} ({worst[0] or 'none'})"


def main() -> int:
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = C.Checks("storage_crosscheck")
    with tempfile.TemporaryDirectory() as tmp:
        rendered = os.path.join(tmp, "rendered.fits")
        C.render(binary, rendered, os.path.join(tmp, "truth.json"), width=640, height=480, stars=180,
                 psf="moffat", beta=3.0, fwhm=3.2, seed=11, hot_pixels=5, cosmic_rays=5)
        values, _ = C.read_image(rendered)
        values = values.astype(np.float64)
        assert np.all(values == np.round(values)) and values.min() >= 0 and values.max() <= 65535

        files: dict[str, tuple[str, str, np.ndarray]] = {}

        def add(name: str, twin: str, expected: np.ndarray, write) -> None:
            path = os.path.join(tmp, f"{name}.fits")
            write(path)
            files[name] = (path, twin, expected)

        add("float32", "", values, lambda p: write_stored(p, values.astype(">f4")))
        add("float64", "float32", values, lambda p: write_stored(p, values.astype(">f8")))
        add("int16_bzero", "float32", values,
            lambda p: write_stored(p, (values - 32768).astype(">i2"), bzero=32768))
        add("int32", "float32", values, lambda p: write_stored(p, values.astype(">i4")))
        add("int64", "float32", values, lambda p: write_stored(p, values.astype(">i8")))
        # stored = 2 (v + 1000): physical = -1000 + 0.5 x stored, exact in binary.
        add("int32_scaled", "float32", values,
            lambda p: write_stored(p, (2 * (values + 1000)).astype(">i4"), bscale=0.5, bzero=-1000))
        add("float32_scaled", "float32", values,
            lambda p: write_stored(p, ((values - 500) / 4).astype(">f4"), bscale=4.0, bzero=500))

        # 8 bits: steps of 8 ADU from 50 ADU below the sky (the brightest stars clip
        # at the top, as a saturated sensor would), physical = base + 8 x stored.
        base = float(np.median(values)) - 50.0
        coarse = np.clip(np.round((values - base) / 8), 0, 255)
        add("coarse_float32", "", base + 8 * coarse,
            lambda p: write_stored(p, (base + 8 * coarse).astype(">f4")))
        add("uint8", "coarse_float32", base + 8 * coarse,
            lambda p: write_stored(p, coarse.astype(np.uint8), bscale=8.0, bzero=base))

        # Undefined pixels: a few sky pixels and one through a star's wing.
        rng = np.random.default_rng(3)
        holes = (rng.integers(0, values.shape[0], 40), rng.integers(0, values.shape[1], 40))
        holed = values.copy()
        holed[holes] = np.nan
        add("nan_float32", "", holed, lambda p: write_stored(p, holed.astype(">f4")))
        blank_stored = values.astype(">i4")
        blank_stored[holes] = -999
        add("blank_int32", "nan_float32", holed, lambda p: write_stored(p, blank_stored, blank=-999))
        blank16 = (values - 32768).astype(">i2")
        blank16[holes] = -32768
        add("blank_int16_bzero", "nan_float32", holed,
            lambda p: write_stored(p, blank16, bzero=32768, blank=-32768))

        # astropy reads every file back to the values intended (so the files are right).
        for name, (path, _, expected) in files.items():
            got = physical(path)
            same = np.array_equal(np.isnan(got), np.isnan(expected)) and np.allclose(
                np.nan_to_num(got), np.nan_to_num(expected), rtol=0, atol=1e-6)
            if not same:
                checks.record(f"{name}: astropy reads back the intended values", False)

        records, code, err = C.measure(binary, [files[n][0] for n in files])
        by_name = dict(zip(files, records))
        for name, (path, twin, _) in files.items():
            rec = by_name.get(name)
            if rec is None or rec.get("status") != "ok":
                checks.record(f"{name}: measured", False, (rec or {}).get("error", err.strip()[:200]))
                continue
            if not twin:
                checks.info(name, f"reference: {rec['star_count']} stars, FWHM {rec['fwhm_px']} px")
                continue
            ok, detail = same_record(rec, by_name[twin])
            checks.record(f"{name} measures as {twin}", ok, detail)
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
