"""Security and integrity of the web app: CSRF, headers, cookies, password storage, truth never sent before the
response is stored, responses stored once, uploads checked and stored by hash.  Sessions and account names:
test_webapp_sessions.py; sign-in throttling: test_webapp_throttle.py; request and upload limits, import root and
CSV exports: test_webapp_limits.py."""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pytest
from webapp_helpers import (
    PASSWORDS,
    accounts_app,
    answer,
    csrf_from,
    demo_app,
    login,
    pass_display_check,
    race,
    reader_client,
)


@pytest.fixture
def demo(tmp_path):
    return demo_app(tmp_path)


# --------------------------------------------------------------------------- CSRF
def test_state_changing_requests_without_a_csrf_token_are_refused(demo):
    app, sid = demo
    c = app.test_client()
    r = c.post("/login", data={"username": "reader1", "password": PASSWORDS["reader1"]})
    assert r.status_code == 400 and "security token" in r.text  # sign-in form itself
    tok = login(c, "reader1")
    pass_display_check(c, sid, tok)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    body = {"chosen_site": 0, "response_ms": 1000, "window": 100.0, "level": 50.0, "zoom": 1}
    assert c.post(t["response_url"], json=body).status_code == 400  # no header
    assert c.post(t["response_url"], json=body, headers={"X-CSRFToken": "forged"}).status_code == 400
    assert c.get(f"/reading/api/studies/{sid}/next").json["trial"] == t["trial"]  # nothing stored
    cc = app.test_client()
    login(cc, "coordinator")
    assert cc.post(f"/coordinator/studies/{sid}/close").status_code == 400
    assert "open" in cc.get(f"/coordinator/studies/{sid}").text


# --------------------------------------------------------------------------- headers, cookies, passwords
def test_security_headers_and_cookie_flags(demo):
    app, sid = demo
    c = app.test_client()
    page = c.get("/login")
    csp = page.headers["Content-Security-Policy"]
    assert "script-src 'self'" in csp and "unsafe-inline" not in csp and "frame-ancestors 'none'" in csp
    assert page.headers["X-Content-Type-Options"] == "nosniff"
    assert page.headers["X-Frame-Options"] == "DENY"
    r = c.post(
        "/login", data={"username": "reader1", "password": PASSWORDS["reader1"], "csrf_token": csrf_from(page.text)}
    )
    cookie = r.headers.get("Set-Cookie", "")
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie
    # no page of the app carries an inline script or inline event handler (the CSP would block it anyway)
    for url in ("/reading/", f"/reading/studies/{sid}/check"):
        text = c.get(url).text
        assert not re.search(r"<script(?![^>]*\bsrc=)[^>]*>", text), url
        assert not re.search(r"\son[a-z]+\s*=", text), url


def test_passwords_are_stored_as_salted_hashes(demo):
    app, _ = demo
    from webapp.models import User, db
    from webapp.security import verify_password

    with app.app_context():
        users = db().query(User).all()
        hashes = [u.password_hash for u in users]
        for u in users:
            assert PASSWORDS.get(u.username, "outsider-pass") not in u.password_hash
            assert verify_password(u.password_hash, PASSWORDS.get(u.username, "outsider-pass"))
        assert len(set(hashes)) == len(hashes)
        assert all(h.startswith(("scrypt:", "pbkdf2:")) for h in hashes)


def test_open_redirect_after_login_is_refused(demo):
    app, _ = demo
    c = app.test_client()
    tok = csrf_from(c.get("/login").text)
    r = c.post(
        "/login?next=//evil.example/x",
        data={"username": "reader1", "password": PASSWORDS["reader1"], "csrf_token": tok},
    )
    assert r.status_code == 302 and "evil" not in r.headers["Location"]


# --------------------------------------------------------------------------- blinding and truth
def _reader_texts(client, sid, token):
    """Everything a reader's browser receives for a whole study (pages, JSON and the answers to responses)."""
    texts = [client.get("/reading/").text, client.get(f"/reading/studies/{sid}/check").text]
    pass_display_check(client, sid, token)
    texts.append(client.get(f"/reading/studies/{sid}").text)
    answers = []
    while True:
        r = client.get(f"/reading/api/studies/{sid}/next")
        texts.append(r.text)
        t = r.json
        if t["done"]:
            break
        client.get(t["region_url"])
        a = answer(client, token, t, 0, ms=800, window=1.0, level=1.0)
        assert a.status_code == 200, a.json
        answers.append((t, a.json))
    return texts, answers


def test_truth_and_blinded_labels_never_reach_the_reader(tmp_path):
    app, sid = demo_app(tmp_path, show_feedback=False)
    from webapp.models import Region, StudyImage, db

    with app.app_context():
        images = db().query(StudyImage).all()
        regions = db().query(Region).all()
        secret = (
            {im.detector for im in images}
            | {im.label for im in images}
            | {im.code for im in images}
            | {im.sha256[:16] for im in images}
            | {r.target for r in regions}
            | {"HSX", "direct", "indirect"}
        )
        numbers = {f"{r.contrast}" for r in regions} | {f"{r.diameter_mm}" for r in regions if r.diameter_mm != 1.0}
    c = app.test_client()
    tok = login(c, "reader1")
    texts, answers = _reader_texts(c, sid, tok)
    # random tokens (CSRF, opaque trial ids) may hold any short string by chance: leave them out of the search
    blob = re.sub(r'csrf[-_]token" (?:value|content)="[^"]+"|[0-9a-f]{24}', "", "\n".join(texts))
    for word in sorted(secret):
        assert word not in blob, f"{word!r} reached the reader"
    for num in sorted(numbers):  # as a number of its own, not as digits inside another one
        assert not re.search(rf"(?<![\d.]){re.escape(num)}(?!\d)", blob), f"{num} reached the reader"
    for key in ("true_site", "signal_site", "correct", "contrast", "diameter", "detector", "target", "image"):
        assert f'"{key}' not in blob, key
    # after the response is stored: feedback only on practice trials (the study has feedback off)
    for t, a in answers:
        assert a["stored"] is True
        assert ("feedback" in a) == t["practice"]


def test_trial_data_do_not_depend_on_the_truth(tmp_path):
    """Change where the disc is (in the database) and the reader's API answers stay byte for byte the same."""
    app, sid = demo_app(tmp_path)
    from webapp.models import Region, db

    c, tok = reader_client(app, sid)
    before = c.get(f"/reading/api/studies/{sid}/next")
    region_before = c.get(before.json["region_url"]).data
    with app.app_context():
        for r in db().query(Region).all():
            r.true_site = (r.true_site + 1) % 4
        db().commit()
    after = c.get(f"/reading/api/studies/{sid}/next")
    assert after.data == before.data
    assert c.get(after.json["region_url"]).data == region_before


# --------------------------------------------------------------------------- responses stored once
def test_a_response_submitted_twice_is_stored_once(demo):
    app, sid = demo
    from webapp.models import Response, db

    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    body = {"chosen_position": 2, "response_ms": 1000, "window": 100.0, "level": 50.0, "zoom": 1}
    first = c.post(t["response_url"], json=body, headers={"X-CSRFToken": tok})
    second = c.post(t["response_url"], json={**body, "chosen_position": 1}, headers={"X-CSRFToken": tok})
    assert first.status_code == 200 and second.status_code == 409 and second.json["duplicate"]
    with app.app_context():
        rows = db().query(Response).all()
        assert len(rows) == 1 and rows[0].chosen_site == rows[0].trial.order[2]  # the first answer, position 2


def test_two_tabs_answering_the_same_trial_at_once_store_one_response(demo):
    app, sid = demo
    from webapp.models import Response, db

    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    codes = race(app, c, t["response_url"], tok, 8)
    assert codes == [200] + [409] * 7, codes
    with app.app_context():
        assert db().query(Response).count() == 1


def test_the_database_itself_refuses_a_second_response(demo):
    app, sid = demo
    from sqlalchemy.exc import IntegrityError

    from webapp.models import Response, Trial, db

    c, _tok = reader_client(app, sid)
    c.get(f"/reading/api/studies/{sid}/next")  # trials are made as the reader asks for them
    with app.app_context():
        s = db()
        trial = s.query(Trial).first()
        s.add(Response(trial_id=trial.id, chosen_site=0, correct=False, response_ms=1, window=1, level=1))
        s.commit()
        s.add(Response(trial_id=trial.id, chosen_site=1, correct=False, response_ms=1, window=1, level=1))
        with pytest.raises(IntegrityError):
            s.commit()
        s.rollback()


# --------------------------------------------------------------------------- uploads
def _draft_study(app, client, token):
    r = client.post(
        "/coordinator/studies/new", data={"name": "upload test", "layout": "cairn-demo-plate.toml", "csrf_token": token}
    )
    assert r.status_code == 302, r.text
    return int(r.headers["Location"].rstrip("/").split("/")[-1])


def test_uploads_are_checked_and_stored_under_their_hash(tmp_path):
    import hashlib

    from scorer.images import write_image

    app = accounts_app(tmp_path, MAX_IMAGE_BYTES=600_000)
    from webapp.models import db

    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft_study(app, c, tok)
    url = f"/coordinator/studies/{sid}/images"

    def post(name, data, **extra):
        return c.post(
            url,
            data={"csrf_token": tok, "detector": "panel A", **extra, "images": (io.BytesIO(data), name)},
            content_type="multipart/form-data",
        )

    r = post("notes.exe", b"MZ\x90\x00")
    assert r.status_code == 400 and "notes.exe" in r.text and "must be one of" in r.text
    r = post("broken.dcm", b"this is not DICOM at all" * 10)
    assert r.status_code == 400 and "broken.dcm" in r.text
    r = post("huge.npy", b"\x93NUMPY" + b"\0" * 700_000)
    assert (
        r.status_code == 400 and "huge.npy" in r.text and "file is larger than the limit" in r.text
    )  # listed, not 413
    # a good 16-bit PNG with a hostile client path: stored as <sha256>.png, the client path never used
    png = tmp_path / "ok.png"
    write_image(png, (np.arange(64 * 64).reshape(64, 64) % 4000 + 100).astype(np.uint16))
    data = png.read_bytes()
    r = post("../../../etc/evil name.png", data, pixel_spacing_mm="0.085")
    assert r.status_code == 302, r.text
    store = Path(app.config["STORE_DIR"])
    digest = hashlib.sha256(data).hexdigest()
    assert (store / f"{digest}.png").read_bytes() == data
    assert not any("evil" in p.name for p in tmp_path.rglob("*"))
    page = c.get(f"/coordinator/studies/{sid}").text
    assert "img-" + digest[:10] in page
    # nothing half-written is left behind by the refused uploads
    assert not list(store.glob(".upload-*"))
    # the same image twice is kept once
    post("again.png", data, pixel_spacing_mm="0.085")
    from webapp.models import StudyImage

    with app.app_context():
        assert db().query(StudyImage).count() == 1


def test_upload_size_limit_for_the_whole_request(tmp_path):
    app = accounts_app(tmp_path, MAX_CONTENT_LENGTH=10_000)
    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft_study(app, c, tok)
    r = c.post(
        f"/coordinator/studies/{sid}/images",
        data={"csrf_token": tok, "detector": "A", "images": (io.BytesIO(b"x" * 20_000), "a.dcm")},
        content_type="multipart/form-data",
    )
    assert r.status_code == 413


# --------------------------------------------------------------------------- audit
def test_coordinator_actions_are_audited(demo):
    app, sid = demo
    c = app.test_client()
    tok = login(c, "coordinator")
    c.get(f"/coordinator/studies/{sid}/responses.csv")
    c.post(f"/coordinator/studies/{sid}/close", data={"csrf_token": tok})
    from webapp.models import AuditEntry, db

    with app.app_context():
        actions = [(e.action, e.user.username if e.user else None) for e in db().query(AuditEntry).all()]
    assert ("export_responses", "coordinator") in actions and ("close_study", "coordinator") in actions
    page = c.get("/coordinator/audit").text
    assert "close_study" in page and "export_responses" in page
