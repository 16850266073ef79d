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


# --------------------------------------------------------------------------------------
# The slice browser inside the report (same browser session as above)
# --------------------------------------------------------------------------------------
#
# Outside references:
# - the per-animal estimates at a voxel against statsmodels WLS of that animal's runs
#   (read from the study's input maps) with weights 1/(σ̂² + s_k²) and a fixed scale of 1:
#   its intercept is the precision-weighted mean and its standard error sqrt(1/Σw)
#   (inverse-variance weighting, Borenstein et al. 2009, Introduction to Meta-Analysis);
# - the two-sided p the pointer shows against scipy.stats.norm.sf of the voxel's z;
# - the stereotaxic position against the cluster table's peak (AP, ML, DV from bregma);
# - the content-security policy's hashes recomputed with hashlib from the page's own
#   <script> and <style> text (W3C CSP Level 3, hash-source).

PEAK_RESULT = "sound"  # the first result: the browser opens on it


def _wait_ready(driver, timeout_s: float = 10.0) -> None:
    from selenium.webdriver.support.ui import WebDriverWait

    WebDriverWait(driver, timeout_s).until(
        lambda d: d.execute_script(
            "var e = document.getElementById('slice-browser');"
            "return e && e.getAttribute('data-ready') === 'true';"
        )
    )


def _text(driver, element_id: str) -> str:
    return driver.find_element("id", element_id).text


def _numbers(text: str) -> list[float]:
    import re

    return [float(v) for v in re.findall(r"[-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?", text)]


def _planted_peak(example_output: Path):
    """A significant cluster's peak (not the map's strongest voxel, where the browser
    opens) as a row of clusters.tsv, and its canonical voxel index."""
    import nibabel as nib
    import numpy as np
    import pandas as pd

    clusters = pd.read_csv(example_output / PEAK_RESULT / "clusters.tsv", sep="\t")
    peaks = clusters[(clusters["peak"] == 1) & clusters["peak_region"].notna()]
    assert len(peaks) >= 2, "the example plants bilateral auditory clusters"
    row = peaks.iloc[1]
    can = nib.as_closest_canonical(nib.load(str(example_output / PEAK_RESULT / "mask.nii.gz")))
    mm = np.array([row["peak_x_mm"], row["peak_y_mm"], row["peak_z_mm"], 1.0])
    ijk = np.rint(np.linalg.solve(can.affine, mm)[:3]).astype(int)
    return row, ijk, can


def _reference_animals(example_output: Path, ijk, can) -> dict[str, tuple[float, float]]:
    """statsmodels WLS of each animal's runs at the voxel (canonical index ``ijk``)."""
    import json

    import nibabel as nib
    import numpy as np
    import pandas as pd
    import statsmodels.api as sm

    summary = json.loads((example_output / "summary.json").read_text())
    table_path = Path(summary["settings"]["study"]["table"])
    runs = pd.read_csv(table_path, sep="\t", dtype=str, keep_default_na=False)
    runs = runs[(runs["condition"] == PEAK_RESULT) & (runs["exclude"].str.lower() != "true")]

    def at_voxel(path: Path) -> float:
        return float(np.asarray(nib.as_closest_canonical(nib.load(str(path))).dataobj)[tuple(ijk)])

    var_run = at_voxel(example_output / PEAK_RESULT / "var_run.nii.gz")
    out = {}
    for animal, rows in runs.groupby("animal"):
        y = np.array([at_voxel(table_path.parent / p) for p in rows["effect"]])
        s2 = np.array([at_voxel(table_path.parent / p) for p in rows["variance"]])
        fit = sm.WLS(y, np.ones((len(y), 1)), weights=1.0 / (var_run + s2)).fit(
            cov_type="fixed scale", cov_kwds={"scale": 1.0}
        )
        out[str(animal)] = (float(fit.params[0]), float(fit.bse[0]))
    assert len(out) == summary["results"][PEAK_RESULT]["animals"]
    return out


def test_slice_browser_names_the_planted_cluster_and_its_animals(driver, report, example_output):
    import base64
    import hashlib
    import json

    import nibabel as nib
    import numpy as np
    from scipy import stats
    from selenium.webdriver.common.action_chains import ActionChains

    from tests.conftest import HOSTILE_NAME

    driver.get(report.as_uri())
    _wait_ready(driver)

    # the policy: nothing but the page's own inline code, named by its hashes
    policy = driver.execute_script(
        "return document.querySelector('meta[http-equiv=\"Content-Security-Policy\"]')"
        ".getAttribute('content');"
    )
    assert "default-src 'none'" in policy and "img-src data:" in policy
    assert "unsafe" not in policy and "http" not in policy
    blocks = driver.execute_script(
        "return Array.from(document.querySelectorAll('script, style'))"
        ".map(e => [e.tagName, e.type || '', e.textContent]);"
    )
    code = [b for b in blocks if b[1] != "application/json"]
    assert {b[0] for b in code} == {"SCRIPT", "STYLE"}
    for tag, _type, text in code:
        digest = base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode()
        directive = "script-src" if tag == "SCRIPT" else "style-src"
        sources = next(d for d in policy.split(";") if d.strip().startswith(directive))
        assert f"'sha256-{digest}'" in sources.split(), (tag, text[:60])
    # names are data, never markup: the hostile region name is in the data block only
    assert len(blocks) - len(code) == 1 and sum(b[0] == "SCRIPT" for b in code) == 1
    regions = driver.execute_script(
        "return JSON.parse(document.getElementById('sb-data').textContent).regions.map(r => r[0]);"
    )
    assert HOSTILE_NAME in regions
    assert "<script>alert" not in report.read_text(encoding="utf-8")

    # the pointer on the peak of a planted cluster
    row, ijk, can = _planted_peak(example_output)
    driver.execute_script(
        "var s = document.getElementById('sb-slice'); s.value = arguments[0];"
        "s.dispatchEvent(new Event('input'));",
        int(ijk[1]),  # coronal plane: the slider moves along y (posterior → anterior)
    )
    canvas = driver.find_element("id", "sb-canvas")
    width, height = canvas.size["width"], canvas.size["height"]
    nx, _ny, nz = can.shape[:3]
    dx = (ijk[0] + 0.5) * width / nx - width / 2
    dy = (nz - 1 - ijk[2] + 0.5) * height / nz - height / 2
    ActionChains(driver).move_to_element_with_offset(canvas, int(dx), int(dy)).perform()
    assert _text(driver, "sb-readout-title") == "Under the pointer"
    assert _text(driver, "sb-region") == f"{row['peak_region']} ({row['peak_region_hemisphere']})"
    ap, ml, dv = _numbers(_text(driver, "sb-pos"))[:3]
    assert (ap, ml, dv) == pytest.approx(
        (row["peak_AP_mm"], row["peak_ML_mm"], row["peak_DV_mm"]), abs=0.006
    )
    z = _numbers(_text(driver, "sb-z"))[0]
    assert z == pytest.approx(row["z"], rel=1e-3)
    z_map = np.asarray(
        nib.as_closest_canonical(nib.load(str(report.parent / PEAK_RESULT / "z.nii.gz"))).dataobj
    )
    p_shown = _numbers(_text(driver, "sb-p"))[0]
    assert p_shown == pytest.approx(2 * stats.norm.sf(abs(z_map[tuple(ijk)])), rel=2e-3)

    # a click shows each animal's estimate there
    ActionChains(driver).move_to_element_with_offset(canvas, int(dx), int(dy)).click().perform()
    rows = driver.execute_script(
        "return Array.from(document.querySelectorAll('#sb-animals-table tbody tr'))"
        ".map(r => Array.from(r.cells).map(c => c.textContent));"
    )
    reference = _reference_animals(example_output, ijk, can)
    assert [r[0] for r in rows] == list(
        json.loads((example_output / "summary.json").read_text())["results"][PEAK_RESULT][
            "animal_maps"
        ]["animals"]
    )
    assert {r[0] for r in rows} == set(reference)
    scale = max(abs(v[0]) for v in reference.values())
    for animal, effect, se, runs, _labels in rows:
        want_effect, want_se = reference[animal]
        # 4 significant digits shown; int16 storage errs by ≤ max|effect|/64000 (loose)
        assert float(effect) == pytest.approx(want_effect, rel=1e-3, abs=scale / 3000)
        assert float(se) == pytest.approx(want_se, rel=2e-3)
        assert int(runs.split(" of ")[0]) >= 1
    assert not driver.find_element("id", "sb-forest").get_attribute("hidden")

    # the threshold control: above the largest |z| nothing is coloured
    driver.execute_script(
        "var s = document.getElementById('sb-threshold'); s.value = s.max;"
        "s.dispatchEvent(new Event('input'));"
    )
    assert _text(driver, "sb-shown").startswith("0 voxels coloured")

    requests = []
    for entry in driver.get_log("performance"):
        message = json.loads(entry["message"])["message"]
        if message.get("method") == "Network.requestWillBeSent":
            requests.append(message["params"]["request"]["url"])
    assert [u for u in requests if not u.startswith(("file:", "data:", "blob:"))] == []
    resources = driver.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name);"
    )
    assert [u for u in resources if not u.startswith(("file:", "data:", "blob:"))] == []
    assert [e for e in driver.get_log("browser") if e["level"] == "SEVERE"] == []


def test_slice_browser_shows_each_runs_value_of_a_small_study(driver, tiny_study, tmp_path):
    # A small study keeps its runs' values (run_effect.nii.gz); the table at the
    # selected voxel (the strongest, where the browser opens) lists them. Reference: the
    # study's own input maps at that voxel, read with nibabel.
    import nibabel as nib
    import numpy as np
    import pandas as pd

    import grouplevel

    out = grouplevel.run_study(tiny_study, tmp_path / "out", permutations=0)
    driver.get((out / "report.html").as_uri())
    _wait_ready(driver)

    def canonical(path: Path) -> np.ndarray:
        return np.asarray(nib.as_closest_canonical(nib.load(str(path))).dataobj)

    mask = canonical(out / "mean" / "mask.nii.gz") > 0
    z = canonical(out / "mean" / "z.nii.gz")
    peak = np.argwhere(mask)[np.argmax(np.abs(z[mask]))]
    runs = pd.read_csv(tiny_study.parent / "runs.tsv", sep="\t")
    rows = driver.execute_script(
        "return Array.from(document.querySelectorAll('#sb-animals-table tbody tr'))"
        ".map(r => Array.from(r.cells).map(c => c.textContent));"
    )
    assert [r[0] for r in rows] == sorted(runs["animal"].unique())
    for animal, _effect, _se, _count, shown in rows:
        mine = runs[runs["animal"] == animal]
        values = [canonical(tiny_study.parent / p)[tuple(peak)] for p in mine["effect"]]
        parts = shown.split("; ")
        assert [p.split(":")[0] for p in parts] == [f"run {r}" for r in mine["run"]]
        got = [float(p.split(": ")[1]) for p in parts]
        # 4 significant digits shown; int16 storage errs by ≤ 1/64000 of the run's max
        assert got == pytest.approx(values, rel=1e-3, abs=1e-3)
    assert "Rings: each run's own value." in _text(driver, "sb-animals-note")
    assert [e for e in driver.get_log("browser") if e["level"] == "SEVERE"] == []


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
