"""The role × route matrix: every route of the web app against every kind of visitor.

Visitors: anonymous, the reader who owns the trial (enrolled), another enrolled reader, a reader not
enrolled in the study, and a coordinator. Outcomes: ``ok`` (the role check let the request through: any
status but 401/403/404 or a redirect to sign-in), ``login`` (401 or redirect to the sign-in page), ``403``
(wrong role), ``404`` (a reader reaching a study they are not in or another reader's trial: its existence
is not confirmed). The table must name every route the app has, so a new route cannot skip the check.
"""

from __future__ import annotations

import pytest
from webapp_helpers import csrf_from, demo_app, login, pass_display_check, read_all, wait_job

VISITORS = ("anonymous", "reader", "other_reader", "outsider", "coordinator")
USERS = {"reader": "reader1", "other_reader": "reader2", "outsider": "outsider", "coordinator": "coordinator"}

COORD = {"anonymous": "login", "reader": "403", "other_reader": "403", "outsider": "403", "coordinator": "ok"}
READER_HOME = {"anonymous": "login", "reader": "ok", "other_reader": "ok", "outsider": "ok", "coordinator": "403"}
STUDY_READER = {"anonymous": "login", "reader": "ok", "other_reader": "ok", "outsider": "404", "coordinator": "403"}
TRIAL_OWNER = {"anonymous": "login", "reader": "ok", "other_reader": "404", "outsider": "404", "coordinator": "403"}
PUBLIC = {v: "ok" for v in VISITORS}
SIGNED_IN = {"anonymous": "login", "reader": "ok", "other_reader": "ok", "outsider": "ok", "coordinator": "ok"}

# endpoint -> (method, expected outcome per visitor); destructive routes run last (close_study, then logout)
MATRIX = {
    "auth.index": ("GET", {**PUBLIC, "anonymous": "login"}),  # public, but sends visitors to sign in
    "auth.login": ("GET", PUBLIC),
    "coordinator.dashboard": ("GET", COORD),
    "coordinator.audit_log": ("GET", COORD),
    "coordinator.new_study": ("GET", COORD),
    "coordinator.study": ("GET", COORD),
    "coordinator.reader": ("GET", COORD),
    "coordinator.export_responses": ("GET", COORD),
    "coordinator.export_model": ("GET", COORD),
    "analysis.page": ("GET", COORD),
    "analysis.report": ("GET", COORD),
    "analysis.analysis_json": ("GET", COORD),
    "analysis.plan": ("GET", COORD),
    "jobs.page": ("GET", COORD),
    "jobs.status": ("GET", COORD),
    "reading.home": ("GET", READER_HOME),
    "reading.check": ("GET", STUDY_READER),
    "reading.check_pattern": ("GET", STUDY_READER),
    "reading.check_answer": ("POST", STUDY_READER),
    "reading.read": ("GET", STUDY_READER),
    "reading.next_trial": ("GET", STUDY_READER),
    "reading.region": ("GET", TRIAL_OWNER),
    "reading.respond": ("POST", TRIAL_OWNER),
    "accounts.page": ("GET", COORD),
    "accounts.confirm_reset": ("GET", COORD),
    "accounts.add": ("POST", COORD),
    "accounts.enable": ("POST", COORD),
    "accounts.reset_password": ("POST", COORD),  # without confirm=yes: sent to the confirmation page
    "coordinator.set_readers": ("POST", COORD),
    "coordinator.add_images": ("POST", COORD),
    "coordinator.import_folder": ("POST", COORD),
    "analysis.run": ("POST", COORD),
    "coordinator.open_study": ("POST", COORD),
    "accounts.sign_out_everywhere": ("POST", COORD),  # of the "bystander" account, so no visitor is signed out
    "accounts.disable": ("POST", COORD),  # the bystander again
    "corrections.confirm_reopen": ("GET", COORD),
    "corrections.confirm_delete_study": ("GET", COORD),  # the study is open: refused on its page (400)
    "corrections.confirm_delete_image": ("GET", COORD),
    "corrections.delete_image": ("POST", COORD),  # without confirm=yes: sent to the confirmation page
    "corrections.delete_study": ("POST", COORD),  # an open study: refused (400)
    "coordinator.close_study": ("POST", COORD),
    "corrections.reopen_study": ("POST", COORD),  # after closing, without a reason: refused (400)
    "auth.logout": ("POST", SIGNED_IN),
}


def _outcome(resp) -> str:
    if resp.status_code == 401 or (
        resp.status_code in (301, 302, 303) and "/login" in resp.headers.get("Location", "")
    ):
        return "login"
    if resp.status_code in (403, 404):
        return str(resp.status_code)
    return "ok"


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    app, study_id = demo_app(tmp_path_factory.mktemp("routes"))
    c = app.test_client()
    tok = login(c, "reader1")
    pass_display_check(c, study_id, tok)
    read_all(c, study_id, tok, limit=4)  # some responses, so the analysis has data
    trial = c.get(f"/reading/api/studies/{study_id}/next").json
    cc = app.test_client()
    ctok = login(cc, "coordinator")
    job = wait_job(cc, cc.post(f"/analysis/studies/{study_id}/run", data={"csrf_token": ctok}))
    assert job["state"] == "done", job
    from webapp.demo import ensure_user
    from webapp.models import AnalysisRun, User, db

    with app.app_context():
        run_id = db().query(AnalysisRun).first().id
        ensure_user(db(), "bystander", "reader", "bystander-pass")
        db().commit()
        user_id = db().query(User).filter_by(username="bystander").one().id
        from webapp.models import StudyImage

        image_id = db().query(StudyImage).filter_by(study_id=study_id).first().id
        reader_id = db().query(User).filter_by(username="reader1").one().id
    ids = {
        "study_id": study_id,
        "public_id": trial["trial"],
        "run_id": run_id,
        "job_id": job["id"],
        "user_id": user_id,
        "image_id": image_id,
        "reader_id": reader_id,
    }
    return app, ids


def test_every_route_is_in_the_matrix(study):
    app, _ = study
    endpoints = {r.endpoint for r in app.url_map.iter_rules() if r.endpoint != "static"}
    assert endpoints == set(MATRIX), f"add to MATRIX: {endpoints - set(MATRIX)}; stale: {set(MATRIX) - endpoints}"
    for ep in endpoints:  # every view declares who may use it
        assert getattr(app.view_functions[ep], "limen_roles", None), ep


def test_role_route_matrix(study):
    from flask import url_for

    app, ids = study
    rules = {r.endpoint: r for r in app.url_map.iter_rules() if r.endpoint != "static"}
    wrong, cells = [], 0
    clients = {}
    for visitor in VISITORS:  # one signed-in browser per visitor; enrolled readers pass the display check
        c = app.test_client()
        token = login(c, USERS[visitor]) if visitor != "anonymous" else csrf_from(c.get("/login").text)
        if visitor in ("reader", "other_reader"):
            pass_display_check(c, ids["study_id"], token)
        clients[visitor] = (c, token)
    for endpoint, (method, expected) in MATRIX.items():
        rule = rules[endpoint]
        with app.test_request_context():
            url = url_for(endpoint, **{k: ids[k] for k in rule.arguments})
        for visitor in VISITORS:
            c, token = clients[visitor]
            if method == "GET":
                resp = c.get(url)
            elif endpoint.startswith("reading."):
                body = {
                    "chosen_site": 1,
                    "chosen_position": 1,
                    "response_ms": 900,
                    "window": 500.0,
                    "level": 2000.0,
                    "zoom": 1,
                    "site": 0,
                    "viewing_distance_mm": 500,
                }
                resp = c.post(url, json=body, headers={"X-CSRFToken": token})
            else:
                resp = c.post(url, data={"csrf_token": token})
            cells += 1
            got = _outcome(resp)
            if got != expected[visitor]:
                wrong.append(
                    f"{method} {url} as {visitor}: expected {expected[visitor]}, got {got} ({resp.status_code})"
                )
    print(f"role x route matrix: {len(MATRIX)} routes x {len(VISITORS)} visitors = {cells} cells")
    assert cells == len(MATRIX) * len(VISITORS)
    assert not wrong, "\n".join(wrong)
