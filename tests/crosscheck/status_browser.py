"""The live status page as a browser and a stranger see it: a `subwatch watch` daemon with
`[web] listen` on, frames copied into its folder, and the page opened in headless Chromium
(Debian's package) driven over Chromium's DevTools protocol (a WebSocket, RFC 6455,
spoken here with the standard library).

In the browser, at a desktop's width (1280 px) and a phone's (400 px): no console error,
no exception and no Content-Security-Policy violation; every section present; the frames
recorded listed by file name; every image decoded; nothing past the window's right edge
(tables scroll inside their own `.scroll` boxes). Then the page follows a new frame
without reloading, and a frame whose OBJECT header is markup shows it as text.

The page's three sets of colours, chosen with its own buttons at both widths, once the
night's plots are drawn: each is remembered (localStorage, kept across a reload and a
new tab, and through a live update); every text colour stands at least 4.5:1 against its
background (WCAG 2.1, success criterion 1.4.3); the dark mode's background is dark; and
the red mode, for the dome, shows no green or blue light, checked on every computed
colour, every picture's filter and every pixel of a full-page screenshot, with the light
mode as the control that the pixel check can fail. Every time shown names its clock.

From outside, with raw HTTP: an access token is required when one is configured (and is
enough); traversal, NUL and oversized requests, and a POST, are refused with 4xx; and a
daemon told to listen on every interface without a token refuses to start.

Screenshots are kept in target/status-screenshots/ (or $SUBWATCH_SCREENSHOTS).

usage: python status_browser.py path/to/subwatch
"""

import base64
import json
import os
import re
import secrets
import shutil
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
from io import BytesIO

import numpy as np
from astropy.io import fits
from PIL import Image

from common import Checks

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
SAMPLES = os.path.join(ROOT, "sample-frames")
FIRST = ["kfa-001-good.fits", "kfa-014-soft-focus.fits"]
THIRD = "kfa-021-wind.fits"
HOSTILE_OBJECT = "<img src=x onerror=alert(1)>"
HOSTILE_FILE = "kfa-040-object-markup.fits"
SECTIONS = ["groups", "latest", "frames", "anomalies", "plots", "alerts", "sky"]
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--no-default-browser-check", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", "--hide-scrollbars", "--disable-extensions", "--mute-audio"]


# --------------------------------------------------------------------------
# the daemon
# --------------------------------------------------------------------------
class Daemon:
    """`subwatch watch --config CFG` with its stderr read line by line on a thread."""

    ADDRESS = re.compile(r"status page at http://([0-9.]+:[0-9]+)/")
    MEASURED = re.compile(r" subwatch::watch: (.*) measured: ")

    def __init__(self, binary, config):
        env = dict(os.environ, SUBWATCH_LOG="info")
        self.proc = subprocess.Popen([binary, "watch", "--config", config], stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env)
        self.lines = []
        self.lock = threading.Condition()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stderr:
            with self.lock:
                self.lines.append(line.rstrip("\n"))
                self.lock.notify_all()
        with self.lock:
            self.lock.notify_all()

    def wait_for(self, pred, timeout):
        """The first log line for which pred(line) is truthy, or None after timeout."""
        deadline = time.monotonic() + timeout
        with self.lock:
            seen = 0
            while True:
                for line in self.lines[seen:]:
                    got = pred(line)
                    if got:
                        return got
                seen = len(self.lines)
                left = deadline - time.monotonic()
                if left <= 0 or (self.proc.poll() is not None and seen == len(self.lines)):
                    return None
                self.lock.wait(min(left, 0.2))

    def address(self, timeout=20):
        return self.wait_for(lambda l: (m := self.ADDRESS.search(l)) and m.group(1), timeout)

    def measured(self, path, timeout=60):
        return self.wait_for(lambda l: (m := self.MEASURED.search(l)) and m.group(1) == path and l, timeout)

    def log_tail(self, n=5):
        with self.lock:
            return " | ".join(self.lines[-n:])

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        return self.proc.returncode


def write_config(path, folder, store, listen, token_file=None):
    with open(path, "w") as f:
        f.write(f'[watch]\nfolders = ["{folder}"]\nsettle_seconds = 0.5\n'
                f'[store]\npath = "{store}"\n'
                f'[site]\nlatitude = 40.0\nlongitude = -3.7\ntimezone = "Europe/Madrid"\n'
                f'[web]\nlisten = "{listen}"\n')
        if token_file:
            f.write(f'token_file = "{token_file}"\n')


def land(src, folder, name):
    """Copy under a hidden name, then rename: the frame appears whole (common practice)."""
    part = os.path.join(folder, f".{name}.part")
    shutil.copyfile(src, part)
    final = os.path.join(folder, name)
    os.rename(part, final)
    return final


# --------------------------------------------------------------------------
# Chromium's DevTools protocol over a WebSocket (RFC 6455), standard library only
# --------------------------------------------------------------------------
class WebSocket:
    def __init__(self, url, timeout=30):
        m = re.match(r"ws://([^/:]+):(\d+)(/.*)", url)
        host, port, path = m.group(1), int(m.group(2)), m.group(3)
        self.sock = socket.create_connection((host, port), timeout=timeout)
        key = base64.b64encode(secrets.token_bytes(16)).decode()
        self.sock.sendall((f"GET {path} HTTP/1.1\r\nHost: {host}:{port}\r\nUpgrade: websocket\r\n"
                           f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
                           f"Sec-WebSocket-Version: 13\r\n\r\n").encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("DevTools closed the connection during the handshake")
            head += chunk
        head, self.buf = head.split(b"\r\n\r\n", 1)
        if not head.startswith(b"HTTP/1.1 101"):
            raise ConnectionError(f"DevTools refused the WebSocket: {head[:200]!r}")
        self.sock.settimeout(None)
        self.send_lock = threading.Lock()

    def _exact(self, n):
        while len(self.buf) < n:
            chunk = self.sock.recv(1 << 20)
            if not chunk:
                raise ConnectionError("DevTools closed the connection")
            self.buf += chunk
        out, self.buf = self.buf[:n], self.buf[n:]
        return out

    def send(self, text, opcode=1):
        payload = text.encode() if isinstance(text, str) else text
        n = len(payload)
        head = bytes([0x80 | opcode])
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 1 << 16:
            head += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            head += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = secrets.token_bytes(4)
        masked = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
        with self.send_lock:
            self.sock.sendall(head + mask + masked)

    def recv(self):
        """One whole text message (continuations joined); None when closed."""
        parts = []
        while True:
            b0, b1 = self._exact(2)
            opcode, n = b0 & 0x0F, b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._exact(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._exact(8))[0]
            mask = self._exact(4) if b1 & 0x80 else None
            data = self._exact(n)
            if mask:
                data = bytes(b ^ mask[i % 4] for i, b in enumerate(data))
            if opcode == 8:
                return None
            if opcode == 9:
                self.send(data, opcode=10)
                continue
            if opcode in (0, 1, 2):
                parts.append(data)
                if b0 & 0x80:
                    return b"".join(parts).decode()

    def close(self):
        try:
            self.sock.close()
        except OSError:
            pass


class Page:
    """One page target: commands answered by id, events kept in order."""

    def __init__(self, ws_url):
        self.ws = WebSocket(ws_url)
        self.next_id = 0
        self.replies = {}
        self.events = []
        self.cond = threading.Condition()
        self.closed = False
        threading.Thread(target=self._pump, daemon=True).start()

    def _pump(self):
        try:
            while True:
                msg = self.ws.recv()
                if msg is None:
                    break
                m = json.loads(msg)
                with self.cond:
                    if "id" in m:
                        self.replies[m["id"]] = m
                    else:
                        self.events.append(m)
                    self.cond.notify_all()
                if m.get("method") == "Page.javascriptDialogOpening":
                    # Dismissed, so that the page is not blocked; that it opened is kept.
                    self.send_async("Page.handleJavaScriptDialog", {"accept": False})
        except (ConnectionError, OSError, ValueError):
            pass
        with self.cond:
            self.closed = True
            self.cond.notify_all()

    def send_async(self, method, params=None):
        with self.cond:
            self.next_id += 1
            i = self.next_id
        self.ws.send(json.dumps({"id": i, "method": method, "params": params or {}}))
        return i

    def call(self, method, params=None, timeout=60):
        i = self.send_async(method, params)
        deadline = time.monotonic() + timeout
        with self.cond:
            while i not in self.replies:
                left = deadline - time.monotonic()
                if left <= 0 or self.closed:
                    raise TimeoutError(f"{method}: no answer from Chromium")
                self.cond.wait(min(left, 0.5))
            m = self.replies.pop(i)
        if "error" in m:
            raise RuntimeError(f"{method}: {m['error']}")
        return m.get("result", {})

    def js(self, expression, timeout=60):
        r = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True,
                                           "awaitPromise": True}, timeout=timeout)
        if "exceptionDetails" in r:
            raise RuntimeError(f"evaluate: {r['exceptionDetails'].get('text')} "
                               f"{r['exceptionDetails'].get('exception', {}).get('description', '')[:200]}")
        return r["result"].get("value")

    def wait_js(self, expression, timeout, every=0.25):
        """Poll a JS expression until it is truthy; its last value."""
        deadline = time.monotonic() + timeout
        while True:
            v = self.js(expression)
            if v or time.monotonic() > deadline:
                return v
            time.sleep(every)

    def events_of(self, method, since=0):
        with self.cond:
            return [e for e in self.events[since:] if e["method"] == method]

    def mark(self):
        with self.cond:
            return len(self.events)

    def wait_event(self, method, since, timeout):
        deadline = time.monotonic() + timeout
        with self.cond:
            while True:
                for e in self.events[since:]:
                    if e["method"] == method:
                        return e
                left = deadline - time.monotonic()
                if left <= 0 or self.closed:
                    return None
                self.cond.wait(min(left, 0.5))

    def close(self):
        self.ws.close()


def errors_in(page, since=0):
    """Console errors, uncaught exceptions and error log entries (a CSP violation is one)."""
    out = []
    for e in page.events[since:]:
        p = e.get("params", {})
        if e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            out.append("console: " + " ".join(str(a.get("value", a.get("description", ""))) for a in p.get("args", [])))
        elif e["method"] == "Runtime.exceptionThrown":
            d = p.get("exceptionDetails", {})
            out.append("exception: " + (d.get("exception", {}).get("description") or d.get("text", "")))
        elif e["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
            entry = p["entry"]
            out.append(f"log ({entry.get('source')}): {entry.get('text', '')} {entry.get('url', '')}".strip())
    return out


def main_frame_navigations(page, since=0):
    return [e for e in page.events_of("Page.frameNavigated", since)
            if not e["params"]["frame"].get("parentId")]


class Chromium:
    def __init__(self, binary, profile):
        os.makedirs(profile, exist_ok=True)
        # Its scratch files go under the profile, which is removed with the test's folder.
        env = dict(os.environ, TMPDIR=profile)
        self.proc = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-port=0",
                                      "about:blank"], stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL, start_new_session=True, env=env)
        port_file = os.path.join(profile, "DevToolsActivePort")
        deadline = time.monotonic() + 30
        self.port = None
        while time.monotonic() < deadline and self.proc.poll() is None:
            try:
                with open(port_file) as f:
                    first = f.readline().strip()
                if first:
                    self.port = int(first)
                    break
            except (OSError, ValueError):
                pass
            time.sleep(0.1)
        if self.port is None:
            self.stop()
            raise RuntimeError("Chromium did not open its DevTools port within 30 s")

    def new_page(self):
        req = urllib.request.Request(f"http://127.0.0.1:{self.port}/json/new?about:blank", method="PUT")
        with urllib.request.urlopen(req, timeout=30) as r:
            target = json.load(r)
        return Page(target["webSocketDebuggerUrl"])

    def stop(self):
        if self.proc.poll() is None and self.port is not None:
            # Asked to close, it cleans up after itself.
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{self.port}/json/version", timeout=10) as r:
                    ws = WebSocket(json.load(r)["webSocketDebuggerUrl"])
                ws.send(json.dumps({"id": 1, "method": "Browser.close"}))
                self.proc.wait(timeout=15)
                ws.close()
            except (OSError, ValueError, KeyError, ConnectionError, subprocess.TimeoutExpired):
                pass
        if self.proc.poll() is None:
            # Its own process group (start_new_session): the renderers go with it.
            try:
                os.killpg(self.proc.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
            try:
                self.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait()


# Measured in the page once it has loaded (and its images have had their chance).
LAYOUT = r"""(() => {
  const vw = window.innerWidth;
  const wide = [];
  for (const el of document.body.querySelectorAll('*')) {
    // Inside a box that scrolls by itself: its overflow is the box's business.
    if (el.parentElement && el.parentElement.closest('.scroll')) continue;
    const r = el.getBoundingClientRect();
    if (r.width > 0 && r.right > vw + 0.5) {
      wide.push(el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') +
                (el.className && typeof el.className === 'string' ? '.' + el.className : '') + ' ' + Math.round(r.right));
    }
  }
  const imgs = Array.from(document.images);
  return {
    innerWidth: vw,
    scrollWidth: document.documentElement.scrollWidth,
    height: document.documentElement.scrollHeight,
    sections: Array.from(document.querySelectorAll('section[id]')).map(s => s.id),
    frames: (document.getElementById('frames') || {innerText: ''}).innerText,
    images: imgs.map(i => ({src: i.getAttribute('src'), ok: i.complete && i.naturalWidth > 0})),
    wide: wide.slice(0, 8), wideCount: wide.length,
  };
})()"""

IMAGES_READY = r"""(() => {
  const pic = document.querySelector('#latest img');
  const imgs = Array.from(document.images);
  return !!pic && imgs.every(i => i.complete && i.naturalWidth > 0);
})()"""


def load(page, url, width, height, mobile):
    page.call("Emulation.setDeviceMetricsOverride", {"width": width, "height": height,
                                                     "deviceScaleFactor": 1, "mobile": mobile})
    since = page.mark()
    page.call("Page.navigate", {"url": url})
    page.wait_event("Page.loadEventFired", since, 30)
    return since


# --------------------------------------------------------------------------
# the page's colours
# --------------------------------------------------------------------------
MODES = ["light", "dark", "red"]
MODE_KEY = "subwatch-page-mode"
# Red mode: a pixel may have green and blue up to RED_FLOOR + RED_SHARE * red (levels of
# 255). The page asks for exactly 0 (colours without green or blue, pictures through a
# matrix that writes 0 into both); the floor allows a compositor's rounding of a level
# or two, and 3 % of red is far below any light that reads as other than red: white and
# grey have G = B = R, and the page's least red colour elsewhere (#960, its light mode's
# warning) has G = 0.67 R. Rod vision, which the dark-adapted eye uses, is all but blind
# beyond 620 nm and most sensitive near 500 nm (green-blue), which is why only red is
# kept (common practice at the telescope).
RED_FLOOR = 2
RED_SHARE = 0.03
# WCAG 2.1 success criterion 1.4.3 (contrast, minimum): 4.5:1 for text.
WCAG_TEXT = 4.5

STYLES = r"""(() => {
  const parse = s => {
    const m = /rgba?\(([^)]*)\)/.exec(s || '');
    if (!m) return null;
    const p = m[1].split(/[\s,\/]+/).filter(Boolean).map(Number);
    return {r: p[0], g: p[1], b: p[2], a: p.length > 3 ? p[3] : 1};
  };
  const desc = el => el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') +
    (typeof el.className === 'string' && el.className ? '.' + el.className.split(' ').join('.') : '');
  const props = ['color', 'background-color', 'border-top-color', 'border-right-color', 'border-bottom-color',
                 'border-left-color', 'outline-color', 'fill', 'stroke', 'text-decoration-color',
                 'column-rule-color', 'caret-color'];
  const colours = [];
  for (const el of [document.documentElement, ...document.querySelectorAll('*')]) {
    if (el !== document.documentElement && el.getClientRects().length === 0) continue;
    const cs = getComputedStyle(el);
    for (const p of props) {
      const c = parse(cs.getPropertyValue(p));
      if (c && c.a > 0) colours.push({el: desc(el), p, r: c.r, g: c.g, b: c.b});
    }
  }
  const rootBg = parse(getComputedStyle(document.documentElement).backgroundColor);
  const texts = [];
  for (const el of document.body.querySelectorAll('*')) {
    if (el.getClientRects().length === 0) continue;
    if (![...el.childNodes].some(n => n.nodeType === 3 && n.textContent.trim())) continue;
    let bg = null;
    for (let a = el; a; a = a.parentElement) {
      const c = parse(getComputedStyle(a).backgroundColor);
      if (c && c.a > 0) { bg = c; break; }
    }
    texts.push({el: desc(el), fg: parse(getComputedStyle(el).color), bg: bg || rootBg});
  }
  const imgs = Array.from(document.images).map(i => ({
    src: i.getAttribute('src'), cls: i.className, where: i.closest('section') ? i.closest('section').id : '',
    filter: getComputedStyle(i).filter, ok: i.complete && i.naturalWidth > 0}));
  const pressed = Array.from(document.querySelectorAll('#modes button[aria-pressed="true"]'))
    .map(b => b.getAttribute('data-mode'));
  const times = Array.from(document.querySelectorAll('time')).map(t => ({
    clock: t.getAttribute('data-clock'), text: t.textContent,
    label: (t.closest('tr') && t.closest('table').querySelector('th') ? t.closest('table').innerText.split('\n')[0] : '') +
           ' ' + (t.parentElement ? t.parentElement.innerText : '') + ' ' +
           (t.closest('section') ? (t.closest('section').querySelector('p.quiet') || {innerText: ''}).innerText : '')}));
  let stored = null;
  try { stored = localStorage.getItem('""" + MODE_KEY + r"""'); } catch (e) { stored = 'unreadable: ' + e; }
  return {mode: document.documentElement.getAttribute('data-mode'), stored, pressed,
          shown: !!document.getElementById('modes') && !document.getElementById('modes').hidden,
          colours, texts, imgs, times, rootBg};
})()"""


def relative_luminance(c):
    """WCAG 2.1's relative luminance of an sRGB colour (its glossary's formula)."""
    def lin(v):
        v = v / 255.0
        return v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4
    return 0.2126 * lin(c["r"]) + 0.7152 * lin(c["g"]) + 0.0722 * lin(c["b"])


def contrast_ratio(a, b):
    la, lb = relative_luminance(a), relative_luminance(b)
    return (max(la, lb) + 0.05) / (min(la, lb) + 0.05)


def red_excess(r, g, b):
    """How far green or blue is above the red mode's bound (<= 0: within it)."""
    bound = RED_FLOOR + RED_SHARE * r
    return max(g - bound, b - bound)


def screenshot(page, width, path):
    height = min(max(int(page.js("document.documentElement.scrollHeight")), 200), 16000)
    data = page.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                "clip": {"x": 0, "y": 0, "width": width, "height": height,
                                                         "scale": 1}})["data"]
    raw = base64.b64decode(data)
    with open(path, "wb") as f:
        f.write(raw)
    return np.asarray(Image.open(BytesIO(raw)).convert("RGB")).astype(np.int32)


def pixels_beyond_red(rgb):
    """(pixels whose green or blue is above the bound, largest G, largest B, pixels with any G or B)."""
    r, g, b = rgb[..., 0], rgb[..., 1], rgb[..., 2]
    bound = RED_FLOOR + RED_SHARE * r
    beyond = int(np.count_nonzero((g > bound) | (b > bound)))
    return beyond, int(g.max()), int(b.max()), int(np.count_nonzero((g > 0) | (b > 0)))


def choose_mode(page, mode):
    """Press the page's own button for `mode`; its state afterwards."""
    clicked = page.js(f"(() => {{ const b = document.querySelector('#modes button[data-mode=\"{mode}\"]');"
                      f" if (!b) return false; b.click(); return true; }})()")
    # Two frames drawn after the click, so that what is measured is what is shown.
    page.js("new Promise(r => requestAnimationFrame(() => requestAnimationFrame(() => r(true))))")
    return clicked


def check_modes(checks, page, url, shots, daemon):
    """The three sets of colours at both widths, once the night's plots are in."""
    for label, width, mobile in (("desktop", 1280, False), ("phone", 400, True)):
        since = load(page, url, width, 900, mobile)
        t0 = time.monotonic()
        # The analysis (plots, cutouts) runs while the page is looked at, at most every 30 s.
        ready = page.wait_js(IMAGES_READY + " && document.querySelectorAll('img.plot').length > 0", 75, every=0.5)
        kinds = page.js("Array.from(document.images).map(i => i.closest('section') ? i.closest('section').id : '?')")
        checks.record(f"{label}: the picture and the night's plots are on the page before the colours are checked",
                      bool(ready), f"after {time.monotonic() - t0:.1f} s: images in {sorted(set(kinds or []))}, "
                                   f"{(kinds or []).count('plots')} plot(s), {(kinds or []).count('anomalies')} cutout(s)")
        for mode in MODES:
            clicked = choose_mode(page, mode)
            if mode == "red":
                # A cutout as the page shows one (none of these frames may have an anomaly),
                # made of the brightest picture there is: a plot, white with coloured lines.
                page.js("(async () => { const a = document.createElement('div'); a.className = 'anomaly';"
                        " a.id = 'control-cutout'; const i = document.createElement('img');"
                        " i.src = document.querySelector('img.plot').getAttribute('src'); a.appendChild(i);"
                        " document.getElementById('anomalies').appendChild(a); await i.decode(); return true; })()")
            time.sleep(0.3)
            st = page.js(STYLES)
            checks.record(f"{label} ({width} px), {mode}: chosen with the page's own button and remembered",
                          clicked and st["shown"] and st["mode"] == mode and st["stored"] == mode
                          and st["pressed"] == [mode],
                          f"button {'pressed' if clicked else 'missing'}; data-mode {st['mode']!r}, "
                          f"stored {st['stored']!r}, pressed {st['pressed']}")
            worst = min(((contrast_ratio(t["fg"], t["bg"]), t["el"]) for t in st["texts"] if t["fg"] and t["bg"]),
                        default=(None, "-"))
            checks.record(f"{label}, {mode}: every text stands at least {WCAG_TEXT}:1 against its background "
                          f"(WCAG 2.1, 1.4.3)", worst[0] is not None and worst[0] >= WCAG_TEXT,
                          f"{len(st['texts'])} text elements; lowest {worst[0]:.2f}:1 ({worst[1]})"
                          if worst[0] is not None else "no text measured")
            broken = [i["src"] for i in st["imgs"] if not i["ok"]]
            checks.record(f"{label}, {mode}: every image still decodes", not broken and len(st["imgs"]) > 0,
                          f"{len(st['imgs'])} images; broken {broken[:3]}")
            shot = os.path.join(shots, f"status-{label}-{width}px-{mode}.png")
            rgb = screenshot(page, width, shot)
            beyond, gmax, bmax, tinted = pixels_beyond_red(rgb)
            if mode == "light":
                # The control: the same pixel check finds the light mode's green, blue and white.
                checks.record(f"{label}, light (control): the red check finds green or blue in the light mode",
                              beyond > 1000, f"{beyond} of {rgb.shape[0] * rgb.shape[1]} pixels beyond the bound; {shot}")
            elif mode == "dark":
                bg = st["rootBg"]
                lum = relative_luminance(bg) if bg else 1.0
                median = float(np.median(rgb.mean(axis=2)))
                plots_inverted = all("invert" in i["filter"] for i in st["imgs"] if "plot" in i["cls"])
                checks.record(f"{label}, dark: the page is dark (background luminance under 0.02, median pixel "
                              f"under 40 of 255) and the white plots are drawn inverted",
                              lum < 0.02 and median < 40 and plots_inverted,
                              f"background {bg}, luminance {lum:.4f}; median pixel {median:.0f}; "
                              f"plots inverted {plots_inverted}; {shot}")
            else:
                bad = [f"{c['el']} {c['p']} rgb({c['r']}, {c['g']}, {c['b']})" for c in st["colours"]
                       if red_excess(c["r"], c["g"], c["b"]) > 0]
                checks.record(f"{label}, red: no computed colour has green or blue above {RED_FLOOR} + "
                              f"{RED_SHARE:.0%} of its red", not bad,
                              f"{len(st['colours'])} colours of {len(set(c['el'] for c in st['colours']))} elements; "
                              f"beyond: {bad[:3]}")
                unfiltered = [i["src"] for i in st["imgs"] if "red-only" not in i["filter"]]
                checks.record(f"{label}, red: every picture (the frame, plots, cutouts) is drawn through the "
                              f"red-only filter", not unfiltered and len(st["imgs"]) > 0,
                              f"{len(st['imgs'])} images, filters {sorted(set(i['filter'] for i in st['imgs']))}; "
                              f"unfiltered {unfiltered[:3]}")
                cutouts = [i for i in st["imgs"] if i["where"] == "anomalies"]
                checks.record(f"{label}, red: no pixel of the full-page screenshot has green or blue above "
                              f"{RED_FLOOR} + {RED_SHARE:.0%} of its red",
                              beyond == 0 and rgb.shape[1] == width and len(cutouts) > 0,
                              f"{rgb.shape[1]}x{rgb.shape[0]} px with {len(st['imgs'])} pictures "
                              f"({len(cutouts)} cutout(s), one a control made of a plot): {beyond} beyond; "
                              f"largest G {gmax}, largest B {bmax}; {tinted} pixels with any G or B; {shot}")
                page.js("(() => { const c = document.getElementById('control-cutout'); if (c) c.remove(); return true; })()")
        errors = errors_in(page, since)
        checks.record(f"{label}: no console error or CSP violation while the colours changed", not errors,
                      f"{len(errors)}: {errors[:3]}")
    # The last choice (red) outlives a reload and holds in a new tab of the same browser.
    page.call("Page.reload", {})
    time.sleep(2)
    st = page.js(STYLES)
    checks.record("red is kept across a reload (localStorage), its button pressed",
                  st["mode"] == "red" and st["pressed"] == ["red"], f"data-mode {st['mode']!r}, pressed {st['pressed']}")
    # Times name their clock: frame time (DATE-OBS) or this PC's.
    unlabelled = [t for t in st["times"]
                  if not ((t["clock"] == "frame" and "DATE-OBS" in t["label"])
                          or (t["clock"] == "pc" and "this PC" in t["label"]))]
    clocks = sorted(set(t["clock"] or "none" for t in st["times"]))
    checks.record("every time shown is marked with its clock and labelled beside it (DATE-OBS or this PC's clock)",
                  len(st["times"]) >= 3 and not unlabelled and "frame" in clocks and "pc" in clocks,
                  f"{len(st['times'])} times on clocks {clocks}; unlabelled {[(t['clock'], t['text']) for t in unlabelled][:3]}")
    apart = page.js("(document.getElementById('clocks-apart') || {innerText: ''}).innerText")
    checks.record("the sample frames (DATE-OBS in the past) are said to be far behind this PC's clock",
                  "behind this PC" in apart, apart[:160] or "no notice")


def new_tab_mode(browser, url):
    """The mode a fresh tab of the same browser opens the page in."""
    other = browser.new_page()
    try:
        other.call("Page.enable")
        since = other.mark()
        other.call("Page.navigate", {"url": url})
        other.wait_event("Page.loadEventFired", since, 30)
        return other.js("document.documentElement.getAttribute('data-mode')")
    finally:
        other.close()


def check_width(checks, page, url, label, width, mobile, names, shots):
    since = load(page, url, width, 900, mobile)
    # The latest frame's picture is made a moment after the first request; the page
    # brings it in by itself.
    t0 = time.monotonic()
    ready = page.wait_js(IMAGES_READY, 25, every=0.5)
    waited = time.monotonic() - t0
    time.sleep(0.5)
    r = page.js(LAYOUT)
    checks.record(f"{label} ({width} px): the window is the width asked for (Emulation.setDeviceMetricsOverride)",
                  r["innerWidth"] == width, f"innerWidth {r['innerWidth']}")
    errors = errors_in(page, since)
    checks.record(f"{label}: no console error, exception or CSP violation (Chromium's DevTools protocol)",
                  not errors, f"{len(errors)}: {errors[:3]}")
    missing = [s for s in SECTIONS if s not in r["sections"]]
    checks.record(f"{label}: every section is present", not missing,
                  f"sections {', '.join(r['sections'])}; missing {missing}")
    absent = [n for n in names if n not in r["frames"]]
    checks.record(f"{label}: the frames recorded are listed by file name", not absent,
                  f"{len(names)} frames; missing {absent}")
    broken = [i["src"] for i in r["images"] if not i["ok"]]
    has_preview = any((i["src"] or "").startswith("preview/") or (i["src"] or "").startswith("/preview/")
                      for i in r["images"])
    checks.record(f"{label}: the latest frame's picture is shown and every image decodes",
                  bool(ready) and has_preview and not broken,
                  f"{len(r['images'])} images after {waited:.1f} s; broken {broken[:3]}")
    checks.record(f"{label}: nothing reaches past the window's right edge",
                  r["scrollWidth"] <= width and r["wideCount"] == 0,
                  f"page {r['scrollWidth']} px wide in {width}; {r['wideCount']} elements past it {r['wide'][:3]}")
    shot = os.path.join(shots, f"status-{label}-{width}px.png")
    if os.path.exists(shot):
        os.remove(shot)
    height = min(max(int(r["height"]), 200), 16000)
    data = page.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                "clip": {"x": 0, "y": 0, "width": width, "height": height,
                                                         "scale": 1}})["data"]
    with open(shot, "wb") as f:
        f.write(base64.b64decode(data))
    checks.record(f"{label}: a screenshot is kept", os.path.getsize(shot) > 1000, shot)


# --------------------------------------------------------------------------
# raw HTTP
# --------------------------------------------------------------------------
def raw_request(address, text, timeout=15):
    """Send bytes as they are; the status code of the answer (None if none came)."""
    host, port = address.split(":")
    try:
        with socket.create_connection((host, int(port)), timeout=timeout) as s:
            s.sendall(text if isinstance(text, bytes) else text.encode("latin-1"))
            got = b""
            while b"\r\n" not in got:
                chunk = s.recv(4096)
                if not chunk:
                    break
                got += chunk
    except OSError as e:
        return None, str(e)
    m = re.match(rb"HTTP/1\.[01] (\d{3})", got)
    return (int(m.group(1)) if m else None), got.split(b"\r\n", 1)[0].decode("latin-1")


def http_get(url, headers=None, timeout=15):
    """(status, headers, body) without following redirects."""
    class NoRedirect(urllib.request.HTTPRedirectHandler):
        def redirect_request(self, *a, **k):
            return None
    opener = urllib.request.build_opener(NoRedirect)
    req = urllib.request.Request(url, headers=headers or {})
    try:
        with opener.open(req, timeout=timeout) as r:
            return r.status, r.headers, r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.headers, e.read()


def wait_ready(base, headers=None, timeout=20):
    """Until /api/version answers 200; before the first snapshot the server answers 503
    with Retry-After (RFC 9110, 10.2.3), which is honoured. (seconds, 503s, last status)"""
    t0 = time.monotonic()
    n503 = 0
    while True:
        status, h, _ = http_get(base + "/api/version", headers)
        if status != 503 or time.monotonic() - t0 > timeout:
            return time.monotonic() - t0, n503, status
        n503 += 1
        try:
            wait = float(h.get("Retry-After") or 1)
        except ValueError:
            wait = 1.0
        time.sleep(min(max(wait, 0.1), 2.0))


def check_token_and_requests(checks, binary, tmp):
    d = os.path.join(tmp, "tokened")
    folder = os.path.join(d, "in")
    os.makedirs(folder)
    token = secrets.token_hex(16)
    token_file = os.path.join(d, "token")
    with open(token_file, "w") as f:
        f.write(token + "\n")
    os.chmod(token_file, 0o600)
    cfg = os.path.join(d, "c.toml")
    write_config(cfg, folder, os.path.join(d, "s.db"), "127.0.0.1:0", token_file)
    daemon = Daemon(binary, cfg)
    try:
        address = daemon.address()
        if not checks.record("with a token: the daemon starts and logs the page's address", address is not None,
                             address or daemon.log_tail()):
            return
        base = f"http://{address}"
        auth = {"Authorization": f"Bearer {token}"}
        status, _, _ = http_get(base + "/")
        checks.record("with a token: GET / without it is refused (401)", status == 401, f"HTTP {status}")
        status, _, _ = http_get(base + "/api/night")
        checks.record("with a token: GET /api/night without it is refused (401)", status == 401, f"HTTP {status}")
        status, _, _ = http_get(base + "/", {"Authorization": f"Bearer {token[:-1]}x"})
        checks.record("with a token: a wrong token is refused (401)", status == 401, f"HTTP {status}")
        took, n503, status = wait_ready(base, auth)
        checks.record("with a token: the page is ready within 20 s (503 with Retry-After until then)",
                      status == 200, f"HTTP {status} after {took:.1f} s and {n503} answer(s) 503")
        status, _, body = http_get(base + "/", auth)
        checks.record("with a token: GET / with Authorization: Bearer TOKEN is served (200)",
                      status == 200 and b'id="live"' in body, f"HTTP {status}, {len(body)} bytes")
        status, headers, _ = http_get(base + f"/?token={token}")
        cookie = (headers.get("Set-Cookie") or "").split(";", 1)[0]
        status2, _, _ = http_get(base + "/api/version", {"Cookie": cookie}) if cookie else (None, None, None)
        checks.record("with a token: /?token=TOKEN gives a cookie that opens the page",
                      status in (302, 303) and status2 == 200, f"HTTP {status}, then HTTP {status2} with the cookie")
        host = f"Host: {address}\r\nAuthorization: Bearer {token}\r\nConnection: close\r\n"
        cases = [
            ("GET /..%2f..%2fetc/passwd (encoded traversal)", f"GET /..%2f..%2fetc/passwd HTTP/1.1\r\n{host}\r\n"),
            ("GET /../../etc/passwd (plain traversal)", f"GET /../../etc/passwd HTTP/1.1\r\n{host}\r\n"),
            ("GET /%00 (encoded NUL)", f"GET /%00 HTTP/1.1\r\n{host}\r\n"),
            ("a request with a 20 KB header", f"GET / HTTP/1.1\r\n{host}X-Filler: {'a' * 20480}\r\n\r\n"),
        ]
        for what, text in cases:
            status, line = raw_request(address, text)
            checks.record(f"raw socket, with the token: {what} is refused with 4xx",
                          status is not None and 400 <= status < 500, line or "no answer")
        status, line = raw_request(address, f"POST / HTTP/1.1\r\n{host}Content-Length: 0\r\n\r\n")
        checks.record("raw socket, with the token: POST / is refused with 405", status == 405, line or "no answer")
        status, _, body = http_get(base + "/api/version", auth)
        checks.record("with a token: the server still answers after all that", status == 200, f"HTTP {status}")
    finally:
        rc = daemon.stop()
        checks.record("with a token: the daemon stops cleanly on SIGTERM", rc == 0, f"exit {rc}")


def check_open_listen_refused(checks, binary, tmp):
    d = os.path.join(tmp, "open")
    folder = os.path.join(d, "in")
    os.makedirs(folder)
    cfg = os.path.join(d, "c.toml")
    write_config(cfg, folder, os.path.join(d, "s.db"), "0.0.0.0:0")
    t0 = time.monotonic()
    proc = subprocess.Popen([binary, "watch", "--config", cfg], stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        out, err = proc.communicate(timeout=10)
        rc = proc.returncode
    except subprocess.TimeoutExpired:
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=30)
        rc = None
    took = time.monotonic() - t0
    said = (out + err).strip().splitlines()
    named = [l for l in said if "web.listen" in l]
    checks.record("listen = \"0.0.0.0:0\" without a token: `subwatch watch` exits non-zero within 10 s",
                  rc not in (None, 0), f"exit {rc} after {took:.1f} s")
    checks.record("... and its message names web.listen", bool(named), (named or said or ["(nothing)"])[0][:200])
    r = subprocess.run([binary, "check-config", "--config", cfg], capture_output=True, text=True, timeout=60)
    said = (r.stdout + r.stderr).strip().splitlines()
    named = [l for l in said if "web.listen" in l]
    checks.record("listen = \"0.0.0.0:0\" without a token: `subwatch check-config` exits non-zero",
                  r.returncode != 0, f"exit {r.returncode}: {(named or said or ['(nothing)'])[0][:200]}")


# --------------------------------------------------------------------------
def hostile_frame(src, path):
    """A sample frame with OBJECT set to markup; everything else as it was."""
    with fits.open(src) as hdul:
        hdul[0].header["OBJECT"] = HOSTILE_OBJECT
        hdul.writeto(path, overwrite=True)


def main():
    binary = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "target/release/subwatch")
    checks = Checks("status_browser")
    chromium = shutil.which("chromium")
    # A check that cannot run is a failure, never a skip.
    checks.record("chromium is installed (.ci/run installs Debian's package)", chromium is not None,
                  chromium or "not found")
    shots = os.environ.get("SUBWATCH_SCREENSHOTS", os.path.join(ROOT, "target", "status-screenshots"))
    os.makedirs(shots, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        if chromium is not None:
            check_browser(checks, binary, chromium, tmp, shots)
        check_token_and_requests(checks, binary, tmp)
        check_open_listen_refused(checks, binary, tmp)
    return checks.finish()


def check_browser(checks, binary, chromium, tmp, shots):
    folder = os.path.join(tmp, "in")
    os.makedirs(folder)
    cfg = os.path.join(tmp, "c.toml")
    write_config(cfg, folder, os.path.join(tmp, "s.db"), "127.0.0.1:0")
    daemon = Daemon(binary, cfg)
    browser = None
    page = None
    try:
        address = daemon.address()
        if not checks.record("the daemon starts and logs the page's address (port 0)", address is not None,
                             address or daemon.log_tail()):
            return
        url = f"http://{address}/"
        took, n503, status = wait_ready(url.rstrip("/"))
        if not checks.record("the page is ready within 20 s (503 with Retry-After until then)", status == 200,
                             f"HTTP {status} after {took:.1f} s and {n503} answer(s) 503"):
            return
        names = []
        for name in FIRST:
            path = land(os.path.join(SAMPLES, name), folder, name)
            names.append(name)
        done = [daemon.measured(os.path.join(folder, n)) for n in names]
        if not checks.record("two sample frames are measured", all(done), daemon.log_tail(2)):
            return
        try:
            browser = Chromium(chromium, os.path.join(tmp, "profile"))
            page = browser.new_page()
            for domain in ("Page", "Runtime", "Log"):
                page.call(f"{domain}.enable")
        except (RuntimeError, OSError, ConnectionError, TimeoutError) as e:
            checks.record("Chromium starts and answers on its DevTools port", False, str(e))
            return
        checks.record("Chromium starts and answers on its DevTools port", True, f"port {browser.port}")

        check_width(checks, page, url, "desktop", 1280, False, names, shots)
        check_width(checks, page, url, "phone", 400, True, names, shots)

        # Live update without a reload (at the desktop width).
        load(page, url, 1280, 900, False)
        page.wait_js(IMAGES_READY, 20, every=0.5)
        since = page.mark()
        navs_before = len(main_frame_navigations(page))
        page.js("window.__marker = 1")
        path = land(os.path.join(SAMPLES, THIRD), folder, THIRD)
        names.append(THIRD)
        t0 = time.monotonic()
        shown = page.wait_js(f"(document.getElementById('frames') || {{innerText: ''}}).innerText"
                             f".includes({json.dumps(THIRD)})", 30, every=0.25)
        took = time.monotonic() - t0
        checks.record("a new frame appears on the open page within 30 s", bool(shown),
                      f"{THIRD} after {took:.1f} s" if shown else f"not after 30 s; log: {daemon.log_tail(2)}")
        marker = page.js("window.__marker")
        navs = main_frame_navigations(page)[navs_before:]
        checks.record("... without a reload (window.__marker kept, no Page.frameNavigated)",
                      marker == 1 and not navs, f"marker {marker!r}, {len(navs)} navigation(s)")
        errors = errors_in(page, since)
        checks.record("... and with no console error while it updated", not errors, f"{len(errors)}: {errors[:3]}")

        check_modes(checks, page, url, shots, daemon)
        mode = new_tab_mode(browser, url)
        checks.record("a new tab of the same browser opens the page in red, as chosen", mode == "red",
                      f"data-mode {mode!r}")

        # A header made of markup.
        since = page.mark()
        hostile_src = os.path.join(tmp, HOSTILE_FILE)
        hostile_frame(os.path.join(SAMPLES, FIRST[0]), hostile_src)
        path = land(hostile_src, folder, HOSTILE_FILE)
        measured = daemon.measured(path)
        checks.record("a frame whose OBJECT is markup is measured", bool(measured),
                      (measured or daemon.log_tail(2))[-160:])
        shown = page.wait_js(f"document.body.innerText.includes({json.dumps(HOSTILE_FILE)}) && "
                             f"document.body.innerText.includes({json.dumps(HOSTILE_OBJECT)})", 30, every=0.25)
        status, _, body = http_get(url + "api/night")
        try:
            targets = {f.get("file"): f.get("target") for f in json.loads(body)["frames"]}
        except (ValueError, KeyError, TypeError):
            targets = {}
        checks.record("the markup reached the page's data as the frame's target",
                      targets.get(HOSTILE_FILE) == HOSTILE_OBJECT, f"target {targets.get(HOSTILE_FILE)!r}")
        checks.record("... and is shown as text on the open page", bool(shown),
                      "shown" if shown else "not in the page's text after 30 s")
        made = page.js("document.querySelectorAll('img[src=\"x\"], [onerror]').length")
        checks.record("... and no element was made from it (no img[src=x], no onerror attribute)", made == 0,
                      f"{made} element(s)")
        status, _, part = http_get(url + "part")
        text = part.decode("utf-8", "replace")
        checks.record("... and /part carries it escaped, never raw",
                      "&lt;img src=x onerror=alert(1)&gt;" in text and HOSTILE_OBJECT not in text,
                      f"HTTP {status}; escaped {text.count('&lt;img src=x')}, raw {text.count(HOSTILE_OBJECT)}")
        page.call("Page.reload", {})
        time.sleep(3)
        made = page.js("document.querySelectorAll('img[src=\"x\"], [onerror]').length")
        checks.record("... also when the whole page is loaded afresh", made == 0 and page.js(
            f"document.body.innerText.includes({json.dumps(HOSTILE_OBJECT)})"), f"{made} element(s)")
        st = page.js(STYLES)
        bad = [f"{c['el']} {c['p']} rgb({c['r']}, {c['g']}, {c['b']})" for c in st["colours"]
               if red_excess(c["r"], c["g"], c["b"]) > 0]
        checks.record("... and the page stays red through a live update and a reload (no green or blue colour)",
                      st["mode"] == "red" and not bad and HOSTILE_FILE in page.js("document.body.innerText"),
                      f"data-mode {st['mode']!r}; {len(st['colours'])} colours, beyond: {bad[:3]}")
        dialogs = page.events_of("Page.javascriptDialogOpening")
        checks.record("no dialog opened (Page.javascriptDialogOpening never fired)", not dialogs,
                      f"{len(dialogs)}: {[d['params'].get('message') for d in dialogs][:3]}")
        errors = errors_in(page, since)
        checks.record("... and no console error meanwhile", not errors, f"{len(errors)}: {errors[:3]}")

        # A control for the error count above: an inline script must be blocked by the
        # page's Content-Security-Policy, and the block must be seen.
        since = page.mark()
        page.js("(() => { const s = document.createElement('script'); s.textContent = 'window.__inline = 1';"
                " document.head.appendChild(s); })()")
        time.sleep(1.0)
        ran = page.js("window.__inline === 1")
        seen = errors_in(page, since)
        checks.record("control: an injected inline script is blocked by the CSP and the block is seen",
                      not ran and len(seen) > 0, f"ran {ran}; {len(seen)} error(s): {seen[:1]}")
    except (RuntimeError, TimeoutError, ConnectionError, OSError) as e:
        checks.record("the browser checks ran to the end", False, f"{type(e).__name__}: {e}")
    finally:
        if page is not None:
            page.close()
        if browser is not None:
            browser.stop()
        rc = daemon.stop()
        checks.record("the daemon stops cleanly on SIGTERM", rc == 0, f"exit {rc}")


if __name__ == "__main__":
    sys.exit(main())
