"""The database reads of the coordinator's and the readers' pages, one function per question (the views parse the
request, call these, and render).  Writes stay with the code that owns them (:mod:`webapp.placement`,
:mod:`webapp.study_edits`, the views' own small updates)."""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any, Unpack

from sqlalchemy import Row, func, select

from webapp.models import (
    AnySession,
    AuditEntry,
    Enrolment,
    ReadingSession,
    Region,
    Response,
    Study,
    StudyImage,
    Trial,
    User,
)


# --------------------------------------------------------------------------- coordinator
def reader_accounts(s: AnySession) -> Sequence[User]:
    """Every reader account, by name."""
    return s.execute(select(User).where(User.role == "reader").order_by(User.username)).scalars().all()


def studies_newest_first(s: AnySession) -> Sequence[Study]:
    return s.execute(select(Study).order_by(Study.created_at.desc())).scalars().all()


def recent_audit_entries(s: AnySession, limit: int = 500) -> Sequence[AuditEntry]:
    return s.execute(select(AuditEntry).order_by(AuditEntry.at.desc()).limit(limit)).scalars().all()


def opening_notes_json(s: AnySession, study_id: int) -> str | None:
    """The notes of the study's latest opening (its ``open_study`` audit entry) as JSON text, or None."""
    e = (
        s.execute(
            select(AuditEntry)
            .where(AuditEntry.study_id == study_id, AuditEntry.action == "open_study")
            .order_by(AuditEntry.id.desc())
        )
        .scalars()
        .first()
    )
    if e is None:
        return None
    return json.dumps(json.loads(e.detail).get("notes", []))


# --------------------------------------------------------------------------- reader
def is_enrolled(s: AnySession, study_id: int, user_id: int) -> bool:
    return (
        s.execute(select(Enrolment.id).where(Enrolment.study_id == study_id, Enrolment.user_id == user_id)).first()
        is not None
    )


def trial_by_public_id(s: AnySession, public_id: str) -> Trial | None:
    return s.execute(select(Trial).where(Trial.public_id == public_id)).scalars().first()


def readers_studies(s: AnySession, user_id: int) -> Sequence[Study]:
    """The opened (open or closed) studies the reader is enrolled in, by id."""
    return (
        s.execute(
            select(Study)
            .join(Enrolment, Enrolment.study_id == Study.id)
            .where(Enrolment.user_id == user_id, Study.status.in_(("open", "closed")))
            .order_by(Study.id)
        )
        .scalars()
        .all()
    )


def trial_counts(s: AnySession, study_id: int, reader_id: int) -> dict[str, int]:
    """The reader's trials and answers in the study, practice apart (one query)."""
    rows = s.execute(
        select(Trial.practice, func.count(Trial.id), func.count(Response.id))
        .outerjoin(Response, Response.trial_id == Trial.id)
        .where(Trial.study_id == study_id, Trial.reader_id == reader_id)
        .group_by(Trial.practice)
    ).all()
    out = {"answered": 0, "total": 0, "practice_answered": 0, "practice_total": 0}
    for practice, n, answered in rows:
        key = "practice_" if practice else ""
        out[f"{key}total"] += int(n)
        out[f"{key}answered"] += int(answered)
    return out


def next_sitting_number(s: AnySession, study_id: int, reader_id: int) -> int:
    """The number of the reader's next reading session (sitting) in the study: 1, 2, …"""
    last = s.scalar(
        select(func.max(ReadingSession.number)).where(
            ReadingSession.study_id == study_id, ReadingSession.reader_id == reader_id
        )
    )
    return (last or 0) + 1


def trial_pixels_source(s: AnySession, public_id: str) -> Row[Unpack[tuple[Any, ...]]] | None:
    """One query on the hot path of a trial's pixels: whose trial, is the study open, where the crops are, which
    stored image."""
    return s.execute(
        select(
            Trial.reader_id,
            Trial.study_id,
            Trial.tile_order,
            Study.status,
            Study.region_rows,
            Study.region_cols,
            Region.row0,
            Region.col0,
            Region.tile_px,
            Region.tiles_json,
            StudyImage.sha256,
        )
        .join(Study, Study.id == Trial.study_id)
        .join(Region, Region.id == Trial.region_id)
        .join(StudyImage, StudyImage.id == Region.image_id)
        .where(Trial.public_id == public_id)
    ).first()
