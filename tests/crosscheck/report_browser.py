"""The morning report as a newcomer sees it: `subwatch demo`, then the HTML report opened
in headless Chromium (a real browser from the Debian packages). Checks that the page
renders its plots (the plot colours are on the screenshot) and its anomaly table (in the
rendered DOM).

usage: python report_browser.py path/to/subwatch
"""

import os
import shutil
import subprocess
import sys
import tempfile

from PIL import Image

from common import Checks

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars"]


def main():
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("report_browser")
    chromium = shutil.which("chromium")
    # A check that cannot run is a failure, never a skip.
    checks.record("chromium is installed (.ci/run installs Debian's package)", chromium is not None, shutil.which("chromium") or "not found")
    if chromium is None:
        return checks.finish()
    with tempfile.TemporaryDirectory() as tmp:
        out = os.path.join(tmp, "demo")
        demo = subprocess.run([binary, "demo", "--out", out], capture_output=True, text=True)
        checks.record("subwatch demo runs", demo.returncode == 0, demo.stdout.splitlines()[0] if demo.stdout else demo.stderr[-300:])
        html = os.path.join(out, "reports", "night-2026-03-14.html")
        profile = os.path.join(tmp, "profile")
        dom = subprocess.run([chromium, *FLAGS, f"--user-data-dir={profile}", "--dump-dom", f"file://{html}"],
                             capture_output=True, text=True, timeout=120).stdout
        images = dom.count('<img src="data:image/png;base64,')
        checks.record("the page holds its plots and cutouts", images >= 10, f"{images} images")
        kinds = [k for k in ["new_source", "variable", "color", "moving", "trail", "hot_pixel", "transient"] if f"<td>{k}</td>" in dom]
        checks.record("the anomaly table lists every kind", len(kinds) == 7, ", ".join(kinds))
        shot = os.path.join(tmp, "shot.png")
        subprocess.run([chromium, *FLAGS, f"--user-data-dir={profile}", "--window-size=1000,1500",
                        f"--screenshot={shot}", f"file://{html}"], capture_output=True, timeout=120)
        ok = os.path.exists(shot)
        checks.record("a screenshot is taken", ok)
        if ok:
            img = Image.open(shot).convert("RGB")
            px = img.load()
            w, h = img.size
            # Plot markers: ok frames blue (30, 90, 200), rejected red (200, 0, 0).
            blue = red = 0
            for y in range(0, h, 2):
                for x in range(0, w, 2):
                    r, g, b = px[x, y]
                    if abs(r - 30) < 25 and abs(g - 90) < 25 and abs(b - 200) < 25:
                        blue += 1
                    elif r > 170 and g < 40 and b < 40:
                        red += 1
            checks.record("the plots are drawn on screen", blue > 200 and red > 50, f"{blue} blue and {red} red sample pixels")
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
