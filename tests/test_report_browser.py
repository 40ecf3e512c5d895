"""The HTML report: self-contained (no scripts, no external requests), complete enough to
reproduce a run, and rendered by a real browser (headless Chromium) without errors."""

from __future__ import annotations

import base64
import builtins
import fcntl
import hashlib
import html.parser
import importlib.util
import json
import os
import select
import shutil
import signal
import time
from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile

import fringe
from fringe._util import FringeError
from fringe.htmlreport import measure_outputs, report_for_results, sha256_file, write_report
from fringe.report import format_value
from fringe.synth import render_fringes

needs_mpl = pytest.mark.skipif(importlib.util.find_spec("matplotlib") is None,
                               reason="matplotlib (extra 'plot') is not installed")

# W3C PNG Specification (Second Edition), 2003, section 5.2: the PNG signature.
PNG_SIGNATURE = bytes([137, 80, 78, 71, 13, 10, 26, 10])
BROWSER_TIMEOUT_S = 60.0


# --------------------------------------------------------------------------------------------
# a measured run written to files
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    rng = np.random.default_rng(11)
    img = render_fringes((96, 128), period_px=10.0, orientation_deg=30.0, phase_rad=0.5,
                         visibility=0.6, mean=1000.0)
    offset = 100
    tifffile.imwrite(d / "science.tif", (rng.poisson(img) + offset).astype(np.uint16))
    tifffile.imwrite(d / "dark.tif", np.full((96, 128), offset, dtype=np.uint16))
    tifffile.imwrite(d / "blank.tif", rng.poisson(np.full((96, 128), 900.0)).astype(np.uint16))
    results = [fringe.measure(d / "science.tif", dark=d / "dark.tif", pixel_um=(5.0, 0.05)),
               fringe.measure(d / "blank.tif", dark=d / "dark.tif")]
    assert results[0].ok and not results[1].ok
    return d, results


@pytest.fixture(scope="module")
def report(run):
    if importlib.util.find_spec("matplotlib") is None:
        pytest.skip("matplotlib (extra 'plot') is not installed: no figures to check")
    d, results = run
    inputs = [d / "science.tif", d / "blank.tif", d / "dark.tif"]
    before = {p: (p.read_bytes(), p.stat().st_mtime_ns) for p in inputs}
    out = measure_outputs(results, images=[str(d / "science.tif"), str(d / "blank.tif")],
                          plot_dir=d / "plots", report=d / "report.html",
                          settings={"pixel_um": (5.0, 0.05), "channel": "auto"},
                          command=["fringe", "measure", "science.tif", "blank.tif",
                                   "--dark", "dark.tif", "--report", "report.html"])
    for p, (data, mtime) in before.items():  # inputs are read, never written
        assert p.read_bytes() == data and p.stat().st_mtime_ns == mtime
    return d, results, out


class _Collector(html.parser.HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.style = ""
        self._in_style = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False

    def handle_data(self, data):
        if self._in_style:
            self.style += data


def _parse(path: Path) -> tuple[str, _Collector]:
    text = path.read_text(encoding="utf-8")
    c = _Collector()
    c.feed(text)
    c.close()
    return text, c


# --------------------------------------------------------------------------------------------
# static checks
# --------------------------------------------------------------------------------------------


def test_report_is_self_contained(report):
    d, results, out = report
    assert out["report"] == str(d / "report.html")
    assert not os.path.exists(str(d / "report.html") + ".part")
    text, c = _parse(d / "report.html")
    names = [t for t, _ in c.tags]
    assert "script" not in names and "<script" not in text.lower()
    for forbidden in ("link", "iframe", "object", "embed", "base", "form"):
        assert forbidden not in names
    for tag, attrs in c.tags:
        for key in ("src", "href", "srcset", "action", "poster", "data"):
            val = (attrs.get(key) or "").strip().lower()
            assert not val.startswith(("http://", "https://", "//", "ftp:")), (tag, key, val)
        assert not any(k.startswith("on") for k in attrs), (tag, attrs)  # no inline handlers
    imgs = [a for t, a in c.tags if t == "img"]
    assert len(imgs) == len(out["figures"]) >= 3
    for a in imgs:
        src = a["src"]
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
        assert a.get("alt")
    assert "url(" not in c.style and "@import" not in c.style and "@font-face" not in c.style
    csp = [a for t, a in c.tags if t == "meta" and a.get("http-equiv") ==
           "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]["content"]


def test_report_holds_what_reproduces_the_run(report):
    d, results, _ = report
    text, _ = _parse(d / "report.html")
    # SHA-256 per FIPS 180-4 (NIST, Secure Hash Standard, 2015), computed here by hashlib.
    for name in ("science.tif", "blank.tif", "dark.tif"):
        digest = hashlib.sha256((d / name).read_bytes()).hexdigest()
        assert digest in text, name
        assert sha256_file(d / name) == digest
    # Results with their uncertainties and units.
    r = results[0]
    assert format_value(r.period_px, r.period_px_err) in text
    assert format_value(r.visibility, r.visibility_err) in text
    assert "period (px)" in text and "value ± 1σ" in text
    assert html_escape(results[1].error) in text  # the failure is reported
    # Warnings, settings, command line, versions, safety notes.
    assert "pixel_um" in text
    assert "fringe measure science.tif blank.tif --dark dark.tif --report report.html" in text
    assert fringe.__version__ in text and np.__version__ in text
    import scipy

    assert scipy.__version__ in text
    low = text.lower()
    # Safety practice (common practice; laser safety references in /work/shared/references.md
    # section 12: IEC 60825-1, ANSI Z136.1).
    for phrase in ("never look into a laser beam", "class", "below eye level",
                   "solar filter", "laser safety officer"):
        assert phrase in low, phrase


def html_escape(text: str) -> str:
    import html

    return html.escape(text, quote=True)


def test_report_never_overwrites_an_input(run, tmp_path):
    d, results = run
    target = tmp_path / "copy.tif"
    shutil.copy(d / "science.tif", target)
    data = target.read_bytes()
    with pytest.raises(FringeError, match="would overwrite the input"):
        write_report(target, title="t", inputs=[target], calibration=None, settings=None,
                     results=results, warnings=[], figures=None)
    assert target.read_bytes() == data


def test_report_without_matplotlib_says_so(run, tmp_path, monkeypatch):
    d, results = run
    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    out = report_for_results(tmp_path / "r.html", results, command="fringe measure x")
    text, c = _parse(Path(out))
    assert "figures omitted" in text and "fringe[plot]" in text
    assert not [t for t, _ in c.tags if t == "img"]
    with pytest.raises(FringeError, match=r"fringe\[plot\]"):
        measure_outputs(results, images=[], plot_dir=tmp_path / "plots")


def test_write_report_refuses_non_png_figures(run, tmp_path):
    _, results = run
    bogus = tmp_path / "fig.png"
    bogus.write_bytes(b"GIF89a not a png")
    with pytest.raises(FringeError, match="not a PNG"):
        write_report(tmp_path / "r.html", title="t", inputs=[], calibration=None,
                     settings=None, results=results, warnings=[], figures=[bogus])
    assert not (tmp_path / "r.html").exists()


# --------------------------------------------------------------------------------------------
# headless Chromium over the DevTools protocol (pipe transport, no extra packages)
# --------------------------------------------------------------------------------------------


class _BrowserUnavailable(Exception):
    pass


def _find_chromium() -> str | None:
    for name in (os.environ.get("FRINGE_CHROMIUM"), "/usr/bin/chromium", "chromium",
                 "chromium-browser", "google-chrome"):
        if name:
            found = shutil.which(name)
            if found:
                return found
    return None


def _high_fd(fd: int) -> int:
    new = fcntl.fcntl(fd, fcntl.F_DUPFD_CLOEXEC, 10)
    os.close(fd)
    return new


class _DevTools:
    """Chromium with ``--remote-debugging-pipe``: commands on fd 3, replies on fd 4,
    each message JSON ended by a NUL byte."""

    def __init__(self, exe: str, profile: Path, deadline: float):
        self.deadline = deadline
        self.events: list[dict] = []
        self._buf = b""
        self._id = 0
        self.log_path = profile.parent / "chromium-stderr.log"
        to_r, to_w = (_high_fd(f) for f in os.pipe())
        from_r, from_w = (_high_fd(f) for f in os.pipe())
        log_fd = _high_fd(os.open(self.log_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC
                                  | os.O_CLOEXEC, 0o600))
        args = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--no-default-browser-check", "--disable-extensions",
                "--disable-background-networking", "--disable-component-update",
                "--disable-sync", "--disable-dev-shm-usage", "--mute-audio",
                "--remote-debugging-pipe", f"--user-data-dir={profile}",
                "--window-size=1200,2000", "about:blank"]
        actions = [(os.POSIX_SPAWN_OPEN, 0, os.devnull, os.O_RDONLY, 0),
                   (os.POSIX_SPAWN_DUP2, log_fd, 1), (os.POSIX_SPAWN_DUP2, log_fd, 2),
                   (os.POSIX_SPAWN_DUP2, to_r, 3), (os.POSIX_SPAWN_DUP2, from_w, 4)]
        try:
            self.pid = os.posix_spawn(exe, args, dict(os.environ), file_actions=actions,
                                      setsid=True)
        except OSError as exc:
            raise _BrowserUnavailable(f"cannot start {exe}: {exc}") from None
        finally:
            for fd in (to_r, from_w, log_fd):
                os.close(fd)
        self._w, self._r = to_w, from_r

    def log_tail(self) -> str:
        try:
            lines = self.log_path.read_text(errors="replace").splitlines()
        except OSError:
            return ""
        lines = [ln for ln in lines if "dbus" not in ln and "unexpected operator" not in ln]
        return " | ".join(lines[-5:])

    def _send(self, msg: dict) -> None:
        data = json.dumps(msg).encode() + b"\0"
        while data:
            n = os.write(self._w, data)
            data = data[n:]

    def _read_one(self) -> dict:
        while b"\0" not in self._buf:
            left = self.deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("no answer from the browser in time")
            ready, _, _ = select.select([self._r], [], [], left)
            if not ready:
                continue
            chunk = os.read(self._r, 1 << 20)
            if not chunk:
                raise EOFError("the browser closed its DevTools pipe")
            self._buf += chunk
        raw, self._buf = self._buf.split(b"\0", 1)
        return json.loads(raw)

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._id += 1
        msg: dict = {"id": self._id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        self._send(msg)
        while True:
            m = self._read_one()
            if m.get("id") == self._id:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})
            if "method" in m:
                self.events.append(m)

    def wait_event(self, method: str, session: str) -> dict:
        for m in self.events:
            if m.get("method") == method and m.get("sessionId") == session:
                return m
        while True:
            m = self._read_one()
            if "method" in m:
                self.events.append(m)
                if m["method"] == method and m.get("sessionId") == session:
                    return m

    def pump(self, seconds: float) -> None:
        """Collect events for a short while (late console messages)."""
        end = min(time.monotonic() + seconds, self.deadline)
        while time.monotonic() < end:
            ready, _, _ = select.select([self._r], [], [], max(0.0, end - time.monotonic()))
            if not ready:
                break
            chunk = os.read(self._r, 1 << 20)
            if not chunk:
                break
            self._buf += chunk
            while b"\0" in self._buf:
                raw, self._buf = self._buf.split(b"\0", 1)
                m = json.loads(raw)
                if "method" in m:
                    self.events.append(m)

    def close(self) -> None:
        try:
            self._send({"id": self._id + 1, "method": "Browser.close", "params": {}})
        except OSError:
            pass
        end = time.monotonic() + 5.0
        while time.monotonic() < end:
            pid, _ = os.waitpid(self.pid, os.WNOHANG)
            if pid:
                break
            time.sleep(0.05)
        else:
            try:
                os.killpg(self.pid, signal.SIGKILL)  # the browser's own process group
            except ProcessLookupError:
                pass
            os.waitpid(self.pid, 0)
        try:
            os.killpg(self.pid, signal.SIGKILL)  # helpers left in the group, if any
        except (ProcessLookupError, PermissionError):
            pass
        for fd in (self._w, self._r):
            try:
                os.close(fd)
            except OSError:
                pass


_PAGE_FACTS = """(() => {
  const t = document.querySelector('table.results');
  const imgs = Array.from(document.images).map(i => {
    const r = i.getBoundingClientRect();
    return {complete: i.complete, w: i.naturalWidth, h: i.naturalHeight,
            x: r.left + window.scrollX, y: r.top + window.scrollY, rw: r.width, rh: r.height,
            scheme: i.currentSrc.slice(0, 5)};
  });
  return {title: document.title,
          rows: t ? t.tBodies[0].rows.length : -1,
          headers: t ? Array.from(t.tHead.rows[0].cells).map(c => c.textContent) : [],
          firstRow: t ? t.tBodies[0].rows[0].textContent : '',
          imgs: imgs, width: document.documentElement.scrollWidth,
          height: document.documentElement.scrollHeight,
          scripts: document.scripts.length};
})()"""


@pytest.mark.slow
def test_report_in_headless_chromium(report, tmp_path):
    d, results, out = report
    exe = _find_chromium()
    if exe is None:
        pytest.skip("headless browser check skipped: chromium not found (Debian: apt-get "
                    "install -y chromium)")
    url = (d / "report.html").resolve().as_uri()
    deadline = time.monotonic() + BROWSER_TIMEOUT_S
    try:
        browser = _DevTools(exe, tmp_path / "profile", deadline)
    except _BrowserUnavailable as exc:
        pytest.skip(f"headless browser check skipped: {exc}")
    try:
        try:
            target = browser.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        except (TimeoutError, EOFError, OSError, RuntimeError) as exc:
            pytest.skip(f"headless browser check skipped: {exe} did not start ({exc}; "
                        f"stderr: {browser.log_tail()})")
        sid = browser.call("Target.attachToTarget", {"targetId": target,
                                                     "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            browser.call(f"{domain}.enable", session=sid)
        browser.call("Emulation.setDeviceMetricsOverride",
                     {"width": 1200, "height": 1600, "deviceScaleFactor": 1,
                      "mobile": False}, session=sid)
        nav = browser.call("Page.navigate", {"url": url}, session=sid)
        assert not nav.get("errorText"), nav
        browser.wait_event("Page.loadEventFired", sid)
        browser.pump(0.5)
        facts = browser.call("Runtime.evaluate", {"expression": _PAGE_FACTS,
                                                  "returnByValue": True},
                             session=sid)["result"]["value"]
        height = int(min(facts["height"], 12000))
        shot = browser.call("Page.captureScreenshot",
                            {"format": "png", "captureBeyondViewport": True,
                             "clip": {"x": 0, "y": 0, "width": 1200, "height": height,
                                      "scale": 1}}, session=sid)["data"]
    finally:
        browser.close()

    # No console errors, no uncaught exceptions, no error log entries.
    page_events = [e for e in browser.events if e.get("sessionId") == sid]
    console = [e["params"] for e in page_events if e["method"] == "Runtime.consoleAPICalled"]
    thrown = [e["params"] for e in page_events if e["method"] == "Runtime.exceptionThrown"]
    errors = [e["params"]["entry"] for e in page_events if e["method"] == "Log.entryAdded"
              and e["params"]["entry"].get("level") == "error"]
    assert not console, console
    assert not thrown, thrown
    assert not errors, errors
    # Nothing fetched but the report itself and its embedded data.
    urls = [e["params"]["request"]["url"] for e in page_events
            if e["method"] == "Network.requestWillBeSent"]
    assert url in urls
    assert all(u == url or u.startswith("data:") for u in urls), urls

    # The results table and the figures are there after load.
    assert facts["scripts"] == 0
    assert facts["rows"] == len(results)
    assert "period (px)" in facts["headers"] and "visibility" in facts["headers"]
    assert "science.tif" in facts["firstRow"]
    assert len(facts["imgs"]) == len(out["figures"]) >= 3
    for im in facts["imgs"]:
        assert im["complete"] and im["w"] > 100 and im["h"] > 100, im
        assert im["scheme"] == "data:" and im["rw"] > 100 and im["rh"] > 50, im

    # The screenshot is not blank, and every figure area holds drawn (non-white) pixels.
    png = base64.b64decode(shot)
    assert png[:8] == PNG_SIGNATURE
    img = cv2.imdecode(np.frombuffer(png, np.uint8), cv2.IMREAD_COLOR)
    assert img is not None and img.shape[1] == 1200
    grey = img.astype(float).mean(axis=2)
    assert grey.var() > 100.0
    for im in facts["imgs"]:
        y0, x0 = int(im["y"]), int(im["x"])
        y1, x1 = int(im["y"] + im["rh"]), int(im["x"] + im["rw"])
        if y1 > grey.shape[0]:
            continue
        area = grey[y0:y1, x0:x1]
        assert area.size and np.mean(area < 200) > 0.03, im
        assert area.var() > 100.0, im
