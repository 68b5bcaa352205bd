"""Undo from the browser (coordinators only): reopen a closed study with a reason, delete a draft study or an image
of a draft (:mod:`webapp.study_edits` holds the rules and the queries).

Every destructive action is asked for on a page of its own (the CSP allows no inline script, so no ``confirm()``):
deleting a study takes its name typed again; removing an image, a button on its confirmation page (a POST that did
not come from there leads to it and changes nothing).  Refusals show on the study's page with their one-line reason.
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, abort, current_app, flash, redirect, render_template, request, url_for

from scorer.errors import LimenError
from webapp import study_edits
from webapp.coordinator import show_refusal
from webapp.models import StudyImage, db
from webapp.security import role_required, study_or_404

bp = Blueprint("corrections", __name__, url_prefix="/coordinator/studies")
coordinator_only = role_required("coordinator")
bp.register_error_handler(LimenError, show_refusal)


def _store() -> Path:
    return Path(current_app.config["STORE_DIR"])


def _image(study, image_id: int) -> StudyImage:
    im = db().get(StudyImage, image_id)
    if im is None or im.study_id != study.id:
        abort(404)
    return im


# --------------------------------------------------------------------------- reopen
@bp.route("/<int:study_id>/reopen")
@coordinator_only
def confirm_reopen(study_id):
    st = study_or_404(study_id)
    if st.status != "closed":
        raise LimenError(f"only a closed study can be reopened (this one is {st.status})")
    return render_template("coordinator/confirm_reopen.html", study=st, reason="")


@bp.route("/<int:study_id>/reopen", methods=["POST"])
@coordinator_only
def reopen_study(study_id):
    st = study_or_404(study_id)
    study_edits.reopen(st, request.form.get("reason") or "")
    db().commit()
    flash("Study reopened: readers can answer their remaining trials.", "info")
    return redirect(url_for("coordinator.study", study_id=st.id))


# --------------------------------------------------------------------------- delete a draft study
@bp.route("/<int:study_id>/delete")
@coordinator_only
def confirm_delete_study(study_id):
    st = study_edits.require_draft(db(), study_or_404(study_id))
    return render_template("coordinator/confirm_delete_study.html", study=st, typed="")


@bp.route("/<int:study_id>/delete", methods=["POST"])
@coordinator_only
def delete_study(study_id):
    st = study_edits.require_draft(db(), study_or_404(study_id))
    typed = (request.form.get("confirm_name") or "").strip()
    if typed != st.name.strip():
        if typed:
            flash("The name typed is not the study's name: nothing was deleted.", "error")
        page = render_template("coordinator/confirm_delete_study.html", study=st, typed=typed)
        return page, (400 if typed else 200)
    name, sid = st.name, st.id
    files = study_edits.delete_draft(db(), st, _store())
    db().commit()
    study_edits.discard_files(db(), _store(), files, study_id=sid)
    flash(f"Draft study “{name}” deleted.", "info")
    return redirect(url_for("coordinator.dashboard"))


# --------------------------------------------------------------------------- remove an image from a draft
@bp.route("/<int:study_id>/images/<int:image_id>/delete")
@coordinator_only
def confirm_delete_image(study_id, image_id):
    st = study_edits.require_draft(db(), study_or_404(study_id))
    return render_template("coordinator/confirm_delete_image.html", study=st, image=_image(st, image_id))


@bp.route("/<int:study_id>/images/<int:image_id>/delete", methods=["POST"])
@coordinator_only
def delete_image(study_id, image_id):
    st = study_or_404(study_id)
    if request.form.get("confirm") != "yes":  # not from the confirmation page: show it
        return redirect(url_for("corrections.confirm_delete_image", study_id=st.id, image_id=image_id))
    im = _image(st, image_id)
    label = im.label
    files = study_edits.delete_image(db(), st, im, _store())
    db().commit()
    study_edits.discard_files(db(), _store(), files)
    flash(f"{label} removed from the study.", "info")
    return redirect(url_for("coordinator.study", study_id=st.id))
