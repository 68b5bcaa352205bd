"""Sessions the server can end, and account names that are one account regardless of case or Unicode form.

The session cookie is signed but kept by the browser: ending a session therefore has to be decided on the
server (the account's session generation, webapp.accounts).  Names: Unicode Standard Annex #15 (NFKC) and
case folding (Unicode Standard ch. 3), docs/references.md.
"""

from __future__ import annotations

import sqlite3

import pytest
from click.testing import CliRunner
from webapp_helpers import PASSWORDS, accounts_app, csrf_from, login

from scorer.cli import main


def _app(tmp_path):
    return accounts_app(tmp_path, ("coordinator", "reader1", "reader2"))


def _copy_of(app, client):
    """Another browser holding a copy of ``client``'s session cookie (stolen, or the same reader elsewhere)."""
    other = app.test_client()
    other.set_cookie("session", client.get_cookie("session").value)
    return other


def _signed_out(resp) -> bool:
    return resp.status_code in (301, 302) and "/login" in resp.headers.get("Location", "")


def _cli(tmp_path, *args, **kw):
    r = CliRunner().invoke(main, ["users", *args, "--instance", str(tmp_path / "instance")], **kw)
    assert r.exit_code == 0, r.output
    return r


# --------------------------------------------------------------------------- sessions end on the server
def test_sign_out_ends_a_copied_session_too(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    tok = login(c, "reader1")
    copy = _copy_of(app, c)
    assert copy.get("/reading/").status_code == 200
    assert c.post("/logout", data={"csrf_token": tok}).status_code == 302
    assert _signed_out(c.get("/reading/"))
    assert _signed_out(copy.get("/reading/"))  # the cookie copied before sign-out no longer opens anything
    # the reader signs in again as usual, and only the new session works
    login(c, "reader1")
    assert c.get("/reading/").status_code == 200 and _signed_out(copy.get("/reading/"))


def test_a_new_password_from_the_server_ends_every_session(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    login(c, "reader1")
    other = app.test_client()
    login(other, "reader2")
    _cli(tmp_path, "password", "reader1", "--generate")
    assert _signed_out(c.get("/reading/"))
    assert other.get("/reading/").status_code == 200  # another account's session is not touched


def test_disabling_ends_the_session_and_enabling_does_not_revive_it(tmp_path):
    app = _app(tmp_path)
    c = app.test_client()
    login(c, "reader1")
    _cli(tmp_path, "disable", "reader1")
    assert _signed_out(c.get("/reading/"))
    _cli(tmp_path, "enable", "reader1")
    assert _signed_out(c.get("/reading/"))  # an old cookie stays dead; the reader signs in again
    login(c, "reader1")
    assert c.get("/reading/").status_code == 200


def test_a_coordinator_signs_an_account_out_everywhere_and_it_is_audited(tmp_path):
    app = _app(tmp_path)
    from webapp.models import AuditEntry, User, db

    laptop, phone = app.test_client(), app.test_client()
    login(laptop, "reader1")
    login(phone, "reader1")
    bystander = app.test_client()
    login(bystander, "reader2")
    coord = app.test_client()
    ctok = login(coord, "coordinator")
    with app.app_context():
        uid = db().query(User).filter_by(username="reader1").one().id
    assert "Sign out everywhere" in coord.get("/coordinator/accounts/").text
    r = coord.post(f"/coordinator/accounts/{uid}/sign-out", data={"csrf_token": ctok})
    assert r.status_code == 302
    assert _signed_out(laptop.get("/reading/")) and _signed_out(phone.get("/reading/"))
    assert bystander.get("/reading/").status_code == 200 and coord.get("/coordinator/").status_code == 200
    with app.app_context():
        e = db().query(AuditEntry).filter_by(action="sign_out_everywhere").one()
        assert e.user.username == "coordinator" and "reader1" in e.detail
    assert coord.post("/coordinator/accounts/99999/sign-out", data={"csrf_token": ctok}).status_code == 404
    # the same from the server's command line
    login(laptop, "reader1")
    _cli(tmp_path, "sign-out", "READER1")
    assert _signed_out(laptop.get("/reading/"))


def test_a_session_cookie_of_the_old_form_is_not_honoured(tmp_path):
    """A cookie that names only the account id (as before sessions had a generation) is treated as signed out."""
    app = _app(tmp_path)
    c = app.test_client()
    login(c, "reader1")
    with c.session_transaction() as sess:
        assert sess["_user_id"].endswith(":0")
        sess["_user_id"] = sess["_user_id"].split(":")[0]
    assert _signed_out(c.get("/reading/"))


# --------------------------------------------------------------------------- one account per name
def test_names_differing_only_by_case_are_one_account(tmp_path):
    inst = str(tmp_path / "instance")
    r = CliRunner().invoke(main, ["users", "add", "dup", "--role", "reader", "--generate", "--instance", inst])
    assert r.exit_code == 0, r.output
    r = CliRunner().invoke(main, ["users", "add", "DUP", "--role", "reader", "--generate", "--instance", inst])
    assert r.exit_code == 2 and "is taken" in r.output
    app = accounts_app(tmp_path, ("coordinator",))
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post("/coordinator/accounts/", data={"username": "Dup", "role": "reader", "csrf_token": tok})
    assert r.status_code == 400 and "is taken" in r.text
    from webapp.models import User, db

    with app.app_context():
        assert [u.username for u in db().query(User).filter(User.role == "reader")] == ["dup"]


def test_the_database_refuses_two_names_differing_by_case(tmp_path):
    from sqlalchemy.exc import IntegrityError

    from webapp.models import User, db

    app = _app(tmp_path)
    with app.app_context():
        s = db()
        s.add(User(username="Reader1", password_hash="x", role="reader"))
        with pytest.raises(IntegrityError):
            s.commit()
        s.rollback()
    # and below the ORM: a raw insert of the same key
    con = sqlite3.connect(tmp_path / "instance" / "limen.db")
    with pytest.raises(sqlite3.IntegrityError):
        con.execute(
            "INSERT INTO users (username, username_key, password_hash, role, active, created_at, session_generation)"
            " VALUES ('READER2', 'reader2', 'x', 'reader', 1, '2026-01-01', 0)"
        )
    con.close()


def test_sign_in_matches_the_normalised_name(tmp_path):
    app = _app(tmp_path)
    for typed in ("READER1", "Reader1", " reader1 ", "ｒｅａｄｅｒ１"):  # full-width letters and digit (NFKC)
        c = app.test_client()
        tok = csrf_from(c.get("/login").text)
        r = c.post("/login", data={"username": typed, "password": PASSWORDS["reader1"], "csrf_token": tok})
        assert r.status_code == 302, typed
        assert "reader1 · reader" in c.get("/reading/").text


@pytest.mark.parametrize(
    "name",
    [
        "rеader1",  # Cyrillic е (U+0435) among Latin letters: a look-alike
        "ｒｅａｄｅｒ9",  # full-width: refused at creation rather than silently changed
        "reader\u200b9",  # zero-width space
        "_reader",  # must start with a letter or digit
        "bad name",
        "",
    ],
)
def test_look_alike_and_odd_names_are_refused(tmp_path, name):
    r = CliRunner().invoke(
        main, ["users", "add", name, "--role", "reader", "--generate", "--instance", str(tmp_path / "i")]
    )
    assert r.exit_code == 2 and r.output.startswith("error: user name") and r.output.count("\n") == 1, r.output


def test_a_very_long_name_is_refused_in_a_short_message(tmp_path):
    long = "a" * 100_000
    r = CliRunner().invoke(
        main, ["users", "add", long, "--role", "reader", "--generate", "--instance", str(tmp_path / "i")]
    )
    assert r.exit_code == 2 and len(r.output) < 200 and "100000 characters" in r.output
    app = accounts_app(tmp_path, ("coordinator",))
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post("/coordinator/accounts/", data={"username": long, "role": "reader", "csrf_token": tok})
    assert r.status_code == 400 and long[:200] not in r.text and "100000 characters" in r.text
    c2 = app.test_client()
    tok2 = csrf_from(c2.get("/login").text)
    r = c2.post("/login", data={"username": long, "password": "whatever-pass", "csrf_token": tok2})
    assert r.status_code == 401 and long[:200] not in r.text
    assert long[:200] not in c.get("/coordinator/audit").text  # the failure is audited with a shortened name


def test_a_database_of_the_previous_release_gets_the_new_columns(tmp_path):
    """An instance made before sessions had a generation and names a key: its accounts keep working; of two
    names differing only by case, the older keeps the name and the other can no longer sign in."""
    import shutil
    from pathlib import Path

    from webapp.security import hash_password

    inst = tmp_path / "instance"
    inst.mkdir()
    # the previous release's database (tests/data/make_previous_release_dbs.py), taken back to the release before
    # sessions had a generation and names a key: those two columns dropped, its accounts removed
    shutil.copyfile(Path(__file__).parent / "data" / "previous-webapp.sqlite", inst / "limen.db")
    con = sqlite3.connect(inst / "limen.db")
    for sql in (
        "DELETE FROM users WHERE id NOT IN (SELECT created_by FROM studies)",
        "DROP INDEX ix_users_username_key",
        "ALTER TABLE users DROP COLUMN username_key",
        "ALTER TABLE users DROP COLUMN session_generation",
    ):
        con.execute(sql)
    for name in ("dup", "DUP"):
        con.execute(
            "INSERT INTO users (username, password_hash, role, active, created_at) VALUES (?, ?, 'reader', 1, "
            "'2026-01-01')",
            (name, hash_password(f"{name}-password")),
        )
    con.commit()
    con.close()
    from webapp_helpers import make_app

    app = make_app(tmp_path)
    codes = {}
    for name in ("dup", "DUP"):
        c = app.test_client()
        tok = csrf_from(c.get("/login").text)
        r = c.post("/login", data={"username": name, "password": f"{name}-password", "csrf_token": tok})
        codes[name] = r.status_code
    assert codes == {"dup": 302, "DUP": 401}
