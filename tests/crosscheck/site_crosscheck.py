"""Three rigs of one site, one shared PostgreSQL store, one morning mail.

The database is a real PostgreSQL server (the throwaway one .ci/postgres starts; its
address in SUBWATCH_TEST_POSTGRES), read back with PostgreSQL's own client (psql); the
mail goes to a real SMTP server on loopback (aiosmtpd) and is read back by Python's
standard email parser. Checked:

- three daemons on three folders into one database, 100 frames each landing while they
  run, one of them killed with SIGKILL twice and started again: every frame recorded
  exactly once per rig, no file left marked as being read;
- each rig's verdicts equal those of the same frames recorded by a daemon into an SQLite
  store (read back with Python's sqlite3);
- `report --site --json` gives every rig's frames, each naming its rig, and
  `status --site --json` and the status page every rig's count and running daemon;
- with the summary set to cover the site, the three daemons mail one summary, once,
  naming every rig;
- the server stopped for 60 s with a daemon running: the frames that land meanwhile are
  kept and recorded once it is back, the outage is logged once, and the daemon does not
  spin (its CPU time over the outage is counted);
- TLS where the address asks for it: with the server's certificate from an authority
  trustme makes, and the database refused to connections without TLS, `sslmode=require`
  with that authority as `ca_file` connects, without TLS and with an unknown authority the
  store is refused.

usage: python site_crosscheck.py path/to/subwatch
"""

import datetime as dt
import email
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import time
import urllib.request
from email import policy

from aiosmtpd.controller import Controller

from common import Checks

FRAMES = 100
RIGS = ["north pier", "south pier", "roll-off 3"]


class Collect:
    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        self.messages.append(envelope.content)
        return "250 OK"


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def psql(url, sql):
    out = subprocess.run(["psql", url, "-XAtqc", sql], capture_output=True, text=True, check=True)
    return out.stdout.strip()


def morning_zone():
    """A fixed-offset zone (Etc/GMT-N is UTC+N) where it is about 06:00 now, so the
    night that ended this morning is yesterday evening's and its summary is due."""
    hour = dt.datetime.now(dt.timezone.utc).hour
    offset = (6 - hour) % 24
    if offset > 14:
        offset -= 24
    name = "Etc/GMT" if offset == 0 else f"Etc/GMT{'-' if offset > 0 else '+'}{abs(offset)}"
    return name, offset


def cpu_seconds(pid):
    fields = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def main():
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("site_crosscheck")
    server = os.environ.get("SUBWATCH_TEST_POSTGRES")
    pg_dir = os.environ.get("SUBWATCH_TEST_POSTGRES_DIR")
    if not server or not pg_dir:
        checks.record("a PostgreSQL server to test against (eval \"$(.ci/postgres start)\")", False,
                      "SUBWATCH_TEST_POSTGRES is not set")
        return checks.finish()
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    pg_script = os.path.join(root, ".ci", "postgres")
    dbname = f"subwatch_site_{os.getpid()}"
    psql(server, f"DROP DATABASE IF EXISTS {dbname} WITH (FORCE)")
    psql(server, f"CREATE DATABASE {dbname}")
    url = server.rsplit("/", 1)[0] + "/" + dbname
    zone, offset = morning_zone()
    local = dt.timezone(dt.timedelta(hours=offset))
    evening = (dt.datetime.now(local) - dt.timedelta(days=1)).replace(hour=21, minute=0, second=0, microsecond=0)
    night = evening.date().isoformat()
    smtp = Collect()
    smtp_port = free_port()
    controller = Controller(smtp, hostname="127.0.0.1", port=smtp_port)
    controller.start()
    daemons = {}
    try:
        with tempfile.TemporaryDirectory() as tmp:
            # Frames: each rig its own field; soft focus and thin cloud here and there.
            staged, captures = [], []
            for k, rig in enumerate(RIGS):
                stage = os.path.join(tmp, f"stage{k}")
                cap = os.path.join(tmp, f"capture{k}")
                os.makedirs(stage)
                os.makedirs(cap)
                for i in range(FRAMES):
                    t = (evening + dt.timedelta(minutes=2 * i)).astimezone(dt.timezone.utc)
                    fwhm = 6.0 if i % 10 == 7 else 3.2
                    transparency = 0.45 if i % 17 == 5 else 1.0
                    subprocess.run([binary, "render", f"--out={stage}/sub_{i:03d}.fits", "--width=256", "--height=192",
                                    "--stars=45", f"--seed={k + 1}", f"--fwhm={fwhm}", f"--transparency={transparency}",
                                    f"--object=Kestrel Field {'ABC'[k]}", f"--date-obs={t:%Y-%m-%dT%H:%M:%S}"],
                                   check=True, capture_output=True)
                staged.append(stage)
                captures.append(cap)

            def config(k, store, extra=""):
                path = os.path.join(tmp, f"rig{k}-{'pg' if 'url' in store else 'sqlite'}{extra and '-summary'}.toml")
                with open(path, "w") as f:
                    f.write(f'[watch]\nfolders = ["{captures[k]}"]\nsettle_seconds = 0.2\nchecks_seconds = 1\n'
                            f'[store]\n{store}\n[rig]\nname = "{RIGS[k]}"\n[site]\ntimezone = "{zone}"\n'
                            f'[report]\nfolder = "{tmp}/reports{k}"\n[alerts]\nenabled = false\n'
                            f'[mail]\nsmtp_host = "127.0.0.1"\nsmtp_port = {smtp_port}\nsecurity = "none"\n'
                            f'from = "subwatch@kestrel-ridge.example"\nto = ["observer@kestrel-ridge.example"]\n{extra}')
                return path

            pg = [config(k, f'url = "{url}"') for k in range(len(RIGS))]
            logs = {}

            def start(k, cfg):
                log = open(os.path.join(tmp, f"daemon{k}.log"), "a")
                logs[k] = log.name
                daemons[k] = subprocess.Popen([binary, "watch", "--config", cfg], stdout=log, stderr=log)

            def recorded():
                rows = psql(url, "SELECT rig, COUNT(*), COUNT(DISTINCT path) FROM frames GROUP BY rig ORDER BY rig")
                out = {}
                for line in rows.splitlines():
                    rig, n, distinct = line.split("|")
                    out[rig] = (int(n), int(distinct))
                return out

            for k in range(len(RIGS)):
                start(k, pg[k])
            # The frames land one by one, the three rigs in turn; rig 0's daemon is
            # killed (SIGKILL) twice while frames land, and started again.
            kills = 0
            t0 = time.monotonic()
            for i in range(FRAMES):
                for k in range(len(RIGS)):
                    name = f"sub_{i:03d}.fits"
                    os.rename(os.path.join(staged[k], name), os.path.join(captures[k], name))
                if i in (33, 66):
                    time.sleep(0.4)
                    daemons[0].send_signal(signal.SIGKILL)
                    daemons[0].wait()
                    kills += 1
                    start(0, pg[0])
                time.sleep(0.03)
            deadline = time.monotonic() + 240
            while time.monotonic() < deadline:
                counts = recorded()
                if all(counts.get(r, (0, 0))[0] >= FRAMES for r in RIGS):
                    break
                time.sleep(1)
            elapsed = time.monotonic() - t0
            counts = recorded()
            for k in range(len(RIGS)):
                daemons[k].send_signal(signal.SIGTERM)
                daemons[k].wait(timeout=60)
            checks.info("frames recorded", f"{counts} in {elapsed:.0f} s, rig 0 killed {kills} times")
            checks.record("every rig's 300 frames recorded exactly once (SIGKILL twice mid-night)",
                          all(counts.get(r) == (FRAMES, FRAMES) for r in RIGS), str(counts))
            left = psql(url, "SELECT COUNT(*) FROM reading")
            checks.record("no file left marked as being read", left == "0", f"{left} marks")

            # The same frames recorded by a daemon into an SQLite store, one per rig (read
            # back with Python's sqlite3): the same verdicts.
            lites = [config(k, f'path = "{tmp}/rig{k}.db"') for k in range(len(RIGS))]
            for k in range(len(RIGS)):
                start(k, lites[k])

            def lite_count(k):
                try:
                    with sqlite3.connect(f"file:{tmp}/rig{k}.db?mode=ro", uri=True) as c:
                        return c.execute("SELECT COUNT(*) FROM frames").fetchone()[0]
                except sqlite3.Error:
                    return 0
            deadline = time.monotonic() + 240
            while time.monotonic() < deadline and any(lite_count(k) < FRAMES for k in range(len(RIGS))):
                time.sleep(1)
            for k in range(len(RIGS)):
                daemons[k].send_signal(signal.SIGTERM)
                daemons[k].wait(timeout=60)
            same = True
            detail = []
            for k in range(len(RIGS)):
                lite = lites[k]
                docs = []
                for cfg in (pg[k], lite):
                    out = subprocess.run([binary, "report", "--config", cfg, "--night", night, "--json"],
                                         capture_output=True, text=True)
                    docs.append(json.loads(out.stdout) if out.returncode == 0 else {"frames": []})
                verdicts = [{os.path.basename(f["path"]): f["verdict"] for f in d["frames"]} for d in docs]
                kinds = sorted(set(verdicts[0].values()))
                differ = sorted(n for n in verdicts[0] if verdicts[0][n] != verdicts[1].get(n))
                detail.append(f"{RIGS[k]}: {len(verdicts[0])} frames {kinds}"
                              + (f", differ: {[(n, verdicts[0][n], verdicts[1].get(n)) for n in differ[:4]]}"
                                 if differ else ""))
                same = same and len(verdicts[0]) == FRAMES and verdicts[0] == verdicts[1]
            checks.record("each rig's verdicts equal the SQLite store's of the same frames", same, "; ".join(detail))

            out = subprocess.run([binary, "report", "--config", pg[1], "--night", night, "--site", "--json"],
                                 capture_output=True, text=True)
            frames = json.loads(out.stdout)["frames"] if out.returncode == 0 else []
            by_rig = {r: sum(1 for f in frames if f.get("rig") == r) for r in RIGS}
            checks.record("report --site --json gives every rig's frames, each naming its rig",
                          by_rig == {r: FRAMES for r in RIGS}, f"{by_rig} {out.stderr.strip()[-200:]}")

            # The site's summary: three daemons, one mail.
            web_port = free_port()
            summary = [config(k, f'url = "{url}"', 'summary_time = "00:01"\nsummary_of = "site"\n'
                              + (f'[web]\nlisten = "127.0.0.1:{web_port}"\n' if k == 0 else ""))
                       for k in range(len(RIGS))]
            for k in range(len(RIGS)):
                start(k, summary[k])
            deadline = time.monotonic() + 120
            while time.monotonic() < deadline and not smtp.messages:
                time.sleep(0.5)
            time.sleep(8)  # several more rounds of checks by every daemon
            out = subprocess.run([binary, "status", "--config", pg[2], "--night", night, "--site", "--json"],
                                 capture_output=True, text=True)
            rigs = json.loads(out.stdout).get("rigs", []) if out.returncode == 0 else []
            seen = {r["rig"]: (r["counts"]["frames"], r["daemon"] is not None) for r in rigs}
            checks.record("status --site shows every rig's frames and its running daemon",
                          seen == {r: (FRAMES, True) for r in RIGS}, f"{seen} {out.stderr.strip()[-200:]}")
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{web_port}/api/night", timeout=10) as page:
                    view = json.loads(page.read())
            except (OSError, ValueError) as e:
                view = {"error": str(e)}
            listed = {r["rig"]: (r["frames"], r["heard_s_ago"] is not None and r["heard_s_ago"] < 30)
                      for r in view.get("rigs", [])}
            checks.record("the status page lists every rig, its frames and a daemon heard lately",
                          listed == {r: (FRAMES, True) for r in RIGS}, str(listed or view)[:300])
            for k in range(len(RIGS)):
                daemons[k].send_signal(signal.SIGTERM)
                daemons[k].wait(timeout=60)
            checks.record("one site summary mailed, once, by three daemons", len(smtp.messages) == 1,
                          f"{len(smtp.messages)} message(s)")
            if smtp.messages:
                msg = email.message_from_bytes(smtp.messages[0], policy=policy.default)
                text = msg.get_body(preferencelist=("plain",)).get_content()
                named = [r for r in RIGS if r in text]
                checks.record("the summary names every rig", named == RIGS, f"named {named}; subject {msg['Subject']}")

            # The server away for 60 s while frames land.
            extra = os.path.join(tmp, "stage-extra")
            os.makedirs(extra)
            for i in range(10):
                t = (evening + dt.timedelta(minutes=2 * (FRAMES + i))).astimezone(dt.timezone.utc)
                subprocess.run([binary, "render", f"--out={extra}/late_{i:02d}.fits", "--width=256", "--height=192",
                                "--stars=45", "--seed=1", f"--date-obs={t:%Y-%m-%dT%H:%M:%S}",
                                "--object=Kestrel Field A"], check=True, capture_output=True)
            open(os.path.join(tmp, "daemon0.log"), "w").close()
            start(0, pg[0])
            time.sleep(3)
            subprocess.run(["bash", pg_script, "pause", pg_dir], check=True)
            cpu_before = cpu_seconds(daemons[0].pid)
            away_from = time.monotonic()
            for i in range(10):
                os.rename(os.path.join(extra, f"late_{i:02d}.fits"), os.path.join(captures[0], f"late_{i:02d}.fits"))
                time.sleep(5)
            time.sleep(max(0.0, 60 - (time.monotonic() - away_from)))
            cpu_away = cpu_seconds(daemons[0].pid) - cpu_before
            subprocess.run(["bash", pg_script, "resume", pg_dir], check=True)
            deadline = time.monotonic() + 90
            while time.monotonic() < deadline and recorded().get(RIGS[0], (0, 0))[0] < FRAMES + 10:
                time.sleep(1)
            after = recorded().get(RIGS[0])
            daemons[0].send_signal(signal.SIGTERM)
            daemons[0].wait(timeout=60)
            log = open(os.path.join(tmp, "daemon0.log")).read()
            told = log.count("the store cannot be reached")
            back = "the store is back after" in log
            lines = log.count("\n")
            checks.record("the frames landed during the 60 s outage are recorded once it is back",
                          after == (FRAMES + 10, FRAMES + 10), f"{after}")
            checks.record("the outage is logged once, and its end", told == 1 and back,
                          f"'cannot be reached' {told} time(s), back: {back}, {lines} log lines in all")
            # Reading 10 small frames costs well under a second; a loop retrying without
            # pause would use the whole 60 s.
            checks.record("the daemon does not spin while the store is away", cpu_away < 6.0,
                          f"{cpu_away:.2f} s of CPU over 60 s")
        tls_checks(binary, checks, server, pg_dir, url)
    finally:
        for p in daemons.values():
            if p.poll() is None:
                p.kill()
        controller.stop()
        subprocess.run(["bash", pg_script, "resume", pg_dir], capture_output=True)
        try:
            psql(server, f"DROP DATABASE IF EXISTS {dbname} WITH (FORCE)")
        except subprocess.CalledProcessError:
            pass
    return checks.finish()


def tls_checks(binary, checks, server, pg_dir, url):
    """TLS to the server where the address asks for it: the server given a certificate
    from an authority made by trustme (an outside library), and told to refuse this
    database to any connection without TLS."""
    import trustme
    data = os.path.join(pg_dir, "data")
    hba = os.path.join(data, "pg_hba.conf")
    hba_before = open(hba).read()
    dbname = url.rsplit("/", 1)[1]
    ca = trustme.CA()
    cert = ca.issue_cert("127.0.0.1")
    owner = os.stat(data).st_uid
    for name, blob in (("server.crt", cert.cert_chain_pems[0].bytes()), ("server.key", cert.private_key_pem.bytes())):
        path = os.path.join(data, name)
        with open(path, "wb") as f:
            f.write(blob)
        os.chmod(path, 0o600)
        os.chown(path, owner, -1)
    with tempfile.TemporaryDirectory() as tmp:
        ca_file = os.path.join(tmp, "site-ca.pem")
        ca.cert_pem.write_to_path(ca_file)
        try:
            with open(hba, "w") as f:
                f.write(f"hostnossl {dbname} all 127.0.0.1/32 reject\n" + hba_before)
            psql(server, "ALTER SYSTEM SET ssl = on")
            psql(server, "SELECT pg_reload_conf()")
            time.sleep(1)

            def status(address, ca_line):
                cfg = os.path.join(tmp, "tls.toml")
                with open(cfg, "w") as f:
                    f.write(f'[watch]\nfolders = ["{tmp}"]\n[store]\nurl = "{address}"\n{ca_line}'
                            f'[rig]\nname = "north pier"\n[site]\ntimezone = "UTC"\n')
                return subprocess.run([binary, "status", "--config", cfg, "--json"], capture_output=True, text=True)

            plain = status(url, "")
            checks.record("without TLS the server (hostnossl reject) refuses the store",
                          plain.returncode != 0 and "no encryption" in plain.stderr,
                          plain.stderr.strip()[-160:])
            good = status(url + "?sslmode=require", f'ca_file = "{ca_file}"\n')
            checks.record("sslmode=require with the site's authority as ca_file connects over TLS",
                          good.returncode == 0, (good.stderr or good.stdout).strip()[-200:])
            unknown = status(url + "?sslmode=verify-full", "")
            checks.record("a certificate from an unknown authority is refused",
                          unknown.returncode != 0 and "certificate" in unknown.stderr.lower(),
                          unknown.stderr.strip()[-200:])
            cfg = os.path.join(tmp, "tls.toml")
            status(url + "?sslmode=require", f'ca_file = "{ca_file}"\n')
            good_check = subprocess.run([binary, "check-config", "--config", cfg], capture_output=True, text=True)
            status(url + "?sslmode=require", "")
            bad_check = subprocess.run([binary, "check-config", "--config", cfg], capture_output=True, text=True)
            checks.record("check-config reaches the store over TLS, and names a refused certificate",
                          good_check.returncode == 0 and "store: reached" in good_check.stdout
                          and bad_check.returncode == 1 and "UnknownIssuer" in bad_check.stdout,
                          (good_check.stdout + bad_check.stdout).strip()[-300:])
        finally:
            with open(hba, "w") as f:
                f.write(hba_before)
            psql(server, "ALTER SYSTEM SET ssl = off")
            psql(server, "SELECT pg_reload_conf()")


if __name__ == "__main__":
    sys.exit(main())
