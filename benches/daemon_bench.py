"""Daemon speed: backlog throughput for 2048x2048 16-bit frames, latency from a frame
being complete to its record, idle CPU and idle memory. Uses only the standard library.

usage: python3 benches/daemon_bench.py [path/to/subwatch] [--frames N]
"""
import os
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time


def recorded(db):
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
        rows = con.execute("SELECT path, recorded_at FROM frames").fetchall()
        con.close()
        return dict(rows)
    except sqlite3.Error:
        return {}


def proc_stat(pid):
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    cpu = (int(fields[11]) + int(fields[12])) / ticks
    with open(f"/proc/{pid}/status") as f:
        rss = next(int(l.split()[1]) for l in f if l.startswith("VmRSS:"))
    return cpu, rss


def main():
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    binary = os.path.abspath(args[0] if args else "target/release/subwatch")
    n = int(sys.argv[sys.argv.index("--frames") + 1]) if "--frames" in sys.argv else 40
    settle = 1.0
    with tempfile.TemporaryDirectory() as tmp:
        src = os.path.join(tmp, "src")
        capture = os.path.join(tmp, "capture")
        os.makedirs(src)
        os.makedirs(capture)
        for i in range(4):
            subprocess.run([binary, "render", "--out", os.path.join(src, f"f{i}.fits"), "--width", "2048",
                            "--height", "2048", "--stars", "800", "--seed", str(i + 1), "--hot-pixels", "30",
                            "--cosmic-rays", "30"], check=True)
        db = os.path.join(tmp, "store.db")
        cfg = os.path.join(tmp, "sw.toml")
        with open(cfg, "w") as f:
            f.write(f'[watch]\nfolders = ["{capture}"]\nsettle_seconds = {settle}\n[store]\npath = "{db}"\n')
        daemon = subprocess.Popen([binary, "watch", "--config", cfg], stderr=subprocess.DEVNULL)
        time.sleep(1.0)

        # Idle: nothing to do for 10 s.
        cpu0, _ = proc_stat(daemon.pid)
        time.sleep(10)
        cpu1, idle_rss = proc_stat(daemon.pid)
        idle_cpu = (cpu1 - cpu0) / 10 * 100

        # Latency: one frame at a time, 3 s apart.
        latencies = []
        for i in range(8):
            tmpname = os.path.join(capture, f".lat{i}.part")
            shutil.copy(os.path.join(src, f"f{i % 4}.fits"), tmpname)
            final = os.path.join(capture, f"lat{i}.fits")
            os.rename(tmpname, final)
            done = time.time()
            while final not in recorded(db):
                time.sleep(0.02)
            latencies.append(recorded(db)[final] - done)
            time.sleep(2)

        # Backlog: n frames land at once.
        t0 = time.time()
        names = []
        for i in range(n):
            p = os.path.join(capture, f"b{i:03}.fits")
            shutil.copy(os.path.join(src, f"f{i % 4}.fits"), p)
            names.append(p)
        copied = time.time()
        while len([p for p in names if p in recorded(db)]) < n:
            time.sleep(0.05)
        t1 = time.time()
        daemon.terminate()
        daemon.wait(timeout=150)
        lat = sorted(latencies)
        p95 = lat[min(len(lat) - 1, int(round(0.95 * (len(lat) - 1))))]
        print(f"backlog: {n} frames of 2048x2048 in {t1 - t0:.1f} s ({n / (t1 - t0):.1f} frames/s; copying took {copied - t0:.1f} s)")
        print(f"latency complete->recorded: median {statistics.median(lat):.2f} s, p95 {p95:.2f} s "
              f"(settle time {settle:.1f} s included)")
        print(f"idle: CPU {idle_cpu:.2f} %, resident memory {idle_rss / 1024:.1f} MiB")


if __name__ == "__main__":
    main()
