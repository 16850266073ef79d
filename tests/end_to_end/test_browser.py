"""The report opens offline in a real browser (headless Chromium driven by selenium).

Checks, on the example study's report (the session's finished run, whose atlas names one
region with a script tag) opened from disk (file://):
- no request to http/https is made (Chromium's performance log: no
  Network.requestWillBeSent for such a URL) — the page is self-contained;
- the browser console holds no error;
- every <img> decoded (naturalWidth > 0);
- the screenshot is not blank (more than a handful of distinct grey levels);
- printed on A4 (print media emulation, the page's width set to A4 minus the print
  margins of report.css), no table is wider than the page, and Chrome's own
  ``Page.printToPDF`` writes a PDF of A4 pages (595 × 842 pt, ISO 216).

Skipped, with the reason, only when selenium, chromium or chromedriver is missing
(install: apt-get install chromium chromium-driver; pip install selenium).
"""

from __future__ import annotations

import json
import shutil
import struct
import zlib
from pathlib import Path

import pytest

CHROMEDRIVER = Path("/usr/bin/chromedriver")
SCREENSHOT_DIR_ENV = "GROUPLEVEL_SCREENSHOT_DIR"  # keep the screenshot for a human look


def _browser_or_skip():
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        pytest.skip("selenium is not installed (pip install selenium)")
    if not CHROMEDRIVER.exists():
        pytest.skip(f"{CHROMEDRIVER} not found (apt-get install chromium-driver)")
    binary = shutil.which("chromium") or shutil.which("chromium-browser")
    if binary is None:
        pytest.skip("chromium not found (apt-get install chromium)")
    return webdriver, Service, binary


@pytest.fixture(scope="module")
def report(example_output) -> Path:
    """The report of the session's finished example run (tests/conftest.py)."""
    return example_output / "report.html"


@pytest.fixture(scope="module")
def driver(tmp_path_factory):
    webdriver, Service, binary = _browser_or_skip()
    options = webdriver.ChromeOptions()
    options.binary_location = binary
    for arg in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
        "--window-size=1280,2000",
    ):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"performance": "ALL", "browser": "ALL"})
    d = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    yield d
    d.quit()


def _png_pixels(data: bytes) -> tuple[int, int, bytes]:
    """Width, height and the decompressed scanlines of an 8-bit RGB(A) PNG
    (PNG specification, W3C 2003: IHDR, IDAT chunks, zlib stream)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, width, height = 8, b"", 0, 0
    while pos < len(data):
        length, kind = struct.unpack(">I4s", data[pos : pos + 8])
        body = data[pos + 8 : pos + 8 + length]
        if kind == b"IHDR":
            width, height = struct.unpack(">II", body[:8])
        elif kind == b"IDAT":
            idat += body
        pos += 12 + length
    return width, height, zlib.decompress(idat)


def test_report_opens_offline_without_errors(driver, report):
    driver.get(report.as_uri())
    driver.execute_script("return document.readyState")
    images = driver.execute_script(
        "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, i.alt]);"
    )
    # The example report has a montage, projections, forest and variance plot per contrast.
    assert len(images) >= 4
    for complete, width, alt in images:
        assert complete and width > 0, f"image not decoded: {alt}"
        assert alt.strip()
    requests = []
    for entry in driver.get_log("performance"):
        message = json.loads(entry["message"])["message"]
        if message.get("method") == "Network.requestWillBeSent":
            requests.append(message["params"]["request"]["url"])
    remote = [u for u in requests if u.startswith(("http://", "https://"))]
    assert remote == [], f"the report asked the network for {remote}"
    errors = [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]
    assert errors == [], errors
    shot = driver.get_screenshot_as_png()
    width, height, raw = _png_pixels(shot)
    assert width >= 800 and height >= 600
    # non-blank: a rendered page has many distinct byte values (a blank one has 1-2)
    assert len(set(raw[:: max(1, len(raw) // 200_000)])) > 20
    import os

    keep = os.environ.get(SCREENSHOT_DIR_ENV)
    if keep:
        Path(keep, "report_screenshot.png").write_bytes(shot)
        driver.set_window_size(1280, 9000)
        Path(keep, "report_full.png").write_bytes(driver.get_screenshot_as_png())


# A4 (ISO 216: 210 × 297 mm) minus the @page margins of templates/report.css (14 mm left
# and right), in CSS pixels (96 per inch, CSS Values and Units Level 3: 1in = 96px).
A4_TEXT_WIDTH_PX = round((210 - 2 * 14) / 25.4 * 96)


def test_report_prints_on_a4_with_no_table_wider_than_the_page(driver, report):
    import base64
    import re

    if driver.current_url != report.as_uri():
        driver.get(report.as_uri())
    driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": "print"})
    driver.execute_cdp_cmd(
        "Emulation.setDeviceMetricsOverride",
        {"width": A4_TEXT_WIDTH_PX, "height": 1100, "deviceScaleFactor": 1, "mobile": False},
    )
    try:
        page, tables = driver.execute_script(
            """
            const out = [];
            for (const t of document.querySelectorAll('table')) {
              if (t.getClientRects().length === 0) continue;  // not printed
              const r = t.getBoundingClientRect();
              out.push([t.getAttribute('data-source') || t.caption?.textContent || '?',
                        r.right, t.scrollWidth]);
            }
            return [document.documentElement.clientWidth, out];
            """
        )
    finally:
        driver.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})
        driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": ""})
    assert page <= A4_TEXT_WIDTH_PX
    sources = [name for name, _, _ in tables]
    assert "sound/clusters.tsv" in sources and "sound/symmetry.tsv" in sources
    assert len(tables) >= 12
    for name, right, scroll in tables:
        assert right <= page + 0.5, f"{name} is {right:.0f} px wide on a {page} px page"
        assert scroll <= page + 0.5, f"{name} scrolls to {scroll} px on a {page} px page"
    # the page size of the print style sheet (the first page is enough to read it)
    pdf = driver.execute_cdp_cmd("Page.printToPDF", {"preferCSSPageSize": True, "pageRanges": "1"})
    data = base64.b64decode(pdf["data"])
    assert data[:5] == b"%PDF-"
    # every page of the PDF is A4: MediaBox 595 × 842 pt (ISO 216 in PostScript points)
    boxes = re.findall(rb"/MediaBox\s*\[\s*0 0 ([\d.]+) ([\d.]+)\s*\]", data)
    assert boxes, "no page size in the PDF"
    for width, height in boxes:
        assert abs(float(width) - 595.28) < 1.5 and abs(float(height) - 841.89) < 1.5
