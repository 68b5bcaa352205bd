"""Reading the nightly database for reports and commands: thresholds, sessions, alerts, quarantine, counts."""

from __future__ import annotations

import json

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session

from scorer.qc.tables import (
    AlertRow,
    BaselineRow,
    ImageRow,
    QuarantineRow,
    ResponseRow,
    SessionRow,
    ThresholdRow,
    utcnow,
)


class QueryOps:
    """Store operations reading results (and marking alerts e-mailed), one transaction each (mixed into Store)."""

    def thresholds_frame(self, detector: str | None = None, method: str | None = None, session: Session | None = None):
        """Scored thresholds joined with their sessions (one row per session, method and diameter)."""
        if session is not None:
            return thresholds_in(session, detector, method)
        with self.transaction() as s:
            return thresholds_in(s, detector, method)

    def alerts(self, detector: str | None = None, unsent_only: bool = False) -> list[dict]:
        q = select(AlertRow).order_by(AlertRow.session_date, AlertRow.id)
        if detector is not None:
            q = q.where(AlertRow.detector == detector)
        if unsent_only:
            q = q.where(AlertRow.emailed_at.is_(None))
        with self.transaction() as s:
            return [
                {
                    "id": a.id,
                    "session_id": a.session_id,
                    "detector": a.detector,
                    "session_date": a.session_date,
                    "method": a.method,
                    "diameter_mm": a.diameter_mm,
                    "rule": a.rule,
                    "direction": a.direction,
                    "value": a.value,
                    "reference": a.reference,
                    "message": a.message,
                    "emailed": a.emailed_at is not None,
                }
                for a in s.scalars(q)
            ]

    def mark_emailed(self, alert_ids) -> None:
        with self.transaction() as s:
            s.execute(update(AlertRow).where(AlertRow.id.in_(list(alert_ids))).values(emailed_at=utcnow()))

    def detectors(self) -> list[str]:
        with self.transaction() as s:
            return list(
                s.scalars(
                    select(SessionRow.detector)
                    .where(SessionRow.state == "scored")
                    .distinct()
                    .order_by(SessionRow.detector)
                )
            )

    def sessions(self, detector: str | None = None, state: str | None = "scored") -> list[dict]:
        q = select(SessionRow).order_by(SessionRow.detector, SessionRow.session_date, SessionRow.id)
        if detector is not None:
            q = q.where(SessionRow.detector == detector)
        if state is not None:
            q = q.where(SessionRow.state == state)
        with self.transaction() as s:
            return [
                {
                    "id": r.id,
                    "detector": r.detector,
                    "session_date": r.session_date,
                    "state": r.state,
                    "n_images": r.n_images,
                    "kvp": r.kvp,
                    "anode": r.anode,
                    "filter": r.filter,
                    "flags": json.loads(r.flags or "[]"),
                    "overall_verdict": r.overall_verdict,
                    "observer": r.observer,
                    "verdict_method": r.verdict_method,
                    "scored_at": r.scored_at,
                    "scoring_s": r.scoring_s,
                    "warnings": json.loads(r.warnings or "[]"),
                }
                for r in s.scalars(q)
            ]

    def simulated_images(self) -> dict[int, int | None]:
        """Scored session id → how many of its images Limen's simulator made (None: stored before Limen said so)."""
        with self.transaction() as s:
            rows = s.execute(select(SessionRow.id, SessionRow.settings).where(SessionRow.state == "scored")).all()
        out: dict[int, int | None] = {}
        for sid, settings in rows:
            n = json.loads(settings or "{}").get("simulated_images")
            out[int(sid)] = None if n is None else int(n)
        return out

    def other_sessions(self, group_key: str, session_id: int) -> list[dict]:
        """Sessions other than ``session_id`` with the same detector, day and settings (their id and image count)."""
        with self.transaction() as s:
            rows = s.execute(
                select(SessionRow.id, SessionRow.n_images, SessionRow.state).where(
                    SessionRow.group_key == group_key, SessionRow.id != session_id
                )
            ).all()
        return [{"id": r.id, "n_images": r.n_images, "state": r.state} for r in rows]

    def quarantine_log(self) -> list[dict]:
        with self.transaction() as s:
            return [
                {"path": r.original_path, "moved_to": r.moved_to, "reason": r.reason, "at": r.at}
                for r in s.scalars(select(QuarantineRow).order_by(QuarantineRow.id))
            ]

    def counts(self) -> dict:
        """Row counts per table (for tests and the bench)."""
        with self.transaction() as s:
            return {
                t.__tablename__: int(s.scalar(select(func.count()).select_from(t)))
                for t in (SessionRow, ImageRow, ThresholdRow, ResponseRow, BaselineRow, AlertRow, QuarantineRow)
            }


def thresholds_in(s: Session, detector, method):
    """Scored thresholds joined with their sessions, read in the caller's transaction ``s`` (a DataFrame)."""
    import pandas as pd

    q = (
        select(
            SessionRow.id.label("session_id"),
            SessionRow.detector,
            SessionRow.session_date,
            SessionRow.n_images,
            SessionRow.flags,
            SessionRow.overall_verdict,
            SessionRow.kvp,
            ThresholdRow.method,
            ThresholdRow.observer,
            ThresholdRow.diameter_mm,
            ThresholdRow.threshold_contrast,
            ThresholdRow.ci_low,
            ThresholdRow.ci_high,
            ThresholdRow.compared_contrast,
            ThresholdRow.acceptable,
            ThresholdRow.verdict,
        )
        .join(ThresholdRow, ThresholdRow.session_id == SessionRow.id)
        .where(SessionRow.state == "scored")
    )
    if detector is not None:
        q = q.where(SessionRow.detector == detector)
    if method is not None:
        q = q.where(ThresholdRow.method == method)
    rows = (
        s.execute(
            q.order_by(
                SessionRow.detector,
                SessionRow.session_date,
                SessionRow.id,
                ThresholdRow.method,
                ThresholdRow.diameter_mm,
            )
        )
        .mappings()
        .all()
    )
    cols = [
        "session_id",
        "detector",
        "session_date",
        "n_images",
        "flags",
        "overall_verdict",
        "kvp",
        "method",
        "observer",
        "diameter_mm",
        "threshold_contrast",
        "ci_low",
        "ci_high",
        "compared_contrast",
        "acceptable",
        "verdict",
    ]
    df = pd.DataFrame([dict(r) for r in rows], columns=cols)
    for c in ("threshold_contrast", "ci_low", "ci_high", "compared_contrast", "acceptable", "diameter_mm"):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype(float)
    return df
