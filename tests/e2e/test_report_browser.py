"""The demo report in a real browser: headless Chromium renders it, with no console message and no request.

How "nothing leaves the file" is checked, three ways that fail independently:

* statically, the HTML holds no script, no stylesheet link, no ``src``/``href``
  other than ``#anchor`` and ``data:`` images, and no absolute URL except the SVG
  namespace name (an identifier, never fetched);
* the page declares a Content-Security-Policy that forbids loading anything;
  a browser that meets a forbidden load blocks it and logs a console message,
  and every console message fails the test (the page has no script of its own,
  so any message is the browser complaining);
* Chromium's network log (``--log-net-log``) records every URL request; any
  request the page starts (its initiator is the page, not the browser's own
  background services) fails the test. Host resolution is mapped to nowhere
  so that nothing can reach the network even if a check were wrong.

The same run dumps the DOM as the browser built it (``--dump-dom``): every
section and figure of the file must be there, in order, which catches markup
that a browser would nest differently from what was written. A negative
control shows the checks catch a page that does load something.

Debian's ``chromium`` package provides the browser; ``.ci/run`` installs it
where apt works. Without it the test is skipped with a message saying so.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
WIDTH, HEIGHT = 1200, 3000


@dataclass(frozen=True)
class BrowserRun:
    """What headless Chromium made of one page."""

    console: list[str]
    page_requests: list[str]
    events: int
    dom: str
    screenshot: Path


def _render(page: Path, work: Path) -> BrowserRun:
    if CHROMIUM is None:
        pytest.skip("headless Chromium is not installed: on Debian run 'apt-get install -y chromium' (.ci/run does this where apt works)")
    net_log, screenshot = work / "net-log.json", work / "screenshot.png"
    command = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", "--no-first-run", "--hide-scrollbars", f"--user-data-dir={work / 'profile'}",
        "--enable-logging=stderr", "--v=0", f"--log-net-log={net_log}", "--host-resolver-rules=MAP * ~NOTFOUND",
        f"--screenshot={screenshot}", f"--window-size={WIDTH},{HEIGHT}", "--dump-dom", page.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and screenshot.exists(), done.stderr[-2000:]
    log = json.loads(net_log.read_text(encoding="utf-8"))
    kinds = {number: name for name, number in log["constants"]["logEventTypes"].items()}
    requests = [
        event["params"]["url"]
        for event in log["events"]
        if kinds.get(event["type"]) == "URL_REQUEST_START_JOB"
        and "url" in event.get("params", {})
        # The browser's own background services start requests with no origin; the page's have one.
        and event["params"].get("initiator") != "not an origin"
    ]
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    return BrowserRun(console, requests, len(log["events"]), done.stdout, screenshot)


def _sections(text: str) -> list[str]:
    return re.findall(r'<section id="([^"]+)"', text)


def test_demo_report_renders_in_chromium_without_errors_or_requests(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    if CHROMIUM is None:
        pytest.skip("headless Chromium is not installed: on Debian run 'apt-get install -y chromium' (.ci/run does this where apt works)")
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0, capsys.readouterr().err
    page = out / "report.html"
    source = page.read_text(encoding="utf-8")

    # Static: nothing in the file that could fetch anything.
    assert not re.search(r"<script|<link|<iframe|<object|<embed|@import|url\((?!#)", source, re.IGNORECASE)
    for attribute, value in re.findall(r'\b(src|href)="([^"]*)"', source):
        assert value.startswith(("#", "data:image/png;base64,")), (attribute, value[:60])
    assert set(re.findall(r"(?:https?:)?//[\w.-]+\.\w+[^\s\"'<>]*", source)) == {"http://www.w3.org/2000/svg"}

    run = _render(page, tmp_path)
    assert run.console == []
    assert run.page_requests == []
    assert run.events > 0  # the network log was written, so an empty request list means something

    # The browser built every section and figure of the file, in order.
    assert _sections(run.dom) == _sections(source) and len(_sections(source)) >= 9
    assert run.dom.count("<figure") == source.count("<figure") >= 10
    assert run.dom.count("<svg") == source.count("<svg")

    # The screenshot shows a page, not a blank: text and figures put ink on a good share of it.
    from matplotlib.image import imread

    pixels = imread(run.screenshot)
    assert pixels.shape[:2] == (HEIGHT, WIDTH)
    ink = np.mean(pixels[..., :3].min(axis=2) < 0.85)
    assert ink > 0.02, ink
    # The title (dark text) sits in the top band.
    assert pixels[:60, :600, :3].min() < 0.3


def test_the_checks_catch_a_page_that_loads_something(tmp_path: Path) -> None:
    page = tmp_path / "leaky.html"
    page.write_text(
        "<!DOCTYPE html><html><head><meta charset='utf-8'><title>leaky</title></head><body><p>x</p>"
        "<img src='https://example.invalid/pixel.png'><script>console.error('from the page')</script></body></html>",
        encoding="utf-8",
    )
    run = _render(page, tmp_path)
    assert any("from the page" in line for line in run.console)
    assert run.page_requests == ["https://example.invalid/pixel.png"]
