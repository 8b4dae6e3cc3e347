#!/usr/bin/env python3
"""The same frames give the same numbers on every target: `measure --json` on the sample
frames and `night --json` on a rendered night, run by the x86-64 Linux binary and by each
other target's (aarch64 under qemu-user, Windows under Wine), compared number by number.

Numbers must agree to 1e-9 relative (or 1e-12 absolute near zero); counts, verdicts,
reasons and kinds must be equal. The largest relative difference found is printed per
target. Only the standard library is used.

usage: compare_targets.py NATIVE_BINARY NIGHT_DIR FRAME... -- LABEL=COMMAND... [LABEL=COMMAND...]
where COMMAND is how to start the other target's binary (e.g. "wine path/subwatch.exe").
"""

import json
import math
import os
import shlex
import subprocess
import sys

REL = 1e-9
ABS = 1e-12


def windows_path(p):
    """A Linux path as Wine's Z: drive names it."""
    return "Z:" + os.path.abspath(p).replace("/", "\\")


def run(command, args, wine):
    argv = shlex.split(command) + [windows_path(a) if wine and os.path.exists(a) else a for a in args]
    env = dict(os.environ, WINEDEBUG="-all")
    out = subprocess.run(argv, capture_output=True, text=True, env=env, timeout=1800)
    if out.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(argv)} exited {out.returncode}: {out.stderr[-2000:]}")
    return out.stdout


def measure_docs(command, frames, wine):
    docs = [json.loads(line) for line in run(command, ["measure", "--json", *frames], wine).splitlines() if line.strip()]
    return {os.path.basename((d.get("path") or d.get("file")).replace("\\", "/")): d for d in docs}


def night_doc(command, night, wine):
    doc = json.loads(run(command, ["night", night, "--json"], wine))
    return doc


# Keys that name where a file is or when a run happened: they differ by system, not by
# measurement.
SKIP = {"file", "path", "generated", "generated_unix", "program", "version", "elapsed_s", "dir", "folder", "source"}


def compare(a, b, where, worst, problems):
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k in SKIP:
                continue
            if k not in a or k not in b:
                problems.append(f"{where}.{k}: present on one target only")
                continue
            compare(a[k], b[k], f"{where}.{k}", worst, problems)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            problems.append(f"{where}: {len(a)} items against {len(b)}")
            return
        for i, (x, y) in enumerate(zip(a, b)):
            compare(x, y, f"{where}[{i}]", worst, problems)
    elif isinstance(a, bool) or isinstance(b, bool):
        if a != b:
            problems.append(f"{where}: {a} against {b}")
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)):
        if isinstance(a, int) and isinstance(b, int):
            if a != b:
                problems.append(f"{where}: {a} against {b}")
            return
        if math.isnan(a) and math.isnan(b):
            return
        d = abs(a - b)
        rel = d / max(abs(a), abs(b)) if max(abs(a), abs(b)) > 0 else 0.0
        if d > ABS and rel > worst[0]:
            worst[0], worst[1] = rel, f"{where}: {a!r} against {b!r}"
        if d > ABS and rel > REL:
            problems.append(f"{where}: {a!r} against {b!r} (relative {rel:.2e})")
    elif isinstance(a, str) and isinstance(b, str):
        # Words may carry a path (an error message): compare them without it.
        if a != b and a.replace("\\", "/").split("/")[-1] != b.replace("\\", "/").split("/")[-1]:
            problems.append(f"{where}: {a!r} against {b!r}")
    elif a != b:
        problems.append(f"{where}: {a!r} against {b!r}")


def main():
    if "--" not in sys.argv:
        raise SystemExit(__doc__)
    cut = sys.argv.index("--")
    native, night, *frames = sys.argv[1:cut]
    others = [arg.split("=", 1) for arg in sys.argv[cut + 1:]]
    reference = (measure_docs(native, frames, False), night_doc(native, night, False))
    failed = False
    for label, command in others:
        wine = "wine" in command
        got = (measure_docs(command, frames, wine), night_doc(command, night, wine))
        worst, problems = [0.0, "none"], []
        compare(reference[0], got[0], "measure", worst, problems)
        compare(reference[1], got[1], "night", worst, problems)
        frames_n = len(reference[1].get("frames", []))
        stars = sum(d.get("star_count") or 0 for d in reference[0].values())
        status = "PASS" if not problems else "FAIL"
        print(f"[{status}] {label} against x86-64 Linux: {len(reference[0])} frames measured ({stars} stars), "
              f"a night of {frames_n} frames; largest relative difference {worst[0]:.2e} ({worst[1]})")
        for p in problems[:20]:
            print(f"    {p}")
        if len(problems) > 20:
            print(f"    ... and {len(problems) - 20} more")
        failed |= bool(problems)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
