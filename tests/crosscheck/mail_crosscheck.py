"""The morning mail through a real SMTP server on loopback (aiosmtpd) and read back by
Python's standard email parser (an outside parser).

Checks: the summary arrives; it has a plain-text part, an HTML part, inline PNG images
whose Content-IDs are exactly the cid: references of the HTML, and a CSV attachment with
one row per frame; a header with <script> and CR/LF in OBJECT gives escaped HTML and an
intact one-line subject; with the server down the mail waits in the outbox, and after a
restart it arrives exactly once. Then over TLS, with a certificate authority made by
trustme (an outside library): STARTTLS on one port and implicit TLS on another both
deliver when the authority is configured as `ca_file`, and without it the unknown
certificate is refused and the mail kept.

usage: python mail_crosscheck.py path/to/subwatch
"""

import csv
import email
import io
import os
import re
import signal
import socket
import ssl
import subprocess
import sys
import tempfile
import time
from email import policy

import trustme
from aiosmtpd.controller import Controller

from common import Checks


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


def run(binary, *args, check=True):
    return subprocess.run([binary, *args], capture_output=True, text=True, check=check)


def main():
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("mail_crosscheck")
    with tempfile.TemporaryDirectory() as tmp:
        capture = os.path.join(tmp, "capture")
        os.makedirs(capture)
        # Three frames of one night; the first with a hostile OBJECT.
        hostile = "Kestrel <script>alert(1)</script> Field"
        for i in range(3):
            run(binary, "render", f"--out={os.path.join(capture, f'f{i}.fits')}", "--width=400", "--height=300",
                "--stars=80", f"--seed={i + 1}", f"--object={hostile}", f"--date-obs=2026-03-14T22:{10 + i:02d}:00")
        # Put a CR/LF pair inside the OBJECT string of the first frame (same length, so
        # the 80-column cards stay whole): FITS forbids it, a broken writer might not.
        path = os.path.join(capture, "f0.fits")
        data = bytearray(open(path, "rb").read())
        k = data.find(b"<script>")
        data[k - 2:k] = b"\r\n"
        open(path, "wb").write(bytes(data))

        port = free_port()
        cfg = os.path.join(tmp, "subwatch.toml")
        with open(cfg, "w") as f:
            f.write(f'[watch]\nfolders = ["{capture}"]\nsettle_seconds = 0.2\n[store]\npath = "{tmp}/s.db"\n'
                    f'[site]\ntimezone = "UTC"\n[report]\nfolder = "{tmp}/reports"\n'
                    f'[mail]\nsmtp_host = "127.0.0.1"\nsmtp_port = {port}\nsecurity = "none"\n'
                    f'from = "subwatch@kestrel-ridge.example"\nto = ["observer@kestrel-ridge.example"]\n')
        daemon = subprocess.Popen([binary, "watch", "--config", cfg], stderr=subprocess.DEVNULL)
        deadline = time.time() + 30
        import sqlite3
        while time.time() < deadline:
            try:
                n = sqlite3.connect(f"{tmp}/s.db").execute("SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL").fetchone()[0]
            except sqlite3.Error:
                n = 0
            if n == 3:
                break
            time.sleep(0.1)
        daemon.send_signal(signal.SIGTERM)
        daemon.wait(timeout=30)
        checks.record("daemon recorded the frames", n == 3, f"{n} of 3")

        handler = Collect()
        server = Controller(handler, hostname="127.0.0.1", port=port)
        server.start()
        r = run(binary, "report", f"--config={cfg}", "--night=2026-03-14", "--send", check=False)
        time.sleep(0.5)
        checks.record("report --send exits 0 with the server up", r.returncode == 0, r.stderr.strip()[-300:])
        checks.record("one message arrived", len(handler.messages) == 1, f"{len(handler.messages)} message(s)")
        if handler.messages:
            m = email.message_from_bytes(handler.messages[0], policy=policy.default)
            subject = m["Subject"]
            checks.record("subject is one intact line", "\r" not in subject and "\n" not in subject
                          and subject.startswith("subwatch night 2026-03-14: 3 frames"), repr(subject))
            plain = m.get_body(("plain",))
            html = m.get_body(("html",))
            checks.record("plain-text and HTML parts", plain is not None and html is not None)
            html_text = html.get_content() if html is not None else ""
            checks.record("OBJECT escaped in the HTML", "<script>" not in html_text and "&lt;script&gt;" in html_text)
            refs = set(re.findall(r'src="cid:([^"]+)"', html_text))
            cids = {p.get("Content-ID", "").strip("<>") for p in m.walk() if p.get_content_type() == "image/png"}
            checks.record("inline images match the HTML's cid: references", refs and refs == cids,
                          f"{len(refs)} references, {len(cids)} images")
            pngs_ok = all(p.get_content()[:8] == b"\x89PNG\r\n\x1a\n" for p in m.walk() if p.get_content_type() == "image/png")
            checks.record("inline images are PNG", pngs_ok)
            attachments = [p for p in m.iter_attachments() if p.get_content_type() == "text/csv"]
            rows = list(csv.DictReader(io.StringIO(attachments[0].get_content()))) if attachments else []
            checks.record("CSV attachment with one row per frame", len(rows) == 3, f"{len(rows)} rows")
        server.stop()

        # Server down: the mail waits in the outbox; back up: it arrives once.
        r = run(binary, "report", f"--config={cfg}", "--night=2026-03-14", "--send", check=False)
        checks.record("with the server down the mail is kept", r.returncode == 3 and "kept in the outbox" in r.stderr, r.stderr.strip()[-200:])
        handler2 = Collect()
        server = Controller(handler2, hostname="127.0.0.1", port=port)
        server.start()
        first = run(binary, "outbox", f"--config={cfg}", "--now", check=False)
        second = run(binary, "outbox", f"--config={cfg}", "--now", check=False)
        time.sleep(0.5)
        server.stop()
        checks.record("after the restart it arrives exactly once", len(handler2.messages) == 1 and first.returncode == 0
                      and second.stdout.startswith("sent 0"), f"{len(handler2.messages)} message(s); {first.stdout.strip()} / {second.stdout.strip()}")

        # TLS: an authority of our own, a server certificate for "localhost".
        ca = trustme.CA()
        server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ca.issue_cert("localhost").configure_cert(server_ctx)
        ca_file = os.path.join(tmp, "mail-ca.pem")
        ca.cert_pem.write_to_path(ca_file)
        base = open(cfg).read().split("[mail]")[0]

        def tls_config(name, port, security, with_ca):
            path = os.path.join(tmp, name)
            with open(path, "w") as f:
                f.write(base + f'[mail]\nsmtp_host = "localhost"\nsmtp_port = {port}\nsecurity = "{security}"\n'
                        + (f'ca_file = "{ca_file}"\n' if with_ca else "")
                        + 'from = "subwatch@kestrel-ridge.example"\nto = ["observer@kestrel-ridge.example"]\n')
            return path

        for security, kwargs in (("starttls", {"tls_context": server_ctx, "require_starttls": True}),
                                 ("tls", {"ssl_context": server_ctx})):
            port = free_port()
            handler = Collect()
            server = Controller(handler, hostname="127.0.0.1", port=port, **kwargs)
            server.start()
            r = run(binary, "report", f"--config={tls_config(security + '.toml', port, security, True)}",
                    "--night=2026-03-14", "--send", check=False)
            time.sleep(0.5)
            subjects = [email.message_from_bytes(m, policy=policy.default)["Subject"] for m in handler.messages]
            checks.record(f"security = \"{security}\" with ca_file delivers", r.returncode == 0 and len(subjects) == 1
                          and subjects[0].startswith("subwatch night 2026-03-14"),
                          f"exit {r.returncode}, {len(subjects)} message(s) {r.stderr.strip()[-200:]}")
            if security == "starttls":
                # The same server, its authority not configured: refused, kept.
                r = run(binary, "report", f"--config={tls_config('untrusted.toml', port, security, False)}",
                        "--night=2026-03-14", "--send", check=False)
                time.sleep(0.5)
                checks.record("an unknown certificate is refused and the mail kept",
                              r.returncode == 3 and "kept in the outbox" in r.stderr and len(handler.messages) == 1,
                              r.stderr.strip()[-200:])
            server.stop()
    return checks.finish()


if __name__ == "__main__":
    sys.exit(main())
