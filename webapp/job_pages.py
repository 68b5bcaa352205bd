"""Job pages: the progress of a background job (webapp.jobs) and its JSON status (coordinators only)."""

from __future__ import annotations

from flask import Blueprint, abort, current_app, jsonify, render_template, url_for

from webapp.models import Job, db
from webapp.security import role_required

bp = Blueprint("jobs", __name__, url_prefix="/jobs")
coordinator_only = role_required("coordinator")

TITLES = {"open_study": "Opening the study", "analysis": "Analysis", "plan": "Study planning"}


def _job(job_id: int) -> Job:
    """The job, after ending it if its server stopped (heartbeat too old), or a 404 page."""
    from webapp.jobs import fail_stale_jobs

    job = db().get(Job, job_id)
    if job is None:
        abort(404)
    runner = current_app.extensions["limen_jobs"]
    if not job.finished and not runner.is_live(job.id):
        if fail_stale_jobs(db(), runner.stale_s, runner.live_ids()):
            db().refresh(job)
    return job


def result_url(job: Job) -> str | None:
    """Where a finished job's result is shown."""
    if job.state != "done":
        return None
    kind, _, ident = (job.result_ref or "").partition(":")
    if kind == "study":
        return url_for("coordinator.study", study_id=int(ident))
    if kind == "analysis_run":
        return url_for("analysis.page", study_id=job.study_id)
    if job.kind == "plan":
        return url_for("jobs.page", job_id=job.id) + "#power-table"
    return None


@bp.route("/<int:job_id>")
@coordinator_only
def page(job_id):
    from webapp.analysis import plan_result
    from webapp.models import Study

    job = _job(job_id)
    study = db().get(Study, job.study_id) if job.study_id else None
    return render_template(
        "jobs/page.html",
        job=job,
        title=TITLES.get(job.kind, job.kind),
        study=study,
        result_url=result_url(job),
        result=plan_result(job),
    )


@bp.route("/<int:job_id>.json")
@coordinator_only
def status(job_id):
    job = _job(job_id)
    return jsonify(
        id=job.id,
        kind=job.kind,
        study_id=job.study_id,
        state=job.state,
        progress_text=job.progress_text,
        progress_fraction=job.progress_fraction,
        error=job.error,
        result_url=result_url(job),
        created_at=job.created_at.isoformat() + "Z",
        started_at=job.started_at.isoformat() + "Z" if job.started_at else None,
        finished_at=job.finished_at.isoformat() + "Z" if job.finished_at else None,
    )
