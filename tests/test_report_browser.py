"""The demo's report.html opened in a real browser (headless Chromium): no console error, every
image decoded, and a screenshot saved.

Runs when Chromium is installed (Debian package ``chromium``; ``.ci/run`` installs it) and is
skipped otherwise, saying so. How it looks: Chromium runs headless on a copy of the page to
which the test appends a small script; after the load event the script records, for every
<img>, whether it finished loading with a non-zero natural size, and writes the result into
the DOM, which ``--dump-dom`` prints. Console messages come from ``--enable-logging=stderr
--v=0`` (lines with "CONSOLE"); any of level error, or a failed resource load, fails the test.
The screenshot goes to the test's temporary folder and, when the environment variable
FIRNLINE_ARTIFACTS names a folder, is copied there.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from firnline.page import png_size


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian: apt-get install "
                                                         "chromium); .ci/run installs it for CI")

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--hide-scrollbars", "--mute-audio"]

CHECK = """
<script>
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images);
  var bad = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0 && i.naturalHeight > 0); });
  var out = document.createElement("pre");
  out.id = "firnline-check";
  out.textContent = JSON.stringify({images: imgs.length, broken: bad.map(function (i) { return i.alt; }),
                                    title: document.title});
  document.body.appendChild(out);
});
</script>
"""


def _run(args: list[str], tmp: Path, timeout=180) -> subprocess.CompletedProcess:
    profile = tmp / f"profile-{len(list(tmp.glob('profile-*')))}"
    profile.mkdir()
    env = dict(os.environ, HOME=str(tmp))
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True,
                          text=True, timeout=timeout, env=env)


def browser_check(html_path: Path, tmp: Path) -> tuple[dict, list[str]]:
    """(the page's image check, the console errors) of ``html_path`` in headless Chromium."""
    probe = tmp / ("probe-" + html_path.name)
    text = html_path.read_text(encoding="utf-8")
    probe.write_text(text.replace("</body>", CHECK + "</body>"), encoding="utf-8")
    r = _run(["--enable-logging=stderr", "--v=0", "--virtual-time-budget=10000", "--dump-dom",
              probe.as_uri()], tmp)
    m = re.search(r'<pre id="firnline-check">(.*?)</pre>', r.stdout, flags=re.S)
    assert m, f"the check did not run; Chromium said: {r.stderr[-2000:]}"
    result = json.loads(m.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    errors = []
    for line in r.stderr.splitlines():
        if "CONSOLE" in line and ("ERROR" in line or "error" in line.lower()):
            errors.append(line)
        elif "Failed to load resource" in line or "net::ERR_" in line:
            errors.append(line)
    return result, errors


def test_demo_report_in_chromium(demo_run, tmp_path):
    _, out = demo_run
    result, errors = browser_check(out / "report.html", tmp_path)
    n = len(list(out.glob("map_*.png"))) + len(list(out.glob("chart_*.png")))
    assert result["images"] == n and n > 0
    assert result["broken"] == []
    assert errors == []
    assert result["title"].startswith("Surface mass balance")
    shot = tmp_path / "report.png"
    r = _run(["--window-size=1280,2200", f"--screenshot={shot}", (out / "report.html").as_uri()], tmp_path)
    assert shot.exists(), r.stderr[-2000:]
    png = shot.read_bytes()
    assert png_size(png) == (1280, 2200) and len(png) > 50_000     # a drawn page, not a blank one
    # printed to PDF (the print style sheet: A4, figures kept whole): a multi-page document
    pdf = tmp_path / "report.pdf"
    r = _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", (out / "report.html").as_uri()], tmp_path)
    assert pdf.exists(), r.stderr[-2000:]
    data = pdf.read_bytes()
    pages = len(re.findall(rb"/Type\s*/Page[^s]", data))
    assert data[:5] == b"%PDF-" and pages >= 5, pages
    if os.environ.get("FIRNLINE_ARTIFACTS"):
        dest = Path(os.environ["FIRNLINE_ARTIFACTS"])
        dest.mkdir(parents=True, exist_ok=True)
        shutil.copy(shot, dest / "report_screenshot.png")
        shutil.copy(pdf, dest / "report.pdf")


def test_browser_check_catches_a_broken_image_and_a_console_error(tmp_path):
    """The check can fail: a page with an undecodable image and a console error is caught."""
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><title>bad</title></head><body>'
                    '<img alt="broken" src="data:image/png;base64,AAAA">'
                    '<script>console.error("deliberate error")</script></body></html>', encoding="utf-8")
    result, errors = browser_check(page, tmp_path)
    assert result["broken"] == ["broken"]
    assert any("deliberate error" in e for e in errors)
