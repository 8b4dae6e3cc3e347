#!/usr/bin/env bash
# The Debian package on this machine (run as root by .ci/cross): install it with dpkg,
# check what it put where, verify its unit with systemd's own tools, then purge it and
# check that nothing of it is left but the observatory's data folder.
#
#   tests/packaging/deb.sh target/packages/subwatch_VERSION-1_amd64.deb
set -euo pipefail
deb=$1
fail() { echo "deb: $*" >&2; exit 1; }

if dpkg -s subwatch >/dev/null 2>&1; then
  fail "a subwatch package is installed on this machine already; not touching it"
fi
trap 'dpkg --purge subwatch >/dev/null 2>&1 || true' EXIT

echo "== dpkg -i $(basename "$deb")"
dpkg -i "$deb"

version=$(dpkg-deb -f "$deb" Version)
got=$(/usr/bin/subwatch --version)
echo "subwatch --version: $got"
[ "$got" = "subwatch ${version%-*}" ] || fail "--version says '$got', the package is $version"

unit=/usr/lib/systemd/system/subwatch.service
[ -f "$unit" ] || fail "no unit at $unit"
grep -q '^ExecStart=/usr/bin/subwatch watch --config /etc/subwatch/subwatch.toml$' "$unit" \
  || fail "the unit does not run /usr/bin/subwatch on /etc/subwatch/subwatch.toml"

# The service's own system user, and the configuration readable by it and root only.
getent passwd subwatch >/dev/null || fail "no subwatch user"
uid=$(id -u subwatch)
[ "$uid" -lt 1000 ] || fail "the subwatch user is not a system user (uid $uid)"
[ "$(stat -c '%U:%G %a' /etc/subwatch/subwatch.toml)" = "root:subwatch 640" ] \
  || fail "/etc/subwatch/subwatch.toml is $(stat -c '%U:%G %a' /etc/subwatch/subwatch.toml), not root:subwatch 640"
grep -qx /etc/subwatch/subwatch.toml /var/lib/dpkg/info/subwatch.conffiles \
  || fail "the configuration is not a conffile"

# Nothing started or enabled by the install: the configuration names folders first.
if [ -d /run/systemd/system ]; then
  state=$(systemctl is-enabled subwatch.service 2>/dev/null || true)
  [ "$state" = disabled ] || fail "the service is '$state' after installing, not disabled"
  ! systemctl is-active --quiet subwatch.service || fail "the service runs after installing"
fi
[ ! -e /etc/systemd/system/multi-user.target.wants/subwatch.service ] \
  || fail "the install enabled the service"

echo "== systemd-analyze verify $unit"
systemd-analyze verify "$unit"
echo "== systemd-analyze security (the installed unit, exposure at or below 2.0)"
systemd-analyze security --offline=yes --threshold=20 "$unit" | tail -n 1

echo "== dpkg --purge subwatch"
dpkg --purge subwatch
trap - EXIT
for gone in /usr/bin/subwatch "$unit" /etc/subwatch/subwatch.toml /etc/subwatch; do
  [ ! -e "$gone" ] || fail "$gone is left after purging"
done
if dpkg-statoverride --list /etc/subwatch/subwatch.toml >/dev/null 2>&1; then
  fail "the configuration's ownership override is left after purging"
fi
echo "deb: installed, verified and purged: $(basename "$deb")"
