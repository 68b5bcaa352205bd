"""End to end in real headless Chromium (Playwright's Python API driving Debian's /usr/bin/chromium) against
the app under waitress on 127.0.0.1.

1. A coordinator creates a study through the forms (layout upload, the design: diameters, wanted CI, rule;
   images of two panels with their conversion functions and a practice image, three readers), opens it; a
   reader passes the display check and reads every trial with mouse and keyboard (window/level by dragging,
   tile by click or number key, Enter or the Confirm button); the coordinator exports the CSV, which must hold
   exactly those responses, and opens the analysis page.
2. A reader does practice, then scored trials in the browser while every response the page receives is kept:
   none differs by detector in anything but pixels; the rest of the study (over 200 trials) is answered through
   the API, and the true tile's screen position is spread evenly over the M places (Pearson's chi-square,
   scipy.stats.chisquare) with no practice region ever scored.
Screenshots are kept in tests/artifacts/browser/ (ignored by git).
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import shutil
import socket
import subprocess
import sys
import threading
import time
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


def _darkest_tile(gray: np.ndarray, boxes) -> int:
    """What a careful reader does on the screen: the disc is darker; compare disc-sized neighbourhoods of the
    tiles' centres at a few scales, in units of the displayed noise."""
    x, y, w, h = boxes[0]
    tiles = np.stack([gray[b[1] : b[1] + h, b[0] : b[0] + w] for b in boxes])  # (M, h, w) as displayed
    return _darkest_site(np.hstack(list(tiles)), [((h - 1) / 2, k * w + (w - 1) / 2) for k in range(len(boxes))])


def _darkest_site(gray: np.ndarray, sites) -> int:
    """Compare disc-sized neighbourhoods of the given points at a few scales, in units of the displayed noise."""
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

    app = accounts_app(tmp_path, ("coordinator", "reader1", "reader2", "reader3"), ANALYSIS_N_BOOT=20)
    srv = make_server(app, host="127.0.0.1", port=0, threads=4)
    th = threading.Thread(target=srv.run, daemon=True)
    th.start()
    yield f"http://127.0.0.1:{srv.effective_port}", app
    srv.close()
    th.join(timeout=5)


def _images(tmp_path):
    from scorer.detector import detector_model, simulate
    from scorer.images import save_conversion
    from scorer.phantom import load_layout
    from scorer.workflow import write_simulated

    layout = load_layout(MINI)
    out = {}
    for k, det in enumerate(("direct", "indirect")):
        model = detector_model(det)
        paths = []
        for i in range(3):  # the third is the practice image
            sim = simulate(model, "phantom", 100.0, np.random.default_rng(40 + 2 * k + i), small=True, layout=layout)
            stamp = _dt.datetime(2026, 11, 30, 9, 2 * k + i)
            paths.append(write_simulated(sim, tmp_path / "upload" / det, f"{det}-{i + 1:02d}", stamp))
        conv = tmp_path / "upload" / det / f"{det}-conversion.toml"
        save_conversion(model.conversion_function(), conv)
        out[det] = (paths, conv)
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
            cp.fill("#diameters", "0.25, 1")
            cp.fill("#half_width_ln", "2")
            cp.select_option("#placement", "psi")
            cp.fill("#seed", "3")
            cp.fill("#repeat_percent", "25")
            cp.fill("#n_practice", "2")
            for r in ("reader1", "reader2", "reader3"):
                cp.check(f"#reader-{r}")
            cp.click("#create-study")
            cp.wait_for_selector("#study-status")
            study_url = cp.url
            for det, (imgs, conv) in files.items():
                for img, practice in zip(imgs, (False, False, True)):
                    cp.set_input_files("#images", str(img))
                    cp.fill("#detector", f"HSX panel {det}")
                    cp.set_input_files("#conversion_file", str(conv))
                    if practice:
                        cp.check("#practice")
                    cp.click("#upload-images")
                    cp.wait_for_selector("#image-table")
            assert cp.locator("#image-table tbody tr").count() == 6
            cp.click("#open-study")  # a background job: its page follows the progress, then links to the study
            cp.wait_for_selector("#job-progress")
            cp.wait_for_selector("#job-result", timeout=120_000)
            cp.screenshot(path=str(ARTIFACTS / "open-study-job.png"))
            cp.click("#job-result")
            cp.wait_for_selector("#progress")
            assert cp.inner_text("#study-status") == "open"
            assert "trials per reader at 0.25 mm" in cp.inner_text("#plan")

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
            chosen, windows_shown, n, n_practice = [], [], 0, 0
            while True:
                rp.wait_for_function(
                    "() => document.getElementById('reader').dataset.ready"
                    " || !document.getElementById('done').classList.contains('hidden')"
                )
                if rp.locator("#done").is_visible():
                    break
                practice = rp.locator("#practice-tag").is_visible()
                boxes = json.loads(rp.get_attribute("#reader", "data-boxes"))
                box = rp.locator("#pixels").bounding_box()
                gray = _screen(rp)
                site = _darkest_tile(gray, boxes)
                scale = box["width"] / gray.shape[1]
                centres = [(y + h / 2, x + w / 2) for x, y, w, h in boxes]
                if n == 5:  # drag: wider window, and press keys for invert on/off and zoom in/out
                    rp.mouse.move(box["x"] + 5, box["y"] + 5)
                    rp.mouse.down()
                    rp.mouse.move(box["x"] + 60, box["y"] + 25, steps=6)
                    rp.mouse.up()
                    for key in ("i", "i", "+", "-", "ArrowUp"):
                        rp.keyboard.press(key)
                if n == 3:
                    rp.screenshot(path=str(ARTIFACTS / "reading-screen.png"))
                if n % 2:  # mouse: click the tile, then the Confirm button
                    rp.mouse.click(box["x"] + centres[site][1] * scale, box["y"] + centres[site][0] * scale)
                    assert rp.inner_text("#choice") == str(site + 1)
                    windows_shown.append(rp.inner_text("#wl-window"))
                    rp.click("#confirm")
                else:  # keyboard: the site's number, then Enter
                    rp.keyboard.press(str(site + 1))
                    assert rp.inner_text("#choice") == str(site + 1)
                    windows_shown.append(rp.inner_text("#wl-window"))
                    rp.keyboard.press("Enter")
                if not practice:
                    chosen.append(site)
                else:
                    n_practice += 1
                n += 1
                assert n < 80, "the reading never ended"
            rp.screenshot(path=str(ARTIFACTS / "reading-done.png"))
            assert n_practice == 2 and n == 2 + len(chosen)
            assert windows_shown[0] == "×1.00"  # W/L shown relative to the study's own, not as panel numbers

            # ---------------------------------------------------------------- coordinator: export and analysis
            cp.goto(study_url)
            assert f"{len(chosen)} / {len(chosen)}" in cp.inner_text("#progress")
            with cp.expect_download() as dl:
                cp.click("#export")
            csv_path = tmp_path / "export.csv"
            dl.value.save_as(csv_path)
            df = pd.read_csv(csv_path)
            assert df["chosen_position"].tolist() == chosen  # exactly the responses given, in order
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


@pytest.fixture
def demo_server(tmp_path):
    """waitress serving an open study on the mini plate: 2 + 2 scored images and a practice image per panel,
    three readers."""
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} not found: install Debian's chromium (.ci/run does) for the browser tests")
    pytest.importorskip("playwright.sync_api", reason="playwright (test extra) not installed")
    from webapp_helpers import demo_app

    from scorer.commands.serve import make_server

    app, sid = demo_app(tmp_path, n_practice=2)
    srv = make_server(app, host="127.0.0.1", port=0, threads=4)
    th = threading.Thread(target=srv.run, daemon=True)
    th.start()
    yield f"http://127.0.0.1:{srv.effective_port}", app, sid
    srv.close()
    th.join(timeout=5)


PER_TRIAL_KEYS = {"trial", "region_url", "response_url", "number", "answered", "practice_answered", "practice_number"}


def test_practice_then_scored_trials_blinded_in_chromium(demo_server):
    """Practice (with the answer shown) then scored trials in the browser; every response the page received is
    kept and compared between the two panels; the rest of the study is answered through the API."""
    from playwright.sync_api import sync_playwright
    from scipy import stats
    from webapp_helpers import login, read_all, reader_client

    from webapp.models import Region, StudyImage, Trial, db

    base, app, sid = demo_server
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    seen, problems = [], []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            rp = browser.new_context(viewport={"width": 1280, "height": 900}).new_page()
            rp.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            _login(rp, base, "reader1")
            rp.click("#my-studies a.button")
            rp.wait_for_selector("#check[data-ready]")
            sites = json.loads(rp.get_attribute("#check", "data-sites"))
            gray = _screen(rp)
            pick = int(np.argmax([gray[r - 4 : r + 5, c - 4 : c + 5].mean() for r, c in sites]))
            box = rp.locator("#pixels").bounding_box()
            rp.mouse.click(box["x"] + sites[pick][1] + 0.5, box["y"] + sites[pick][0] + 0.5)
            trial_api = ("/next", "/region", "/response")  # the reading page's requests (not the check page's)
            rp.on("response", lambda r: seen.append(r) if r.url.endswith(trial_api) else None)
            rp.click("#confirm")
            rp.wait_for_url("**/reading/studies/*")
            tags, feedback = [], []
            for n in range(5):  # two practice trials, then three scored ones
                rp.wait_for_function("() => document.getElementById('reader').dataset.ready")
                tags.append(rp.locator("#practice-tag").is_visible())
                boxes = json.loads(rp.get_attribute("#reader", "data-boxes"))
                k = _darkest_tile(_screen(rp), boxes)
                rp.keyboard.press(str(k + 1))
                assert rp.inner_text("#choice") == str(k + 1)
                rp.keyboard.press("Enter")
                if tags[-1]:  # practice tells the answer, on the reading screen
                    rp.wait_for_function(
                        "() => /Correct|Not this time/.test(document.getElementById('status').textContent)"
                    )
                    feedback.append(rp.inner_text("#status"))
                if n == 2:
                    rp.screenshot(path=str(ARTIFACTS / "tiles-scored-trial.png"))
            rp.wait_for_function("() => document.getElementById('reader').dataset.ready")
            assert tags == [True, True, False, False, False] and len(feedback) == 2
            records = []
            for r in seen:  # what the page received, read now that it is idle
                body = r.body()
                records.append((r.url, r.status, {k: v for k, v in r.headers.items() if k.startswith("x-")}, body))
        finally:
            browser.close()
    assert not problems, problems
    # ------------------------------------------------------------------ nothing but pixels differs by detector
    with app.app_context():
        det_of = {
            t.public_id: im.detector
            for t, im in db()
            .query(Trial, StudyImage)
            .join(Region, Region.id == Trial.region_id)
            .join(StudyImage, StudyImage.id == Region.image_id)
            .filter(Trial.study_id == sid)
        }
    trials, regions = {}, {}
    for url, status, headers, body in records:
        assert status == 200, (url, status)
        if url.endswith("/next"):
            t = json.loads(body)
            if not t.get("done"):
                trials[t["trial"]] = {k: v for k, v in t.items() if k not in PER_TRIAL_KEYS}
        elif url.endswith("/region"):
            regions[url.split("/")[-2]] = (json.dumps(headers, sort_keys=True), len(body))
    scored = [pid for pid, t in trials.items() if not t["practice"]]
    assert len(scored) >= 3 and set(regions) >= set(trials)
    # what depends on neither the trial nor its diameter (window/level, magnification, totals) is one value …
    shape_keys = {"rows", "cols", "m", "tiles", "practice"}
    common = {json.dumps({k: v for k, v in t.items() if k not in shape_keys}, sort_keys=True) for t in trials.values()}
    assert len(common) == 1, common
    # … and what depends on the diameter (tile size, M) gives the same headers and byte count on either panel
    shape_of = {}
    for pid, t in trials.items():
        shape = (t["rows"], t["cols"], t["m"], t["tiles"])
        shape_of.setdefault(shape, set()).add(regions[pid])
    assert all(len(v) == 1 for v in shape_of.values()), shape_of
    assert {det_of[pid] for pid in trials}  # the panels these trials came from (names never sent to the page)
    # ------------------------------------------------------------------ the rest through the API: ≥ 200 trials
    c, tok = reader_client(app, sid, "reader1")
    read_all(c, sid, tok, chooser=lambda t, d: int(t["trial"], 16) % t["m"])
    for name in ("reader2", "reader3"):
        c, tok = reader_client(app, sid, name)
        read_all(c, sid, tok, chooser=lambda t, d: int(t["trial"], 16) % t["m"])
    cc = app.test_client()
    login(cc, "coordinator")
    df = pd.read_csv(io.StringIO(cc.get(f"/coordinator/studies/{sid}/responses.csv").text), dtype={"image": str})
    assert len(df) >= 200
    for m, g in df.groupby("n_alternatives"):
        counts = np.bincount(g["true_position"], minlength=m)
        p_value = stats.chisquare(counts).pvalue
        print(f"M = {m}: {len(g)} trials, true tile position counts {counts.tolist()}, chi-square p = {p_value:.3f}")
        assert p_value > 0.01
    with app.app_context():
        practice_codes = {im.code for im in db().query(StudyImage).filter_by(study_id=sid, practice=True)}
        practice_regions = {t.region_id for t in db().query(Trial).filter_by(study_id=sid, practice=True)}
        scored_regions = {t.region_id for t in db().query(Trial).filter_by(study_id=sid, practice=False)}
    assert practice_regions and not practice_regions & scored_regions
    assert not set(df["image"]) & practice_codes


def test_the_reading_page_reconnects_and_never_loses_or_doubles_an_answer(tmp_path):
    """Issue 19: the server stops while the reader answers; the page says it is reconnecting, keeps trying with a
    growing pause, and when a new server comes up on the same port sends the answer once.  A second fault: the
    answer reaches the server and is stored, but the reply is lost on the way back; the page sends it again, the
    server says "already answered" and the page moves on — one stored response per trial either way."""
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} not found")
    pytest.importorskip("playwright.sync_api", reason="playwright (test extra) not installed")
    from playwright.sync_api import sync_playwright
    from webapp_helpers import demo_app

    from webapp.models import Response, Trial, db

    app, sid = demo_app(tmp_path, n_practice=0, SECRET_KEY=None)  # the instance's own key, as `limen serve` reads it
    with socket.socket() as so:
        so.bind(("127.0.0.1", 0))
        port = so.getsockname()[1]
    base = f"http://127.0.0.1:{port}"
    serve = [
        str(Path(sys.executable).with_name("limen")),
        "serve",
        "--instance",
        app.instance_path,
        "--port",
        str(port),
    ]

    def start():
        proc = subprocess.Popen(serve, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        for _ in range(300):
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                    return proc
            except OSError:
                time.sleep(0.1)
        proc.kill()
        raise AssertionError("limen serve did not start")

    srv = start()

    def stored(public_id):
        with app.app_context():
            return (
                db()
                .query(Response)
                .join(Trial, Trial.id == Response.trial_id)
                .filter(Trial.public_id == public_id)
                .count()
            )

    problems = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            rp = browser.new_context(viewport={"width": 1280, "height": 900}).new_page()
            rp.on("pageerror", lambda e: problems.append(str(e)))
            _login(rp, base, "reader1")
            rp.click("#my-studies a.button")
            rp.wait_for_selector("#check[data-ready]")
            sites = json.loads(rp.get_attribute("#check", "data-sites"))
            gray = _screen(rp)
            pick = int(np.argmax([gray[r - 4 : r + 5, c - 4 : c + 5].mean() for r, c in sites]))
            box = rp.locator("#pixels").bounding_box()
            rp.mouse.click(box["x"] + sites[pick][1] + 0.5, box["y"] + sites[pick][0] + 0.5)
            rp.click("#confirm")
            rp.wait_for_url("**/reading/studies/*")
            ready = "() => document.getElementById('reader').dataset.ready"
            rp.wait_for_function(ready)
            first = rp.get_attribute("#reader", "data-ready")
            # ---- fault 1: the server is killed before the answer is sent, and comes back on the same port
            srv.kill()
            srv.wait(timeout=10)
            rp.keyboard.press("1")
            rp.keyboard.press("Enter")
            rp.wait_for_function("() => document.getElementById('reader').dataset.reconnecting")
            assert "Reconnecting" in rp.inner_text("#status")
            rp.screenshot(path=str(ARTIFACTS / "reconnecting.png"))
            rp.wait_for_timeout(1500)  # a few attempts fail while the server is down
            assert stored(first) == 0
            srv = start()
            rp.wait_for_function(
                f"() => {{ const r = document.getElementById('reader').dataset.ready; return r && r !== '{first}'; }}",
                timeout=30_000,
            )
            assert not rp.get_attribute("#reader", "data-reconnecting")
            assert stored(first) == 1
            # ---- fault 2: the answer is stored but its reply never reaches the page
            second = rp.get_attribute("#reader", "data-ready")
            lost = []

            def drop_first_reply(route):
                if not lost:
                    route.fetch()  # the server receives and stores the answer …
                    lost.append(1)
                    route.abort()  # … and the page never hears back
                else:
                    route.continue_()

            rp.route("**/response", drop_first_reply)
            rp.keyboard.press("2")
            rp.keyboard.press("Enter")
            rp.wait_for_function(
                f"() => {{ const r = document.getElementById('reader').dataset.ready; return r && r !== '{second}'; }}",
                timeout=30_000,
            )
            assert lost and stored(second) == 1
            with app.app_context():
                n_resp = db().query(Response).count()
            assert n_resp == 2  # two answers given, two stored: none lost, none doubled
        finally:
            browser.close()
            srv.kill()
            srv.wait(timeout=10)
    assert not problems, problems
