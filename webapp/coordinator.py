"""Coordinator pages: studies (create, add images, enrol readers, open, close), progress, export, audit log
(accounts: :mod:`webapp.account_pages`; reopening and deleting: :mod:`webapp.corrections`)."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from scorer.phantom.layout import Layout

import datetime as _dt
import io
import json
import secrets
from pathlib import Path
from typing import cast

from flask import (
    Blueprint,
    abort,
    current_app,
    flash,
    redirect,
    render_template,
    request,
    url_for,
)
from flask import (
    Response as FlaskResponse,
)

from scorer.errors import LimenError
from webapp import content_store, export, opening, queries, study_edits, upload_checks
from webapp.models import Enrolment, Study, StudyImage, User, db, utcnow
from webapp.security import audit, role_required, study_or_404, upload

bp = Blueprint("coordinator", __name__, url_prefix="/coordinator")
coordinator_only = role_required("coordinator")


def _study(study_id: int) -> Study:
    return study_or_404(study_id)


def _draft(study_id: int) -> Study:
    return study_edits.require_draft(db(), _study(study_id))


def _add_image(
    st: Study,
    stream,
    name: str,
    detector: str,
    known: set,
    conv_path=None,
    conversion=None,
    spacing=None,
    practice: bool = False,
) -> dict:
    """Store one image file under its hash, check it reads as an image, add it to the study (once: an image the
    study already has is returned with ``skipped``)."""
    label = content_store.safe_label(name)
    suffix = content_store.check_suffix(name, content_store.IMAGE_SUFFIXES, "image file")
    store = Path(current_app.config["STORE_DIR"])
    stored = content_store.store_file(
        stream,
        suffix,
        store,
        current_app.config["MAX_IMAGE_BYTES"],
        label,
        check=lambda p: upload_checks.validate_image_file(p, label, spacing, conversion),
    )
    digest, path = stored.sha256, stored.path
    if digest in known:
        return {"label": label, "sha256": digest, "skipped": True}
    known.add(digest)
    db().add(
        StudyImage(
            study_id=st.id,
            sha256=digest,
            stored_name=path.name,
            code=f"img-{digest[:10]}",
            detector=detector,
            conversion_file=conv_path,
            pixel_spacing_mm=spacing,
            label=label,
            practice=practice,
        )
    )
    return {"label": label, "sha256": digest, "practice": practice}


def _detector_label(form) -> str:
    detector = (form.get("detector") or "").strip()
    if not detector or len(detector) > 100:
        raise LimenError("detector label: 1–100 characters (readers never see it)")
    return detector


def _readers() -> list[User]:
    return list(queries.reader_accounts(db()))


def _num(form, key, kind, lo, hi, label, default=None):
    raw = (form.get(key) or "").strip()
    if raw == "" and default is not None:
        return default
    try:
        v = kind(raw)
    except ValueError:
        raise LimenError(f"{label} must be a number, got {raw!r}") from None
    if not lo <= v <= hi:
        raise LimenError(f"{label} must lie between {lo:g} and {hi:g}, got {v:g}")
    return v


# --------------------------------------------------------------------------- dashboard and audit log
@bp.route("/")
@coordinator_only
def dashboard():
    studies = queries.studies_newest_first(db())
    return render_template("coordinator/dashboard.html", studies=studies, readers=_readers())


@bp.route("/audit")
@coordinator_only
def audit_log():
    entries = queries.recent_audit_entries(db(), limit=500)
    return render_template("coordinator/audit.html", entries=entries)


# --------------------------------------------------------------------------- creating a study
@bp.route("/studies/new", methods=["GET", "POST"])
@upload
@coordinator_only
def new_study():
    layouts = content_store.bundled_layouts()
    if request.method == "GET":
        return render_template("coordinator/new_study.html", layouts=layouts, readers=_readers(), form={})
    f = request.form
    try:
        name = (f.get("name") or "").strip()
        if not name or len(name) > 200:
            raise LimenError("study name: 1–200 characters")
        upload = request.files.get("layout_file")
        store = Path(current_app.config["STORE_DIR"])
        if upload and upload.filename:
            label = content_store.safe_label(upload.filename)
            suffix = content_store.check_suffix(upload.filename, content_store.LAYOUT_SUFFIXES, "layout file")
            stored = content_store.store_file(
                upload.stream,
                suffix,
                store / "layouts",
                1024 * 1024,
                label,
                check=lambda p: upload_checks.validate_layout_file(p, label),
            )
            path, layout = stored.path, cast("Layout", stored.checked)  # what validate_layout_file returned
        else:
            key = f.get("layout") or ""
            if key not in layouts:
                raise LimenError("choose a bundled layout or upload one")
            path = Path(layouts[key])
            layout = upload_checks.validate_layout_file(path, key)
        from webapp import design

        diameters = design.parse_diameters(f.get("diameters", ""), layout)
        placement_rule = f.get("placement") or "psi"
        if placement_rule not in design.PLACEMENTS:
            raise LimenError(f"placement rule must be one of {', '.join(design.PLACEMENTS)}")
        study = Study(
            name=name,
            created_by=_current_id(),
            layout_file=str(path),
            layout_name=layout.name,
            m_alternatives=max(t.m_alternatives for t in layout.targets),
            trials_per_reader=_num(f, "trials_per_reader", int, 1, 100000, "most scored trials per reader", 600),
            placement=placement_rule,
            diameters_json=json.dumps(diameters) if diameters else None,
            half_width_ln=_num(
                f, "half_width_ln", float, 0.05, 3.0, "wanted CI half-width (ln)", design.DEFAULT_HALF_WIDTH_LN
            ),
            seed=_num(f, "seed", int, 0, 2**31 - 1, "randomisation seed", secrets.randbelow(2**31)),
            repeat_fraction=_num(f, "repeat_percent", float, 0, 100, "repeated trials (%)", 0.0) / 100.0,
            n_practice=_num(f, "n_practice", int, 0, 50, "practice trials", 4),
            show_feedback=f.get("show_feedback") == "on",
            observer=f.get("observer") if f.get("observer") in ("npw", "npwe") else "npwe",
            viewing_distance_mm=_num(f, "viewing_distance_mm", float, 100, 2000, "viewing distance (mm)", 500.0),
            magnification=_num(f, "magnification", int, 1, 8, "display magnification", 1),
        )
    except LimenError as exc:
        flash(str(exc), "error")
        return render_template("coordinator/new_study.html", layouts=layouts, readers=_readers(), form=f), 400
    s = db()
    s.add(study)
    s.flush()
    _set_enrolment(study, request.form.getlist("readers"))
    audit(
        "create_study",
        study.id,
        name=name,
        layout=layout.name,
        trials_per_reader=study.trials_per_reader,
        seed=study.seed,
        repeat_fraction=study.repeat_fraction,
        n_practice=study.n_practice,
        show_feedback=study.show_feedback,
        observer=study.observer,
        placement=study.placement,
        diameters_mm=diameters,
        half_width_ln=study.half_width_ln,
    )
    s.commit()
    flash("Study created. Add its images, then open it for reading.", "info")
    return redirect(url_for("coordinator.study", study_id=study.id))


def _current_id() -> int:
    from flask_login import current_user

    return int(current_user.id)


def _set_enrolment(study: Study, ids) -> None:
    s = db()
    wanted = set()
    for raw in ids:
        try:
            wanted.add(int(raw))
        except ValueError:
            raise LimenError(f"unknown reader {raw!r}") from None
    readers = {u.id for u in _readers()}
    if wanted - readers:
        raise LimenError("a chosen reader account does not exist or is not a reader")
    have = {e.user_id: e for e in study.enrolments}
    for uid in wanted - set(have):
        s.add(Enrolment(study_id=study.id, user_id=uid))
    for uid in set(have) - wanted:
        s.delete(have[uid])


@bp.route("/studies/<int:study_id>")
@coordinator_only
def study(study_id):
    return study_page(_study(study_id))


def study_page(st: Study, status: int = 200, **extra):
    """The study's page (also answering a POST whose outcome it shows: an upload's refused files, an error)."""
    from webapp import progress
    from webapp.design import PLACEMENT_LABELS, plan_of

    notes = json.loads(st_notes) if (st_notes := queries.opening_notes_json(db(), st.id)) else []
    rows = (
        progress.readers_progress(db(), st, progress.stalled_after(current_app.config)) if st.status != "draft" else []
    )
    page = render_template(
        "coordinator/study.html",
        plan=plan_of(st),
        placement_labels=PLACEMENT_LABELS,
        study=st,
        progress=rows,
        stalled_minutes=progress.stalled_after(current_app.config).total_seconds() / 60,
        readers=_readers(),
        enrolled={e.user_id for e in st.enrolments},
        notes=notes,
        open_job=open_job(st.id) if st.status == "draft" else None,
        **extra,
    )
    return page, status


@bp.errorhandler(LimenError)
def show_refusal(exc):
    """A refused form of a study's page (bad upload settings, a study not ready to open …) is shown on that page
    with its one-line reason, not on a dead-end error page; elsewhere the app's error page."""
    from webapp.security import wants_json

    db().rollback()
    study_id = (request.view_args or {}).get("study_id")
    st = db().get(Study, study_id) if study_id is not None else None
    from flask import g, jsonify

    g.refusal_reason = str(exc)  # for the audit of refused requests (webapp.activity)
    if wants_json():
        return jsonify(error=str(exc)), 400
    if st is None:
        return render_template("error.html", title="Cannot use this input", message=str(exc)), 400
    return study_page(st, 400, error=str(exc))


@bp.route("/studies/<int:study_id>/readers/<int:reader_id>")
@coordinator_only
def reader(study_id, reader_id):
    """One reader in one study: answers, state, every display check, refused actions."""
    from webapp import progress

    st = _study(study_id)
    rows = [
        r
        for r in progress.readers_progress(db(), st, progress.stalled_after(current_app.config))
        if r.user_id == reader_id
    ]
    if not rows:
        abort(404)
    user = db().get(User, reader_id)
    if user is None:
        abort(404)
    return render_template(
        "coordinator/reader.html",
        study=st,
        p=rows[0],
        refused=progress.refused_actions(db(), st, user),
        stalled_minutes=progress.stalled_after(current_app.config).total_seconds() / 60,
    )


@bp.route("/studies/<int:study_id>/readers", methods=["POST"])
@coordinator_only
def set_readers(study_id):
    st = _draft(study_id)
    _set_enrolment(st, request.form.getlist("readers"))
    audit("set_readers", st.id, readers=sorted(request.form.getlist("readers")))
    db().commit()
    flash("Readers updated.", "info")
    return redirect(url_for("coordinator.study", study_id=st.id))


@bp.route("/studies/<int:study_id>/images", methods=["POST"])
@upload
@coordinator_only
def add_images(study_id):
    st = _draft(study_id)
    detector = _detector_label(request.form)
    spacing = _num(request.form, "pixel_spacing_mm", float, 0.005, 5.0, "pixel spacing (mm)", 0.0) or None
    conv_path, conversion = None, None
    conv = request.files.get("conversion_file")
    if conv and conv.filename:
        label = content_store.safe_label(conv.filename)
        suffix = content_store.check_suffix(conv.filename, content_store.LAYOUT_SUFFIXES, "conversion function file")
        stored = content_store.store_file(
            conv.stream,
            suffix,
            Path(current_app.config["STORE_DIR"]) / "conversions",
            1024 * 1024,
            label,
            check=lambda p: upload_checks.validate_conversion_file(p, label),
        )
        conversion, conv_path = stored.checked, str(stored.path)
    files = [fs for fs in request.files.getlist("images") if fs and fs.filename]
    if not files:
        raise LimenError("choose at least one image file (DICOM, TIFF, PNG or .npy)")
    known = {im.sha256 for im in st.images}
    practice = request.form.get("practice") == "on"
    added: list[dict] = []
    skipped: list[dict] = []
    refused: list[dict] = []
    for fs in files:  # each file accepted or refused on its own: one bad file does not cost the batch
        label = content_store.safe_label(fs.filename)
        try:
            a = _add_image(st, fs.stream, fs.filename or "", detector, known, conv_path, conversion, spacing, practice)
        except LimenError as exc:
            reason = str(exc)
            refused.append({"label": label, "reason": reason.removeprefix(f"{label}: ")})
            continue
        (skipped if a.get("skipped") else added).append(a)
    audit(
        "add_images", st.id, detector=detector, images=added, conversion=conv_path, refused=refused, practice=practice
    )
    db().commit()
    if not refused:
        what = "practice image(s), never scored," if practice else "image(s)"
        flash(f"Added {len(added)} {what} from detector {detector}.", "info")
        for a in skipped:
            flash(f"{a['label']}: the same image is already in the study; skipped.", "info")
        return redirect(url_for("coordinator.study", study_id=st.id))
    db().refresh(st)  # its images, as committed
    result = {"detector": detector, "added": added, "skipped": skipped, "refused": refused}
    if not (added or skipped):
        from flask import g

        g.refusal_reason = f"none of the {len(refused)} uploaded file(s) could be used"
    # nothing accepted: the request failed (400; a conversion function sent with it is not kept)
    return study_page(st, 200 if added or skipped else 400, upload=result)


@bp.route("/studies/<int:study_id>/import", methods=["POST"])
@coordinator_only
def import_folder(study_id):
    """Add the images of a folder already scored by ``limen score --out`` (inside the server's import root),
    with the conversion function that scoring used."""
    st = _draft(study_id)
    root = current_app.config.get("IMPORT_ROOT")
    if not root:
        raise LimenError("folder import is switched off (start the server with --import-root DIR)")
    root = Path(root).resolve()
    folder = (root / (request.form.get("folder") or "").strip()).resolve()
    if not _inside(root, folder):
        raise LimenError("the folder must lie inside the import root")
    results = folder / "results.json"
    if not results.is_file():
        raise LimenError("no results.json here: give a folder written by `limen score --out`", folder.name)
    if not _inside(root, results.resolve()):
        raise LimenError("results.json links to a file outside the import root", folder.name)
    detector = _detector_label(request.form)
    try:
        info = json.loads(results.read_text(encoding="utf-8"))
        entries = [Path(im["path"]) for im in info["images"]]
        conv = (info.get("settings") or {}).get("conversion")
    except (ValueError, KeyError, TypeError, AttributeError):
        raise LimenError("results.json is not a `limen score` result", folder.name) from None
    conv_path, conversion = None, None
    if conv:
        text = json.dumps(conv, sort_keys=True).encode()
        what = f"{folder.name}/results.json conversion"
        stored = content_store.store_file(
            io.BytesIO(text),
            ".json",
            Path(current_app.config["STORE_DIR"]) / "conversions",
            1024 * 1024,
            "conversion",
            check=lambda p: upload_checks.validate_conversion_file(p, what),
        )
        conversion, conv_path = stored.checked, str(stored.path)
    known = {im.sha256 for im in st.images}
    added = []
    for p in entries:
        src = (p if p.is_absolute() else folder / p).resolve()  # symbolic links and '..' followed
        if not _inside(root, src):
            raise LimenError(f"image {p.name} listed in results.json lies outside the import root", folder.name)
        if not src.is_file():
            raise LimenError(f"image {p.name} listed in results.json is missing", folder.name)
        with open(src, "rb") as fh:
            a = _add_image(st, fh, src.name, detector, known, conv_path, conversion)
        if a.get("skipped"):
            flash(f"{a['label']}: the same image is already in the study; skipped.", "info")
        else:
            added.append(a)
    audit("import_folder", st.id, folder=str(folder), detector=detector, images=added, conversion=conv_path)
    db().commit()
    flash(f"Imported {len(added)} image(s) from {folder.name}.", "info")
    return redirect(url_for("coordinator.study", study_id=st.id))


def _inside(root: Path, path: Path) -> bool:
    """Whether a resolved path is the (resolved) import root or lies below it."""
    return path == root or root in path.parents


def _open_study_work(store_dir: Path):
    """The background work of opening a study (webapp.jobs): scores, regions, display pixels, schedules."""

    def work(s, job, progress):
        from webapp.jobs import JobResult

        st = s.get(Study, job.study_id)
        if st is None or st.status != "draft":
            raise LimenError("the study is already open or closed")
        notes = opening.open_study(s, st, store_dir, progress=progress)
        st.status = "open"
        st.opened_at = utcnow()
        audit(
            "open_study",
            st.id,
            by=job.created_by,
            notes=notes,
            region_px=st.region_rows,
            images=len(st.images),
            readers=len(st.enrolments),
        )
        return JobResult(ref=f"study:{st.id}", message="Study open: readers can start.")

    return work


def open_job(study_id: int):
    """The queued or running job opening this study, if any."""
    return study_edits.open_job(db(), study_id)


@bp.route("/studies/<int:study_id>/open", methods=["POST"])
@coordinator_only
def open_study(study_id):
    """Start opening the study in the background (or find the job already doing it) and show its progress."""
    st = _study(study_id)
    if st.status != "draft":
        raise LimenError("the study is already open or closed")
    if not st.images:
        raise LimenError("the study has no images yet; add images before opening it")
    if not st.enrolments:
        raise LimenError("no readers are enrolled; choose at least one reader")
    _check_design(st)  # refuses a design that cannot reach its CI, saying what to change (before any scoring)
    job, _started = current_app.extensions["limen_jobs"].start(
        db(),
        "open_study",
        f"open_study:{st.id}",
        _current_id(),
        _open_study_work(Path(current_app.config["STORE_DIR"])),
        study_id=st.id,
    )
    return redirect(url_for("jobs.page", job_id=job.id))


def _check_design(st: Study) -> dict:
    """The design gate of :mod:`webapp.design` on a draft study (a one-line LimenError saying what to change)."""
    from scorer.workflow import load_layout
    from webapp import design

    st.placement = st.placement or "psi"
    st.half_width_ln = st.half_width_ln or design.DEFAULT_HALF_WIDTH_LN
    layout = load_layout(content_store.stored_file(st.layout_file, Path(current_app.config["STORE_DIR"])))
    return design.check_design(st, layout)


@bp.route("/studies/<int:study_id>/close", methods=["POST"])
@coordinator_only
def close_study(study_id):
    st = _study(study_id)
    if st.status != "open":
        raise LimenError("only an open study can be closed")
    st.status = "closed"
    st.closed_at = utcnow()
    audit("close_study", st.id)
    db().commit()
    flash("Study closed: no more responses are accepted.", "info")
    return redirect(url_for("coordinator.study", study_id=st.id))


def _csv(text: str, name: str) -> FlaskResponse:
    """A CSV download; cells that a spreadsheet would run as formulas are neutralised (webapp.csv_safety)."""
    from webapp.csv_safety import neutralise_csv

    return FlaskResponse(
        neutralise_csv(text), mimetype="text/csv", headers={"Content-Disposition": f'attachment; filename="{name}"'}
    )


@bp.route("/studies/<int:study_id>/responses.csv")
@coordinator_only
def export_responses(study_id):
    st = _study(study_id)
    text = export.responses_csv(db(), st)
    audit("export_responses", st.id, rows=max(text.count("\n") - 1, 0))
    db().commit()
    stamp = _dt.date.today().isoformat()
    return _csv(text, f"limen-study-{st.id}-responses-{stamp}.csv")


@bp.route("/studies/<int:study_id>/model.csv")
@coordinator_only
def export_model(study_id):
    st = _study(study_id)
    if not st.model_trials_csv:
        abort(404)
    audit("export_model", st.id)
    db().commit()
    return _csv(st.model_trials_csv, f"limen-study-{st.id}-model-{st.observer}.csv")
