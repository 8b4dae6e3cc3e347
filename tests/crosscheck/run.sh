#!/usr/bin/env bash
# Runs the subwatch cross-check suite with the python on PATH (activate the
# venv made from tests/crosscheck/requirements.txt first).
#   usage: tests/crosscheck/run.sh [PATH/TO/subwatch]
# Default binary: target/release/subwatch under the repository root.
# Prints "N passed, N failed" as its last line; exits non-zero on any failure.
set -u
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/../.." && pwd)"
bin="${1:-$root/target/release/subwatch}"
case "$bin" in /*) ;; *) bin="$PWD/$bin" ;; esac
py="${PYTHON:-python3}"

passed=0
failed=0
log="$(mktemp)"
trap 'rm -f "$log"' EXIT

if ! "$py" -c 'import numpy, scipy, astropy, photutils, sep, erfa, aiosmtpd, trustme, voeventparse' 2>/dev/null; then
    echo "error: $py cannot import numpy/scipy/astropy/photutils/sep; install tests/crosscheck/requirements.txt" >&2
    echo "0 passed, 1 failed"
    exit 1
fi

for script in measure_crosscheck.py storage_crosscheck.py independent_render_crosscheck.py wcs_crosscheck.py skyfit_crosscheck.py sky_crosscheck.py mail_crosscheck.py site_crosscheck.py calibration_crosscheck.py voevent_crosscheck.py report_browser.py status_browser.py; do
    label="${script%.py}"
    echo "### $label ($bin)"
    "$py" "$here/$script" "$bin" 2>&1 | tee "$log"
    rc=${PIPESTATUS[0]}
    line="$(grep -E "^${label}: [0-9]+ passed, [0-9]+ failed$" "$log" | tail -n 1)"
    if [ -z "$line" ]; then
        echo "$label: crashed (exit $rc) before printing its summary"
        failed=$((failed + 1))
        continue
    fi
    p="$(echo "$line" | sed -E 's/.*: ([0-9]+) passed, ([0-9]+) failed$/\1/')"
    f="$(echo "$line" | sed -E 's/.*: ([0-9]+) passed, ([0-9]+) failed$/\2/')"
    passed=$((passed + p))
    failed=$((failed + f))
    if [ "$rc" -ne 0 ] && [ "$f" -eq 0 ]; then
        echo "$label: exit $rc with no failed check"
        failed=$((failed + 1))
    fi
done

echo "$passed passed, $failed failed"
[ "$failed" -eq 0 ]
