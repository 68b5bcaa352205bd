"""The coordinator's progress pages: each reader's state (a reader stopped mid-trial among them), display-check
history and refused actions from the audit log; coordinators only."""

from __future__ import annotations

import datetime as _dt
import json

import numpy as np
from webapp_helpers import PASSWORDS, answer, csrf_from, demo_app, login, pass_display_check, read_all


def _uid(app, name):
    from webapp.models import User, db

    with app.app_context():
        return db().query(User).filter_by(username=name).one().id


def _fail_check_once(c, sid, tok):
    """Answer the display check with a site that is not the faint disc's."""
    from webapp.display_check import CHECK_SITES, CHECK_SIZE

    c.get(f"/reading/studies/{sid}/check")
    px = np.frombuffer(c.get(f"/reading/api/studies/{sid}/check/pattern").data, "<u2").reshape(CHECK_SIZE, CHECK_SIZE)
    site = int(np.argmax([px[r - 3 : r + 4, col - 3 : col + 4].mean() for r, col in CHECK_SITES]))
    body = {"site": (site + 1) % 4, "viewing_distance_mm": 600, "screen_width": 1280, "screen_height": 1024}
    r = c.post(f"/reading/api/studies/{sid}/check", json=body, headers={"X-CSRFToken": tok})
    assert r.status_code == 200 and not r.json["passed"]


def _row(page: str, reader: str) -> str:
    return page.split(f'id="progress-{reader}"', 1)[1].split("</tr>", 1)[0]


def test_a_reader_who_stopped_mid_trial_is_shown(tmp_path):
    app, sid = demo_app(tmp_path)
    coord = app.test_client()
    login(coord, "coordinator")
    c = app.test_client()
    tok = login(c, "reader1")
    pass_display_check(c, sid, tok)
    read_all(c, sid, tok, limit=3)
    shown = c.get(f"/reading/api/studies/{sid}/next").json  # handed out, then the reader walks away
    c.get(f"/reading/api/studies/{sid}/next")  # a reload hands out the same trial: its first time is kept
    page = coord.get(f"/coordinator/studies/{sid}").text
    assert "reading" in _row(page, "reader1") and "not started" in _row(page, "reader2")
    from webapp.models import TrialShown, db

    with app.app_context():
        rows = db().query(TrialShown).filter_by(study_id=sid).all()
        assert shown["trial"] in {r.trial_public_id for r in rows} and len(rows) == 4  # 3 answered + the open one
        row = db().get(TrialShown, shown["trial"])
        row.first_at = row.first_at - _dt.timedelta(minutes=25)  # 25 min without an answer (limit: 10 min)
        db().commit()
    page = coord.get(f"/coordinator/studies/{sid}").text
    assert "stopped mid-trial" in _row(page, "reader1") and "unanswered for 25 min" in _row(page, "reader1")
    assert "stopped mid-trial" not in _row(page, "reader2")
    assert "more than 10 minutes" in page  # the stated time
    detail = coord.get(f"/coordinator/studies/{sid}/readers/{_uid(app, 'reader1')}").text
    assert 'id="reader-state">stopped mid-trial' in detail
    # the reader comes back and answers: reading again
    assert answer(c, tok, shown).status_code == 200
    page = coord.get(f"/coordinator/studies/{sid}").text
    assert "stopped mid-trial" not in _row(page, "reader1")
    # a closed study has nobody stopped mid-trial
    with app.app_context():
        nxt = c.get(f"/reading/api/studies/{sid}/next").json
        row = db().get(TrialShown, nxt["trial"])
        row.first_at = row.first_at - _dt.timedelta(minutes=25)
        db().commit()
    assert "stopped mid-trial" in _row(coord.get(f"/coordinator/studies/{sid}").text, "reader1")
    ctok = csrf_from(coord.get(f"/coordinator/studies/{sid}").text)
    assert coord.post(f"/coordinator/studies/{sid}/close", data={"csrf_token": ctok}).status_code == 302
    assert "stopped mid-trial" not in _row(coord.get(f"/coordinator/studies/{sid}").text, "reader1")


def test_display_check_history_lists_every_sitting(tmp_path):
    app, sid = demo_app(tmp_path)
    first = app.test_client()
    tok = login(first, "reader1")
    _fail_check_once(first, sid, tok)
    pass_display_check(first, sid, tok)  # passed at the second attempt
    read_all(first, sid, tok, limit=1)
    second = app.test_client()  # another sitting, another browser
    tok2 = login(second, "reader1")
    pass_display_check(second, sid, tok2)
    coord = app.test_client()
    login(coord, "coordinator")
    page = coord.get(f"/coordinator/studies/{sid}").text
    assert "2 sittings" in _row(page, "reader1")
    detail = coord.get(f"/coordinator/studies/{sid}/readers/{_uid(app, 'reader1')}").text
    table = detail.split('id="check-history"', 1)[1].split("</table>", 1)[0]
    rows = table.split("<tr>")[2:]
    assert len(rows) == 2
    newest, oldest = rows
    assert "<td>2</td>" in newest and "passed" in newest and "550 mm" in newest  # sitting 2, one attempt
    assert "<td>1</td>" in oldest and "<td>2</td>" in oldest.split("passed", 1)[1]  # sitting 1: two attempts
    assert "1920 × 1080" in oldest  # the screen the reader reported when passing
    # a reader with no sitting yet
    detail = coord.get(f"/coordinator/studies/{sid}/readers/{_uid(app, 'reader2')}").text
    assert "No sitting yet" in detail


def test_refused_actions_come_from_the_audit_log(tmp_path):
    app, sid = demo_app(tmp_path)
    other = app.test_client()
    otok = login(other, "reader2")
    pass_display_check(other, sid, otok)
    their_trial = other.get(f"/reading/api/studies/{sid}/next").json
    c = app.test_client()
    tok = login(c, "reader1")
    # a trial asked for before the display check (428: trials are placed only for a checked sitting), another
    # reader's trial (404), a coordinator's page (403, five times)
    assert c.get(f"/reading/api/studies/{sid}/next").status_code == 428
    assert c.get(their_trial["region_url"]).status_code == 404
    for _ in range(5):
        assert c.get("/coordinator/").status_code == 403
    # a second answer to a stored trial is not a refusal (a retry learning its answer arrived)
    pass_display_check(c, sid, tok)
    mine = c.get(f"/reading/api/studies/{sid}/next").json
    assert answer(c, tok, mine).status_code == 200
    assert answer(c, tok, mine).status_code == 409
    # a failed sign-in with the reader's name (typed in other case)
    anon = app.test_client()
    t = csrf_from(anon.get("/login").text)
    assert (
        anon.post("/login", data={"username": "READER1", "password": "wrong-one", "csrf_token": t}).status_code == 401
    )
    from webapp.models import AuditEntry, db

    with app.app_context():
        refused = [json.loads(e.detail) for e in db().query(AuditEntry).filter_by(action="refused").all()]
    assert sorted(d["status"] for d in refused) == [403, 404, 428]  # the five 403s: one entry a minute
    assert next(d for d in refused if d["status"] == 428)["reason"] == "pass the display check first"
    coord = app.test_client()
    login(coord, "coordinator")
    page = coord.get(f"/coordinator/studies/{sid}").text
    assert '#refused">4</a>' in _row(page, "reader1")  # three refused requests and one failed sign-in
    assert '<span class="muted">0</span>' in _row(page, "reader2")
    detail = coord.get(f"/coordinator/studies/{sid}/readers/{_uid(app, 'reader1')}").text
    table = detail.split('id="refused-actions"', 1)[1].split("</table>", 1)[0]
    assert "pass the display check first" in table and "(428)" in table and "(404)" in table
    assert "sign-in failed" in table and "wrong password" in table
    assert "/coordinator/" in table and "(403)" in table
    assert "already answered" not in table
    # the reader's password was never at stake: the reader signs in as usual
    assert login(app.test_client(), "reader1", PASSWORDS["reader1"])


def test_progress_pages_are_for_coordinators_only(tmp_path):
    app, sid = demo_app(tmp_path)
    r = app.test_client()
    login(r, "reader1")
    url = f"/coordinator/studies/{sid}/readers/{_uid(app, 'reader1')}"
    assert r.get(url).status_code == 403
    coord = app.test_client()
    login(coord, "coordinator")
    assert coord.get(url).status_code == 200
    assert coord.get(f"/coordinator/studies/{sid}/readers/{_uid(app, 'outsider')}").status_code == 404
