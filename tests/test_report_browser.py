"""Open the HTML report in a real browser (headless Chromium driven by Playwright).

Checks: no console errors, every image decoded (naturalWidth > 0), no request
leaves the file, and the page fits a phone's width without sideways scrolling of
the page itself. Screenshots go to the test's temporary folder.
"""

from __future__ import annotations

import shutil

import pytest

from report_support import PlantedExecutor, make_results

pytestmark = pytest.mark.browser

CHROMIUM_CANDIDATES = ("/usr/bin/chromium", "/usr/bin/chromium-browser")


def _chromium():
    for c in CHROMIUM_CANDIDATES:
        if shutil.which(c):
            return c
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def report_html(tmp_path_factory):
    from benchharness.report import write_reports

    tmp = tmp_path_factory.mktemp("browser")
    folder = make_results(tmp, executor=PlantedExecutor(timeout_runs={3}))
    html, _md = write_reports(folder)
    return html


def test_report_loads_cleanly_in_chromium(report_html, tmp_path):
    exe = _chromium()
    if exe is None:
        pytest.skip("no Chromium executable found (Debian package 'chromium'; "
                    ".ci/run installs it with apt-get)")
    sync_api = pytest.importorskip("playwright.sync_api",
                                   reason="the playwright Python package is not installed")
    errors, requests = [], []
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=exe, headless=True, args=[
            "--no-sandbox", "--disable-gpu", "--disable-background-networking"])
        try:
            for name, width in (("laptop", 1280), ("phone", 390)):
                page = browser.new_page(viewport={"width": width, "height": 900})
                page.on("console", lambda m: errors.append(m.text) if m.type == "error"
                        else None)
                page.on("pageerror", lambda e: errors.append(str(e)))
                page.on("request", lambda r: requests.append(r.url))
                page.goto(report_html.as_uri(), wait_until="load")
                widths = page.evaluate(
                    "Array.from(document.images).map(i => [i.complete, i.naturalWidth])")
                assert len(widths) >= 6
                assert all(done and w > 0 for done, w in widths), widths
                overflow = page.evaluate(
                    "document.documentElement.scrollWidth - document.documentElement.clientWidth")
                assert overflow <= 1, f"{name}: page wider than the viewport by {overflow}px"
                shot = tmp_path / f"report-{name}.png"
                page.screenshot(path=str(shot), full_page=True)
                assert shot.stat().st_size > 10_000
                page.close()
        finally:
            browser.close()
    assert errors == []
    outside = [u for u in requests if not (u.startswith("file:") or u.startswith("data:"))]
    assert outside == []
