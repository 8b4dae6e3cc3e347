"""The status page under load: does serving it slow down the recording of frames?

A `subwatch watch` daemon with `[web] listen` on. Phase A: N frames land one at a time at
a steady pace and nobody looks at the page. Phase B: C clients request the page, its
parts, its JSON and its images as fast as they are answered while N more frames land at
the same pace. For each frame, the latency from the moment it was complete in the folder
(renamed into place) to its record in the store (`frames.recorded_at`, read-only).

Reported: frames recorded per phase (all N expected), median and 90th-percentile latency
per phase and their ratio (target: loaded median within 20 % of unloaded), requests
served, errors (target 0; 503s, time-outs and connection failures counted apart),
requests per second, and the daemon's resident memory over time and at its peak
(VmHWM from /proc/PID/status). Uses only the standard library.

The load runs in separate processes at a low CPU priority (--client-nice, default 19),
so that on a small machine the load generator takes as little as it can from the daemon
it measures: the clients stand in for browsers on other machines, each from a loopback
address of its own (127.0.1.K: the server holds at most 8 connections per client
address). Keep-alive
connections are used as browsers do; a request that fails on a reused connection before
any byte of an answer is retried once on a new connection (what browsers do with
idempotent requests); those retries are counted and shown, and a failure after that is
an error.

usage: python3 benches/web_load.py [path/to/subwatch] [--clients 50] [--seconds 60]
           [--frames 100] [--interval 0.6] [--size 2048] [--procs 2] [--client-nice 19]
"""
import argparse
import datetime
import http.client
import json
import multiprocessing as mp
import os
import re
import signal
import socket
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time

DATE0 = datetime.datetime(2026, 3, 14, 20, 0, 0)


# --------------------------------------------------------------------------
# frames
# --------------------------------------------------------------------------
def render_sources(binary, folder, size, count=4):
    """A few frames of the invented Kestrel Field A, with subwatch's own renderer."""
    out = []
    for i in range(count):
        p = os.path.join(folder, f"src{i}.fits")
        subprocess.run([binary, "render", "--out", p, "--width", str(size), "--height", str(size),
                        "--stars", "800", "--seed", str(i + 1), "--fwhm", f"{3.2 + 0.2 * i:.1f}",
                        "--hot-pixels", "30", "--cosmic-rays", "30", "--object", "Kestrel Field A",
                        "--date-obs", DATE0.strftime("%Y-%m-%dT%H:%M:%S")],
                       check=True, stdout=subprocess.DEVNULL)
        with open(p, "rb") as f:
            out.append(f.read())
    return out


def dated(frame, when):
    """The same bytes with DATE-OBS replaced (a fixed-width value in its 80-byte card)."""
    old = DATE0.strftime("%Y-%m-%dT%H:%M:%S").encode()
    i = frame.find(b"DATE-OBS= '" + old)
    if i < 0 or i > 2880 * 4:
        raise ValueError("DATE-OBS card not found in the rendered frame's header")
    j = i + len("DATE-OBS= '")
    return frame[:j] + when.strftime("%Y-%m-%dT%H:%M:%S").encode() + frame[j + len(old):]


def land(folder, name, data):
    """Written under a hidden name, then renamed: complete at the rename."""
    part = os.path.join(folder, f".{name}.part")
    with open(part, "wb") as f:
        f.write(data)
    final = os.path.join(folder, name)
    os.rename(part, final)
    return final, time.time()


def recorded(db):
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=2)
        rows = con.execute("SELECT path, recorded_at, status FROM frames").fetchall()
        con.close()
        return {p: (t, s) for p, t, s in rows}
    except sqlite3.Error:
        return {}


def land_phase(db, folder, sources, names, first_index, interval, timeout):
    """Land the frames at a steady pace; (latencies by path, missing paths, not ok)."""
    t0 = time.monotonic()
    done = {}
    for k, name in enumerate(names):
        wait = t0 + k * interval - time.monotonic()
        if wait > 0:
            time.sleep(wait)
        i = first_index + k
        data = dated(sources[i % len(sources)], DATE0 + datetime.timedelta(seconds=60 * i))
        path, at = land(folder, name, data)
        done[path] = at
    deadline = time.monotonic() + timeout
    rec = recorded(db)
    while time.monotonic() < deadline and any(p not in rec for p in done):
        time.sleep(0.1)
        rec = recorded(db)
    lat = {p: rec[p][0] - at for p, at in done.items() if p in rec}
    missing = [p for p in done if p not in rec]
    not_ok = [p for p in done if p in rec and rec[p][1] != "ok"]
    return lat, missing, not_ok


# --------------------------------------------------------------------------
# the daemon
# --------------------------------------------------------------------------
class Daemon:
    def __init__(self, binary, config):
        self.proc = subprocess.Popen([binary, "watch", "--config", config], stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                                     env=dict(os.environ, SUBWATCH_LOG="info"))
        self.address = None
        self.problems = []
        self.ready = threading.Event()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stderr:
            m = re.search(r"status page at http://([0-9.]+:[0-9]+)/", line)
            if m:
                self.address = m.group(1)
                self.ready.set()
            if " ERROR " in line or (" WARN " in line and "mail.to is empty" not in line):
                self.problems.append(line.strip())
        self.ready.set()

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        return self.proc.returncode


class Sampler:
    """The daemon's memory and CPU (per thread name) every half second."""

    def __init__(self, pid):
        self.pid = pid
        self.samples = []   # (t, rss_kb)
        self.stop = threading.Event()
        threading.Thread(target=self._run, daemon=True).start()

    def status(self, key):
        with open(f"/proc/{self.pid}/status") as f:
            return next(int(l.split()[1]) for l in f if l.startswith(key + ":"))

    def cpu(self):
        """CPU seconds by thread: web server, page builder, everything else."""
        tick = os.sysconf("SC_CLK_TCK")
        out = {"web": 0.0, "page": 0.0, "rest": 0.0}
        for tid in os.listdir(f"/proc/{self.pid}/task"):
            try:
                with open(f"/proc/{self.pid}/task/{tid}/stat") as f:
                    s = f.read()
            except OSError:
                continue
            name = s[s.index("(") + 1:s.rindex(")")]
            fields = s.rsplit(")", 1)[1].split()
            t = (int(fields[11]) + int(fields[12])) / tick
            key = "web" if name == "subwatch-web" else "page" if name == "subwatch-page" else "rest"
            out[key] += t
        # Threads and reader processes that ended are in the process's totals.
        with open(f"/proc/{self.pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
        total = (int(fields[11]) + int(fields[12]) + int(fields[13]) + int(fields[14])) / tick
        out["rest"] = max(out["rest"], total - out["web"] - out["page"])
        return out

    def _run(self):
        t0 = time.monotonic()
        while not self.stop.is_set():
            try:
                self.samples.append((time.monotonic() - t0, self.status("VmRSS")))
            except (OSError, StopIteration):
                return
            self.stop.wait(0.5)


# --------------------------------------------------------------------------
# the load
# --------------------------------------------------------------------------
PAGES = ["/api/version", "/", "/api/night", "/part"]
RETRYABLE = (http.client.RemoteDisconnected, ConnectionResetError, BrokenPipeError, ConnectionAbortedError)


def client_thread(address, source, stop, stats, lock):
    host, port = address.split(":")
    conn = None
    used = False
    images = []
    k = 0
    mine = {"ok": 0, "by_status": {}, "by_kind": {}, "timeouts": 0, "conn_fail": 0, "retried": 0,
            "bytes": 0, "times": [], "examples": []}

    def note(kind, what):
        if len(mine["examples"]) < 5:
            mine["examples"].append(f"{kind}: {what}")

    while not stop.is_set():
        cycle = PAGES + images[:4]
        path = cycle[k % len(cycle)]
        k += 1
        kind = "image" if path.endswith(".png") else path
        for attempt in (0, 1):
            if conn is None:
                conn = http.client.HTTPConnection(host, int(port), timeout=10, source_address=(source, 0))
                used = False
            t = time.monotonic()
            try:
                conn.request("GET", path)
                r = conn.getresponse()
                body = r.read()
            except RETRYABLE as e:
                reused = used
                conn.close()
                conn = None
                if reused and attempt == 0:
                    mine["retried"] += 1
                    continue
                mine["conn_fail"] += 1
                note(kind, f"{type(e).__name__} {e}")
                break
            except socket.timeout:
                conn.close()
                conn = None
                mine["timeouts"] += 1
                note(kind, "timed out")
                break
            except (OSError, http.client.HTTPException) as e:
                conn.close()
                conn = None
                mine["conn_fail"] += 1
                note(kind, f"{type(e).__name__} {e}")
                break
            used = True
            dt = time.monotonic() - t
            mine["times"].append(dt)
            mine["bytes"] += len(body)
            st = r.status
            mine["by_status"][st] = mine["by_status"].get(st, 0) + 1
            bk = mine["by_kind"].setdefault(kind, {})
            bk[st] = bk.get(st, 0) + 1
            if 200 <= st < 300:
                mine["ok"] += 1
                if path == "/api/night":
                    try:
                        v = json.loads(body)
                        urls = [(v.get("latest") or {}).get("preview_url")]
                        urls += [p.get("url") for p in v.get("plots", [])]
                        urls += [a.get("cutout_url") for a in v.get("anomalies", [])]
                        images = ["/" + u.lstrip("/") for u in urls if u]
                    except (ValueError, AttributeError):
                        note(kind, "JSON that does not parse")
            else:
                note(kind, f"HTTP {st} for {path}")
            if r.getheader("connection", "").lower() == "close":
                conn.close()
                conn = None
            break
    if conn is not None:
        conn.close()
    with lock:
        stats.append(mine)


def client_process(address, first, threads, nice, stop, out):
    try:
        os.nice(nice)
    except OSError:
        pass
    stats, lock = [], threading.Lock()
    # Client K connects from 127.0.0.0/8's 127.0.1.K (Linux answers on all of it).
    ts = [threading.Thread(target=client_thread,
                           args=(address, f"127.0.{1 + (first + i) // 250}.{1 + (first + i) % 250}", stop, stats, lock))
          for i in range(threads)]
    t0 = time.process_time()
    for t in ts:
        t.start()
    for t in ts:
        t.join()
    out.put({"threads": stats, "cpu": time.process_time() - t0})


def merge(results):
    m = {"ok": 0, "by_status": {}, "by_kind": {}, "timeouts": 0, "conn_fail": 0, "retried": 0, "bytes": 0,
         "times": [], "examples": [], "cpu": 0.0}
    for r in results:
        m["cpu"] += r["cpu"]
        for s in r["threads"]:
            for key in ("ok", "timeouts", "conn_fail", "retried", "bytes"):
                m[key] += s[key]
            m["times"] += s["times"]
            m["examples"] += s["examples"]
            for st, n in s["by_status"].items():
                m["by_status"][st] = m["by_status"].get(st, 0) + n
            for kind, d in s["by_kind"].items():
                mk = m["by_kind"].setdefault(kind, {})
                for st, n in d.items():
                    mk[st] = mk.get(st, 0) + n
    return m


# --------------------------------------------------------------------------
def pct(values, q):
    v = sorted(values)
    if not v:
        return float("nan")
    return v[min(len(v) - 1, max(0, int(round(q * (len(v) - 1)))))]


def table(headers, rows):
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(headers)]
    line = "  ".join(h.rjust(w) if i else h.ljust(w) for i, (h, w) in enumerate(zip(headers, widths)))
    print(line)
    print("-" * len(line))
    for r in rows:
        print("  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths))))


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("binary", nargs="?", default="target/release/subwatch")
    ap.add_argument("--clients", type=int, default=50)
    ap.add_argument("--seconds", type=float, default=60, help="least time the load runs (phase B)")
    ap.add_argument("--frames", type=int, default=100, help="frames landed in each phase")
    ap.add_argument("--interval", type=float, default=0.6, help="seconds between two frames")
    ap.add_argument("--size", type=int, default=2048, help="frame side, pixels")
    ap.add_argument("--procs", type=int, default=2, help="client processes (the clients are shared out)")
    ap.add_argument("--client-nice", type=int, default=19)
    args = ap.parse_args()
    binary = os.path.abspath(args.binary)
    n = args.frames
    print(f"web_load: {n} frames per phase of {args.size}x{args.size}, one every {args.interval} s; "
          f"{args.clients} clients in {args.procs} processes at nice {args.client_nice} for at least "
          f"{args.seconds:.0f} s; {os.cpu_count()} CPUs", flush=True)
    rc = 0
    with tempfile.TemporaryDirectory() as tmp:
        capture = os.path.join(tmp, "capture")
        os.makedirs(capture)
        sources = render_sources(binary, tmp, args.size)
        db = os.path.join(tmp, "store.db")
        cfg = os.path.join(tmp, "sw.toml")
        with open(cfg, "w") as f:
            f.write(f'[watch]\nfolders = ["{capture}"]\nsettle_seconds = 0.5\n[store]\npath = "{db}"\n'
                    f'[site]\nlatitude = 40.0\nlongitude = -3.7\ntimezone = "Europe/Madrid"\n'
                    f'[web]\nlisten = "127.0.0.1:0"\n')
        daemon = Daemon(binary, cfg)
        try:
            daemon.ready.wait(30)
            if daemon.address is None:
                print(f"error: the daemon did not log the page's address (exit {daemon.proc.poll()})")
                return 1
            sampler = Sampler(daemon.proc.pid)
            time.sleep(2)
            timeout = 120 + n * args.interval

            # Phase A: nobody looks.
            cpu_a0 = sampler.cpu()
            ta0 = time.monotonic()
            lat_a, miss_a, bad_a = land_phase(db, capture, sources, [f"a{i:04}.fits" for i in range(n)], 0,
                                              args.interval, timeout)
            ta1 = time.monotonic()
            cpu_a1 = sampler.cpu()
            rss_a = max((r for t, r in sampler.samples), default=0)
            print(f"phase A done: {len(lat_a)}/{n} recorded in {ta1 - ta0:.0f} s", flush=True)
            time.sleep(3)

            # Phase B: the clients, then the frames.
            stop = mp.Event()
            out = mp.Queue()
            share = [args.clients // args.procs + (1 if i < args.clients % args.procs else 0)
                     for i in range(args.procs)]
            procs = [mp.Process(target=client_process,
                                args=(daemon.address, sum(share[:i]), k, args.client_nice, stop, out))
                     for i, k in enumerate(share) if k > 0]
            cpu_b0 = sampler.cpu()
            tb0 = time.monotonic()
            for p in procs:
                p.start()
            time.sleep(3)  # the page now counts as looked at
            lat_b, miss_b, bad_b = land_phase(db, capture, sources, [f"b{i:04}.fits" for i in range(n)], n,
                                              args.interval, timeout)
            left = tb0 + args.seconds - time.monotonic()
            if left > 0:
                time.sleep(left)
            stop.set()
            results = [out.get(timeout=120) for _ in procs]
            tb1 = time.monotonic()
            for p in procs:
                p.join(timeout=30)
            cpu_b1 = sampler.cpu()
            print(f"phase B done: {len(lat_b)}/{n} recorded; load for {tb1 - tb0:.0f} s", flush=True)
            load = merge(results)
            hwm = sampler.status("VmHWM")
            sampler.stop.set()
        finally:
            code = daemon.stop()

        # ---------------- report ----------------
        a, b = list(lat_a.values()), list(lat_b.values())
        med_a, med_b = statistics.median(a) if a else float("nan"), statistics.median(b) if b else float("nan")
        p90_a, p90_b = pct(a, 0.9), pct(b, 0.9)
        print()
        table(["phase", "frames recorded", "not ok", "median s", "p90 s", "max s",
               "daemon CPU s (web/page/rest)"],
              [["A: no load", f"{len(a)}/{n}", str(len(bad_a)), f"{med_a:.3f}", f"{p90_a:.3f}",
                f"{max(a, default=float('nan')):.3f}",
                "/".join(f"{cpu_a1[k] - cpu_a0[k]:.1f}" for k in ("web", "page", "rest"))],
               [f"B: {args.clients} clients", f"{len(b)}/{n}", str(len(bad_b)), f"{med_b:.3f}", f"{p90_b:.3f}",
                f"{max(b, default=float('nan')):.3f}",
                "/".join(f"{cpu_b1[k] - cpu_b0[k]:.1f}" for k in ("web", "page", "rest"))]])
        ratio = med_b / med_a if a and b else float("nan")
        ratio90 = p90_b / p90_a if a and b else float("nan")
        print(f"\nlatency B/A: median {ratio:.3f}, p90 {ratio90:.3f} (target: median within 1.20)")

        dur = tb1 - tb0
        errors = sum(v for st, v in load["by_status"].items() if not 200 <= st < 300 and st != 503)
        e503 = load["by_status"].get(503, 0)
        total = load["ok"] + errors + e503 + load["timeouts"] + load["conn_fail"]
        print()
        table(["requests", "count"],
              [["answered 2xx", str(load["ok"])],
               ["errors: non-2xx other than 503", str(errors)],
               ["errors: 503", str(e503)],
               ["errors: timed out (10 s)", str(load["timeouts"])],
               ["errors: connection failed", str(load["conn_fail"])],
               ["retried once after the server closed a kept-alive connection", str(load["retried"])],
               ["requests per second (2xx)", f"{load['ok'] / dur:.0f}"],
               ["MB per second received", f"{load['bytes'] / dur / 1e6:.1f}"],
               ["request time median / p90 / max, ms",
                f"{1000 * pct(load['times'], 0.5):.1f} / {1000 * pct(load['times'], 0.9):.1f} / "
                f"{1000 * max(load['times'], default=0):.0f}"],
               ["client CPU s (load generator)", f"{load['cpu']:.1f}"]])
        print("\nby path: " + "; ".join(f"{k} {dict(sorted(v.items()))}" for k, v in sorted(load["by_kind"].items())))
        if load["examples"]:
            print("first errors: " + " | ".join(load["examples"][:6]))

        # Memory over time, every ~10 s.
        s = sampler.samples
        marks = [x for i, x in enumerate(s) if i % 20 == 0] + ([s[-1]] if s else [])
        print(f"\ndaemon RSS over time (s: MiB): " + ", ".join(f"{t:.0f}: {r / 1024:.0f}" for t, r in marks))
        print(f"daemon peak RSS (VmHWM): {hwm / 1024:.1f} MiB; highest sampled in phase A "
              f"{rss_a / 1024:.1f} MiB, overall {max((r for _, r in s), default=0) / 1024:.1f} MiB")
        print(f"daemon exit on SIGTERM: {code}")
        if daemon.problems:
            print(f"daemon warnings/errors logged: {len(daemon.problems)}; first: {daemon.problems[0][:200]}")

        print("\ntargets:")
        ok_frames = not miss_a and not miss_b
        print(f"  every frame recorded in both phases: {'met' if ok_frames else 'MISSED'}"
              f" ({len(a)}/{n}, {len(b)}/{n})")
        print(f"  loaded median latency within 20 % of unloaded: {'met' if ratio <= 1.2 else 'MISSED'}"
              f" ({ratio:.3f})")
        bad = errors + e503 + load["timeouts"] + load["conn_fail"]
        print(f"  no request error: {'met' if bad == 0 else 'MISSED'} ({bad} of {total})")
        if not ok_frames or code != 0:
            rc = 1
    return rc


if __name__ == "__main__":
    sys.exit(main())
