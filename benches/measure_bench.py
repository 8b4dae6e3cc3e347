"""Speed and memory of one large frame: subwatch's decode + full measurement against sep's
background + extraction alone, on the same 6000x4000 16-bit file, in the same run.

usage: python benches/measure_bench.py [path/to/subwatch] [--repeat N]
                                      [--psf moffat|gaussian] [--fwhm PX] [--beta B]
(needs the cross-check environment: numpy, astropy, sep). The default frame is the one
the closing figures quote: Moffat beta 3.5, FWHM 3.5 px; the options try other stars.
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import sep
from astropy.io import fits


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("binary", nargs="?", default="target/release/subwatch")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--psf", default="moffat", choices=["moffat", "gaussian"])
    parser.add_argument("--fwhm", type=float, default=3.5)
    parser.add_argument("--beta", type=float, default=3.5)
    opts = parser.parse_args()
    binary = os.path.abspath(opts.binary)
    repeat = opts.repeat
    with tempfile.TemporaryDirectory() as tmp:
        frame = os.path.join(tmp, "big.fits")
        t0 = time.perf_counter()
        subprocess.run(
            [binary, "render", "--out", frame, "--width", "6000", "--height", "4000",
             "--stars", "3000", "--psf", opts.psf, "--beta", str(opts.beta), "--fwhm", str(opts.fwhm),
             "--hot-pixels", "200", "--cosmic-rays", "200", "--seed", "5"],
            check=True,
        )
        print(f"rendered 6000x4000 frame with 3000 stars ({opts.psf}, FWHM {opts.fwhm} px) "
              f"in {time.perf_counter() - t0:.1f} s")
        pixels = 6000 * 4000

        ours = []
        peak_kib = 0
        for _ in range(repeat):
            t0 = time.perf_counter()
            with open(os.path.join(tmp, "out.json"), "w") as sink:
                proc = subprocess.Popen([binary, "measure", "--json", frame], stdout=sink)
                # wait4 gives this one child's peak resident memory (not the renderer's).
                _, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
            ours.append(time.perf_counter() - t0)
            peak_kib = max(peak_kib, usage.ru_maxrss)
            if proc.returncode != 0:
                sys.exit(f"subwatch measure failed with exit code {proc.returncode}")
        with open(os.path.join(tmp, "out.json")) as f:
            rec = json.loads(f.readline())
        theirs = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            data = fits.getdata(frame).astype(np.float32)
            bkg = sep.Background(data)
            sub = data - bkg
            sep.set_extract_pixstack(5_000_000)
            objs = sep.extract(sub, 5.0, err=bkg.globalrms)
            theirs.append(time.perf_counter() - t0)
        ours_s, theirs_s = min(ours), min(theirs)
        print(f"subwatch decode + full measurement: {ours_s:.2f} s (best of {repeat}; all: {', '.join(f'{t:.2f}' for t in ours)}); "
              f"{rec['star_count']} stars measured, FWHM {rec['fwhm_px']:.3f} px")
        print(f"sep read + background + extraction: {theirs_s:.2f} s (best of {repeat}); {len(objs)} objects")
        print(f"ratio subwatch / sep: {ours_s / theirs_s:.2f}")
        print(f"subwatch peak resident memory: {peak_kib / 1024:.0f} MiB = {peak_kib * 1024 / pixels:.1f} bytes per pixel (target <= 12)")


if __name__ == "__main__":
    main()
