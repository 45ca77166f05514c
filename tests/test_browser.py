"""End to end in a real browser: ``probeplan app`` on a free loopback port, driven by Debian's Chromium.

Screenshots go to ``test-artifacts/`` at the repository root (git-ignored).  Without
``/usr/bin/chromium`` the test is skipped, unless ``PROBEPLAN_REQUIRE_BROWSER=1``
(set in CI), when it fails.  Playwright's own browser download is never used.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = ROOT / "test-artifacts"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
VIEWPORT = {"width": 1400, "height": 1300}
START_TIMEOUT_S = 90.0
UI_TIMEOUT_MS = 60_000
#: The first unmixing in a fresh environment compiles the NNLS kernel (tens of seconds on a busy machine).
UNMIX_TIMEOUT_MS = 240_000


def _need_browser() -> None:
    required = os.environ.get("PROBEPLAN_REQUIRE_BROWSER") == "1"
    problems = []
    if not CHROMIUM.exists():
        problems.append(f"{CHROMIUM} is missing (install Debian's chromium package)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        problems.append("the playwright Python package is missing")
    if problems:
        message = "; ".join(problems)
        if required:
            pytest.fail(f"PROBEPLAN_REQUIRE_BROWSER=1 but {message}")
        pytest.skip(message)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_healthy(proc: subprocess.Popen, port: int, log: Path) -> None:
    url = f"http://127.0.0.1:{port}/_stcore/health"
    deadline = time.monotonic() + START_TIMEOUT_S
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            pytest.fail(f"probeplan app exited with {proc.returncode}:\n{log.read_text(errors='replace')}")
        try:
            with urllib.request.urlopen(url, timeout=2) as r:
                if r.status == 200:
                    return
        except OSError:
            pass
        time.sleep(0.5)
    pytest.fail(f"probeplan app did not answer on {url} within {START_TIMEOUT_S:g} s:\n{log.read_text(errors='replace')}")


def _wait_idle(page) -> None:
    """Wait until the page has applied the last input (Streamlit's running indicator is gone)."""
    page.wait_for_timeout(300)
    page.locator("[data-testid='stStatusWidget']").wait_for(state="hidden", timeout=UI_TIMEOUT_MS)


def _single(locator):
    """The one element ``locator`` finds, once a rerun under way has replaced the old copy of it.

    While Streamlit reruns a script on a busy machine, the element from the last run can stay in
    the page beside the new one for a moment; wait for one, and take the newest if two remain.
    """
    deadline = time.monotonic() + UI_TIMEOUT_MS / 1000.0
    while locator.count() != 1 and time.monotonic() < deadline:
        time.sleep(0.2)
    return locator.last if locator.count() > 1 else locator


def _upload(page, index: int, path: Path, tries: int = 3) -> None:
    """Put ``path`` into the index-th file uploader once the page is idle; retry if a rerun swallowed it."""
    from playwright.sync_api import TimeoutError as PlaywrightTimeout

    for attempt in range(tries):
        _wait_idle(page)
        page.locator("input[type='file']").nth(index).set_input_files(str(path))
        try:
            page.locator("[data-testid='stFileUploader']").nth(index).get_by_text(path.name).wait_for(
                timeout=UI_TIMEOUT_MS // tries)
            return
        except PlaywrightTimeout:
            if attempt == tries - 1:
                raise


def _stop(proc: subprocess.Popen) -> None:
    """Stop the server by its PID (``probeplan app`` replaces itself with Streamlit: one process)."""
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=15)


def _test_stack(folder: Path) -> tuple[Path, Path]:
    """A three-channel stack mixed from two known abundance maps, and its reference spectra (our own test data)."""
    from probeplan.io.stacks import write_stack

    refs = np.array([[0.7, 0.1], [0.2, 0.3], [0.1, 0.6]])
    yy, xx = np.mgrid[0:96, 0:128]
    abundance = np.stack([
        1500.0 * np.exp(-((xx - 40) ** 2 + (yy - 40) ** 2) / (2 * 12.0**2)),
        900.0 * np.exp(-((xx - 85) ** 2 + (yy - 60) ** 2) / (2 * 16.0**2)),
    ]) + 40.0
    stack = np.random.default_rng(7).poisson(np.einsum("ck,kyx->cyx", refs, abundance)).astype(np.uint16)
    stack_path = write_stack(folder / "stack.tif", stack, channel_names=["ch700", "ch780", "ch880"],
                             dtype=np.uint16)
    ref_path = folder / "refs.csv"
    ref_path.write_text("channel,dot A,dot B\nch700,0.7,0.1\nch780,0.2,0.3\nch880,0.1,0.6\n", encoding="utf-8")
    return stack_path, ref_path


def _draw_region(page, name: str, start: tuple[float, float], end: tuple[float, float]) -> None:
    """Drag a box on the region chart (fractions of its plot area), name it and add it; wait for it in the list."""
    _wait_idle(page)
    chart = page.locator("[data-testid='stPlotlyChart']").first
    chart.scroll_into_view_if_needed()
    area = chart.locator("rect.nsewdrag").first
    area.wait_for(timeout=UI_TIMEOUT_MS)
    box = area.bounding_box()
    x0, y0 = box["x"] + start[0] * box["width"], box["y"] + start[1] * box["height"]
    x1, y1 = box["x"] + end[0] * box["width"], box["y"] + end[1] * box["height"]
    page.mouse.move(x0, y0)
    page.mouse.down()
    for i in range(1, 11):
        page.mouse.move(x0 + (x1 - x0) * i / 10, y0 + (y1 - y0) * i / 10)
    page.mouse.up()
    _wait_idle(page)
    for _ in range(3):  # a rerun still under way can replace the field with an empty one: type again
        field = _single(page.get_by_label("region name", exact=True))
        field.fill(name)
        field.press("Enter")
        _wait_idle(page)
        if _single(page.get_by_label("region name", exact=True)).input_value() == name:
            break
    _single(page.get_by_role("button", name="Add region")).click()
    _wait_idle(page)
    page.get_by_text(f"{name} (", exact=False).first.wait_for(timeout=UI_TIMEOUT_MS)


def _study_csv(folder: Path) -> Path:
    """A small study's measurements table: two groups of three animals at three times (our own test data)."""
    rng = np.random.default_rng(5)
    lines = ["animal,group,time_h,roi,component,mean,se,tbr"]
    for group, level in (("vehicle", 1.4), ("treated", 2.2)):
        for a in range(3):
            for t in (1, 24, 48):
                tbr = level * (1 + 0.1 * rng.standard_normal()) * (1 - t / 200)
                lines.append(f"{group}-{a + 1},{group},{t},tumour,dot A,{120 * tbr:.2f},3.0,{tbr:.3f}")
    path = folder / "measurements.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _pdf_pages_to_png(pdf_path: Path) -> None:
    """Render the downloaded report's pages to PNG beside it, for a person to look at (when pypdfium2 is there)."""
    try:
        import pypdfium2 as pdfium
    except ImportError:
        return
    pdf = pdfium.PdfDocument(str(pdf_path))
    for i in range(min(len(pdf), 4)):
        pdf[i].render(scale=1.2).to_pil().save(str(pdf_path.with_name(f"browser-report-page-{i + 1}.png")))


def _plot_src(page) -> str:
    img = page.locator("[data-testid='stImage'] img").first
    img.wait_for(timeout=UI_TIMEOUT_MS)
    return img.get_attribute("src") or ""


@pytest.mark.browser
def test_page_in_chromium(tmp_path):
    _need_browser()
    from playwright.sync_api import sync_playwright

    ARTIFACTS.mkdir(exist_ok=True)
    port = _free_port()
    log = tmp_path / "app.log"
    env = dict(os.environ, STREAMLIT_BROWSER_GATHER_USAGE_STATS="false", MPLBACKEND="Agg")
    with open(log, "wb") as out:
        proc = subprocess.Popen([sys.executable, "-m", "probeplan", "app", "--port", str(port)], cwd=tmp_path,
                                stdout=out, stderr=subprocess.STDOUT, env=env)
    try:
        _wait_healthy(proc, port, log)
        stack_path, ref_path = _test_stack(tmp_path)
        study_csv = _study_csv(tmp_path)
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            page = browser.new_page(viewport=VIEWPORT)
            try:
                page.goto(f"http://127.0.0.1:{port}/", timeout=UI_TIMEOUT_MS)
                page.get_by_text("Depth at which each probe is lost").wait_for(timeout=UI_TIMEOUT_MS)
                page.get_by_text("For research use only").first.wait_for(timeout=UI_TIMEOUT_MS)
                before = _plot_src(page)
                page.screenshot(path=str(ARTIFACTS / "browser-1-depth.png"))

                # move a control: the first probe's emission peak 700 -> 720 nm; the plot must change
                _wait_idle(page)
                peak = _single(page.get_by_label("probe 1 emission peak (nm)", exact=True))
                peak.fill("720")
                peak.press("Enter")
                deadline = time.monotonic() + UI_TIMEOUT_MS / 1000
                after = before
                while after == before and time.monotonic() < deadline:
                    time.sleep(0.5)
                    after = _plot_src(page)
                assert after != before, "the depth plot did not change after the peak was moved"
                page.get_by_text("CdTe 720 nm").first.wait_for(state="attached", timeout=UI_TIMEOUT_MS)
                page.screenshot(path=str(ARTIFACTS / "browser-2-depth-after-change.png"))

                page.get_by_text("Channels: crosstalk and design").click()
                page.get_by_text("Separability at the target depth").wait_for(timeout=UI_TIMEOUT_MS)
                page.get_by_text("condition number").first.wait_for(timeout=UI_TIMEOUT_MS)
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-3-channels.png"))

                # upload a stack and its reference spectra, unmix, see the abundance maps
                page.get_by_text("Unmix: abundance maps and regions").first.click()
                page.get_by_text("reference spectra (CSV)").wait_for(timeout=UI_TIMEOUT_MS)
                _upload(page, 0, stack_path)
                _upload(page, 1, ref_path)
                _wait_idle(page)
                page.get_by_role("button", name="Unmix", exact=True).click()
                page.get_by_text("Results for stack.tif").wait_for(timeout=UNMIX_TIMEOUT_MS)
                maps = page.locator("[data-testid='stImage'] img")
                maps.first.wait_for(timeout=UI_TIMEOUT_MS)
                assert (maps.first.get_attribute("src") or "") != ""
                assert page.locator("[data-testid='stException']").count() == 0
                maps.first.scroll_into_view_if_needed()
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-4-unmix-maps.png"))
                page.get_by_text("composite", exact=True).click()
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-5-unmix-composite.png"), full_page=True)

                # draw two regions on the map: a box around dot A (centre x 40, y 40 of 128 x 96) and one in a
                # corner far from both dots, then measure them
                _draw_region(page, "dot A", (0.20, 0.25), (0.43, 0.58))
                _draw_region(page, "background", (0.86, 0.04), (0.98, 0.18))
                _single(page.get_by_role("button", name="Measure the regions")).click()
                page.get_by_text("Mean ± SD of the abundance in each region").wait_for(timeout=UI_TIMEOUT_MS)
                _wait_idle(page)
                assert page.locator("[data-testid='stException']").count() == 0
                page.locator("[data-testid='stPlotlyChart']").first.scroll_into_view_if_needed()
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-6-unmix-regions.png"))
                page.get_by_text("Mean ± SD of the abundance in each region").scroll_into_view_if_needed()
                time.sleep(0.5)
                page.screenshot(path=str(ARTIFACTS / "browser-7-unmix-roi-table.png"), full_page=True)
                # the drawn regions saved as the ROI file read back by the library (the one format)
                from probeplan.unmixing.roifile import read_roi_file

                with page.expect_download(timeout=UI_TIMEOUT_MS) as download:
                    _single(page.get_by_role("button", name="Save the regions (ROI file)")).click()
                roi_path = ARTIFACTS / "browser-rois.json"
                download.value.save_as(str(roi_path))
                saved = read_roi_file(roi_path, image_size=(128, 96))
                assert [r.name for r in saved.regions] == ["dot A", "background"]
                assert saved.background == "background"

                # the study view: a study's measurements over time
                page.get_by_text("Study: animals and groups over time").first.click()
                page.get_by_text("upload a study's result tables").click()
                page.get_by_text("measurements (CSV)").wait_for(timeout=UI_TIMEOUT_MS)
                _upload(page, 0, study_csv)
                page.get_by_text("6 animals").wait_for(timeout=UI_TIMEOUT_MS)
                _wait_idle(page)
                # the figure is drawn after the summary line: wait for it rather than count at once
                page.locator("[data-testid='stImage'] img").first.wait_for(timeout=UI_TIMEOUT_MS)
                assert page.locator("[data-testid='stException']").count() == 0
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-8-study.png"))

                # the plan view: check the demo plan, download the report as PDF
                page.get_by_text("Plan: rules and the protocol report").first.click()
                _single(page.get_by_role("button", name="Check the plan")).click()
                page.get_by_text("Rule by rule").wait_for(timeout=UI_TIMEOUT_MS)
                time.sleep(1.0)
                page.screenshot(path=str(ARTIFACTS / "browser-9-plan.png"))
                assert page.locator("[data-testid='stException']").count() == 0
                with page.expect_download(timeout=UI_TIMEOUT_MS) as download:
                    _single(page.get_by_role("button", name="Report (PDF)")).click()
                pdf_path = ARTIFACTS / "browser-report.pdf"
                download.value.save_as(str(pdf_path))
                assert pdf_path.read_bytes()[:5] == b"%PDF-"
                _pdf_pages_to_png(pdf_path)
            except Exception:
                page.screenshot(path=str(ARTIFACTS / "browser-failure.png"))
                raise
            finally:
                browser.close()
    finally:
        _stop(proc)
