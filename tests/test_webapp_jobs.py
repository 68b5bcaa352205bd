"""Background jobs of the web app (webapp.jobs): opening a study, the analysis and planning run outside the request.

The POST returns at once with a redirect to the job's page; the job's state and progress live in the ``jobs``
table, so any server thread (and a page reload) reads the same state; a failure keeps one line; the same operation
is not started twice; a job a killed server left behind is marked failed; readers never see a job.
"""

from __future__ import annotations

import datetime as _dt
import threading
import time

import pytest
from webapp_helpers import MINI, PASSWORDS, login, make_app, wait_job


def _draft_app(tmp_path, **config):
    """An app with a draft (not yet opened) demo study on the mini plate: 2 direct + 2 indirect images and a
    practice image per panel, 3 readers, a design its images can reach (±2 in ln)."""
    from webapp.demo import create_demo_study

    app = make_app(tmp_path, **config)
    out = create_demo_study(
        app,
        n_readers=3,
        images_per_detector=2,
        trials_per_reader=None,
        n_practice=2,
        repeat_fraction=0.25,
        layout_path=str(MINI),
        diameters_mm=None,
        half_width_ln=2.0,
        passwords=PASSWORDS,
        open_study=False,
    )
    return app, out["study_id"]


def _coordinator(app):
    c = app.test_client()
    return c, login(c, "coordinator")


def _jobs(app):
    from webapp.models import Job, db

    with app.app_context():
        rows = db().query(Job).order_by(Job.id).all()
        db().expunge_all()
        return rows


def test_open_study_job_runs_to_done_and_records_its_progress_in_the_database(tmp_path):
    from webapp.models import AuditEntry, Job, Region, Study, db

    app, sid = _draft_app(tmp_path)
    runner = app.extensions["limen_jobs"]
    seen = []
    real_progress = runner.progress

    def spy(job_id, text, fraction=None):  # the real writer runs; then another connection reads the row back
        from sqlalchemy.orm import Session

        real_progress(job_id, text, fraction)
        with Session(app.extensions["limen_engine"]) as other:  # not the job's own session
            row = other.get(Job, job_id)
            seen.append((text, fraction, row.state, row.progress_text, row.progress_fraction))

    runner.progress = spy
    c, tok = _coordinator(app)
    t0 = time.perf_counter()
    r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    post_s = time.perf_counter() - t0
    job = wait_job(c, r)
    print(f"POST to redirect {post_s * 1000:.0f} ms; progress steps {[s[0] for s in seen]}")
    assert job["state"] == "done" and job["error"] is None, job
    assert job["progress_fraction"] == 1.0 and job["result_url"] == f"/coordinator/studies/{sid}"
    # every step was in the database (another session read it back) while the job ran
    assert len(seen) >= 3, seen
    assert all(state == "running" and txt == text for text, _f, state, txt, _rf in seen), seen
    fractions = [rf for _t, _f, _s, _txt, rf in seen]
    assert fractions == sorted(fractions) and 0 < fractions[0] < fractions[-1] < 1
    assert any("planning" in s[0] for s in seen) and any("scoring" in s[0] for s in seen)
    assert any("tiles" in s[0] for s in seen)
    with app.app_context():
        st = db().get(Study, sid)
        assert st.status == "open" and db().query(Region).filter_by(study_id=sid).count() == 6 * 18
        row = db().get(Job, job["id"])
        assert row.active_key is None and row.started_at <= row.finished_at
        (entry,) = db().query(AuditEntry).filter_by(action="open_study", study_id=sid).all()
        assert entry.user_id == row.created_by  # the job acts for the coordinator who started it
    page = c.get(f"/jobs/{job['id']}").text
    assert 'id="job-result"' in page and "<progress" in page and "Caution." in page
    assert "job.js" not in page  # a finished job's page stops polling
    # the study page no longer offers to open it; a second open is refused with one line
    r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    assert r.status_code == 400 and "already open" in r.text


def test_a_failing_job_stores_its_one_line_error_and_leaves_the_study_as_it_was(tmp_path):
    from webapp.models import Region, Study, StudyImage, db

    app, sid = _draft_app(tmp_path)
    with app.app_context():
        im = db().query(StudyImage).filter_by(study_id=sid).first()
        stored = app.config["STORE_DIR"] + "/" + im.stored_name
    with open(stored, "r+b") as fh:  # the stored DICOM is damaged after upload (disk fault, someone's editor)
        fh.truncate(300)
    c, tok = _coordinator(app)
    job = wait_job(c, c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok}))
    assert job["state"] == "failed" and job["result_url"] is None, job
    err = job["error"]
    assert err and "\n" not in err and "Traceback" not in err and im.stored_name in err, err
    page = c.get(f"/jobs/{job['id']}").text
    assert 'id="job-error"' in page and im.stored_name in page and "Caution." in page
    with app.app_context():  # rolled back: still a draft, no regions, no trials
        assert db().get(Study, sid).status == "draft"
        assert db().query(Region).filter_by(study_id=sid).count() == 0
    # the failed job no longer blocks the operation: a new start makes a new job
    r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    assert r.status_code == 302 and r.headers["Location"] != f"/jobs/{job['id']}"
    assert wait_job(c, r)["state"] == "failed"


def test_a_second_start_while_the_job_runs_returns_the_same_job(tmp_path, monkeypatch):
    from webapp import opening
    from webapp.models import Study, db

    app, sid = _draft_app(tmp_path)
    release, entered = threading.Event(), threading.Event()
    real_open = opening.open_study

    def held_open(*args, **kwargs):  # the real opening, held until both POSTs have arrived
        entered.set()
        assert release.wait(60)
        return real_open(*args, **kwargs)

    monkeypatch.setattr(opening, "open_study", held_open)
    c, tok = _coordinator(app)
    c2, tok2 = _coordinator(app)  # a second tab or a second coordinator
    r1 = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    assert entered.wait(30)
    r2 = c2.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok2})
    assert r1.status_code == r2.status_code == 302
    assert r1.headers["Location"] == r2.headers["Location"]
    assert c2.get(r2.headers["Location"] + ".json").json["state"] == "running"
    # while it runs, the draft cannot change under it, and the study page links to the job
    assert "open-job-link" in c.get(f"/coordinator/studies/{sid}").text
    r = c.post(f"/coordinator/studies/{sid}/readers", data={"csrf_token": tok, "readers": []})
    assert r.status_code == 400 and "being opened" in r.text
    release.set()
    assert wait_job(c, r1)["state"] == "done"
    assert len(_jobs(app)) == 1
    with app.app_context():
        assert db().get(Study, sid).status == "open"


def test_a_job_left_running_by_a_killed_server_is_marked_failed_at_start_up(tmp_path):
    from webapp.models import Job, User, db

    app, sid = _draft_app(tmp_path)
    long_ago = _dt.datetime(2026, 12, 1, 8, 0)
    with app.app_context():
        uid = db().query(User).filter_by(username="coordinator").one().id
        db().add_all(
            [
                Job(kind="open_study", study_id=sid, created_by=uid, state="running", active_key=f"open_study:{sid}",
                    started_at=long_ago, heartbeat_at=long_ago),
                Job(kind="plan", created_by=uid, state="queued", active_key=f"plan:user:{uid}", heartbeat_at=long_ago),
                # a job of a server still running (fresh heartbeat), e.g. while `limen users` builds its own app
                Job(kind="analysis", study_id=sid, created_by=uid, state="running", active_key=f"analysis:{sid}",
                    heartbeat_at=_dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None)),
            ]
        )  # fmt: skip
        db().commit()
    app2 = make_app(tmp_path)  # the restarted server, same instance folder
    dead, queued, live = _jobs(app2)
    for j in (dead, queued):
        assert j.state == "failed" and j.active_key is None and j.finished_at is not None
        assert "\n" not in j.error and "server stopped" in j.error
    assert live.state == "running" and live.active_key == f"analysis:{sid}"
    c, tok = _coordinator(app2)
    page = c.get(f"/jobs/{dead.id}").text
    assert 'id="job-error"' in page and "server stopped" in page
    # the operation can be started again
    assert wait_job(c, c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok}))["state"] == "done"


def test_a_job_page_seen_after_its_heartbeat_stopped_shows_it_failed(tmp_path):
    """A server killed and restarted within the stale limit: the start-up sweep leaves the job, its page ends it."""
    from webapp.models import Job, User, db

    app, sid = _draft_app(tmp_path, JOB_STALE_S=0.5)
    with app.app_context():
        uid = db().query(User).filter_by(username="coordinator").one().id
        now = _dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None)
        db().add(Job(kind="analysis", study_id=sid, created_by=uid, state="running", heartbeat_at=now))
        db().commit()
    c, _tok = _coordinator(app)
    (job,) = _jobs(app)
    time.sleep(1.0)
    st = c.get(f"/jobs/{job.id}.json").json
    assert st["state"] == "failed" and "server stopped" in st["error"]


@pytest.mark.parametrize("who", ["reader1", "outsider", "anonymous"])
def test_a_reader_cannot_see_a_job(tmp_path, who):
    from webapp.demo import ensure_user
    from webapp.models import db

    app, sid = _draft_app(tmp_path)
    with app.app_context():
        ensure_user(db(), "outsider", "reader", "outsider-pass")
        db().commit()
    c, tok = _coordinator(app)
    job = wait_job(c, c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok}))
    v = app.test_client()
    if who != "anonymous":
        login(v, who)
    page, status = v.get(f"/jobs/{job['id']}"), v.get(f"/jobs/{job['id']}.json")
    if who == "anonymous":
        assert page.status_code == 302 and "/login" in page.headers["Location"]
        assert status.status_code == 401
    else:
        assert page.status_code == status.status_code == 403
        assert "progress_fraction" not in status.text
    assert c.get("/jobs/999999").status_code == 404  # no such job, even for a coordinator


def test_analysis_and_planning_jobs_report_their_progress(tmp_path):
    from webapp_helpers import demo_app, read_all, reader_client

    app, sid = demo_app(tmp_path)
    rc, rtok = reader_client(app, sid)
    read_all(rc, sid, rtok)
    runner = app.extensions["limen_jobs"]
    seen = []
    real_progress = runner.progress
    runner.progress = lambda job_id, text, fraction=None: (
        seen.append((text, fraction)),
        real_progress(job_id, text, fraction),
    )
    c, tok = _coordinator(app)
    job = wait_job(c, c.post(f"/analysis/studies/{sid}/run", data={"csrf_token": tok}))
    assert job["state"] == "done" and job["result_url"] == f"/analysis/studies/{sid}", job
    assert seen[0][0].startswith("reading the stored responses") and any("bootstrap" in t for t, _f in seen)
    assert 'id="report"' in c.get(job["result_url"]).text
    seen.clear()
    form = {
        "csrf_token": tok, "ratio": "2.0", "diameter_mm": "0.25", "target_power": "50", "alpha": "0.05",
        "readers": "4", "images": "8", "n_sim": "10", "seed": "4", "source": "stated", "median_factor": "1.6",
        "cv_between": "15",
    }  # fmt: skip
    job = wait_job(c, c.post("/analysis/plan", data=form))
    assert job["state"] == "done", job
    assert [f for _t, f in seen] == [k / 10 for k in range(1, 11)]  # one step per simulated study
    assert 'id="power-table"' in c.get(f"/jobs/{job['id']}").text
