"""Accounts from the browser (coordinators only): add a reader or a coordinator, disable and enable, reset a password
(shown once), sign out everywhere — each audited with the coordinator's name, CSRF-protected, refused to readers,
under the rules of ``limen users`` (webapp.account_admin is the one implementation)."""

from __future__ import annotations

import json
import re

from webapp_helpers import PASSWORDS, accounts_app, csrf_from, login


def _app(tmp_path):
    return accounts_app(tmp_path, ("coordinator", "reader1", "reader2"))


def _sign_in(app, name, password) -> int:
    c = app.test_client()
    tok = csrf_from(c.get("/login").text)
    return c.post("/login", data={"username": name, "password": password, "csrf_token": tok}).status_code


def _audit(app, action):
    from webapp.models import AuditEntry, db

    with app.app_context():
        return [
            (e.user.username if e.user else None, json.loads(e.detail))
            for e in db().query(AuditEntry).filter_by(action=action).order_by(AuditEntry.id)
        ]


def _uid(app, name):
    from webapp.models import User, db

    with app.app_context():
        return db().query(User).filter_by(username=name).one().id


def _shown_password(html: str) -> str:
    return re.search(r'id="once-password">([^<]+)<', html).group(1)


def test_a_coordinator_adds_reader_and_coordinator_accounts(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    assert 'id="add-account"' in c.get("/coordinator/accounts/").text
    r = c.post("/coordinator/accounts/", data={"username": "dr.osei", "role": "coordinator", "csrf_token": tok})
    assert r.status_code == 200 and "shown once" in r.text
    password = _shown_password(r.text)
    assert len(password) >= 10
    assert r.headers["Cache-Control"] == "no-store"  # the page with the password is not kept by the browser
    assert _sign_in(app, "dr.osei", password) == 302
    r = c.post("/coordinator/accounts/", data={"username": "reader_09", "role": "reader", "csrf_token": tok})
    assert _sign_in(app, "READER_09", _shown_password(r.text)) == 302  # names compared by key, as at sign-in
    added = _audit(app, "add_user")
    assert added == [
        ("coordinator", {"username": "dr.osei", "role": "coordinator"}),
        ("coordinator", {"username": "reader_09", "role": "reader"}),
    ]
    assert password not in c.get("/coordinator/audit").text  # the password goes nowhere but that one page
    # the rules of `limen users`: a name taken regardless of case, a bad name, an unknown role — on the same page
    for form, said in (
        ({"username": "Reader1", "role": "reader"}, "is taken"),
        ({"username": "bad name!", "role": "reader"}, "starting with a letter or digit"),
        ({"username": "someone", "role": "admin"}, "role must be one of"),
    ):
        r = c.post("/coordinator/accounts/", data={**form, "csrf_token": tok})
        assert r.status_code == 400 and said in r.text and 'id="add-account"' in r.text, (form, r.text[:300])
    assert len(_audit(app, "add_user")) == 2


def test_disable_and_enable_an_account(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    reader = app.test_client()
    login(reader, "reader1")
    uid = _uid(app, "reader1")
    r = c.post(f"/coordinator/accounts/{uid}/disable", data={"csrf_token": tok})
    assert r.status_code == 302
    assert reader.get("/reading/").status_code == 302  # its session ended at once
    assert _sign_in(app, "reader1", PASSWORDS["reader1"]) == 401
    assert 'id="account-reader1"' in c.get("/coordinator/accounts/").text
    assert "disabled" in c.get("/coordinator/accounts/").text
    r = c.post(f"/coordinator/accounts/{uid}/enable", data={"csrf_token": tok})
    assert r.status_code == 302
    assert _sign_in(app, "reader1", PASSWORDS["reader1"]) == 302  # with the password it had
    assert _audit(app, "disable_user") == [("coordinator", {"username": "reader1"})]
    assert _audit(app, "enable_user") == [("coordinator", {"username": "reader1"})]
    # a coordinator cannot lock themselves out from the browser
    me = _uid(app, "coordinator")
    r = c.post(f"/coordinator/accounts/{me}/disable", data={"csrf_token": tok})
    assert r.status_code == 400 and "your own account" in r.text
    r = c.post(f"/coordinator/accounts/{me}/password", data={"csrf_token": tok, "confirm": "yes"})
    assert r.status_code == 400 and "your own account" in r.text
    assert c.get("/coordinator/").status_code == 200
    assert c.post("/coordinator/accounts/99999/disable", data={"csrf_token": tok}).status_code == 404


def test_reset_a_password_after_confirmation(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    reader = app.test_client()
    login(reader, "reader2")
    uid = _uid(app, "reader2")
    page = c.get(f"/coordinator/accounts/{uid}/password")
    assert page.status_code == 200 and 'id="confirm-reset"' in page.text
    # a POST that did not come from the confirmation page changes nothing and leads to it
    r = c.post(f"/coordinator/accounts/{uid}/password", data={"csrf_token": tok})
    assert r.status_code == 302 and r.headers["Location"].endswith(f"/coordinator/accounts/{uid}/password")
    assert _sign_in(app, "reader2", PASSWORDS["reader2"]) == 302 and not _audit(app, "reset_password")
    r = c.post(f"/coordinator/accounts/{uid}/password", data={"csrf_token": tok, "confirm": "yes"})
    assert r.status_code == 200
    new = _shown_password(r.text)
    assert reader.get("/reading/").status_code == 302  # every session ended
    assert _sign_in(app, "reader2", PASSWORDS["reader2"]) == 401
    assert _sign_in(app, "reader2", new) == 302
    assert _audit(app, "reset_password") == [("coordinator", {"username": "reader2"})]


def test_sign_out_everywhere_is_kept(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    reader = app.test_client()
    login(reader, "reader1")
    r = c.post(f"/coordinator/accounts/{_uid(app, 'reader1')}/sign-out", data={"csrf_token": tok})
    assert r.status_code == 302 and reader.get("/reading/").status_code == 302
    assert _audit(app, "sign_out_everywhere") == [("coordinator", {"username": "reader1"})]


def test_readers_and_forged_requests_change_no_account(tmp_path):
    app = _app(tmp_path)
    reader = app.test_client()
    rtok = login(reader, "reader1")
    uid = _uid(app, "reader2")
    posts = [
        ("/coordinator/accounts/", {"username": "mine", "role": "coordinator"}),
        (f"/coordinator/accounts/{uid}/disable", {}),
        (f"/coordinator/accounts/{uid}/enable", {}),
        (f"/coordinator/accounts/{uid}/password", {"confirm": "yes"}),
        (f"/coordinator/accounts/{uid}/sign-out", {}),
    ]
    for url, form in posts:
        assert reader.post(url, data={**form, "csrf_token": rtok}).status_code == 403, url
    assert reader.get("/coordinator/accounts/").status_code == 403
    assert reader.get(f"/coordinator/accounts/{uid}/password").status_code == 403
    # a coordinator's browser tricked into posting from another site: no CSRF token, refused
    c = app.test_client()
    login(c, "coordinator")
    for url, form in posts:
        assert c.post(url, data=form).status_code == 400, url
    from webapp.models import AuditEntry, db

    with app.app_context():
        actions = {e.action for e in db().query(AuditEntry)}
    assert not actions & {"add_user", "disable_user", "enable_user", "reset_password", "sign_out_everywhere"}
    assert _sign_in(app, "reader2", PASSWORDS["reader2"]) == 302
