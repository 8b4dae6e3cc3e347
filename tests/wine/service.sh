#!/usr/bin/env bash
# The Windows zip and its service, under Wine (run by .ci/cross): unpack the zip into a
# Wine prefix of its own, check its example configuration with check-config (its folders
# made on Wine's drives), install the service on it, start it, copy frames into a capture
# folder, stop it (a clean stop: the log's last line, exit code 0), check each frame was
# recorded once, and uninstall it.
#
#   tests/wine/service.sh ZIP SHIM.dll FRAME.fits...
#
# SHIM.dll is the test-only stand-in for Wine 8.0's missing bcryptprimitives.dll
# (tests/wine/bcryptprimitives.c), put beside subwatch.exe here and never shipped.
set -euo pipefail
zip=$(realpath "$1")
shim=$(realpath "$2")
shift 2
frames=("$@")
fail() {
  echo "service: $*" >&2
  exit 1
}

work=$(mktemp -d)
export WINEPREFIX=$work/prefix WINEDEBUG=-all
program=
cleanup() {
  if [ -n "$program" ]; then wine "$program" service uninstall >/dev/null 2>&1 || true; fi
  wineserver -k >/dev/null 2>&1 || true
  rm -rf "$work"
}
trap cleanup EXIT

echo "== a Wine prefix of its own"
wineboot --init >/dev/null 2>&1 || true
# Keep Wine's session (and so the service) alive between the commands below: once the
# server wineboot started has gone, one that stays.
wineserver -w
wineserver -p

echo "== the zip: $(basename "$zip")"
python3 -m zipfile -e "$zip" "$work/programs"
program=$(echo "$work"/programs/*/subwatch.exe)
[ -f "$program" ] || fail "no subwatch.exe in the zip"
folder=$(dirname "$program")
for f in subwatch.toml INSTALL.txt; do
  [ -f "$folder/$f" ] || fail "no $f in the zip"
done
cp "$shim" "$folder/"

# The example's places: the capture disk D: (a folder here), and %ProgramData%\subwatch.
mkdir -p "$work/d/Capture/scope1" "$work/d/Capture/scope2"
ln -s "$work/d" "$WINEPREFIX/dosdevices/d:"
data=$(winepath -u 'C:\ProgramData\subwatch\data')
mkdir -p "$data"
config='C:\ProgramData\subwatch\subwatch.toml'
cp "$folder/subwatch.toml" "$(winepath -u "$config")"

echo "== check-config on the zip's example configuration"
wine "$program" check-config --config "$config"

echo "== service install"
wine "$program" service install --config "$config"
# Wine's sc has no qc: the service's registry key says the same.
key=$(wine reg query 'HKLM\SYSTEM\CurrentControlSet\Services\subwatch' | tr -d '\r')
echo "$key" | grep -Eq '^ +Start +REG_DWORD +0x2$' || fail "not started with Windows: $key"
echo "$key" | grep -q 'subwatch.exe service run --config C:\\ProgramData\\subwatch\\subwatch.toml$' \
  || fail "the service does not run the daemon on the configuration: $key"

state() { wine sc query subwatch | tr -d '\r' | sed -n 's/^ *STATE *: *[0-9]* *//p'; }
wait_for() {
  for _ in $(seq 1 120); do
    [ "$(state)" = "$1" ] && return 0
    sleep 1
  done
  fail "the service is '$(state)' after 120 s, not $1"
}

echo "== service start"
wine "$program" service start
wait_for RUNNING

echo "== ${#frames[@]} frame(s) copied into D:\\Capture\\scope1"
cp "${frames[@]}" "$work/d/Capture/scope1/"
log() { find "$WINEPREFIX/drive_c" -path '*subwatch/logs/subwatch-*.log' -print0 | xargs -0 cat; }
for _ in $(seq 1 180); do
  [ "$(log | grep -c ' measured: ' || true)" -ge "${#frames[@]}" ] && break
  sleep 1
done
[ "$(log | grep -c ' measured: ' || true)" -ge "${#frames[@]}" ] \
  || fail "the service measured $(log | grep -c ' measured: ' || true) of ${#frames[@]} frames in 180 s"

echo "== service stop"
wine "$program" service stop
wait_for STOPPED
exit_code=$(wine sc query subwatch | tr -d '\r' | sed -n 's/^ *WIN32_EXIT_CODE *: *\([0-9]*\).*/\1/p')
[ "$exit_code" = 0 ] || fail "the service stopped with exit code $exit_code"
last=$(log | tail -n 1)
echo "$last"
echo "$last" | grep -q "subwatch stopped: ${#frames[@]} frame(s) recorded in this run" \
  || fail "the log does not end with a clean stop"

echo "== each frame recorded once"
python3 - "$data/subwatch.db" "${#frames[@]}" <<'PY'
import sqlite3, sys
db, want = sys.argv[1], int(sys.argv[2])
rows = sqlite3.connect(db).execute("SELECT path, count(*) FROM frames GROUP BY path").fetchall()
assert len(rows) == want and all(n == 1 for _, n in rows), rows
print(f"{len(rows)} frames, each once: " + ", ".join(p.rsplit(chr(92), 1)[-1] for p, _ in rows))
PY

echo "== service uninstall"
wine "$program" service uninstall
program=
if wine sc query subwatch >/dev/null 2>&1; then fail "the service is still registered"; fi
echo "service: installed, ran, stopped cleanly and removed under Wine"
