"""Calibration frames written with numpy and astropy alone (no subwatch code makes
them), graded by `subwatch night DIR --json`: a clean set must pass without a single
warning, and each planted fault must be found with its own reason.

The scene (invented): lights of 120 s at -10 C through filter L, with five flats at
40 % of full scale, five darks of 120 s at -10 C and five bias frames; then the faults:
a flat at 8 % and one at 95 % of full scale, a flat whose dust shadow moved, a dark at
-4 C, a dark of 60 s, and a dark with a light leak (a glow and lit spots).

Sources: the unsigned 16-bit convention (BITPIX 16, BZERO 32768: full scale 65535) is
FITS Standard 4.0 section 4.4.2.5; Poisson and Gaussian noise from numpy; the flat
level band, the darks' 1 C and same-exposure matching are common practice.

usage: python calibration_crosscheck.py PATH/TO/subwatch
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile

import numpy as np
from astropy.io import fits

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import Checks  # noqa: E402

H, W = 300, 400
RNG = np.random.default_rng(20261202)


def write(path: str, data: np.ndarray, kind: str, exposure: float, temp: float, extra=None) -> None:
    """As a camera writes it: unsigned 16-bit through BZERO."""
    hdr = fits.Header()
    hdr["IMAGETYP"] = kind
    hdr["EXPTIME"] = exposure
    hdr["CCD-TEMP"] = temp
    hdr["SET-TEMP"] = -10.0
    hdr["XBINNING"] = 1
    hdr["FILTER"] = "L"
    hdr["DATE-OBS"] = "2026-03-14T21:30:00"
    hdr["OBJECT"] = "Kestrel Field A" if kind == "Light Frame" else kind.upper()
    for k, v in (extra or {}).items():
        hdr[k] = v
    u16 = np.clip(np.rint(data), 0, 65535).astype(np.uint16)
    fits.PrimaryHDU(data=u16, header=hdr).writeto(path, overwrite=False)


def vignetted(level: float) -> np.ndarray:
    """A flat: a smooth vignette, photon noise."""
    y, x = np.mgrid[0:H, 0:W]
    r2 = ((x - W / 2) / W) ** 2 + ((y - H / 2) / H) ** 2
    shape = 1.0 - 0.25 * r2
    return RNG.poisson(level * shape).astype(float)


def dark(level: float = 1000.0, noise: float = 10.0) -> np.ndarray:
    d = RNG.normal(level, noise, (H, W))
    # The same 25 hot pixels in every dark of the camera.
    hot = np.random.default_rng(7).integers(0, [H, W], size=(25, 2))
    d[hot[:, 0], hot[:, 1]] = 20000.0
    return d


def light() -> np.ndarray:
    img = RNG.normal(1300.0, 25.0, (H, W))
    y, x = np.mgrid[0:H, 0:W]
    for cy, cx, f in RNG.uniform([20, 20, 2000], [H - 20, W - 20, 20000], size=(40, 3)):
        img += f / (2 * np.pi * 2.0**2) * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (2 * 2.0**2))
    return img


def night(binary: str, folder: str) -> dict:
    out = subprocess.run([binary, "night", folder, "--json"], capture_output=True, text=True, timeout=600)
    if out.returncode not in (0, 1):
        raise RuntimeError(f"night exited {out.returncode}: {out.stderr}")
    return json.loads(out.stdout)


def main() -> int:
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("calibration_crosscheck")
    work = tempfile.mkdtemp(prefix="subwatch-calibration-")
    try:
        folder = os.path.join(work, "night")
        os.makedirs(folder)
        for k in range(4):
            write(os.path.join(folder, f"light_{k}.fits"), light(), "Light Frame", 120.0, -10.0)
        for k in range(5):
            write(os.path.join(folder, f"flat_{k}.fits"), vignetted(0.40 * 65535), "Flat Field", 2.0, -10.0)
            write(os.path.join(folder, f"dark_{k}.fits"), dark(), "Dark Frame", 120.0, -10.0)
            write(os.path.join(folder, f"bias_{k}.fits"), dark(990.0, 8.0), "Bias Frame", 0.0, -10.0)
        doc = night(binary, folder)
        frames = {os.path.basename(f["path"]): f for f in doc["frames"]}
        kinds = {name: f.get("kind") for name, f in frames.items()}
        checks.record(
            "every frame is listed with its kind (the contract: frames[].kind)",
            all(kinds.get(f"light_{k}.fits") == "light" for k in range(4))
            and all(kinds.get(f"flat_{k}.fits") == "flat" for k in range(5))
            and all(kinds.get(f"dark_{k}.fits") == "dark" for k in range(5))
            and all(kinds.get(f"bias_{k}.fits") == "bias" for k in range(5)),
            json.dumps(kinds),
        )
        flagged = {n: f["reasons"] for n, f in frames.items() if f.get("kind") != "light" and f["verdict"] != "ok"}
        checks.record("a clean calibration set passes with no warning", not flagged, json.dumps(flagged))
        checks.record(
            "with darks, flats and bias of the lights' settings, nothing is said missing",
            doc.get("calibration_notes") == [],
            json.dumps(doc.get("calibration_notes")),
        )

        # The faults.
        write(os.path.join(folder, "flat_low.fits"), vignetted(0.08 * 65535), "Flat Field", 2.0, -10.0)
        write(os.path.join(folder, "flat_high.fits"), vignetted(0.95 * 65535), "Flat Field", 2.0, -10.0)
        dusty = vignetted(0.40 * 65535)
        y, x = np.mgrid[0:H, 0:W]
        dusty[(x - 300) ** 2 + (y - 80) ** 2 < 25**2] *= 0.90
        write(os.path.join(folder, "flat_dust.fits"), dusty, "Flat Field", 2.0, -10.0)
        write(os.path.join(folder, "dark_warm.fits"), dark(), "Dark Frame", 120.0, -4.0)
        write(os.path.join(folder, "dark_short.fits"), dark(), "Dark Frame", 60.0, -10.0)
        leak = dark() + 3.0 * y / H * 30.0
        for cy, cx in [(50, 50), (150, 300), (250, 120), (200, 200)]:
            leak[cy - 3 : cy + 4, cx - 3 : cx + 4] += 400.0
        write(os.path.join(folder, "dark_leak.fits"), leak, "Dark Frame", 120.0, -10.0)
        doc = night(binary, folder)
        frames = {os.path.basename(f["path"]): f for f in doc["frames"]}
        expected = {
            "flat_low.fits": "flat_level_low",
            "flat_high.fits": "flat_level_high",
            "flat_dust.fits": "flat_departs",
            "dark_warm.fits": "dark_temperature_mismatch",
            "dark_short.fits": "dark_exposure_mismatch",
            "dark_leak.fits": "light_leak",
        }
        for name, reason in expected.items():
            f = frames.get(name, {})
            checks.record(
                f"{name}: found as {reason}",
                reason in f.get("reasons", []) and f.get("verdict") in ("warn", "reject"),
                f"{f.get('verdict')} {f.get('reasons')} {f.get('explanations')}",
            )
        false = {
            n: f["reasons"]
            for n, f in frames.items()
            if f.get("kind") not in (None, "light") and n not in expected and f["verdict"] != "ok"
        }
        checks.record("no false warning on the clean frames beside the faults", not false, json.dumps(false))
        level = frames.get("flat_low.fits", {}).get("explanations", [""])[0]
        checks.record(
            "the flat's level is stated against the full scale of unsigned 16 bits (65535 ADU)",
            "65535" in level and " 8 %" in level,
            level,
        )
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
