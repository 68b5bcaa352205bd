"""Analysis pages: the statistics of :func:`scorer.study.analyse_study` on a study's stored responses,
model observer beside the human readers (coordinators only)."""

from __future__ import annotations

from flask import Blueprint, Response as FlaskResponse, abort, current_app, flash, g, redirect, render_template, \
    url_for
from sqlalchemy import func, select

from webapp import services
from webapp.models import AnalysisRun, Response, Study, Trial
from webapp.security import REPORT_CSP, audit, db, role_required

bp = Blueprint("analysis", __name__, url_prefix="/analysis")
coordinator_only = role_required("coordinator")


def _study(study_id: int) -> Study:
    st = db().get(Study, study_id)
    if st is None:
        abort(404)
    return st


def _latest(study_id: int) -> AnalysisRun | None:
    return db().execute(select(AnalysisRun).where(AnalysisRun.study_id == study_id)
                        .order_by(AnalysisRun.id.desc())).scalars().first()


@bp.route("/studies/<int:study_id>")
@coordinator_only
def page(study_id):
    st = _study(study_id)
    n = db().scalar(select(func.count(Response.id)).join(Trial).where(Trial.study_id == st.id,
                                                                      Trial.practice.is_(False))) or 0
    return render_template("analysis/page.html", study=st, run=_latest(st.id), n_responses=n,
                           n_boot=current_app.config["ANALYSIS_N_BOOT"])


@bp.route("/studies/<int:study_id>/run", methods=["POST"])
@coordinator_only
def run(study_id):
    st = _study(study_id)
    s = db()
    n_boot = int(current_app.config["ANALYSIS_N_BOOT"])
    r = services.run_analysis(s, st, n_boot=n_boot, seed=int(st.seed))
    audit("run_analysis", st.id, n_responses=r.n_responses, n_boot=n_boot)
    s.commit()
    flash(f"Analysed {r.n_responses} responses.", "info")
    return redirect(url_for("analysis.page", study_id=st.id))


@bp.route("/studies/<int:study_id>/report/<int:run_id>")
@coordinator_only
def report(study_id, run_id):
    r = db().get(AnalysisRun, run_id)
    if r is None or r.study_id != study_id:
        abort(404)
    g.csp = REPORT_CSP
    return FlaskResponse(r.report_html, mimetype="text/html")


@bp.route("/studies/<int:study_id>/analysis.json")
@coordinator_only
def analysis_json(study_id):
    r = _latest(_study(study_id).id)
    if r is None:
        abort(404)
    return FlaskResponse(r.analysis_json, mimetype="application/json")
