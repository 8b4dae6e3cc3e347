#!/usr/bin/env python3
"""The Windows example configuration, made from config/subwatch.toml (the one source of
every key's documentation): Linux paths become Windows ones under %ProgramData%\\subwatch
and a capture drive, and the few comments that name Linux tools say the Windows way.

Every replacement must match exactly as often as stated, so a change to the Linux example
that this script no longer fits fails the package build instead of shipping a half-made
file.

Usage: windows_config.py config/subwatch.toml OUT.toml
"""
import re
import sys

PROGRAM_DATA = "C:\\ProgramData\\subwatch"

# (text in the Linux example, its Windows form, how many times it occurs)
COMMENTS = [
    (
        "# subwatch: example configuration for a service install.\n",
        "# subwatch: example configuration for a Windows service install.\n",
        1,
    ),
    (
        "# Install as /etc/subwatch/subwatch.toml (root:subwatch, mode 640) and check it with\n"
        "#\n"
        "#     subwatch check-config --config /etc/subwatch/subwatch.toml\n",
        f"# Install as {PROGRAM_DATA}\\subwatch.toml (INSTALL.txt says how) and check it,\n"
        "# in a prompt opened as administrator, with\n"
        "#\n"
        f"#     subwatch check-config --config {PROGRAM_DATA}\\subwatch.toml\n"
        "#\n"
        "# Paths are written in single quotes (TOML literal strings), where a backslash is just\n"
        "# a backslash: 'D:\\Capture'.\n",
        1,
    ),
    (
        "(the systemd unit creates /var/lib/subwatch)",
        f"(make {PROGRAM_DATA}\\data first)",
        1,
    ),
    (
        "readable by nobody else (chmod 600)",
        "readable by nobody else (icacls, as INSTALL.txt shows)",
        2,
    ),
    (
        "(make one with: head -c 24 /dev/urandom |\n# base64 | tr -d '/+=' > FILE)",
        "(make one in PowerShell:\n"
        "# -join ((48..57)+(65..90)+(97..122) | Get-Random -Count 32 | % {[char]$_}) |\n"
        "# Set-Content -Encoding ascii FILE)",
        1,
    ),
    (
        "Under systemd and in\n# a console the log goes to stderr (the journal) and this is not used.",
        "In a console\n# (subwatch watch) the log goes to the console and this is not used.",
        1,
    ),
]

# Linux folders of the example and where the Windows example puts them (longest first).
FOLDERS = [
    ("/srv/subwatch/capture/", "D:\\Capture\\"),
    ("/srv/subwatch/calibration-library", "D:\\Calibration library"),
    ("/srv/subwatch/catalogue/", f"{PROGRAM_DATA}\\catalogue\\"),
    ("/var/lib/subwatch/", f"{PROGRAM_DATA}\\data\\"),
    ("/etc/subwatch/", f"{PROGRAM_DATA}\\"),
]


def windows_path(match: re.Match) -> str:
    path = match.group(1)
    for linux, windows in FOLDERS:
        if path.startswith(linux):
            return "'" + windows + path[len(linux):].replace("/", "\\") + "'"
    sys.exit(f"windows_config.py: no Windows place for the path \"{path}\"")


def convert(text: str) -> str:
    for old, new, times in COMMENTS:
        found = text.count(old)
        if found != times:
            sys.exit(
                f"windows_config.py: expected {times} of {old!r} in the example, found {found}"
            )
        text = text.replace(old, new)
    # A path value: a double-quoted string starting with "/" (in a key or a commented key).
    text = re.sub(r'"(/[^"]*)"', windows_path, text)
    for word in ("/srv/", "/var/", "/etc/", "/dev/", "systemd", "journal", "chmod", "chown"):
        if word in text:
            line = next(l for l in text.splitlines() if word in l)
            sys.exit(f"windows_config.py: a Linux-only mention is left: {line.strip()!r}")
    return text


def main() -> None:
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    with open(sys.argv[1], encoding="utf-8") as f:
        text = f.read()
    # CRLF line ends: Notepad before Windows 10 1809 shows a LF-only file as one line.
    with open(sys.argv[2], "w", encoding="utf-8", newline="\r\n") as f:
        f.write(convert(text))


if __name__ == "__main__":
    main()
