"""Analysis pages: the statistics of :func:`scorer.study.analyse_study` on a study's stored responses,
model observer beside the human readers (coordinators only)."""

from __future__ import annotations

from flask import Blueprint, abort, current_app, g, redirect, render_template, url_for
from flask import Response as FlaskResponse
from sqlalchemy import func, select

from webapp import study_analysis
from webapp.models import AnalysisRun, Response, Study, Trial, db
from webapp.security import REPORT_CSP, audit, role_required, study_or_404

bp = Blueprint("analysis", __name__, url_prefix="/analysis")
coordinator_only = role_required("coordinator")


def _study(study_id: int) -> Study:
    return study_or_404(study_id)


def _latest(study_id: int) -> AnalysisRun | None:
    return (
        db()
        .execute(select(AnalysisRun).where(AnalysisRun.study_id == study_id).order_by(AnalysisRun.id.desc()))
        .scalars()
        .first()
    )


@bp.route("/studies/<int:study_id>")
@coordinator_only
def page(study_id):
    st = _study(study_id)
    n = (
        db().scalar(
            select(func.count(Response.id)).join(Trial).where(Trial.study_id == st.id, Trial.practice.is_(False))
        )
        or 0
    )
    from webapp.report_view import in_app_report

    run_ = _latest(st.id)
    return render_template(
        "analysis/page.html",
        study=st,
        run=run_,
        report=in_app_report(run_.report_html) if run_ else None,
        n_responses=n,
        n_boot=current_app.config["ANALYSIS_N_BOOT"],
        job=_running(f"analysis:{st.id}"),
    )


def _analysis_work(n_boot: int):
    """The background work of an analysis (webapp.jobs): the statistics and the stored report."""

    def work(s, job, progress):
        from webapp.jobs import JobResult

        st = s.get(Study, job.study_id)
        r = study_analysis.run_analysis(s, st, n_boot=n_boot, seed=int(st.seed), progress=progress)
        s.flush()
        audit("run_analysis", st.id, by=job.created_by, n_responses=r.n_responses, n_boot=n_boot)
        return JobResult(ref=f"analysis_run:{r.id}", message=f"Analysed {r.n_responses} responses.")

    return work


def _running(key: str):
    from webapp.models import Job

    return db().execute(select(Job).where(Job.active_key == key)).scalars().first()


@bp.route("/studies/<int:study_id>/run", methods=["POST"])
@coordinator_only
def run(study_id):
    """Start the analysis in the background (or find the job already running it) and show its progress."""
    from flask_login import current_user

    st = _study(study_id)
    n_boot = int(current_app.config["ANALYSIS_N_BOOT"])
    job, _started = current_app.extensions["limen_jobs"].start(
        db(), "analysis", f"analysis:{st.id}", int(current_user.id), _analysis_work(n_boot), study_id=st.id
    )
    return redirect(url_for("jobs.page", job_id=job.id))


@bp.route("/studies/<int:study_id>/report/<int:run_id>")
@coordinator_only
def report(study_id, run_id):
    """The stored report as written by scorer.reports (self-contained: its own style, figures inline), as a file
    to download; the analysis page shows the same report in the app's style (webapp.report_view)."""
    r = db().get(AnalysisRun, run_id)
    if r is None or r.study_id != study_id:
        abort(404)
    g.csp = REPORT_CSP
    stamp = r.created_at.strftime("%Y-%m-%d")
    return FlaskResponse(
        r.report_html,
        mimetype="text/html",
        headers={"Content-Disposition": f'attachment; filename="limen-study-{study_id}-analysis-{stamp}.html"'},
    )


@bp.route("/studies/<int:study_id>/analysis.json")
@coordinator_only
def analysis_json(study_id):
    r = _latest(_study(study_id).id)
    if r is None:
        abort(404)
    return FlaskResponse(r.analysis_json, mimetype="application/json")


# --------------------------------------------------------------------------- study planning
MAX_SIMULATED_STUDIES = 400  # keeps one planning request to about a minute on a small server


def _int_list(raw: str, label: str) -> list[int]:
    from scorer.errors import LimenError

    try:
        vals = sorted({int(x) for x in raw.replace(";", ",").split(",") if x.strip()})
    except ValueError:
        raise LimenError(f"{label}: whole numbers separated by commas, e.g. 4, 6, 8") from None
    if not vals or len(vals) > 6 or min(vals) < 2 or max(vals) > 200:
        raise LimenError(f"{label}: 1–6 numbers between 2 and 200")
    return vals


def _plan_work(params: dict):
    """The background work of a planning run (webapp.jobs): power by simulation, one step per simulated study."""

    def work(s, job, progress):
        from scorer.reports.html import dumps
        from scorer.study import ReaderPopulation, power_by_simulation
        from webapp.jobs import JobResult

        p = params
        plan_ = power_by_simulation(
            p["ratio"],
            p["readers"],
            p["images"],
            population=ReaderPopulation(**p["population"]),
            diameter_mm=p["diameter_mm"],
            alpha=p["alpha"],
            target_power=p["target_power"],
            n_sim=p["n_sim"],
            n_boot=50,
            seed=p["seed"],
            progress=lambda done, total: progress(f"{done} of {total} simulated studies", done / max(total, 1)),
        )
        audit(
            "plan_study",
            None,
            by=job.created_by,
            ratio=p["ratio"],
            diameter_mm=p["diameter_mm"],
            readers=p["readers"],
            images=p["images"],
            n_sim=p["n_sim"],
            source=p["source"],
            recommended=plan_.recommended,
        )
        doc = {"plan": plan_.to_json(), "readers": p["readers"], "images": p["images"], "source": p["source"]}
        return JobResult(message="Power estimated.", json=dumps(doc))

    return work


def plan_result(job) -> dict | None:
    """A finished planning job's power table, as the plan template reads it."""
    import json

    if job.kind != "plan" or not job.result_json:
        return None
    doc = json.loads(job.result_json)
    doc["grid"] = {(c["n_readers"], c["n_images"]): c for c in doc["plan"]["cells"]}
    return doc


@bp.route("/plan", methods=["GET", "POST"])
@coordinator_only
def plan():
    """Readers × images needed to detect a detector ratio with the target power (scorer.study.planning)."""
    import json

    from flask import request
    from flask_login import current_user

    from scorer.errors import LimenError
    from scorer.study import ReaderPopulation, population_from_analysis

    pilots = (
        db()
        .execute(select(Study).join(AnalysisRun, AnalysisRun.study_id == Study.id).distinct().order_by(Study.id))
        .scalars()
        .all()
    )
    form = request.form if request.method == "POST" else {}
    error = None
    if request.method == "POST":
        try:

            def num(key, lo, hi, label):
                try:
                    v = float(form.get(key, ""))
                except ValueError:
                    raise LimenError(f"{label} must be a number") from None
                if not lo <= v <= hi:
                    raise LimenError(f"{label} must lie between {lo:g} and {hi:g}")
                return v

            ratio = num("ratio", 1.01, 5.0, "ratio to detect")
            diameter = num("diameter_mm", 0.05, 5.0, "disc diameter (mm)")
            alpha = num("alpha", 0.001, 0.2, "significance level")
            target = num("target_power", 50, 99, "target power (%)") / 100
            n_sim = int(num("n_sim", 10, 400, "simulated studies per design"))
            readers = _int_list(form.get("readers", ""), "readers")
            images = _int_list(form.get("images", ""), "images per detector")
            if len(readers) * len(images) * n_sim > MAX_SIMULATED_STUDIES:
                raise LimenError(
                    f"{len(readers) * len(images)} designs × {n_sim} simulated studies is more than "
                    f"{MAX_SIMULATED_STUDIES}: try fewer designs or fewer simulations"
                )
            if form.get("source") == "pilot":
                st = _study(int(form.get("pilot") or 0))
                run_ = _latest(st.id)
                if run_ is None:
                    raise LimenError("the pilot study has not been analysed yet")
                population = population_from_analysis(json.loads(run_.analysis_json))
                source = f"pilot study “{st.name}” ({run_.n_responses} responses)"
            else:
                population = ReaderPopulation(
                    median_factor=num("median_factor", 1.0, 10.0, "human/model factor"),
                    cv_between=num("cv_between", 0.0, 100.0, "between-reader CV (%)") / 100,
                )
                source = "stated between-reader spread"
            params = {
                "ratio": ratio,
                "readers": readers,
                "images": images,
                "population": {"median_factor": population.median_factor, "cv_between": population.cv_between},
                "diameter_mm": diameter,
                "alpha": alpha,
                "target_power": target,
                "n_sim": n_sim,
                "seed": int(num("seed", 0, 2**31 - 1, "seed")) if form.get("seed") else 0,
                "source": source,
            }
            uid = int(current_user.id)
            job, _started = current_app.extensions["limen_jobs"].start(
                db(), "plan", f"plan:user:{uid}", uid, _plan_work(params), params=params
            )
            return redirect(url_for("jobs.page", job_id=job.id))
        except LimenError as exc:
            error = str(exc)
    return render_template("analysis/plan.html", pilots=pilots, form=form, error=error), (400 if error else 200)
