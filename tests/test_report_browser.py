"""The report opened in a real browser: Debian's headless Chromium loads it, draws it and reports no console message.

Chromium runs with networking cut off (every host name resolves to nothing), so a page that tried to
fetch anything would log a failed load. Chromium writes every console message of the page to stderr
as a ":CONSOLE" line under --enable-logging; the first test proves that on a page that throws, so the
check on the report cannot pass by hearing nothing. The screenshot is kept in artifacts/ at the
repository root (ignored by git) for a person to look at.
"""

from __future__ import annotations

import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
from conftest import REPO, copy_demo
from fixtures_engines import require_engine
from PIL import Image

from featpipe import api
from featpipe.fitted.report import write_report
from featpipe.fitted.report.plots import MODEL_COLOURS

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = REPO / "artifacts"
WIDTH, HEIGHT = 1280, 4000
SECTIONS = ["model", "comparison", "coefficients", "terms", "effect-curves-section", "decision-surface", "performance", "cautions"]


def open_in_chromium(page: Path, workdir: Path, screenshot: Path) -> tuple[str, list[str]]:
    """The DOM after load, and the console messages the page logged."""
    if not CHROMIUM.is_file():
        require_engine("chromium", f"{CHROMIUM} is missing; install Debian's package: apt-get install -y chromium")
    command = [
        str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={workdir / 'profile'}", "--enable-logging=stderr", "--v=0",
        "--host-resolver-rules=MAP * ~NOTFOUND", f"--window-size={WIDTH},{HEIGHT}", "--hide-scrollbars",
        f"--screenshot={screenshot}", "--dump-dom", page.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=180, cwd=workdir)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout, [line for line in done.stderr.splitlines() if ":CONSOLE" in line]


class Outline(HTMLParser):
    """Section ids in document order and the number of <svg> elements, from the browser's DOM."""

    def __init__(self):
        super().__init__()
        self.sections: list[str] = []
        self.svgs = 0

    def handle_starttag(self, tag, attrs):
        if tag == "section":
            self.sections.append(dict(attrs).get("id"))
        elif tag == "svg":
            self.svgs += 1


def test_the_console_check_hears_a_page_that_throws(tmp_path):
    page = tmp_path / "throws.html"
    page.write_text('<!DOCTYPE html><p>x</p><script>throw new Error("deliberate")</script>', encoding="utf-8")
    _, console = open_in_chromium(page, tmp_path, tmp_path / "throws.png")
    assert any("Uncaught Error: deliberate" in line for line in console)


def test_the_report_loads_in_chromium_without_console_messages(tmp_path):
    lease = api.load_project(copy_demo("lease_default", tmp_path))
    api.fit(lease)
    report = write_report(lease, "default_risk", against="default_raw")
    screenshot = tmp_path / "report.png"

    dom, console = open_in_chromium(report, tmp_path, screenshot)

    ARTIFACTS.mkdir(exist_ok=True)
    shutil.copyfile(screenshot, ARTIFACTS / "report-default_risk-vs-default_raw.png")
    assert console == []
    outline = Outline()
    outline.feed(dom)
    assert outline.sections == SECTIONS
    assert outline.svgs == report.read_text(encoding="utf-8").count("<svg") >= 10
    image = np.asarray(Image.open(screenshot).convert("RGB")).astype(int)
    assert image.shape == (HEIGHT, WIDTH, 3)
    # Below the header, the model colour appears only inside drawn figures (the interval plot first).
    accent = np.array([int(MODEL_COLOURS[0][i:i + 2], 16) for i in (1, 3, 5)])
    drawn = np.abs(image[600:] - accent).sum(axis=2) < 30
    assert drawn.sum() > 500
