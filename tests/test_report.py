"""report.html: self-contained, rendered by a real browser (headless Chromium through selenium)."""

from __future__ import annotations

import base64
import dataclasses
import os
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import pytest

from phantometry import compare as cmp
from phantometry.measure import measure
from phantometry.report import esc, format_value, measure_report_html
from phantometry.results import CAUTION
from phantometry.synth import write_synthetic_family

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")


# ----------------------------------------------------------------------------- browser
def _have_browser() -> bool:
    return CHROMIUM.exists() and CHROMEDRIVER.exists()


@pytest.fixture(scope="module")
def browser():
    if not _have_browser():
        if os.environ.get("CI") == "true":
            pytest.fail("CI: /usr/bin/chromium or /usr/bin/chromedriver is missing; .ci/run must run .ci/install-chromium.sh")
        script = ROOT / ".ci" / "install-chromium.sh"
        if script.exists():
            subprocess.run(["bash", str(script)], capture_output=True, timeout=900, check=False)
        if not _have_browser():
            pytest.skip("headless Chromium (Debian packages chromium, chromium-driver) is not installed and could not be installed")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="phantometry-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-background-networking",
                "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}"):
        options.add_argument(arg)
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _open(driver, path: Path) -> dict:
    """Load a report and collect what the checks need, from the rendered page."""
    driver.get(path.resolve().as_uri())
    return driver.execute_script(
        """
        const cells = sel => Array.from(document.querySelectorAll(sel)).map(c => {
            const s = getComputedStyle(c);
            return {text: c.innerText, color: s.color, background: s.backgroundColor, weight: s.fontWeight};
        });
        return {
          images: Array.from(document.images).map(i => ({complete: i.complete, width: i.naturalWidth, height: i.naturalHeight,
                                                         src: i.getAttribute('src').slice(0, 22)})),
          tables: Array.from(document.querySelectorAll('table')).map(t => ({id: t.id, rows: t.tBodies[0] ? t.tBodies[0].rows.length : 0})),
          scripts: document.scripts.length,
          resources: performance.getEntriesByType('resource').map(e => e.name),
          caution: (document.getElementById('caution') || {innerText: ''}).innerText,
          text: document.body.innerText,
          pass: cells('td.v-pass'), fail: cells('td.v-fail'),
        };
        """
    )


def _check_page(page: dict, min_images: int, tables: list[str]) -> None:
    assert len(page["images"]) >= min_images
    for img in page["images"]:
        assert img["complete"] and img["width"] > 0 and img["height"] > 0, img
        assert img["src"] == "data:image/png;base64,"  # embedded, nothing fetched
    ids = {t["id"]: t["rows"] for t in page["tables"]}
    for t in tables:
        assert ids.get(t, 0) > 0, (t, ids)
    assert page["resources"] == []  # self-contained: no external resource was requested
    assert page["scripts"] == 0
    assert CAUTION.split(".")[0] in page["caution"]


def _rgb(text: str) -> tuple[float, float, float]:
    vals = [float(v) for v in re.findall(r"[\d.]+", text)[:3]]
    return vals[0], vals[1], vals[2]


def _contrast_ratio(fg: str, bg: str) -> float:
    # WCAG 2.1 relative luminance and contrast ratio (W3C Web Content Accessibility
    # Guidelines 2.1, definitions "relative luminance" and "contrast ratio").
    def lum(rgb):
        def ch(c):
            c = c / 255.0
            return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4
        r, g, b = (ch(c) for c in rgb)
        return 0.2126 * r + 0.7152 * g + 0.0722 * b

    l1, l2 = sorted((lum(_rgb(fg)), lum(_rgb(bg))), reverse=True)
    return (l1 + 0.05) / (l2 + 0.05)


# ----------------------------------------------------------------------------- reports
@pytest.fixture(scope="module")
def measure_report(demo_scan, tmp_path_factory):
    out = tmp_path_factory.mktemp("report") / "results"
    analysis = measure(demo_scan["image"], fill=demo_scan["fill"], out=out, report=True)
    return {"analysis": analysis, "path": out / "report.html"}


@pytest.fixture(scope="module")
def verdict_report(measure_report, tmp_path_factory):
    """The same analysis with invented band verdicts (pass and fail) on the RC mean rows."""
    a = measure_report["analysis"]
    rows = []
    for r in a.rows:
        if r.metric == "rc_mean":
            verdict = "pass" if r.value >= 0.6 else "fail"
            r = dataclasses.replace(r, band="invented-band", band_low=0.6, band_high=1.1, verdict=verdict, uncertainty=0.012)
        rows.append(r)
    path = tmp_path_factory.mktemp("verdicts") / "report.html"
    path.write_text(measure_report_html(dataclasses.replace(a, rows=rows)), encoding="utf-8")
    return {"path": path, "rows": rows}


@pytest.fixture(scope="module")
def compare_report(tmp_path_factory):
    root = tmp_path_factory.mktemp("cmp_report")
    fam = write_synthetic_family(root / "in", [{"fwhm_mm": 5.0, "noise_cv": 0.15}, {"fwhm_mm": 11.0, "noise_cv": 0.06}], voxel_mm=4.0)
    labels = root / "labels.csv"
    labels.write_text("series,label\n2,<script>alert(1)</script> smooth\n", encoding="utf-8")

    # shipped EANM FDG v2.0 bands: the sharp setting recovers too much, the smooth one too little
    result = cmp.compare(root / "in", fill=fam["fill"], out=root / "out", bands=["eanm-fdg-2015"], labels=labels, workers=1, report=True)
    return {"result": result, "path": root / "out" / "report.html"}


# ----------------------------------------------------------------------------- checks
def test_measure_report_renders_in_chromium(browser, measure_report):
    page = _open(browser, measure_report["path"])
    _check_page(page, min_images=2, tables=["spheres", "measurements", "fits"])  # overlay + RC chart
    assert "No acceptance bands were applied" in page["text"]
    analysis = measure_report["analysis"]
    assert analysis.volume.series_uid in page["text"]
    from phantometry import __version__

    assert f"phantometry {__version__}" in page["text"]


def test_verdicts_read_without_colour(browser, verdict_report):
    page = _open(browser, verdict_report["path"])
    _check_page(page, min_images=2, tables=["spheres", "measurements"])
    n_fail = sum(1 for r in verdict_report["rows"] if r.verdict == "fail")
    n_pass = sum(1 for r in verdict_report["rows"] if r.verdict == "pass")
    assert n_fail and n_pass
    fails = [c for c in page["fail"] if "FAIL" in c["text"]]
    passes = [c for c in page["pass"] if "pass" in c["text"]]
    assert len(fails) >= n_fail and len(passes) >= n_pass
    # the verdict is also in the words and symbols (greyscale print, colour blindness) ...
    assert all("\u2717" in c["text"] for c in fails) and all("\u2713" in c["text"] for c in passes)
    # ... and a failure is bold; both stay readable: text contrast >= 4.5:1 (WCAG 2.1 AA)
    assert all(int(c["weight"]) >= 600 for c in fails)
    for c in fails[:1] + passes[:1]:
        assert _contrast_ratio(c["color"], c["background"]) >= 4.5
    assert fails[0]["background"] != passes[0]["background"]
    assert "\u00b1 0.012" in page["text"]  # value +- standard uncertainty
    assert "FAIL" in page["text"].split("Verdict", 1)[1][:200]  # the overall verdict line


def test_report_prints(browser, verdict_report):
    browser.get(verdict_report["path"].resolve().as_uri())
    pdf = base64.b64decode(browser.print_page())
    assert pdf[:5] == b"%PDF-" and len(pdf) > 50_000


def test_compare_report_renders_in_chromium(browser, compare_report):
    page = _open(browser, compare_report["path"])
    # two charts + one overlay per measured series
    _check_page(page, min_images=4, tables=["ranking", "matrix-rc-mean", "per-setting"])
    assert "<script>alert(1)</script> smooth" in page["text"]  # shown as text, never run
    result = compare_report["result"]
    assert all(e.meets_all_bands is False for e in result.ranking)
    assert sum("FAILS" in c["text"] for c in page["fail"]) == len(result.ranking)
    # every failing value in the matrices is marked by a cross, every passing one by a tick
    n_fail = sum(1 for o in result.succeeded for r in o.rows if r.verdict == "fail" and r.metric in ("rc_mean", "rc_max"))
    assert sum(1 for c in page["fail"] if "\u2717" in c["text"] and "FAILS" not in c["text"]) == n_fail
    assert page["pass"] and all("\u2713" in c["text"] for c in page["pass"])


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs = []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k in ("src", "href") and v is not None:
                self.refs.append((tag, v))


def test_report_files_have_no_external_references(measure_report, compare_report):
    for path in (measure_report["path"], compare_report["path"]):
        text = path.read_text(encoding="utf-8")
        p = _Collect()
        p.feed(text)
        assert p.refs and all(v.startswith("data:image/png;base64,") for _, v in p.refs), p.refs[:3]
        assert "<script" not in text.lower().replace("&lt;script", "")
        assert "@media print" in text


def test_value_formatting_and_escaping():
    assert format_value(0.81234, "1", 0.01449) == "0.812 &plusmn; 0.014"
    assert format_value(5300.4, "Bq/mL") == "5300"
    assert format_value(float("nan"), "%") == "&ndash;"
    assert format_value(None, "%") == "&ndash;"
    assert esc('<a href="x">&') == "&lt;a href=&quot;x&quot;&gt;&amp;"
