"""The report and the review sheet in a real browser: Debian's chromium, headless.

The browser is driven over the Chrome DevTools Protocol on a pipe (`--remote-debugging-pipe`:
JSON messages ended by a NUL byte on file descriptors 3 and 4; protocol documented at
chromedevtools.github.io/devtools-protocol), so no driver or websocket package is needed.
Checks: each page loads and its screenshot is not blank (pixel spread, measured with Pillow);
the console and the browser log carry no error; hostile captions, file names, codes and
metadata appear as text and neither run script nor add elements. Each check is first shown to
fail on a page made to fail it (a positive control), so a broken harness cannot pass.

chromium must be installed (`.ci/run` installs it): without it these tests fail, they do not skip.
"""
from __future__ import annotations

import base64
import fcntl
import io
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pyarrow as pa
import pytest
from PIL import Image
from test_report import _chk, _ledger, _loader, _photos, _row
from test_review import make_run

from curate.config import load_config
from curate.plan import config_sections
from curate.report import write_report
from curate.report.review import review
from curate.writers import summarize

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-quic",
         "--no-first-run", "--disable-component-update", "--disable-sync", "--hide-scrollbars",
         "--remote-debugging-pipe"]
TIMEOUT = 90  # seconds per protocol answer: the CI machine may be loaded
# Payloads that would run or add elements if any text reached the page unescaped.
RUNS = '<script>document.title="PWNED"</script>'
INJECTS = '<img src=x onerror="document.body.dataset.pwned=1">'
STYLE_BREAK = '</style><b id="injected">bold</b><style>'
JS_URL = 'javascript:document.body.dataset.pwned=2'
HOSTILE = [RUNS, INJECTS, STYLE_BREAK, JS_URL, '"><svg onload="document.body.dataset.pwned=3">']


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    pytest.fail("chromium is not installed: the browser tests need Debian's chromium "
                "(`apt-get install -y chromium`; .ci/run installs it before `make test`)", pytrace=False)


class Browser:
    """One headless chromium, spoken to over the DevTools pipe."""

    def __init__(self, exe: str):
        self.profile = tempfile.mkdtemp(prefix="curate-chromium-")
        to_browser_r, self._w = os.pipe()
        self._r, from_browser_w = os.pipe()

        def fds() -> None:  # in the child: the protocol reads fd 3 and writes fd 4
            a = fcntl.fcntl(to_browser_r, fcntl.F_DUPFD, 10)
            b = fcntl.fcntl(from_browser_w, fcntl.F_DUPFD, 10)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen([exe, *FLAGS, f"--user-data-dir={self.profile}", "about:blank"],
                                     pass_fds=(3, 4), preexec_fn=fds, stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self.buf, self.next_id, self.events = b"", 0, []

    def _message(self, deadline: float) -> dict:
        while b"\0" not in self.buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("chromium did not answer in time")
            if select.select([self._r], [], [], left)[0]:
                chunk = os.read(self._r, 1 << 20)
                if not chunk:
                    raise RuntimeError(f"chromium closed the pipe (exit code {self.proc.poll()})")
                self.buf += chunk
        msg, self.buf = self.buf.split(b"\0", 1)
        return json.loads(msg)

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self.next_id += 1
        m = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            m["sessionId"] = session
        os.write(self._w, json.dumps(m).encode() + b"\0")
        deadline = time.monotonic() + TIMEOUT
        while True:
            msg = self._message(deadline)
            if msg.get("id") == self.next_id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            self.events.append(msg)

    def wait_for(self, method: str, session: str) -> dict:
        deadline = time.monotonic() + TIMEOUT
        while True:
            for i, e in enumerate(self.events):
                if e.get("method") == method and e.get("sessionId") == session:
                    return self.events.pop(i)
            self.events.append(self._message(deadline))

    def open(self, path: Path, width: int = 1280, height: int = 900) -> "Page":
        target = self.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        s = self.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page.enable", "Runtime.enable", "Log.enable"):
            self.send(domain, session=s)
        self.send("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False}, session=s)
        self.send("Page.navigate", {"url": path.resolve().as_uri()}, session=s)
        self.wait_for("Page.loadEventFired", s)
        self.send("Runtime.evaluate", {"expression": "1", "returnByValue": True}, session=s)  # drain events
        return Page(self, s, target)

    def close(self) -> None:
        try:
            self.send("Browser.close")
        except Exception:  # noqa: BLE001 - it may already be gone
            pass
        try:
            self.proc.wait(15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._w)
        os.close(self._r)
        shutil.rmtree(self.profile, ignore_errors=True)


class Page:
    def __init__(self, browser: Browser, session: str, target: str):
        self.b, self.s, self.target = browser, session, target

    def js(self, expression: str):
        r = self.b.send("Runtime.evaluate", {"expression": expression, "returnByValue": True}, session=self.s)
        return r["result"].get("value")

    def screenshot(self, height: int = 900) -> Image.Image:
        r = self.b.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                   "clip": {"x": 0, "y": 0, "width": 1280, "height": height,
                                                            "scale": 1}}, session=self.s)
        return Image.open(io.BytesIO(base64.b64decode(r["data"]))).convert("RGB")

    def problems(self) -> list[str]:
        """Console errors and warnings, uncaught exceptions and browser-log errors of this page."""
        self.js("1")
        out = []
        for e in self.b.events:
            if e.get("sessionId") != self.s:
                continue
            p = e.get("params", {})
            if e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "warning", "assert"):
                out.append("console: " + " ".join(str(a.get("value", a.get("description"))) for a in p["args"]))
            elif e["method"] == "Runtime.exceptionThrown":
                out.append("exception: " + p["exceptionDetails"].get("text", ""))
            elif e["method"] == "Log.entryAdded" and p["entry"]["level"] in ("error", "warning"):
                out.append(f"log {p['entry']['source']}: {p['entry']['text']}")
        return out

    def close(self) -> None:
        self.b.send("Target.closeTarget", {"targetId": self.target})


@pytest.fixture(scope="module")
def browser():
    b = Browser(_chromium())
    try:
        yield b
    finally:
        b.close()


def spread(img: Image.Image) -> float:
    """Standard deviation of the grey levels: 0 for a blank (single-colour) screenshot."""
    return float(np.asarray(img.convert("L"), dtype=np.float64).std())


def injected(page: Page) -> dict:
    """What hostile text would have done had it reached the page as markup."""
    return page.js("""({title: document.title,
        pwned: document.body ? (document.body.dataset.pwned || null) : null,
        scripts: document.querySelectorAll('script').length,
        injected: document.querySelectorAll('#injected').length,
        handlers: [...document.querySelectorAll('*')].filter(e => [...e.attributes].some(a => a.name.startsWith('on'))).length,
        jsurls: [...document.querySelectorAll('[href],[src]')].filter(e => /^\\s*javascript:/i.test(e.getAttribute('href') || e.getAttribute('src') || '')).length})""")


# --------------------------------------------------------------------------- positive controls


def test_controls_prove_each_check_can_fail(browser, tmp_path):
    blank = tmp_path / "blank.html"
    blank.write_text("<!doctype html><html><body style='background:#fff'></body></html>")
    p = browser.open(blank)
    assert spread(p.screenshot()) == 0.0  # a blank page is seen as blank
    assert p.problems() == []
    p.close()
    bad = tmp_path / "bad.html"
    bad.write_text("<!doctype html><html><head><title>t</title></head><body><h1>x</h1>"
                   "<script>console.error('boom')</script><img src='missing-file.png'>"
                   "<p>" + "".join(HOSTILE) + "</p></body></html>")  # hostile text NOT escaped
    p = browser.open(bad)
    found = p.problems()
    assert any("boom" in x for x in found)  # console.error is caught
    assert any("missing-file.png" in x or "ERR_FILE_NOT_FOUND" in x for x in found), found  # failed load too
    got = injected(p)
    assert got["title"] == "PWNED" and got["pwned"] is not None and got["injected"] == 1 and got["handlers"] >= 1
    p.close()


# --------------------------------------------------------------------------- the real pages


def _hostile_report(tmp_path: Path) -> Path:
    rows = [
        _row(1, True, split="train", caption="teapot " + RUNS, flags=["face"], source="dir/" + INJECTS + ".jpg",
             checks=[_chk("risk", "face", None, None, None, None, True, action="flag")]),
        _row(2, False, reasons=[STYLE_BREAK], caption=STYLE_BREAK + " mug", source=JS_URL, stopped="caption",
             checks=[_chk("caption", STYLE_BREAK, None, None, None, None, True) | {"detail": INJECTS}]),
        _row(3, False, reasons=["duplicate"], caption=HOSTILE[4], group="g" + RUNS, dup=("g" + RUNS, "phash", 2.0),
             checks=[_chk("neardup", "duplicate", 2, 8, ">", "bits" + RUNS, True)]),
        _row(4, True, split="quarantine", flags=["pii:" + INJECTS], caption="vase",
             checks=[_chk("risk", "pii:" + INJECTS, None, None, None, None, True, action="quarantine")]),
    ]
    rows += [_row(10 + i, True, split="train", checks=[_chk("agreement", "agreement_low", 0.3 + i / 100, 0.28, ">=",
                                                            "cosine", False)]) for i in range(12)]
    led = _ledger(rows)
    # manifest metadata columns (prefixed meta.): a licence with markup and a source URL with a javascript: scheme
    n = led.num_rows
    led = led.append_column("meta.licence", pa.array([STYLE_BREAK + RUNS] * n, pa.string()))
    led = led.append_column("meta.url", pa.array([JS_URL] * n, pa.string()))
    cfg = load_config(None, sections=config_sections())
    cfg.input.path = "/data/" + STYLE_BREAK + RUNS
    plan = SimpleNamespace(stages=[SimpleNamespace(name=s) for s in ("inspect", "caption", "neardup", "risk")])
    facts = {"stages": {"embed": {"model": RUNS, "pretrained": JS_URL, "weights_sha256": INJECTS}},
             "state": {"embed": {"seconds": 1.0}}}
    return write_report(tmp_path / "out", led, summarize(led, plan), cfg, load_images=_loader(_photos()), facts=facts)


def test_report_renders_without_errors_and_hostile_text_stays_text(browser, tmp_path):
    path = _hostile_report(tmp_path)
    p = browser.open(path)
    shot = p.screenshot()
    shot.save(tmp_path / "report.png")
    assert spread(shot) > 20  # text, charts and photos: far from a single colour
    assert p.problems() == []
    assert injected(p) == {"title": "curate filtering report", "pwned": None, "scripts": 0, "injected": 0,
                           "handlers": 0, "jsurls": 0}
    text = p.js("document.body.innerText")
    for payload in (RUNS, INJECTS, STYLE_BREAK, JS_URL):
        assert payload in text or payload.replace('"', "") in text.replace('"', ""), payload  # shown as text
    assert p.js("[...document.querySelectorAll('dt')].filter(e => e.textContent === 'licence').length") > 0
    # the pictures decoded: every thumbnail has a natural width
    assert p.js("[...document.images].filter(i => !i.complete || i.naturalWidth === 0).length") == 0
    assert p.js("document.images.length") > 6
    p.close()


def test_review_sheet_renders_without_errors_and_hostile_text_stays_text(browser, tmp_path):
    rows = [dict(sample_id=f"{i:016x}", source=src, kept=i % 2 == 0, reasons=[] if i % 2 == 0 else ["duplicate"],
                 flags=["face"], split="train" if i % 2 == 0 else None, group_id=f"{i:016x}", checks=[],
                 caption=cap)
            for i, (src, cap) in enumerate([("pics/photo0.jpg", RUNS), ("pics/photo1.jpg", INJECTS),
                                            (JS_URL, STYLE_BREAK), ("pics/photo3.jpg", HOSTILE[4])])]
    for r in rows:
        r["meta.url"] = JS_URL
        r["meta.credit"] = INJECTS
    run = make_run(tmp_path, rows, extra={"meta.url": pa.string(), "meta.credit": pa.string()})
    res = review(run, out=tmp_path / "sheet" / "decisions.csv")
    p = browser.open(Path(res["sheet"]))
    shot = p.screenshot()
    assert spread(shot) > 20
    assert p.problems() == []
    assert injected(p) == {"title": "curate review sheet: decisions.csv", "pwned": None, "scripts": 0,
                           "injected": 0, "handlers": 0, "jsurls": 0}
    text = p.js("document.body.innerText")
    assert RUNS in text and STYLE_BREAK in text and JS_URL in text
    assert p.js("[...document.querySelectorAll('dt')].filter(e => e.textContent === 'url').length") == 4
    assert p.js("document.querySelectorAll('figure.card').length") == 4
    assert p.js("[...document.images].filter(i => i.naturalWidth === 0).length") == 0
    p.close()
