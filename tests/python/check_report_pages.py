#!/usr/bin/python3
"""Checks graft's HTML reports as a person sees them, in Debian's headless Chromium.

usage: check_report_pages.py --work DIR [--chromium PATH]
           --job RUN_DIR PAGE [--job RUN_DIR PAGE ...]
           [--sweep PAGE COMPARE_JSON RUN_DIR ...]
           [--screenshot-out PNG]

One Chromium process (--headless, --remote-debugging-port=0, every proxy pointed at a loopback
port this script listens on and records) loads each page over the DevTools protocol (the
WebSocket client is written here on the standard library). Per page:
  - nothing is fetched: every request the page makes (Network.requestWillBeSent, file:// too)
    must be the page itself, and the recording proxy must see no connection;
  - no console error, no uncaught exception, no log entry of level error;
  - the page holds no <script>, <link>, <img>, <iframe>, no url( or @import in its style, and no
    href but '#...' or a relative path to an existing file (a sweep's job pages).
Per job page (RUN_DIR holds the run's metrics.jsonl, result.json and failures.jsonl):
  - one <polyline class="curve"> per expected series (acc_held_out, iia_held_out,
    iia_changed_held_out, iia_by_set.<each set of result.json>), each with one vertex per
    metrics.jsonl line that has the metric, and a band (<polygon class="band">) behind it;
  - the reference lines of the controls and the unchanged floor at result.json's values;
  - the final-figures table: value, lo, hi as result.json's rounded to 3 decimals, correct and n
    exactly; the confusion tables' counts exactly; one failures row per failures.jsonl line;
  - a full-page screenshot that is not blank (over 2% of its pixels not white, 8 or more
    colours). The first two job pages' screenshots must differ in over 1% of their pixels
    (the IIT run and the baseline).
Per sweep page: the compare table equals COMPARE_JSON (`graft compare --format json`), and both
equal a recomputation from the RUN_DIRs' result.json files with SciPy's Student t quantile
(scipy.stats.t.ppf(0.975, n-1), the interval mean +- t*sd/sqrt(n), common practice); one mean
curve per setting and metric and one faint curve per job; one point series per swept key.
Before anything else, a copy of the first job page with an image from http://probe.invalid/ and
a console.error() added is loaded: the checks must flag both, or this script fails, since a check
that cannot fail proves nothing.

Exit codes: 0 every check passed; 1 a check failed (each is printed); 2 bad usage, a missing
module or a browser that did not start (never a skip).
"""

import argparse
import base64
import hashlib
import html.parser
import http.client
import io
import json
import math
import os
import re
import selectors
import shutil
import socket
import struct
import subprocess
import sys
import threading
import time

try:
    import numpy
    import scipy.stats
    from PIL import Image
except ImportError as e:  # a missing module is a failure, never a skip
    print(f"check_report_pages: cannot import a module ({e}); install Debian's python3-numpy, python3-scipy and "
          f"python3-pil and run with /usr/bin/python3", file=sys.stderr)
    sys.exit(2)

BROWSER_START_S = 30      # bounds on waiting, never assertions about speed
# Elements a self-contained page must not hold: each would load, run or embed something that
# is not written in the page itself. The names are HTML's own element names (the HTML standard,
# from memory): script, link, the embedded-content elements and the media source element.
FETCHING_ELEMENTS = ("script", "link", "img", "iframe", "object", "embed", "audio", "video", "source")
PAGE_LOAD_S = 30
failures = []


def fail(message):
    failures.append(message)
    print("FAIL: " + message)


# --- A WebSocket client (RFC 6455), enough for the DevTools protocol --------------------------------

class WebSocket:
    def __init__(self, url, timeout):
        assert url.startswith("ws://")
        host_port, path = url[5:].split("/", 1)
        host, port = host_port.split(":")
        self.sock = socket.create_connection((host, int(port)), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET /{path} HTTP/1.1\r\nHost: {host_port}\r\nUpgrade: websocket\r\n"
                           f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n")
                          .encode())
        reply = b""
        while b"\r\n\r\n" not in reply:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("DevTools closed the WebSocket handshake")
            reply += chunk
        head, self.buffer = reply.split(b"\r\n\r\n", 1)
        if b" 101 " not in head.split(b"\r\n")[0]:
            raise ConnectionError("DevTools refused the WebSocket: " + head.decode(errors="replace"))
        accept = base64.b64encode(hashlib.sha1((key + "258EAFA5-E914-47DA-95CA-C5AB0DC85B11").encode()).digest())
        if accept not in head:
            raise ConnectionError("bad Sec-WebSocket-Accept")

    def send(self, text):
        data = text.encode()
        mask = os.urandom(4)
        n = len(data)
        header = bytes([0x81])
        if n < 126:
            header += bytes([0x80 | n])
        elif n < 65536:
            header += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            header += bytes([0x80 | 127]) + struct.pack(">Q", n)
        masked = bytes(b ^ mask[i % 4] for i, b in enumerate(data))
        self.sock.sendall(header + mask + masked)

    def _read(self, n):
        while len(self.buffer) < n:
            chunk = self.sock.recv(1 << 20)
            if not chunk:
                raise ConnectionError("DevTools closed the WebSocket")
            self.buffer += chunk
        out, self.buffer = self.buffer[:n], self.buffer[n:]
        return out

    def receive(self):
        message = b""
        while True:
            b0, b1 = self._read(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._read(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._read(8))[0]
            payload = self._read(n)
            opcode = b0 & 0x0F
            if opcode == 8:
                raise ConnectionError("DevTools closed the WebSocket")
            if opcode in (0, 1, 2):
                message += payload
                if b0 & 0x80:
                    return message.decode()


class DevTools:
    """One page target: call(method, params) waits for its reply; events are kept in order."""

    def __init__(self, ws):
        self.ws = ws
        self.next_id = 0
        self.events = []

    def call(self, method, params=None, timeout=PAGE_LOAD_S):
        self.next_id += 1
        my_id = self.next_id
        self.ws.send(json.dumps({"id": my_id, "method": method, "params": params or {}}))
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.receive())
            if msg.get("id") == my_id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(method)

    def wait_event(self, name, timeout=PAGE_LOAD_S):
        deadline = time.monotonic() + timeout
        for i, e in enumerate(self.events):
            if e["method"] == name:
                return self.events.pop(i)
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.receive())
            if msg.get("method") == name:
                return msg
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(name)


class RecordingProxy:
    """Listens on a loopback port given to Chromium as its proxy for every scheme; records each
    connection's first line and closes it, so a request that would leave the machine is seen and
    goes nowhere."""

    def __init__(self):
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(16)
        self.port = self.sock.getsockname()[1]
        self.seen = []
        self.lock = threading.Lock()
        threading.Thread(target=self._serve, daemon=True).start()

    def _serve(self):
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            conn.settimeout(2)
            try:
                first = conn.recv(4096).split(b"\r\n")[0].decode(errors="replace")
            except OSError:
                first = "(no request line)"
            with self.lock:
                self.seen.append(first)
            try:
                conn.sendall(b"HTTP/1.1 502 Bad Gateway\r\nContent-Length: 0\r\nConnection: close\r\n\r\n")
            except OSError:
                pass
            conn.close()

    def take(self):
        with self.lock:
            out, self.seen = self.seen, []
        return out


class Browser:
    def __init__(self, chromium, work, proxy):
        self.profile = os.path.join(work, "chromium-profile")
        shutil.rmtree(self.profile, ignore_errors=True)
        os.makedirs(self.profile)
        self.log = open(os.path.join(work, "chromium.log"), "w")
        self.log_lock = threading.Lock()  # the stderr drain writes to the log until close()
        self.proc = subprocess.Popen(
            [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--remote-debugging-port=0",
             "--remote-allow-origins=*", f"--user-data-dir={self.profile}", "--no-first-run",
             "--no-default-browser-check", "--disable-background-networking", "--disable-component-update",
             "--disable-sync", "--disable-extensions", "--disable-default-apps", "--hide-scrollbars",
             "--no-pings", "--disable-domain-reliability", "--disable-client-side-phishing-detection",
             "--disable-field-trial-config",
             "--disable-features=Translate,OptimizationHints,MediaRouter,AutofillServerCommunication,ChromeSignin,"
             "DeviceBoundSessionCredentials,EnableBoundSessionCredentials",
             "--password-store=basic", "--metrics-recording-only",
             f"--proxy-server=http://127.0.0.1:{proxy.port}", "--proxy-bypass-list=<-loopback>",
             "about:blank"], stdout=self.log, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
        port = self._devtools_port(time.monotonic() + BROWSER_START_S)
        if port is None:
            self.close()
            raise RuntimeError(f"chromium did not start (see {self.log.name})")
        try:
            targets = json.loads(self._http(port, "/json/list"))
            page = next(t for t in targets if t["type"] == "page")
            self.dev = DevTools(WebSocket(page["webSocketDebuggerUrl"], PAGE_LOAD_S))
            for domain in ("Page", "Network", "Runtime", "Log"):
                self.dev.call(domain + ".enable")
            self.dev.call("Emulation.setDeviceMetricsOverride",
                          {"width": 1100, "height": 900, "deviceScaleFactor": 1, "mobile": False})
        except Exception:
            self.close()  # never leave a browser behind
            raise

    @staticmethod
    def _http(port, path):
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=PAGE_LOAD_S)
        try:
            conn.request("GET", path)
            return conn.getresponse().read().decode()
        finally:
            conn.close()

    def load(self, path):
        """Loads a page; returns (url, requests, problems, dom, png bytes)."""
        url = "file://" + os.path.abspath(path)
        self.dev.events.clear()
        self.dev.call("Page.navigate", {"url": url})
        self.dev.wait_event("Page.loadEventFired")
        # A round trip after the load event, so messages logged during the load have arrived.
        dom = self.dev.call("Runtime.evaluate", {"expression": "document.documentElement.outerHTML",
                                                 "returnByValue": True})["result"]["value"]
        metrics = self.dev.call("Page.getLayoutMetrics")
        size = metrics.get("cssContentSize") or metrics["contentSize"]
        shot = self.dev.call("Page.captureScreenshot", {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1}})
        # Printable: Chromium's print to PDF (A4, the page's own print style) gives a PDF.
        pdf = base64.b64decode(self.dev.call("Page.printToPDF", {"paperWidth": 8.27, "paperHeight": 11.69,
                                                                  "preferCSSPageSize": True})["data"])
        requests, problems = [], []
        if not pdf.startswith(b"%PDF") or pdf.count(b"/Type /Page") + pdf.count(b"/Type/Page") < 1:
            problems.append(f"printing to PDF gave no page ({len(pdf)} bytes)")
        self.pdf_pages = pdf.count(b"/Type /Page") + pdf.count(b"/Type/Page") - pdf.count(b"/Type /Pages") - \
            pdf.count(b"/Type/Pages")
        for e in self.dev.events:
            m, p = e["method"], e.get("params", {})
            if m == "Network.requestWillBeSent":
                requests.append(p["request"]["url"])
            elif m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "warning", "assert"):
                problems.append("console." + p["type"] + ": " + " ".join(str(a.get("value", a.get("description", "")))
                                                                     for a in p.get("args", [])))
            elif m == "Runtime.exceptionThrown":
                problems.append("exception: " + p["exceptionDetails"].get("text", ""))
            elif m == "Log.entryAdded" and p["entry"].get("level") == "error":
                problems.append("log: " + p["entry"].get("text", "") + " " + p["entry"].get("url", ""))
            elif m == "Network.loadingFailed":
                problems.append("loading failed: " + p.get("errorText", ""))
        return url, requests, problems, dom, base64.b64decode(shot["data"])

    def _devtools_port(self, deadline):
        """Chromium's DevTools port, from the line it writes to stderr once it listens ("DevTools
        listening on ws://HOST:PORT/..."): waits on the pipe, not on time. None if it exits or the
        deadline passes first. The rest of stderr keeps going to the log."""
        fd = self.proc.stderr.fileno()
        seen = b""
        port = None
        with selectors.DefaultSelector() as sel:
            sel.register(fd, selectors.EVENT_READ)
            while port is None and (left := deadline - time.monotonic()) > 0 and sel.select(left):
                chunk = os.read(fd, 4096)
                if not chunk:  # chromium closed stderr: it has exited
                    break
                self.log.write(chunk.decode(errors="replace"))
                seen += chunk
                found = re.search(rb"DevTools listening on ws://[^/\s]+:(\d+)/", seen)
                port = int(found.group(1)) if found else None
        self.log.flush()

        def drain():
            for chunk in iter(lambda: os.read(fd, 4096), b""):
                with self.log_lock:
                    if self.log.closed:
                        return
                    self.log.write(chunk.decode(errors="replace"))
                    self.log.flush()

        threading.Thread(target=drain, daemon=True).start()
        return port

    def close(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        with self.log_lock:
            self.log.close()


# --- The DOM ---------------------------------------------------------------------------------------

class Dom(html.parser.HTMLParser):
    """Elements as (tag, attrs, text) in document order, with the text of <td>/<th> cells."""

    def __init__(self, text):
        super().__init__()
        self.elements = []
        self.stack = []
        self.style = ""
        self.in_style = False
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        e = {"tag": tag, "attrs": dict(attrs), "text": "", "children": []}
        if self.stack:
            self.stack[-1]["children"].append(e)
        self.elements.append(e)
        if tag not in ("meta", "br", "line", "polyline", "polygon", "rect", "circle", "path"):
            self.stack.append(e)
        self.in_style = tag == "style"

    def handle_startendtag(self, tag, attrs):
        e = {"tag": tag, "attrs": dict(attrs), "text": "", "children": []}
        if self.stack:
            self.stack[-1]["children"].append(e)
        self.elements.append(e)

    def handle_endtag(self, tag):
        for i in range(len(self.stack) - 1, -1, -1):
            if self.stack[i]["tag"] == tag:
                del self.stack[i:]
                break
        if tag == "style":
            self.in_style = False

    def handle_data(self, data):
        if self.in_style:
            self.style += data
        for e in self.stack:
            e["text"] += data

    def find(self, tag=None, cls=None, **attrs):
        out = []
        for e in self.elements:
            if tag and e["tag"] != tag:
                continue
            if cls and cls not in e["attrs"].get("class", "").split():
                continue
            if any(e["attrs"].get(k.replace("_", "-")) != v for k, v in attrs.items()):
                continue
            out.append(e)
        return out


def cells(row):
    return {c["attrs"].get("data-field"): c["text"].strip() for c in row["children"] if c["tag"] in ("td", "th")}


def fixed3(v):
    return "%.3f" % v


# Chromium calls its vendor's services by itself (time, updates, accounts) whatever page it shows;
# the proxy keeps them from leaving. They are told apart from the page's requests by host: a page
# request names its host in the DevTools log, and any other host fails.
BROWSER_SERVICE_SUFFIXES = (".google.com", ".googleapis.com", ".gstatic.com", ".gvt1.com")


def _host_of(text):
    """The host of a URL or of a proxy request line ("CONNECT host:443 ...", "GET http://host/...")."""
    parts = text.split()
    target = parts[1] if len(parts) >= 2 and parts[0].isupper() else text
    if "://" in target:
        target = target.split("://", 1)[1].split("/", 1)[0]
    return target.split(":")[0].lower()


def _is_browser_service(host):
    return any(("." + host).endswith(s) for s in BROWSER_SERVICE_SUFFIXES)


def check_self_contained(name, dom, page_path, url, requests, proxy_seen, problems):
    for r in requests:
        if r.split("#")[0] != url:
            fail(f"{name}: the page fetched {r}")
    page_hosts = {_host_of(r) for r in requests}
    for line in proxy_seen:
        host = _host_of(line)
        if host in page_hosts or not _is_browser_service(host):
            fail(f"{name}: a request reached the network (the recording proxy saw '{line}')")
        else:
            print(f"{name}: Chromium's own background request, not the page's (none of its requests named "
                  f"{host}); it went nowhere: {line}")
    for p in problems:
        fail(f"{name}: {p}")
    for tag in FETCHING_ELEMENTS:
        if dom.find(tag):
            fail(f"{name}: holds a <{tag}> element")
    if "url(" in dom.style or "@import" in dom.style:
        fail(f"{name}: its style loads something (url( or @import)")
    for e in dom.elements:
        # (<object data=...> is caught above: the element itself is refused.)
        for attr in ("src", "srcset", "xlink:href"):
            if attr in e["attrs"]:
                fail(f"{name}: <{e['tag']} {attr}=...> loads {e['attrs'][attr]}")
        href = e["attrs"].get("href")
        if href is None or href.startswith("#"):
            continue
        if "://" in href or href.startswith("//") or href.startswith("/") or href.startswith("data:"):
            fail(f"{name}: links outside the report: {href}")
        elif not os.path.exists(os.path.join(os.path.dirname(page_path), href)):
            fail(f"{name}: links to {href}, which was not written")


def check_screenshot(name, png):
    img = numpy.asarray(Image.open(io.BytesIO(png)).convert("RGB"))
    not_white = numpy.any(img < 250, axis=2).mean()
    colours = len(numpy.unique(img.reshape(-1, 3)[::7], axis=0))
    print(f"{name}: screenshot {img.shape[1]}x{img.shape[0]}, {not_white:.3%} of pixels not white, "
          f"{colours} colours (in every 7th pixel)")
    if not_white <= 0.02 or colours < 8:
        fail(f"{name}: the screenshot is blank ({not_white:.3%} not white, {colours} colours)")
    return img


def read_jsonl(path):
    if not os.path.exists(path):
        return []
    with open(path) as f:
        return [json.loads(line) for line in f if line.strip()]


def check_job(name, dom, run_dir):
    points = read_jsonl(os.path.join(run_dir, "metrics.jsonl"))
    with open(os.path.join(run_dir, "result.json")) as f:
        result = json.load(f)
    fails = read_jsonl(os.path.join(run_dir, "failures.jsonl"))
    sets = list(result["iia_by_set"])
    expected = ["acc_held_out", "iia_held_out", "iia_changed_held_out"] + ["iia_by_set." + s for s in sets]

    def metric(point, key):
        v = point
        for part in key.split("."):
            v = v.get(part) if isinstance(v, dict) else None
        return v

    curves = dom.find("polyline", "curve")
    keys = [c["attrs"].get("data-series") for c in curves]
    for key in expected:
        if keys.count(key) != 1:
            fail(f"{name}: {keys.count(key)} curves of {key}, expected 1")
            continue
        c = curves[keys.index(key)]
        vertices = len(c["attrs"].get("points", "").split())
        want = sum(1 for p in points if isinstance(metric(p, key), dict))
        if vertices != want:
            fail(f"{name}: the curve of {key} has {vertices} points, metrics.jsonl has {want}")
        if not [b for b in dom.find("polygon", "band") if b["attrs"].get("data-series") == key]:
            fail(f"{name}: the curve of {key} has no interval band")
    extra = [k for k in keys if k not in expected and k not in ("loss_task", "loss_interchange")]
    if extra:
        fail(f"{name}: curves of unexpected series {extra}")

    refs = {r["attrs"].get("data-reference"): float(r["attrs"]["data-value"]) for r in dom.find("line", "reference")
            if "data-value" in r["attrs"]}
    want_refs = {"unchanged_floor": result["unchanged_floor"],
                 "control_untrained_network.iia_held_out": result["control_untrained_network"]["iia_held_out"]["value"],
                 "control_random_units.iia_held_out": result["control_random_units"]["iia_held_out"]["value"]}
    for s in sets:
        want_refs["control_random_units.iia_by_set." + s] = result["control_random_units"]["iia_by_set"][s]["value"]
    for key, value in want_refs.items():
        if key not in refs:
            fail(f"{name}: no reference line {key}")
        elif not math.isclose(refs[key], value, rel_tol=1e-5, abs_tol=1e-9):
            fail(f"{name}: reference line {key} at {refs[key]}, result.json has {value}")

    rows = {r["attrs"]["data-key"]: cells(r) for r in dom.find("tr") if "data-key" in r["attrs"]}
    table_keys = ["acc_train", "acc_held_out", "iia_held_out", "iia_changed_held_out"] + \
        ["iia_by_set." + s for s in sets] + \
        ["control_untrained_network.iia_held_out", "control_untrained_network.iia_changed_held_out",
         "control_random_units.iia_held_out", "control_random_units.iia_changed_held_out"] + \
        ["control_random_units.iia_by_set." + s for s in sets]
    compared = 0
    for key in table_keys:
        acc = metric(result, key)
        if key not in rows:
            fail(f"{name}: the final-figures table has no row {key}")
            continue
        row = rows[key]
        for field in ("value", "lo", "hi"):
            if row.get(field) != fixed3(acc[field]):
                fail(f"{name}: {key}.{field} shows {row.get(field)}, result.json has {acc[field]}")
            compared += 1
        for field in ("correct", "n"):
            if row.get(field) != str(acc[field]):
                fail(f"{name}: {key}.{field} shows {row.get(field)}, result.json has {acc[field]}")
            compared += 1
    if rows.get("unchanged_floor", {}).get("value") != fixed3(result["unchanged_floor"]):
        fail(f"{name}: unchanged_floor shows {rows.get('unchanged_floor')}, result.json has {result['unchanged_floor']}")

    for s, matrix in result["confusion"]["by_set"].items():
        tables = [t for t in dom.find("table", "confusion") if t["attrs"].get("data-set") == s]
        if len(tables) != 1:
            fail(f"{name}: {len(tables)} confusion tables of set {s}")
            continue
        shown = [int(c["attrs"]["data-count"]) for c in _descendants(tables[0])
                 if c["tag"] == "td" and "data-count" in c["attrs"]]
        flat = [v for row in matrix for v in row]
        if shown != flat:
            fail(f"{name}: confusion of {s} shows {shown}, result.json has {flat}")
        compared += len(flat)
    table = dom.find("table", id="failures-table")
    shown_failures = len([r for r in _descendants(table[0]) if r["tag"] == "tr"]) - 1 if table else 0
    if shown_failures != len(fails):
        fail(f"{name}: {shown_failures} failing triples shown, failures.jsonl has {len(fails)}")
    print(f"{name}: {len(curves)} curves, {len(refs)} reference lines, {compared} table numbers compared, "
          f"{shown_failures} failing triples")


def _descendants(e):
    out = []
    for c in e["children"]:
        out.append(c)
        out.extend(_descendants(c))
    return out


def check_sweep(name, dom, compare_path, run_dirs):
    with open(compare_path) as f:
        compare = json.load(f)
    results = {}
    for d in run_dirs:
        with open(os.path.join(d, "result.json")) as f:
            results[os.path.basename(os.path.normpath(d))] = json.load(f)
    rows = {r["attrs"]["data-setting"]: cells(r) for r in dom.find("tr") if "data-setting" in r["attrs"]}
    if len(rows) != len(compare["settings"]):
        fail(f"{name}: {len(rows)} settings in the compare table, graft compare has {len(compare['settings'])}")
    for s in compare["settings"]:
        row = rows.get(s["setting"])
        if row is None:
            fail(f"{name}: no compare row for {s['setting']}")
            continue
        if row.get("seeds") != str(s["seeds"]):
            fail(f"{name}: {s['setting']} shows {row.get('seeds')} seeds, graft compare {s['seeds']}")
        for metric in ("acc_held_out", "iia_changed_held_out"):
            values = [results[j][metric]["value"] for j in s["job_ids"]]
            n = len(values)
            mean = float(numpy.mean(values))
            half = float(scipy.stats.t.ppf(0.975, n - 1) * numpy.std(values, ddof=1) / math.sqrt(n)) if n > 1 else None
            for field, ref in (("mean", mean), ("lo", mean - half if half is not None else None),
                               ("hi", mean + half if half is not None else None)):
                shown = row.get(f"{metric}.{field}")
                theirs = s[metric][field]
                want = "-" if ref is None else fixed3(ref)
                if shown != want:
                    fail(f"{name}: {s['setting']} {metric}.{field} shows {shown}, SciPy gives {want}")
                if (theirs is None) != (ref is None) or (ref is not None and not math.isclose(theirs, ref, abs_tol=1e-9)):
                    fail(f"{name}: {s['setting']} {metric}.{field}: graft compare {theirs}, SciPy {ref}")
        for metric in ("iia_changed_held_out", "acc_held_out"):
            key = metric + "|" + s["setting"]
            n = len([c for c in dom.find("polyline", "curve") if c["attrs"].get("data-series") == key])
            if n != 1:
                fail(f"{name}: {n} mean curves of {key}, expected 1")
            for j in s["job_ids"]:
                faint = [c for c in dom.find("polyline", "seed-curve")
                         if c["attrs"].get("data-series") == key + "|" + j]
                if len(faint) != 1:
                    fail(f"{name}: {len(faint)} faint curves of {j} for {metric}, expected 1")
    swept = set()
    for s in compare["settings"]:
        rest = s["setting"].split("/", 1)[1] if "/" in s["setting"] else ""
        swept.update(part.split("=")[0] for part in rest.split(",") if "=" in part)
    series = [g["attrs"].get("data-series", "") for g in dom.find("g", "point-series")]
    for key in swept:
        if not any(x.startswith(key + "|") for x in series):
            fail(f"{name}: no small multiple for the swept key {key}")
    print(f"{name}: {len(rows)} settings, {len(dom.find('polyline', 'curve'))} mean curves, "
          f"{len(dom.find('polyline', 'seed-curve'))} seed curves, swept keys {sorted(swept)}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--work", required=True)
    ap.add_argument("--chromium", default="/usr/bin/chromium")
    ap.add_argument("--job", nargs=2, action="append", default=[], metavar=("RUN_DIR", "PAGE"))
    ap.add_argument("--sweep", nargs="+", action="append", default=[], metavar="PAGE COMPARE_JSON RUN_DIR")
    ap.add_argument("--screenshot-out")
    args = ap.parse_args()
    if not args.job:
        print("check_report_pages: give at least one --job", file=sys.stderr)
        return 2
    os.makedirs(args.work, exist_ok=True)
    proxy = RecordingProxy()
    try:
        browser = Browser(args.chromium, args.work, proxy)
    except Exception as e:  # noqa: BLE001 (reported, exit 2)
        print(f"check_report_pages: {e}", file=sys.stderr)
        return 2
    try:
        # The check must be able to fail: a tampered copy of the first page must be flagged.
        first = args.job[0][1]
        with open(first) as f:
            text = f.read()
        probe = os.path.join(os.path.dirname(os.path.abspath(first)), "probe-tampered.html")
        with open(probe, "w") as f:
            f.write(text.replace("</body>", "<img src=\"http://probe.invalid/p.png\" alt=\"\">"
                                             "<script>console.error('probe')</script></body>"))
        url, requests, problems, _, _ = browser.load(probe)
        os.remove(probe)
        fetched = [r for r in requests if r.split("#")[0] != url]
        # The proxy sees the probe's request, unless Chromium refused it earlier (then the
        # DevTools request log still holds it).
        seen = proxy.take()
        if (not fetched or not any("console.error" in p for p in problems)
                or not any(_host_of(line) == "probe.invalid" for line in seen)):
            fail(f"self-test: the tampered page was not flagged (requests {fetched}, proxy {seen}, "
                 f"problems {problems}): these checks cannot fail")
        else:
            print(f"self-test: the tampered page is flagged (requests {fetched}, the proxy saw "
                  f"{[line for line in seen if 'probe.invalid' in line]}, problems {problems})")

        images = []
        for run_dir, page in args.job:
            name = page
            url, requests, problems, text, png = browser.load(page)
            dom = Dom(text)
            check_self_contained(name, dom, page, url, requests, proxy.take(), problems)
            check_job(name, dom, run_dir)
            print(f"{name}: printed to PDF, {browser.pdf_pages} A4 pages")
            images.append(check_screenshot(name, png))
            if args.screenshot_out and len(images) == 1:
                with open(args.screenshot_out, "wb") as f:
                    f.write(png)
        if len(images) >= 2:
            a, b = images[0], images[1]
            h, w = min(a.shape[0], b.shape[0]), min(a.shape[1], b.shape[1])
            differ = numpy.any(a[:h, :w] != b[:h, :w], axis=2).mean()
            print(f"the first two job pages' screenshots differ in {differ:.3%} of their pixels")
            if differ <= 0.01:
                fail(f"the screenshots of {args.job[0][1]} and {args.job[1][1]} barely differ ({differ:.3%})")
        for entry in args.sweep:
            if len(entry) < 3:
                print("check_report_pages: --sweep PAGE COMPARE_JSON RUN_DIR...", file=sys.stderr)
                return 2
            page, compare_path, run_dirs = entry[0], entry[1], entry[2:]
            name = page
            url, requests, problems, text, png = browser.load(page)
            dom = Dom(text)
            check_self_contained(name, dom, page, url, requests, proxy.take(), problems)
            check_sweep(name, dom, compare_path, run_dirs)
            check_screenshot(name, png)
    finally:
        browser.close()
    print(f"{len(failures)} failed" if failures else "all report checks passed")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
