#!/usr/bin/env bash
# Re-creates the sample frames with subwatch's own renderer (an invented night at the
# invented Kestrel Ridge Observatory). Run from the repository root after a release build.
set -euo pipefail
bin=${1:-target/release/subwatch}
out=sample-frames
rm -f "$out"/*.fits
common=(--width 800 --height 600 --stars 220 --hot-pixels 6 --cosmic-rays 4 --object "Kestrel Field A")
"$bin" render "${common[@]}" --out "$out/kfa-001-good.fits" --seed 101 --psf moffat --beta 3.5 --fwhm 3.2 --date-obs 2026-03-14T21:30:00
"$bin" render "${common[@]}" --out "$out/kfa-014-soft-focus.fits" --seed 101 --psf moffat --beta 3.5 --fwhm 6.5 --date-obs 2026-03-14T22:02:00
"$bin" render "${common[@]}" --out "$out/kfa-021-wind.fits" --seed 101 --psf moffat --beta 3.5 --fwhm 3.6 --eccentricity 0.75 --angle 35 --date-obs 2026-03-14T22:18:00
"$bin" render "${common[@]}" --out "$out/kfa-033-cloud.fits" --seed 101 --psf moffat --beta 3.5 --fwhm 3.3 --sky 2600 --transparency 0.25 --gradient 0.4 0.1 --date-obs 2026-03-14T22:46:00
"$bin" render --width 800 --height 600 --stars 220 --object "Kestrel Field B" --out "$out/kfb-007-colour.fits" --seed 202 --psf moffat --beta 3 --fwhm 3.4 --bayer RGGB --date-obs 2026-03-15T01:10:00
