"""The report in a real browser: headless Chromium opens the pages offline through ``file://``.

Chromium is driven through the Chrome DevTools Protocol over ``--remote-debugging-pipe`` (JSON
messages separated by NUL bytes on file descriptors 3 and 4; no port is opened).  Every network
request and console error is recorded; none may occur beyond the run's own files.  Screenshots and
a PDF print are saved under the test's temporary folder.

Without ``/usr/bin/chromium`` (Debian package ``chromium``) these tests skip, unless the environment
variable ``FITAUDIT_REQUIRE_BROWSER=1`` is set (CI), in which case they fail.

The screenshots of the run page and of an exception's model page are saved to the folder named by
``FITAUDIT_SCREENSHOTS`` (default: ``screenshots/`` under pytest's base temporary folder); their
paths are printed (``pytest -s``) and recorded as the tests' ``screenshot`` properties.
"""

from __future__ import annotations

import base64
import json
import os
import pathlib
import re
import select
import shutil
import subprocess
import tempfile
import time

import numpy as np
import pytest

from fitaudit.core.audit import AuditSettings, apply_fleet_rules, audit_series
from fitaudit.core.models.arima import Arima
from fitaudit.tasks.outcomes import model_record
from fitaudit.tasks.report import STATUS, render_run
from fitaudit.tasks.results import build_results

pytestmark = pytest.mark.browser

CHROMIUM = os.environ.get("FITAUDIT_CHROMIUM", "/usr/bin/chromium")
REQUIRED = os.environ.get("FITAUDIT_REQUIRE_BROWSER") == "1"
META = {
    "run_id": "20261130-T010203Z-beef",
    "started_utc": "2026-11-30T01:02:03Z",
    "finished_utc": "2026-11-30T01:04:00Z",
    "operator": "svc-audit",
    "tool_version": "0.1.0",
    "code_commit": "292b527",
    "prefect_version": "3.9.0",
    "archive_head": "5f" * 32 + " (seq 41)",
    "previous_run_id": "20261123-T010203Z-a1a1",
    "previous_as_of": "2026-11-23",
    "fleet_trend": [
        {"as_of": "2026-11-09", "passed": 3, "registered": 3},
        {"as_of": "2026-11-23", "passed": 2, "registered": 3},
    ],
}
A4_POINTS = (595.28, 841.89)  # source: ISO 216 A4 = 210 mm x 297 mm; 1 pt = 1/72 inch = 0.3528 mm


class Browser:
    """A headless Chromium driven over the DevTools pipe."""

    def __init__(self, executable: str, profile: str):
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()

        def wire_pipes():  # the child reads commands on fd 3 and writes replies on fd 4
            a, b = os.dup(to_browser_r), os.dup(from_browser_w)
            os.dup2(a, 3)
            os.dup2(b, 4)

        args = [
            executable,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--disable-features=MediaRouter,OptimizationHints",
            f"--user-data-dir={profile}",
            "--remote-debugging-pipe",
            "about:blank",
        ]
        self.process = subprocess.Popen(
            args,
            preexec_fn=wire_pipes,
            pass_fds=(3, 4),
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict] = []

    def call(self, method: str, params: dict | None = None, session: str | None = None, timeout: float = 60) -> dict:
        self._next_id += 1
        ident = self._next_id
        message = {"id": ident, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        reply = self.wait_for(lambda m: m.get("id") == ident, timeout)
        if "error" in reply:
            raise RuntimeError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def wait_for(self, predicate, timeout: float = 60) -> dict:
        deadline = time.monotonic() + timeout
        while True:
            while b"\0" in self._buffer:
                raw, self._buffer = self._buffer.split(b"\0", 1)
                message = json.loads(raw)
                if "method" in message:
                    self.events.append(message)
                if predicate(message):
                    return message
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not select.select([self._from_browser], [], [], remaining)[0]:
                raise TimeoutError("Chromium did not answer in time")
            chunk = os.read(self._from_browser, 1 << 20)
            if not chunk:
                raise EOFError("Chromium closed the DevTools pipe")
            self._buffer += chunk

    def open_tab(self) -> str:
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Network", "Runtime", "Log"):
            self.call(f"{domain}.enable", session=session)
        self.call(
            "Emulation.setDeviceMetricsOverride",
            {"width": 1280, "height": 900, "deviceScaleFactor": 1, "mobile": False},
            session=session,
        )
        return session

    def load(self, session: str, url: str) -> list[dict]:
        """Navigate and wait for the load event; returns the events recorded meanwhile."""
        start = len(self.events)
        self.call("Page.navigate", {"url": url}, session=session)
        self.wait_for(lambda m: m.get("method") == "Page.loadEventFired" and m.get("sessionId") == session)
        time.sleep(0.3)  # let late requests and console messages arrive
        self.call("Runtime.evaluate", {"expression": "1"}, session=session)
        return [e for e in self.events[start:] if e.get("sessionId") == session]

    def evaluate(self, session: str, expression: str):
        result = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True}, session=session)
        if "exceptionDetails" in result:
            raise RuntimeError(result["exceptionDetails"])
        return result["result"].get("value")

    def screenshot(self, session: str, path: pathlib.Path) -> bytes:
        height = self.call("Page.getLayoutMetrics", session=session)["cssContentSize"]["height"]
        data = self.call(
            "Page.captureScreenshot",
            {
                "format": "png",
                "captureBeyondViewport": True,
                "clip": {"x": 0, "y": 0, "width": 1280, "height": min(height, 12000), "scale": 1},
            },
            session=session,
        )["data"]
        png = base64.b64decode(data)
        path.write_bytes(png)
        return png

    def close(self) -> None:
        self.process.kill()
        self.process.wait(timeout=30)
        os.close(self._to_browser)
        os.close(self._from_browser)


def requests_of(events: list[dict]) -> list[str]:
    return [e["params"]["request"]["url"] for e in events if e["method"] == "Network.requestWillBeSent"]


def errors_of(events: list[dict]) -> list[str]:
    out = []
    for e in events:
        p = e["params"]
        if e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            out.append(json.dumps(p.get("args"))[:200])
        elif e["method"] == "Runtime.exceptionThrown":
            out.append(json.dumps(p.get("exceptionDetails"))[:200])
        elif e["method"] == "Log.entryAdded" and p["entry"].get("level") == "error":
            out.append(p["entry"].get("text", "")[:200])
    return out


@pytest.fixture(scope="module")
def browser():
    if not (os.path.isfile(CHROMIUM) and os.access(CHROMIUM, os.X_OK)):
        message = (
            f"headless Chromium not found at {CHROMIUM}; install Debian's `chromium` package (apt-get install chromium)"
        )
        if REQUIRED:
            pytest.fail(message + " (FITAUDIT_REQUIRE_BROWSER=1 makes the browser tests required)")
        pytest.skip(message)
    profile = tempfile.mkdtemp(prefix="fitaudit-chromium-")
    b = Browser(CHROMIUM, profile)
    try:
        b.call("Browser.getVersion")
        yield b
    finally:
        b.close()
        shutil.rmtree(profile, ignore_errors=True)


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> tuple[pathlib.Path, dict]:
    """A three-model run (pass, respecify with a change point, error) written to disk."""
    rng = np.random.default_rng(7)
    e = rng.standard_normal(300)
    y = np.zeros(300)
    for t in range(1, 300):
        y[t] = 0.6 * y[t - 1] + e[t]
    arima = Arima(order=(1, 0, 0), trend="c")
    production = arima.fit(y[:240]).params
    walk = np.cumsum(rng.standard_t(2, size=300))
    settings = AuditSettings(replicates=99, audit_window=60, change_permutations=99)
    cases = [("steady-demand", y), ("wandering-demand", walk)]
    days = np.arange(
        np.datetime64("2026-11-30") - 299, np.datetime64("2026-11-30") + 1
    )  # daily, ending at the as-of date
    results = apply_fleet_rules(
        [audit_series(s, arima, production=production, settings=settings, label=n, timestamps=days) for n, s in cases],
        q=0.1,
    )
    records = [
        model_record(
            {"id": n, "safe_id": n, "owner": "team <b>a</b>", "tier": 2},
            as_of="2026-11-30",
            verdict=r.verdict,
            reasons=r.reasons,
            audit=r.to_dict(),
            spec_text=arima.describe(),
            settings=settings.to_dict(),
            history=[{"as_of": "2026-11-23", "verdict": "refit", "r_max": 1.2, "p_value": 0.01}],
        )
        for (n, _), r in zip(cases, results)
    ]
    records.append(
        model_record(
            {"id": "<script>alert(1)</script>", "safe_id": "entry-3"},
            as_of="2026-11-30",
            verdict="error",
            reasons=["the registry entry has no usable id"],
            audit=None,
            spec_text="unknown",
        )
    )
    doc = json.loads(
        json.dumps(
            build_results(
                as_of="2026-11-30",
                registry={"path": "registry.yaml", "sha256": "0" * 64},
                policy={"level": 0.05, "multiple_testing": "bh", "fdr_q": 0.1},
                records=records,
                tool_version="0.1.0",
            )
        )
    )
    assert {m["verdict"] for m in doc["models"]} >= {"pass", "respecify", "error"}
    folder = tmp_path_factory.mktemp("run")
    for name, data in render_run(doc, META).items():
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
    return folder, doc


@pytest.fixture(scope="module")
def shots(tmp_path_factory) -> pathlib.Path:
    """Where the screenshots go (``FITAUDIT_SCREENSHOTS`` or pytest's base temporary folder)."""
    folder = pathlib.Path(os.environ.get("FITAUDIT_SCREENSHOTS") or tmp_path_factory.getbasetemp() / "screenshots")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def _allowed_urls(folder: pathlib.Path) -> set[str]:
    return {p.as_uri() for p in folder.rglob("*.html")}


VISIBLE = """(() => {
  const out = {};
  for (const sel of %s) {
    const el = document.querySelector(sel);
    if (!el) { out[sel] = null; continue; }
    const r = el.getBoundingClientRect(), s = getComputedStyle(el);
    out[sel] = {w: r.width, h: r.height, top: r.top + window.scrollY,
                shown: s.visibility === 'visible' && s.display !== 'none' && parseFloat(s.opacity) > 0,
                text: (el.innerText ?? el.textContent).slice(0, 400)};
  }
  return out;
})()"""


def test_run_page_opens_offline_and_shows_counts_and_exceptions(browser, run_folder, shots, record_property):
    folder, doc = run_folder
    session = browser.open_tab()
    url = (folder / "index.html").as_uri()
    events = browser.load(session, url)
    requests = requests_of(events)
    assert url in requests  # the recorder sees the page itself
    assert set(requests) <= _allowed_urls(folder), requests
    assert errors_of(events) == []
    seen = browser.evaluate(session, VISIBLE % json.dumps(["#counts", "#exceptions table", "#trail table", "footer"]))
    for selector, box in seen.items():
        assert box and box["shown"] and box["w"] > 300 and box["h"] > 20, (selector, box)
    assert seen["#counts"]["top"] < 900  # the counts are on the first screen
    counts_text = seen["#counts"]["text"]
    for symbol, word in STATUS.values():
        assert f"{symbol} {word}" in counts_text
    rendered = browser.evaluate(
        session, "Array.from(document.querySelectorAll('#counts tbody td')).map(td => td.innerText.trim())"
    )
    assert [int(x) for x in rendered] == [doc["summary"][k] for k in ("registered", "audited", *STATUS)]
    assert "<script>alert(1)</script>" in seen["#exceptions table"]["text"]  # shown as text, not run
    facts = browser.evaluate(session, "document.querySelector('.facts').innerText")
    assert (
        "5f" * 32 + " (seq 41)" in facts and "20261123-T010203Z-a1a1 (as of 2026-11-23)" in facts
    )  # the chain head and the previous run
    columns = browser.evaluate(
        session, "Array.from(document.querySelectorAll('#exceptions thead th')).map(th => th.innerText.trim())"
    )
    assert columns[-2:] == ["Reason", "Action"]
    actions = browser.evaluate(
        session, "Array.from(document.querySelectorAll('#exceptions td.action')).map(td => td.innerText)"
    )
    assert actions and all(re.search(r"By 2026-12-\d\d\.$", a) for a in actions)
    table_box = browser.evaluate(
        session,
        "(() => { const t = document.querySelector('#exceptions table').getBoundingClientRect(); return t.right; })()",
    )
    assert table_box <= 1280  # the action column fits the page width, no sideways scrolling
    assert "→" in browser.evaluate(session, "document.querySelector('#fleet-trend').innerText")
    path = shots / "run-page.png"
    png = browser.screenshot(session, path)
    assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 20_000
    print(f"run page screenshot: {path}")
    record_property("screenshot", str(path))


def test_model_page_shows_the_divergence_map(browser, run_folder, shots, record_property):
    folder, doc = run_folder
    model = next(m for m in doc["models"] if m["verdict"] == "respecify")
    session = browser.open_tab()
    url = (folder / "models" / f"{model['safe_id']}.html").as_uri()
    events = browser.load(session, url)
    assert set(requests_of(events)) <= _allowed_urls(folder) and url in requests_of(events)
    assert errors_of(events) == []
    seen = browser.evaluate(
        session,
        VISIBLE
        % json.dumps(
            [
                f"#model-{model['safe_id']}",
                "#figure-map-production svg",
                "#figure-map-refit svg",
                "#figure-hist-refit svg",
                "#figure-qq-refit svg",
                "#figure-acf-refit svg",
                "#checks table",
            ]
        ),
    )
    for selector, box in seen.items():
        assert box and box["shown"] and box["w"] > 200 and box["h"] > 150, (selector, box)
    marks = browser.evaluate(
        session,
        """(() => {
      const svg = document.querySelector('#figure-map-production svg');
      const box = el => { const r = el.getBoundingClientRect(); return r.width > 0 && r.height > 0; };
      return {cells: svg.querySelectorAll('rect').length,
              edge: Array.from(svg.querySelectorAll('path.edge')).filter(box).length,
              members: Array.from(svg.querySelectorAll('circle.mem')).filter(box).length,
              max: Array.from(svg.querySelectorAll('path.mx')).filter(box).length,
              fill: getComputedStyle(svg.querySelector('rect')).fill};
    })()""",
    )
    assert marks["cells"] == 17 * 9 and marks["edge"] == 1 and marks["members"] == 5 and marks["max"] == 1
    assert marks["fill"].startswith("rgb(")  # the inline stylesheet coloured the cells
    classes = browser.evaluate(
        session,
        """(() => {
      const hex = h => {
        const v = h.trim();
        return `rgb(${parseInt(v.slice(1, 3), 16)}, ${parseInt(v.slice(3, 5), 16)}, ${parseInt(v.slice(5, 7), 16)})`;
      };
      const root = getComputedStyle(document.documentElement), out = {};
      for (const r of document.querySelectorAll('svg.heat rect')) {
        const cls = r.getAttribute('class'),
          name = cls === 'hinf' ? '--heat-inf' : cls === 'hna' ? '--heat-na' : `--heat-${cls.slice(1)}`;
        out[cls] = [getComputedStyle(r).fill, hex(root.getPropertyValue(name))];
      }
      return out;
    })()""",
    )
    assert {"h7", "h8"} <= set(classes)  # the walk fails far beyond the critical value
    for cls, (fill, expected) in classes.items():
        assert fill == expected, (
            cls
        )  # each class drawn in its palette colour (checked for order and contrast in test_report.py)
    assert browser.evaluate(session, "document.querySelectorAll('#figure-map-production svg path.frame').length") == 1
    action = browser.evaluate(session, "document.querySelector('#action').innerText")
    assert "What the owner should do." in action and "By 2026-12-" in action
    path = shots / f"model-page-{model['safe_id']}.png"
    browser.screenshot(session, path)
    print(f"model page screenshot ({model['verdict']}): {path}")
    record_property("screenshot", str(path))


def test_recorder_catches_requests_and_console_errors(browser, tmp_path):
    """A negative control: the same checks do flag a page that fetches and fails."""
    bad = tmp_path / "bad.html"
    bad.write_text(
        '<!DOCTYPE html><html lang="en"><title>x</title><img src="http://127.0.0.1:9/x.png" alt="">'
        '<script>console.error("boom")</script></html>',
        encoding="utf-8",
    )
    session = browser.open_tab()
    events = browser.load(session, bad.as_uri())
    assert "http://127.0.0.1:9/x.png" in requests_of(events)
    assert any("boom" in e for e in errors_of(events))


def test_run_page_prints_on_a4_without_hiding_data_tables(browser, run_folder, tmp_path):
    folder, doc = run_folder
    model = next(m for m in doc["models"] if m["verdict"] == "respecify")
    session = browser.open_tab()
    browser.load(session, (folder / "models" / f"{model['safe_id']}.html").as_uri())
    browser.call("Emulation.setEmulatedMedia", {"media": "print"}, session=session)
    hidden_in_print = browser.evaluate(
        session,
        "Array.from(document.querySelectorAll('details table'))"
        ".filter(t => t.getBoundingClientRect().height === 0).length",
    )
    assert hidden_in_print == 0  # closed <details> still print their data tables
    browser.call("Emulation.setEmulatedMedia", {"media": ""}, session=session)
    browser.load(session, (folder / "index.html").as_uri())
    pdf = base64.b64decode(
        browser.call("Page.printToPDF", {"preferCSSPageSize": True, "printBackground": True}, session=session)["data"]
    )
    (tmp_path / "run-page.pdf").write_bytes(pdf)
    assert pdf.startswith(b"%PDF-")
    pages = re.findall(rb"/Type\s*/Page(?!s)", pdf)
    assert len(pages) >= 1
    boxes = {tuple(round(float(v), 0) for v in m.split()) for m in re.findall(rb"/MediaBox\s*\[\s*([0-9.\s]+)\]", pdf)}
    assert boxes == {(0.0, 0.0, round(A4_POINTS[0]), round(A4_POINTS[1]))}, boxes
