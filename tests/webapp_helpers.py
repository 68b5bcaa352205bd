"""Builders shared by the web-app tests: an app with a demo study on the mini plate, sign-in, display check."""

from __future__ import annotations

import re
import threading
from pathlib import Path

import numpy as np

MINI = Path(__file__).parent / "data" / "mini-plate.toml"
PASSWORDS = {
    "coordinator": "coord-pass-123",
    "reader1": "reader1-pass",
    "reader2": "reader2-pass",
    "reader3": "reader3-pass",
}


def make_app(tmp_path, db_url=None, **config):
    from webapp import create_app

    cfg = {"INSTANCE_PATH": str(tmp_path / "instance"), "SECRET_KEY": "test-secret", "ANALYSIS_N_BOOT": 20}
    if db_url:
        cfg["DATABASE_URL"] = db_url
    cfg.update(config)
    return create_app(cfg)


def demo_app(
    tmp_path,
    db_url=None,
    n_readers=3,
    trials_per_reader=None,
    n_practice=2,
    repeat_fraction=0.25,
    show_feedback=False,
    half_width_ln=2.0,
    placement="psi",
    images_per_detector=2,
    **config,
):
    """An app with an open study on simulated mini-plate images (2 direct + 2 indirect scored: each cell then
    offers the 10 trials per reader an estimable threshold needs; one practice image per panel when practice is
    asked for), ``n_readers`` readers enrolled, and one more reader (``outsider``) not
    enrolled.  The wide wanted CI (±2 in ln) lets the design gate open a study this small; ``trials_per_reader``
    is the most scored trials per reader (None: no limit)."""
    from webapp.demo import create_demo_study, ensure_user
    from webapp.models import db

    app = make_app(tmp_path, db_url, **config)
    out = create_demo_study(
        app,
        n_readers=n_readers,
        images_per_detector=images_per_detector,
        trials_per_reader=trials_per_reader,
        n_practice=n_practice,
        repeat_fraction=repeat_fraction,
        layout_path=str(MINI),
        diameters_mm=None,
        half_width_ln=half_width_ln,
        placement=placement,
        passwords=PASSWORDS,
        show_feedback=show_feedback,
    )
    with app.app_context():
        ensure_user(db(), "outsider", "reader", "outsider-pass")
        db().commit()
    out["credentials"]["outsider"] = "outsider-pass"
    return app, out["study_id"]


def csrf_from(html: str) -> str:
    m = re.search(r'name="csrf[-_]token" (?:value|content)="([^"]+)"', html)
    assert m, "no CSRF token in the page"
    return m.group(1)


def login(client, username, password=None):
    """Sign in; return a CSRF token for later POSTs."""
    password = password or PASSWORDS.get(username) or "outsider-pass"
    page = client.get("/login")
    r = client.post("/login", data={"username": username, "password": password, "csrf_token": csrf_from(page.text)})
    assert r.status_code == 302, (username, r.status_code)
    return csrf_from(client.get("/login").text)


def pass_display_check(client, study_id, token):
    """Find the faint disc of the display check as a reader would: the brightest of the four sites."""
    from webapp.display_check import CHECK_SITES, CHECK_SIZE

    assert client.get(f"/reading/studies/{study_id}/check").status_code == 200
    px = np.frombuffer(client.get(f"/reading/api/studies/{study_id}/check/pattern").data, "<u2")
    px = px.reshape(CHECK_SIZE, CHECK_SIZE)
    site = int(np.argmax([px[r - 3 : r + 4, c - 3 : c + 4].mean() for r, c in CHECK_SITES]))
    r = client.post(
        f"/reading/api/studies/{study_id}/check",
        json={
            "site": site,
            "viewing_distance_mm": 550,
            "screen_width": 1920,
            "screen_height": 1080,
            "device_pixel_ratio": 1,
            "browser_zoom": 1,
        },
        headers={"X-CSRFToken": token},
    )
    assert r.status_code == 200 and r.json["passed"], r.json
    return r.json


def answer(client, token, trial, site=0, ms=1500, window=1000.0, level=3000.0):
    """Answer a trial with the choice ``site``: a screen position (tile) in a tiled trial, a site otherwise."""
    key = "chosen_position" if trial.get("tiles") else "chosen_site"
    return client.post(
        trial["response_url"],
        json={key: site, "response_ms": ms, "window": window, "level": level, "zoom": 1},
        headers={"X-CSRFToken": token},
    )


def read_all(client, study_id, token, chooser=None, limit=None):
    """Answer trials until done (or ``limit``); return the list of (trial json, chosen site)."""
    done = []
    while limit is None or len(done) < limit:
        t = client.get(f"/reading/api/studies/{study_id}/next").json
        if t["done"]:
            break
        data = client.get(t["region_url"]).data
        site = chooser(t, data) if chooser else 0
        r = answer(client, token, t, site)
        assert r.status_code == 200, r.json
        done.append((t, site))
    return done


def accounts_app(tmp_path, users=("coordinator",), **config):
    """An app with no study yet and the named accounts (role from the name: coordinator, else reader)."""
    from webapp.demo import ensure_user
    from webapp.models import db

    app = make_app(tmp_path, **config)
    with app.app_context():
        for name in users:
            ensure_user(db(), name, "coordinator" if name == "coordinator" else "reader", PASSWORDS[name])
        db().commit()
    return app


def race(app, client, url, token, n):
    """``n`` tabs of the same signed-in browser POST a response to ``url`` at the same moment; return the codes."""
    cookie = client.get_cookie("session").value
    barrier = threading.Barrier(n)
    codes = []

    def tab(site):
        tc = app.test_client()
        tc.set_cookie("session", cookie)
        barrier.wait()
        codes.append(
            tc.post(
                url,
                json={"chosen_position": site % 3, "response_ms": 700, "window": 9.0, "level": 3.0, "zoom": 1},
                headers={"X-CSRFToken": token},
            ).status_code
        )

    threads = [threading.Thread(target=tab, args=(i,)) for i in range(n)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    return sorted(codes)


def wait_job(client, resp, timeout_s=120.0):
    """Follow a POST that started a background job (a redirect to its page) until the job ends; return its
    JSON status."""
    import time

    assert resp.status_code == 302 and "/jobs/" in resp.headers["Location"], (resp.status_code, resp.text[:300])
    url = resp.headers["Location"].split("?")[0] + ".json"
    end = time.monotonic() + timeout_s
    while True:
        st = client.get(url).json
        if st["state"] in ("done", "failed") or time.monotonic() > end:
            return st
        time.sleep(0.05)


def reader_client(app, study_id, name="reader1"):
    """A reader's browser, signed in and past the display check: (client, CSRF token)."""
    c = app.test_client()
    tok = login(c, name)
    pass_display_check(c, study_id, tok)
    return c, tok


def darkest_tile(trial, data):
    """A reader working on the bytes it receives: the tile whose centre (disc-sized averages at a few scales) is
    darkest (a disc lowers the kerma)."""
    px = np.frombuffer(data, "<u2").reshape(trial["tiles"], trial["rows"], trial["cols"]).astype(float)
    c = (trial["rows"] - 1) // 2
    yy, xx = np.mgrid[: trial["rows"], : trial["cols"]]
    best = np.zeros(trial["tiles"])
    for radius in (0.75, 1.5, 2.5, 4.0, 6.0):
        m = (yy - c) ** 2 + (xx - c) ** 2 <= radius**2
        means = px[:, m].mean(axis=1)
        bg = np.median(px.reshape(trial["tiles"], -1), axis=1)
        z = (bg - means) / (px.std() / np.sqrt(m.sum()))
        best = np.maximum(best, z - np.median(z))
    return int(np.argmax(best))


def simulated_study_files(tmp_path, n=1):
    """``n`` simulated mini-plate images per panel (direct, indirect) at 100 µGy, written as DICOM, and each
    panel's conversion file: ``{panel: ([paths], conversion path)}``."""
    import datetime as _dt

    from scorer.detector import detector_model, simulate
    from scorer.images import save_conversion
    from scorer.phantom import load_layout
    from scorer.workflow import write_simulated

    layout = load_layout(MINI)
    out = {}
    for k, det in enumerate(("direct", "indirect")):
        model = detector_model(det)
        files = []
        for i in range(n):
            sim = simulate(model, "phantom", 100.0, np.random.default_rng(10 * k + i), small=True, layout=layout)
            files.append(write_simulated(sim, tmp_path / det, f"{det}-{i}", _dt.datetime(2026, 11, 30, 8, i)))
        conv = tmp_path / det / "conversion.toml"
        save_conversion(model.conversion_function(), conv)
        out[det] = (files, conv)
    return out
