"""The web app's store on PostgreSQL (CI starts a throwaway server on loopback; skipped locally without one):
a study opens, two tabs answering at once store one response, the database refuses a second response, and the
export holds exactly the responses given."""

from __future__ import annotations

import io

import pandas as pd
import pytest
from webapp_helpers import demo_app, login, pass_display_check, race, read_all


def test_study_on_postgresql(tmp_path, postgres_url):
    from sqlalchemy.exc import IntegrityError

    from webapp.models import Response, Trial, db

    app, sid = demo_app(tmp_path, db_url=postgres_url)
    assert app.config["DATABASE_URL"].startswith("postgresql")
    c = app.test_client()
    tok = login(c, "reader1")
    pass_display_check(c, sid, tok)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    assert race(app, c, t["response_url"], tok, 6) == [200] + [409] * 5
    rest = read_all(c, sid, tok, chooser=lambda tr, d: tr["m"] - 1)  # the last site of each cell (M is 3 or 5)
    with app.app_context():
        s = db()
        assert s.query(Response).count() == 1 + len(rest)
        trial = s.query(Trial).filter(Trial.public_id == t["trial"]).one()
        s.add(Response(trial_id=trial.id, chosen_site=0, correct=False, response_ms=1, window=1, level=1))
        with pytest.raises(IntegrityError):
            s.commit()
        s.rollback()
    cc = app.test_client()
    login(cc, "coordinator")
    df = pd.read_csv(io.StringIO(cc.get(f"/coordinator/studies/{sid}/responses.csv").text))
    n_main = sum(1 for tr, _ in rest if not tr["practice"]) + (0 if t["practice"] else 1)
    assert len(df) == n_main and set(df["reader"]) == {"reader1"}
    with app.app_context():
        db().remove()
    app.extensions["limen_engine"].dispose()


def test_accounts_sessions_and_sign_in_throttle_on_postgresql(tmp_path, postgres_url):
    """The new columns and table on PostgreSQL: names unique regardless of case, sessions ended on the server,
    failed sign-ins counted in the database."""
    from sqlalchemy.exc import IntegrityError
    from webapp_helpers import accounts_app, csrf_from

    from webapp.models import SignInFailure, User, db

    app = accounts_app(tmp_path, ("coordinator", "reader1"), DATABASE_URL=postgres_url, LOGIN_FREE_FAILURES=1)
    with app.app_context():
        db().add(User(username="READER1", password_hash="x", role="reader"))
        with pytest.raises(IntegrityError):
            db().commit()
        db().rollback()
    c = app.test_client()
    tok = login(c, "reader1")
    copy = app.test_client()
    copy.set_cookie("session", c.get_cookie("session").value)
    c.post("/logout", data={"csrf_token": tok})
    assert copy.get("/reading/").status_code == 302
    g = app.test_client()
    tok = csrf_from(g.get("/login").text)
    codes = [
        g.post("/login", data={"username": "Reader1", "password": "wrong", "csrf_token": tok}).status_code
        for _ in range(3)
    ]
    assert codes == [401, 401, 429]
    with app.app_context():
        assert db().query(SignInFailure).filter_by(name_key="reader1").count() == 2
