"""A study's progress for its coordinator: per reader, answers, state, display-check history and refused actions.

A reader's **state**: *finished* (every trial answered), *stopped mid-trial* (a trial was handed out — see
:mod:`webapp.activity` — and has had no answer for longer than ``STALLED_TRIAL_MINUTES``, 10 by default, while the
study is open), *reading*, or *not started*.  The **display-check history** is every sitting's check (attempts,
passed, the screen and viewing distance the reader reported).  **Refused actions** are the ``refused`` audit
entries of the reader's requests (another reader's trial, an answer without a display check, a closed study …)
and the failed or throttled sign-ins typed with the reader's name.
"""

from __future__ import annotations

import datetime as _dt
import json
from dataclasses import dataclass, field

from sqlalchemy import func, select

from webapp.models import AuditEntry, ReadingSession, Response, Study, Trial, TrialShown, User, utcnow
from webapp.placement import reader_totals

SIGN_IN_REFUSALS = ("sign_in_failed", "sign_in_throttled")
DEFAULT_STALLED_TRIAL_MINUTES = 10.0


@dataclass
class ReaderProgress:
    """One enrolled reader's progress in one study."""

    user_id: int
    reader: str
    active: bool
    done: int
    total: int
    last: _dt.datetime | None
    state: str  # "finished", "stopped mid-trial", "reading", "not started"
    stalled_since: _dt.datetime | None = None
    stalled_minutes: float | None = None
    sessions: list = field(default_factory=list)  # ReadingSession, oldest first
    refused: int = 0

    @property
    def session(self):
        """The latest sitting (its display check is the one in force)."""
        return self.sessions[-1] if self.sessions else None


def stalled_after(config) -> _dt.timedelta:
    """How long a shown trial may wait for its answer before its reader counts as stopped mid-trial."""
    return _dt.timedelta(minutes=float(config.get("STALLED_TRIAL_MINUTES", DEFAULT_STALLED_TRIAL_MINUTES)))


def readers_progress(session, study: Study, wait: _dt.timedelta, now: _dt.datetime | None = None):
    """Every enrolled reader's :class:`ReaderProgress`, by name (a few grouped queries for the whole study)."""
    now = now or utcnow()
    main = (Trial.study_id == study.id, Trial.practice.is_(False))
    totals = dict(
        session.execute(select(Trial.reader_id, func.count(Trial.id)).where(*main).group_by(Trial.reader_id)).all()
    )
    done = dict(
        session.execute(
            select(Trial.reader_id, func.count(Response.id)).join(Response).where(*main).group_by(Trial.reader_id)
        ).all()
    )
    last = dict(
        session.execute(
            select(Trial.reader_id, func.max(Response.created_at))
            .join(Response)
            .where(Trial.study_id == study.id)
            .group_by(Trial.reader_id)
        ).all()
    )
    waiting = dict(  # the oldest trial handed out and not answered, per reader
        session.execute(
            select(TrialShown.reader_id, func.min(TrialShown.first_at))
            .join(Trial, Trial.public_id == TrialShown.trial_public_id)
            .outerjoin(Response, Response.trial_id == Trial.id)
            .where(TrialShown.study_id == study.id, Response.id.is_(None))
            .group_by(TrialShown.reader_id)
        ).all()
    )
    planned = reader_totals(study)  # a study placed adaptively: its trials are made as the reader goes
    if planned is not None:
        totals = {e.user_id: planned[1] for e in study.enrolments}
    sittings: dict[int, list] = {}
    for rs in session.execute(
        select(ReadingSession).where(ReadingSession.study_id == study.id).order_by(ReadingSession.id)
    ).scalars():
        sittings.setdefault(rs.reader_id, []).append(rs)
    out = []
    for e in sorted(study.enrolments, key=lambda e: e.user.username):
        uid, user = e.user_id, e.user
        n_done, n_total = int(done.get(uid, 0)), int(totals.get(uid, 0))
        since = waiting.get(uid)
        row = ReaderProgress(uid, user.username, bool(user.active), n_done, n_total, last.get(uid), "not started")
        row.sessions = sittings.get(uid, [])
        row.refused = len(refused_actions(session, study, user, limit=1000))
        if n_total and n_done >= n_total:
            row.state = "finished"
        elif since is not None and study.status == "open" and now - since > wait:
            row.state, row.stalled_since = "stopped mid-trial", since
            row.stalled_minutes = (now - since).total_seconds() / 60.0
        elif n_done or since is not None or row.sessions:
            row.state = "reading"
        out.append(row)
    return out


def refused_actions(session, study: Study, user: User, limit: int = 200) -> list[dict]:
    """The reader's refused requests since the study was created (in this study, or on no study), and the
    failed or throttled sign-ins typed with the reader's name; newest first."""
    since = study.created_at
    own = session.execute(
        select(AuditEntry)
        .where(
            AuditEntry.user_id == user.id,
            AuditEntry.action == "refused",
            AuditEntry.at >= since,
            (AuditEntry.study_id == study.id) | AuditEntry.study_id.is_(None),
        )
        .order_by(AuditEntry.id.desc())
        .limit(limit)
    ).scalars()
    # sign-in entries name the typed account in their detail (JSON with sorted keys): a text filter first,
    # then the exact name key
    from webapp.accounts import name_key

    fragment = f'"username": "{user.username_key or name_key(user.username)}"'
    signins = session.execute(
        select(AuditEntry)
        .where(
            AuditEntry.action.in_(SIGN_IN_REFUSALS),
            AuditEntry.at >= since,
            func.lower(AuditEntry.detail).contains(fragment),
        )
        .order_by(AuditEntry.id.desc())
        .limit(limit)
    ).scalars()
    rows = []
    for e in [*own, *signins]:
        detail = json.loads(e.detail or "{}")
        if e.action != "refused" and name_key(str(detail.get("username", ""))) != user.username_key:
            continue
        rows.append({"at": e.at, "action": e.action, "detail": detail})
    rows.sort(key=lambda r: r["at"], reverse=True)
    return rows[:limit]
