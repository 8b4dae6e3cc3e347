"""Shared helpers for the subwatch cross-check scripts.

Everything here is plain plumbing: running the binary, writing the same pixels
in several FITS encodings with astropy, matching star lists, and counting
pass/fail results.  The physics and the reference measurements live in the
scripts that import this module.
"""

from __future__ import annotations

import gzip
import json
import math
import os
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass, field

import numpy as np
from astropy.io import fits
from scipy.spatial import cKDTree

# FWHM of a Gaussian in units of its sigma: 2*sqrt(2 ln 2) (analytic).
GAUSS_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
# Variance added along each axis by integrating over a 1x1 pixel (uniform
# distribution of width 1 has variance 1/12; analytic).
PIXEL_VARIANCE = 1.0 / 12.0


# --------------------------------------------------------------------------
# pass / fail bookkeeping
# --------------------------------------------------------------------------
@dataclass
class Checks:
    """Counts checks; one call of record() is one check."""

    label: str
    passed: int = 0
    failed: int = 0
    failures: list = field(default_factory=list)

    def record(self, name: str, ok: bool, detail: str = "") -> bool:
        tag = "PASS" if ok else "FAIL"
        print(f"[{tag}] {name}" + (f" -- {detail}" if detail else ""), flush=True)
        if ok:
            self.passed += 1
        else:
            self.failed += 1
            self.failures.append(name)
        return ok

    def info(self, name: str, detail: str) -> None:
        """Printed, never counted."""
        print(f"[INFO] {name} -- {detail}", flush=True)

    def finish(self) -> int:
        # Per-script summary line; run.sh adds these up into the final line.
        print(f"{self.label}: {self.passed} passed, {self.failed} failed", flush=True)
        return 0 if self.failed == 0 else 1


# --------------------------------------------------------------------------
# running the binary
# --------------------------------------------------------------------------
class BinaryError(RuntimeError):
    pass


def run_cmd(argv: list[str], timeout: float = 300.0) -> subprocess.CompletedProcess:
    t0 = time.monotonic()
    proc = subprocess.run(argv, capture_output=True, text=True, timeout=timeout)
    dt = time.monotonic() - t0
    print(f"    $ {' '.join(argv[:2])} ... ({dt:.1f} s, exit {proc.returncode})", flush=True)
    return proc


def render(binary: str, out: str, truth: str, **opts) -> dict:
    """Run `subwatch render` and return the truth JSON as a dict."""
    argv = [binary, "render", "--out", out, "--truth", truth]
    for key, val in opts.items():
        # --key=value so that negative numbers are not taken for options
        argv.append(f"--{key.replace('_', '-')}={val}")
    proc = run_cmd(argv)
    if proc.returncode != 0:
        raise BinaryError(f"render failed (exit {proc.returncode}): {proc.stderr.strip()[:500]}")
    if not os.path.exists(out) or not os.path.exists(truth):
        raise BinaryError("render exited 0 but did not write the frame and/or the truth file")
    with open(truth) as fh:
        return json.load(fh)


def measure(binary: str, paths: list[str], with_stars: bool = True) -> tuple[list[dict], int, str]:
    """Run `subwatch measure --json [--stars]`; return (records, exit code, stderr)."""
    argv = [binary, "measure", "--json"] + (["--stars"] if with_stars else []) + list(paths)
    proc = run_cmd(argv)
    records = []
    for line in proc.stdout.splitlines():
        line = line.strip()
        if not line:
            continue
        try:
            records.append(json.loads(line))
        except json.JSONDecodeError as exc:
            raise BinaryError(f"measure printed a line that is not JSON: {line[:200]!r} ({exc})")
    return records, proc.returncode, proc.stderr


# --------------------------------------------------------------------------
# FITS encodings of the same pixels
# --------------------------------------------------------------------------
# Keywords that describe the array layout/scaling; astropy rewrites them for
# each encoding, so they are dropped from the header we carry over.
_STRUCTURAL = {
    "SIMPLE", "XTENSION", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "NAXIS3",
    "EXTEND", "PCOUNT", "GCOUNT", "BSCALE", "BZERO", "BLANK", "CHECKSUM", "DATASUM", "EXTNAME",
}


def read_image(path: str) -> tuple[np.ndarray, fits.Header]:
    """First HDU with 2-D image data (handles tile-compressed extensions)."""
    with fits.open(path) as hdul:
        for hdu in hdul:
            if hdu.data is not None and getattr(hdu.data, "ndim", 0) == 2:
                return np.array(hdu.data), hdu.header.copy()
    raise ValueError(f"{path}: no 2-D image HDU")


def carried_header(header: fits.Header) -> fits.Header:
    out = fits.Header()
    for card in header.cards:
        if card.keyword in _STRUCTURAL or card.keyword.startswith("NAXIS"):
            continue
        if card.keyword in ("COMMENT", "HISTORY", ""):
            continue
        out.append(card, end=True)
    return out


def write_uint16(path: str, data_u16: np.ndarray, header: fits.Header) -> None:
    # astropy stores uint16 as BITPIX 16 with BZERO 32768 (FITS standard
    # unsigned-integer convention of the FITS standard 4.0; section number
    # not quoted, from memory).
    assert data_u16.dtype == np.uint16
    fits.PrimaryHDU(data_u16, header=carried_header(header)).writeto(path, overwrite=True)


def write_encodings(src_path: str, outdir: str, stem: str) -> dict[str, str]:
    """Write the pixels of src_path as uint16(BZERO), float32, RICE tiles, gzip.

    Returns {encoding name: path}.  The physical pixel values are identical in
    all of them (float32 holds every integer < 2**24 exactly; RICE_1 is lossless
    for integer data).
    """
    data, header = read_image(src_path)
    if data.dtype != np.uint16:
        # Accept whatever the renderer wrote; physical values must be integers in 0..65535.
        if not np.all(np.isfinite(data)) or np.any(data != np.round(data)) or data.min() < 0 or data.max() > 65535:
            raise ValueError(f"rendered data are not 16-bit unsigned integers (dtype {data.dtype})")
        data = data.astype(np.uint16)
    hdr = carried_header(header)
    paths = {}

    p = os.path.join(outdir, f"{stem}_u16.fits")
    write_uint16(p, data, header)
    paths["uint16"] = p

    p = os.path.join(outdir, f"{stem}_f32.fits")
    fits.PrimaryHDU(data.astype(np.float32), header=hdr).writeto(p, overwrite=True)
    paths["float32"] = p

    p = os.path.join(outdir, f"{stem}_rice.fits")
    comp = fits.CompImageHDU(data=data, header=hdr, compression_type="RICE_1")
    fits.HDUList([fits.PrimaryHDU(), comp]).writeto(p, overwrite=True)
    paths["rice"] = p

    p = os.path.join(outdir, f"{stem}_u16.fits.gz")
    with open(paths["uint16"], "rb") as fin, gzip.open(p, "wb", compresslevel=6) as fout:
        shutil.copyfileobj(fin, fout)
    paths["gzip"] = p

    # Self-check of this harness: every encoding reads back to the same values.
    for name, path in paths.items():
        back, _ = read_image(path)
        if not np.array_equal(back.astype(np.float64), data.astype(np.float64)):
            raise AssertionError(f"harness bug: {name} encoding does not round-trip")
    return paths


# --------------------------------------------------------------------------
# matching
# --------------------------------------------------------------------------
def nearest(xy_from: np.ndarray, xy_to: np.ndarray, radius: float) -> tuple[np.ndarray, np.ndarray]:
    """For each row of xy_from the index of the nearest row of xy_to within
    radius (or -1) and the distance (inf when none)."""
    xy_from = np.asarray(xy_from, float).reshape(-1, 2)
    xy_to = np.asarray(xy_to, float).reshape(-1, 2)
    if len(xy_from) == 0 or len(xy_to) == 0:
        return np.full(len(xy_from), -1, int), np.full(len(xy_from), np.inf)
    tree = cKDTree(xy_to)
    dist, idx = tree.query(xy_from, k=1, distance_upper_bound=radius)
    idx = np.where(np.isfinite(dist), idx, -1)
    return idx.astype(int), dist


def num(v) -> float:
    """JSON number or null -> float (nan for null/missing)."""
    if v is None:
        return float("nan")
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")


def fmt(v, spec: str = ".3f") -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    if isinstance(v, (int, np.integer)):
        return str(v)
    return format(v, spec)


def print_table(headers: list[str], rows: list[list[str]]) -> None:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(headers)]
    line = "  ".join(h.rjust(w) if i else h.ljust(w) for i, (h, w) in enumerate(zip(headers, widths)))
    print(line)
    print("-" * len(line))
    for r in rows:
        print("  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths))))
    sys.stdout.flush()
