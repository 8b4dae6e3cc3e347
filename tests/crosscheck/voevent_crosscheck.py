"""VOEvent documents of a rendered night, checked by the reference library: every
document subwatch writes must validate against the VOEvent 2.0 XML schema (IVOA
Recommendation, 2011) as shipped in the `voevent-parse` package, through lxml; the
position voevent-parse reads back must agree with the anomaly's J2000 position in
`subwatch night --json` to 0.01 arcsec, and its time with the first detection's frame.

The night is subwatch's own invented scenario (`render-night`: a moving object and a
one-frame flash in a field of the invented Kestrel Ridge Observatory).

usage: python voevent_crosscheck.py PATH/TO/subwatch
"""

from __future__ import annotations

import datetime
import glob
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile

import voeventparse

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import Checks  # noqa: E402


def sep_arcsec(ra1, dec1, ra2, dec2) -> float:
    """Angular separation by the haversine formula (analytic)."""
    r1, d1, r2, d2 = map(math.radians, (ra1, dec1, ra2, dec2))
    h = math.sin((d2 - d1) / 2) ** 2 + math.cos(d1) * math.cos(d2) * math.sin((r2 - r1) / 2) ** 2
    return math.degrees(2 * math.asin(min(1.0, math.sqrt(h)))) * 3600.0


def main() -> int:
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("voevent_crosscheck")
    work = tempfile.mkdtemp(prefix="subwatch-voevent-")
    try:
        frames = os.path.join(work, "night")
        out = subprocess.run(
            [binary, "render-night", "--out", frames, "--frames", "12"], capture_output=True, text=True, timeout=600
        )
        checks.record("render-night writes a night", out.returncode == 0, out.stderr[-300:])
        events = os.path.join(work, "events")
        cfg = os.path.join(work, "subwatch.toml")
        with open(cfg, "w") as f:
            f.write(
                f'[watch]\nfolders = ["{frames}"]\n[store]\npath = "{work}/s.db"\n'
                f'[voevent]\nfolder = "{events}"\nkinds = ["moving", "transient", "variable", "new_source"]\n'
                'authority = "ivo://kestrel-ridge.example/subwatch"\nauthor = "Kestrel Ridge Observatory (invented)"\n'
            )
        run = subprocess.run(
            [binary, "night", frames, "--json", "--config", cfg], capture_output=True, text=True, timeout=900
        )
        doc = json.loads(run.stdout)
        wanted = [
            a
            for a in doc["anomalies"]
            if a["kind"] in ("moving", "transient", "variable", "new_source")
            and not (a["kind"] == "transient" and a.get("detail", {}).get("cosmic_ray"))
            and a.get("ra_deg") is not None
        ]
        files = sorted(glob.glob(os.path.join(events, "*.xml")))
        checks.record(
            "one document per anomaly of the chosen kinds with a position",
            len(files) == len(wanted) and len(files) > 0,
            f"{len(files)} documents for {len(wanted)} anomalies ({sorted(a['kind'] for a in wanted)})",
        )
        times = {f["path"]: f.get("time_unix") for f in doc["frames"]}
        for path in files:
            name = os.path.basename(path)
            with open(path, "rb") as f:
                v = voeventparse.load(f)
            checks.record(f"{name}: valid VOEvent 2.0 (voevent-parse's schema, lxml)", voeventparse.valid_as_v2_0(v))
            pos = voeventparse.get_event_position(v)
            best = min(
                wanted,
                key=lambda a: sep_arcsec(pos.ra, pos.dec, a["ra_deg"], a["dec_deg"]),
            )
            d = sep_arcsec(pos.ra, pos.dec, best["ra_deg"], best["dec_deg"])
            checks.record(
                f"{name}: position read back within 0.01 arcsec of the anomaly's",
                d < 0.01 and pos.system == "UTC-ICRS-TOPO",
                f"{d:.5f} arcsec, {pos.system}, error radius {pos.err} {pos.units}",
            )
            t = voeventparse.get_event_time_as_utc(v)
            first = times.get(best["detections"][0]["path"])
            expect = datetime.datetime.fromtimestamp(first, datetime.timezone.utc) if first else None
            checks.record(
                f"{name}: time is the first detection's frame",
                expect is not None and abs((t.replace(tzinfo=datetime.timezone.utc) - expect).total_seconds()) < 0.01,
                f"{t} vs {expect}",
            )
            params = voeventparse.get_toplevel_params(v)
            cut = params.get("cutout", {}).get("value")
            png = os.path.join(events, cut) if cut else None
            checks.record(
                f"{name}: What names its cutout, a PNG written beside it",
                png is not None and open(png, "rb").read(8) == b"\x89PNG\r\n\x1a\n",
                str(cut),
            )
            checks.record(
                f"{name}: What names the kind and the frames; Who the authority",
                params.get("kind", {}).get("value") == best["kind"]
                and int(params.get("frames", {}).get("value", 0)) == len(best["detections"])
                and str(v.Who.AuthorIVORN) == "ivo://kestrel-ridge.example/subwatch",
                json.dumps({k: p.get("value") for k, p in params.items()}),
            )
        # A second run writes nothing again: one document per anomaly.
        again = subprocess.run(
            [binary, "night", frames, "--json", "--config", cfg], capture_output=True, text=True, timeout=900
        )
        checks.record(
            "a second analysis of the same night writes no document twice",
            len(glob.glob(os.path.join(events, "*.xml"))) == len(files) and again.returncode in (0, 1),
            again.stderr[-200:],
        )
        # Attached to the morning mail on request: the daemon records the night, writes
        # the documents, and `report --send` (no SMTP server: an .eml file) attaches them.
        live = os.path.join(work, "live-events")
        reports = os.path.join(work, "reports")
        cfg2 = os.path.join(work, "live.toml")
        with open(cfg2, "w") as f:
            f.write(
                f'[watch]\nfolders = ["{frames}"]\nsettle_seconds = 0.2\nchecks_seconds = 2\n'
                f'[store]\npath = "{work}/live.db"\n[report]\nfolder = "{reports}"\n'
                '[mail]\nfrom = "subwatch@kestrel-ridge.example"\nto = ["observer@kestrel-ridge.example"]\n'
                f'[voevent]\nfolder = "{live}"\nkinds = ["moving", "transient", "variable", "new_source"]\n'
                'authority = "ivo://kestrel-ridge.example/subwatch"\nattach = true\n'
            )
        import sqlite3
        import time
        import signal
        import email
        from email import policy

        daemon = subprocess.Popen([binary, "watch", "--config", cfg2], stderr=subprocess.DEVNULL)
        n_frames = len(glob.glob(os.path.join(frames, "*.fits")))
        deadline = time.time() + 120
        n = 0
        while time.time() < deadline:
            try:
                n = sqlite3.connect(f"{work}/live.db").execute(
                    "SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL"
                ).fetchone()[0]
            except sqlite3.Error:
                n = 0
            if n >= n_frames and len(glob.glob(os.path.join(live, "*.xml"))) > 0:
                break
            time.sleep(0.2)
        time.sleep(3)
        daemon.send_signal(signal.SIGTERM)
        daemon.wait(timeout=60)
        written = sorted(os.path.basename(p) for p in glob.glob(os.path.join(live, "*.xml")))
        checks.record(
            "the daemon writes the documents as it finds the anomalies",
            n >= n_frames and len(written) > 0,
            f"{n} of {n_frames} frames judged, {len(written)} documents",
        )
        r = subprocess.run(
            [binary, "report", "--config", cfg2, "--night", "2026-03-14", "--send"],
            capture_output=True, text=True, timeout=600,
        )
        emls = sorted(glob.glob(os.path.join(reports, "*.eml")))
        attached = []
        if emls:
            with open(emls[-1], "rb") as f:
                msg = email.message_from_bytes(f.read(), policy=policy.default)
            for part in msg.iter_attachments():
                if part.get_filename() and part.get_filename().endswith(".xml"):
                    attached.append(part.get_filename())
                    body = part.get_content()
                    raw = body if isinstance(body, bytes) else body.encode()
                    ok = voeventparse.valid_as_v2_0(voeventparse.loads(raw))
                    checks.record(f"mail attachment {part.get_filename()} is a valid VOEvent (Python's email parser, voevent-parse)", ok)
        all_now = sorted(os.path.basename(p) for p in glob.glob(os.path.join(live, "*.xml")))
        checks.record(
            "report --send attaches every document of the night (attach = true)",
            r.returncode == 0 and attached and sorted(attached) == all_now,
            f"exit {r.returncode}; attached {len(attached)} of {len(all_now)}; {r.stderr[-200:]}",
        )
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
