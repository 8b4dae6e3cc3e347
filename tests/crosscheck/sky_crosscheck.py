"""Sky context against astropy and pyerfa (the reference libraries).

Checks, each against a target the sky issue sets:
- Sun altitude within 0.1 deg and Moon altitude within 0.3 deg of astropy's AltAz
  (geometric: no refraction, pressure 0; topocentric Moon), at latitudes 0, 35 and 60
  on several dates and hours;
- the Sun's crossings of -6, -12 and -18 deg (civil, nautical, astronomical twilight)
  within 2 minutes of the same crossings found from astropy's Sun;
- precession of coordinates of date to J2000 within 1 arcsec of pyerfa's IAU 2006
  precession matrix (erfa.pmat06).

usage: python sky_crosscheck.py path/to/subwatch
"""

import json
import subprocess
import sys

import erfa
import numpy as np
from astropy import units as u
from astropy.coordinates import AltAz, EarthLocation, get_body, get_sun
from astropy.time import Time
from astropy.utils import iers

from common import Checks

# No network here: use the IERS tables shipped with astropy-iers-data.
iers.conf.auto_download = False
iers.conf.auto_max_age = None

SITES = [(0.0, -70.0), (35.0, 10.0), (60.0, 140.0)]
DATES = ["2026-03-20", "2026-06-21", "2026-09-22", "2026-12-21"]


def sky(binary, lat, lon, iso, ra=None, dec=None):
    args = [binary, "sky", f"--latitude={lat}", f"--longitude={lon}", f"--time={iso}"]
    if ra is not None:
        args += [f"--ra={ra}", f"--dec={dec}"]
    out = subprocess.run(args, check=True, capture_output=True, text=True).stdout
    return json.loads(out)


def astropy_alts(lat, lon, times):
    loc = EarthLocation(lat=lat * u.deg, lon=lon * u.deg, height=0 * u.m)
    frame = AltAz(obstime=times, location=loc, pressure=0 * u.hPa)
    sun = get_sun(times).transform_to(frame).alt.deg
    moon = get_body("moon", times, loc).transform_to(frame).alt.deg
    return sun, moon


def crossing(lat, lon, t0, alt, rising):
    """Time (unix) when astropy's Sun crosses alt after t0 (within a day), by bisection."""
    loc = EarthLocation(lat=lat * u.deg, lon=lon * u.deg, height=0 * u.m)
    grid = t0 + np.arange(0, 86400 + 1, 600) * u.s
    alts = get_sun(grid).transform_to(AltAz(obstime=grid, location=loc, pressure=0 * u.hPa)).alt.deg - alt
    for k in range(len(grid) - 1):
        if (alts[k] > 0 >= alts[k + 1] and not rising) or (alts[k] <= 0 < alts[k + 1] and rising):
            a, b = grid[k], grid[k + 1]
            for _ in range(20):
                m = a + (b - a) / 2
                v = get_sun(m).transform_to(AltAz(obstime=m, location=loc, pressure=0 * u.hPa)).alt.deg - alt
                if (v > 0) == (not rising):
                    a = m
                else:
                    b = m
            return (a + (b - a) / 2).unix
    return None


def main():
    binary = sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch"
    checks = Checks("sky_crosscheck")
    for lat, lon in SITES:
        worst_sun = worst_moon = 0.0
        for date in DATES:
            isos = [f"{date}T{h:02d}:00:00" for h in range(0, 24, 3)]
            times = Time(isos, scale="utc")
            sun_ref, moon_ref = astropy_alts(lat, lon, times)
            for k, iso in enumerate(isos):
                d = sky(binary, lat, lon, iso)
                worst_sun = max(worst_sun, abs(d["sun_alt_deg"] - sun_ref[k]))
                worst_moon = max(worst_moon, abs(d["moon_alt_deg"] - moon_ref[k]))
        checks.record(f"Sun altitude at latitude {lat}", worst_sun < 0.1, f"worst {worst_sun:.4f} deg over {len(DATES) * 8} moments (astropy get_sun, AltAz without refraction)")
        checks.record(f"Moon altitude at latitude {lat}", worst_moon < 0.3, f"worst {worst_moon:.4f} deg (astropy get_body moon, topocentric)")

        worst_twilight = 0.0
        agree = True
        for date in DATES:
            # From local noon (roughly: 12 h minus longitude/15 in UTC) of that date.
            t0 = Time(f"{date}T12:00:00", scale="utc") - (lon / 15.0) * u.hour
            # Asked at local noon, and again at local midnight of the same night: both
            # answer for that night (dusk before the moment, dawn after it at midnight).
            for moment in [t0, t0 + 12 * u.hour]:
                for name, alt in [("civil", -6.0), ("nautical", -12.0), ("astronomical", -18.0)]:
                    d = sky(binary, lat, lon, moment.isot[:19])
                    ours = d[name]
                    dark_at_midnight = moment is not t0 and ours["sets_unix"] is not None and ours["sets_unix"] < moment.unix
                    if moment is not t0 and not dark_at_midnight:
                        continue  # the Sun is above this altitude at midnight: another night's question
                    for key, rising in [("sets_unix", False), ("rises_unix", True)]:
                        ref = crossing(lat, lon, t0, alt, rising)
                        got = ours[key]
                        if ref is None or got is None:
                            agree &= (ref is None) == (got is None)
                            continue
                        worst_twilight = max(worst_twilight, abs(got - ref))
        checks.record(f"twilight times at latitude {lat}", agree and worst_twilight < 120.0, f"worst {worst_twilight:.1f} s; events that do not happen agree: {agree}")

    # Precession to J2000 against pyerfa's IAU 2006 matrix.
    worst = 0.0
    rng = np.random.default_rng(5)
    for iso in ["2026-03-14T21:30:00", "2010-01-01T00:00:00", "2040-07-01T00:00:00"]:
        t = Time(iso, scale="utc")
        rp = erfa.pmat06(t.tt.jd1, t.tt.jd2)
        for _ in range(5):
            ra2000, dec2000 = rng.uniform(0, 360), rng.uniform(-80, 80)
            v = erfa.s2c(np.radians(ra2000), np.radians(dec2000))
            ra_d, dec_d = erfa.c2s(rp @ v)
            d = sky(binary, 0.0, 0.0, iso, np.degrees(ra_d) % 360, np.degrees(dec_d))
            got = d["target"]
            sep = erfa.seps(np.radians(got["ra_j2000_deg"]), np.radians(got["dec_j2000_deg"]), np.radians(ra2000), np.radians(dec2000))
            worst = max(worst, np.degrees(sep) * 3600)
    checks.record("precession of date -> J2000", worst < 1.0, f"worst {worst:.4f} arcsec against erfa.pmat06 (IAU 2006)")
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
