"""Undoing a coordinator's mistakes: reopen a closed study, delete a draft study or one of its images.

Only what no reader has seen can be deleted: a study, or an image of it, while the study is a draft (not opened,
and no job opening it).  An open or closed study keeps everything (its responses are the study's record); a
closed one can be reopened with a stated reason.  Each operation is audited in the caller's transaction.  After
the commit, :func:`discard_files` removes the store files of a deletion that no other study refers to
(:func:`webapp.content_store.discard_unreferenced`) and a draft's leftover display pixels (a failed opening).
"""

from __future__ import annotations

import shutil
from pathlib import Path

from sqlalchemy import delete, select

from scorer.errors import LimenError
from webapp.models import Job, Study, StudyImage
from webapp.security import audit

MAX_REASON_CHARS = 500


def open_job(session, study_id: int) -> Job | None:
    """The queued or running job opening this study, if any."""
    return session.execute(select(Job).where(Job.active_key == f"open_study:{study_id}")).scalars().first()


def require_draft(session, study: Study) -> Study:
    """The study, if its images and readers may still change (a draft no job is opening); else a one-line error."""
    if study.status != "draft":
        raise LimenError("images and readers can be changed only before the study is opened")
    if open_job(session, study.id) is not None:
        raise LimenError("the study is being opened: images and readers can no longer be changed")
    return study


def reopen(study: Study, reason: str) -> None:
    """Accept responses again in a closed study; the reason is kept in the audit log."""
    from webapp.models import utcnow

    reason = " ".join((reason or "").split())
    if study.status != "closed":
        raise LimenError(f"only a closed study can be reopened (this one is {study.status})")
    if not reason:
        raise LimenError("give the reason for reopening the study (it is kept in the audit log)")
    if len(reason) > MAX_REASON_CHARS:
        raise LimenError(f"reason: at most {MAX_REASON_CHARS} characters, got {len(reason)}")
    closed_at = study.closed_at
    study.status = "open"
    study.closed_at = None
    audit("reopen_study", study.id, reason=reason, closed_at=closed_at, reopened_at=utcnow())


def _store_paths(store_dir: Path, study: Study | None, images) -> list[Path]:
    """The store files a deleted study or image used (bundled layouts and files elsewhere are never touched)."""
    store = Path(store_dir).resolve()
    paths = [store / im.stored_name for im in images]
    paths += [Path(im.conversion_file) for im in images if im.conversion_file]
    if study is not None:
        paths.append(Path(study.layout_file))
    return [p for p in dict.fromkeys(paths) if store in p.resolve().parents]


def delete_image(session, study: Study, image: StudyImage, store_dir: Path) -> list[Path]:
    """Remove an image from a draft study; return the store files to offer :func:`discard_files` after commit."""
    require_draft(session, study)
    if image.study_id != study.id:
        raise LimenError("this image belongs to another study")
    files = _store_paths(store_dir, None, [image])
    audit(
        "delete_image",
        study.id,
        code=image.code,
        label=image.label,
        detector=image.detector,
        sha256=image.sha256,
    )
    session.delete(image)
    return files


def delete_draft(session, study: Study, store_dir: Path) -> list[Path]:
    """Delete a draft study (its images, enrolments and finished jobs); return the store files it used."""
    require_draft(session, study)
    files = _store_paths(store_dir, study, study.images)
    audit(
        "delete_study",
        study.id,
        name=study.name,
        layout=study.layout_name,
        images=[im.code for im in study.images],
        readers=sorted(e.user.username for e in study.enrolments),
    )
    session.execute(delete(Job).where(Job.study_id == study.id))  # failed openings
    for row in [*study.images, *study.enrolments]:
        session.delete(row)
    session.flush()
    session.delete(study)
    return files


def discard_files(session, store_dir: Path, files, study_id: int | None = None) -> list[Path]:
    """After the commit: remove ``files`` that no study refers to any more, and (for a deleted draft) its display
    pixels; return what was removed."""
    from webapp.content_store import discard_unreferenced

    gone = discard_unreferenced(session, files)
    if study_id is not None:
        shutil.rmtree(Path(store_dir) / "display" / f"study-{int(study_id)}", ignore_errors=True)
    return gone
