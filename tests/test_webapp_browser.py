"""End to end in real headless Chromium (Playwright's Python API driving Debian's /usr/bin/chromium) against
the app under waitress on 127.0.0.1.

A coordinator creates a study through the forms (layout upload, images of two panels with their conversion
functions, one reader), opens it; the reader passes the display check and reads every trial with mouse and
keyboard (window/level by dragging, site by click or number key, Enter or the Confirm button); the coordinator
exports the CSV, which must hold exactly those responses, and opens the analysis page. Screenshots of the
reading screen and the analysis page are kept in tests/artifacts/browser/ (ignored by git).
"""

from __future__ import annotations

import datetime as _dt
import json
import shutil
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from webapp_helpers import MINI, PASSWORDS, accounts_app

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
ARTIFACTS = Path(__file__).parent / "artifacts" / "browser"


def _darkest_site(gray: np.ndarray, sites) -> int:
    """What a careful reader does on the screen: the discs are darker; compare disc-sized neighbourhoods of the
    candidate sites at a few scales, in units of the displayed noise."""
    noise = max(1.4826 * np.median(np.abs(np.diff(gray, axis=1))) / np.sqrt(2), 1e-6)
    yy, xx = np.mgrid[: gray.shape[0], : gray.shape[1]]
    best = np.full(len(sites), -np.inf)
    for radius in (0.75, 1.5, 2.5, 4.0, 6.0):
        means, counts = [], []
        for r, c in sites:
            m = (yy - r) ** 2 + (xx - c) ** 2 <= radius**2
            means.append(gray[m].mean())
            counts.append(m.sum())
        z = (np.median(means) - np.array(means)) / (noise / np.sqrt(np.array(counts)))
        best = np.maximum(best, z)
    return int(np.argmax(best))


_CANVAS_GRAY = """() => {
  const c = document.getElementById('pixels');
  const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
  const out = new Array(c.width * c.height);
  for (let i = 0; i < out.length; i++) out[i] = d[4 * i];
  return {w: c.width, h: c.height, px: out};
}"""


def _screen(page):
    g = page.evaluate(_CANVAS_GRAY)
    return np.asarray(g["px"], float).reshape(g["h"], g["w"])


@pytest.fixture
def server(tmp_path):
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} not found: install Debian's chromium (.ci/run does) for the browser tests")
    pytest.importorskip("playwright.sync_api", reason="playwright (test extra) not installed")
    from scorer.commands.serve import make_server

    app = accounts_app(tmp_path, ("coordinator", "reader1"), ANALYSIS_N_BOOT=20)
    srv = make_server(app, host="127.0.0.1", port=0, threads=4)
    th = threading.Thread(target=srv.run, daemon=True)
    th.start()
    yield f"http://127.0.0.1:{srv.effective_port}", app
    srv.close()
    th.join(timeout=5)


def _images(tmp_path):
    from scorer.detector import detector_model, simulate
    from scorer.workflow import write_simulated
    from scorer.images import save_conversion
    from scorer.phantom import load_layout

    layout = load_layout(MINI)
    out = {}
    for k, det in enumerate(("direct", "indirect")):
        model = detector_model(det)
        sim = simulate(model, "phantom", 100.0, np.random.default_rng(40 + k), small=True, layout=layout)
        path = write_simulated(sim, tmp_path / "upload" / det, f"{det}-01", _dt.datetime(2026, 11, 30, 9, k))
        conv = tmp_path / "upload" / det / f"{det}-conversion.toml"
        save_conversion(model.conversion_function(), conv)
        out[det] = (path, conv)
    return out


def _login(page, base, user):
    page.goto(f"{base}/login")
    page.fill("#username", user)
    page.fill("#password", PASSWORDS[user])
    page.click("#sign-in")
    page.wait_for_load_state()


def test_coordinator_and_reader_in_chromium(server, tmp_path):
    from playwright.sync_api import sync_playwright

    base, app = server
    files = _images(tmp_path)
    if ARTIFACTS.exists():
        shutil.rmtree(ARTIFACTS)
    ARTIFACTS.mkdir(parents=True)
    problems = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            # ---------------------------------------------------------------- coordinator sets the study up
            coord = browser.new_context(viewport={"width": 1280, "height": 900}, accept_downloads=True)
            cp = coord.new_page()
            cp.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            _login(cp, base, "coordinator")
            cp.goto(f"{base}/coordinator/studies/new")
            cp.fill("#name", "Room 2 vs room 3, December (invented)")
            cp.set_input_files("#layout_file", str(MINI))
            cp.fill("#trials_per_reader", "8")
            cp.fill("#seed", "3")
            cp.fill("#repeat_percent", "25")
            cp.fill("#n_practice", "2")
            cp.check("#reader-reader1")
            cp.click("#create-study")
            cp.wait_for_selector("#study-status")
            study_url = cp.url
            for det, (img, conv) in files.items():
                cp.set_input_files("#images", str(img))
                cp.fill("#detector", f"HSX panel {det}")
                cp.set_input_files("#conversion_file", str(conv))
                cp.click("#upload-images")
                cp.wait_for_selector("#image-table")
            assert cp.locator("#image-table tbody tr").count() == 2
            cp.click("#open-study")  # a background job: its page follows the progress, then links to the study
            cp.wait_for_selector("#job-progress")
            cp.wait_for_selector("#job-result", timeout=120_000)
            cp.screenshot(path=str(ARTIFACTS / "open-study-job.png"))
            cp.click("#job-result")
            cp.wait_for_selector("#progress")
            assert cp.inner_text("#study-status") == "open"

            # ---------------------------------------------------------------- reader: display check
            rctx = browser.new_context(viewport={"width": 1280, "height": 900})
            rp = rctx.new_page()
            rp.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            _login(rp, base, "reader1")
            rp.click("#my-studies a.button")
            rp.wait_for_selector("#check[data-ready]")
            sites = json.loads(rp.get_attribute("#check", "data-sites"))
            gray = _screen(rp)
            pick = int(np.argmax([gray[r - 4 : r + 5, c - 4 : c + 5].mean() for r, c in sites]))
            box = rp.locator("#pixels").bounding_box()
            scale = box["width"] / gray.shape[1]
            rp.mouse.click(box["x"] + (sites[pick][1] + 0.5) * scale, box["y"] + (sites[pick][0] + 0.5) * scale)
            rp.fill("#distance", "600")
            rp.click("#confirm")
            rp.wait_for_url("**/reading/studies/*")

            # ---------------------------------------------------------------- reader: every trial
            chosen, windows_shown, n = [], [], 0
            while True:
                rp.wait_for_function(
                    "() => document.getElementById('reader').dataset.ready"
                    " || !document.getElementById('done').classList.contains('hidden')"
                )
                if rp.locator("#done").is_visible():
                    break
                practice = rp.locator("#practice-tag").is_visible()
                sites = json.loads(rp.get_attribute("#reader", "data-sites"))
                box = rp.locator("#pixels").bounding_box()
                gray = _screen(rp)
                site = _darkest_site(gray, sites)
                scale = box["width"] / gray.shape[1]
                if n == 5:  # drag: wider window, and press keys for invert on/off and zoom in/out
                    rp.mouse.move(box["x"] + 5, box["y"] + 5)
                    rp.mouse.down()
                    rp.mouse.move(box["x"] + 60, box["y"] + 25, steps=6)
                    rp.mouse.up()
                    for key in ("i", "i", "+", "-", "ArrowUp"):
                        rp.keyboard.press(key)
                if n == 3:
                    rp.screenshot(path=str(ARTIFACTS / "reading-screen.png"))
                if n % 2:  # mouse: click the site, then the Confirm button
                    rp.mouse.click(box["x"] + (sites[site][1] + 0.5) * scale, box["y"] + (sites[site][0] + 0.5) * scale)
                    assert rp.inner_text("#choice") == str(site + 1)
                    windows_shown.append(float(rp.inner_text("#wl-window")))
                    rp.click("#confirm")
                else:  # keyboard: the site's number, then Enter
                    rp.keyboard.press(str(site + 1))
                    assert rp.inner_text("#choice") == str(site + 1)
                    windows_shown.append(float(rp.inner_text("#wl-window")))
                    rp.keyboard.press("Enter")
                if not practice:
                    chosen.append(site)
                n += 1
                assert n < 40, "the reading never ended"
            rp.screenshot(path=str(ARTIFACTS / "reading-done.png"))
            assert n == 2 + 8 + 2

            # ---------------------------------------------------------------- coordinator: export and analysis
            cp.goto(study_url)
            assert "10 / 10" in cp.inner_text("#progress")
            with cp.expect_download() as dl:
                cp.click("#export")
            csv_path = tmp_path / "export.csv"
            dl.value.save_as(csv_path)
            df = pd.read_csv(csv_path)
            assert df["chosen_site"].tolist() == chosen  # exactly the responses given, in order
            assert set(df["reader"]) == {"reader1"} and set(df["detector"]) == {
                "HSX panel direct",
                "HSX panel indirect",
            }
            assert (df["response_ms"] > 0).all() and df["window"].nunique() >= 2  # the drag changed W/L
            cp.click("#analysis-link")
            cp.click("#run-analysis")
            cp.wait_for_selector("#job-result", timeout=120_000)
            cp.click("#job-result")
            cp.locator("#report").get_by_text("Human readers vs model observer").first.wait_for()
            figures = cp.locator("#report img.figure")
            assert figures.count() >= 2 and all(  # the figures drew (an image that failed has no natural width)
                figures.nth(i).evaluate("img => img.complete && img.naturalWidth > 0") for i in range(figures.count())
            )
            cp.screenshot(path=str(ARTIFACTS / "analysis-page.png"), full_page=True)
            href = cp.get_attribute("#report-link", "href")
            stored = cp.request.get(href if href.startswith("http") else base + href).text()
            alone = coord.new_page()  # the downloaded file, opened on its own (no server, no app CSP)
            alone.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            alone.set_content(stored)
            alone.screenshot(path=str(ARTIFACTS / "analysis-report.png"), full_page=True)
        finally:
            browser.close()
    print(f"screenshots in {ARTIFACTS}")
    assert not [m for m in problems if "Content Security Policy" in m or "Refused" in m], problems
    assert not problems, problems
