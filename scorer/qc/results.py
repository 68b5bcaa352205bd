"""Writing a scored session to the nightly database in one transaction.

The transaction first moves the session from ``claimed`` to ``scored`` *with the same token*,
so a run that lost its claim writes nothing; then thresholds, responses, registrations, the
automatic baseline (chosen again from acquisition dates) and the alerts, brought up to date
for every session they concern (:mod:`scorer.qc.alerting`).
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from sqlalchemy import bindparam, insert, select, text, update

from scorer.errors import LimenError
from scorer.qc.claims import ClaimTaken
from scorer.qc.engine import display_url
from scorer.qc.tables import ImageRow, ResponseRow, SessionRow, ThresholdRow, utcnow


def dumps(obj) -> str:
    return json.dumps(obj, default=str)


def _finite(v):
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if v == v and v not in (float("inf"), float("-inf")) else None


@dataclass
class SessionWrite:
    """What writing one scored session raised: its own alerts, and changes to other sessions' alerts."""

    alerts: list
    changes: object  # scorer.qc.alerting.AlertChanges


class ResultOps:
    """Store operation writing a scored session (mixed into :class:`Store`)."""

    def write_session(self, outcome, det, rules) -> SessionWrite | None:
        """Write a scored session in one transaction: thresholds, responses, registrations, baseline, alerts.

        Returns the session's alerts and what changed for other sessions of the detector (a late session
        inside the baseline window changes the baseline; one acquired before others changes their EWMA), or
        None when the claim was lost (nothing written).
        """
        from scorer.qc.alerting import AlertChanges
        from scorer.qc.control import Alert
        from scorer.qc.faults import fault_point

        try:
            with self.transaction() as s:
                row = s.get(SessionRow, outcome.session_id, with_for_update=not self.is_sqlite)
                if row is None or row.state != "claimed" or row.claim_token != outcome.token:
                    raise ClaimTaken()
                if self.engine.dialect.name == "postgresql":  # one writer per detector: baselines stay unique
                    s.execute(text("SELECT pg_advisory_xact_lock(hashtext(:d))"), {"d": row.detector})
                now = utcnow()
                row.state, row.scored_at, row.claim_expires = "scored", now, None
                row.observer, row.verdict_method = outcome.observer, outcome.verdict_method
                row.overall_verdict = outcome.overall_verdict
                row.settings, row.warnings = dumps(outcome.settings), dumps(outcome.warnings)
                row.scoring_s = float(outcome.scoring_s)
                ids = dict(s.execute(select(ImageRow.sha256, ImageRow.id).where(ImageRow.session_id == row.id)).all())
                if set(ids) != {im["sha256"] for im in outcome.images}:
                    raise LimenError(
                        f"session {row.id}: scored images differ from the claimed ones", display_url(self.url)
                    )
                s.connection().execute(
                    update(ImageRow.__table__).where(ImageRow.__table__.c.id == bindparam("image_pk")),
                    [
                        {
                            "image_pk": ids[im["sha256"]],
                            "registration": dumps(im["registration"]),
                            "blur_sigma_px": float(im["blur_sigma_px"]),
                            "n_correct": int(im["n_correct"]),
                            "n_trials": int(im["n_trials"]),
                        }
                        for im in outcome.images
                    ],
                )
                verdicts = {round(v["diameter_mm"], 6): v for v in (outcome.verdicts or [])}
                rows = []
                for p in outcome.thresholds:
                    v = verdicts.get(round(p["diameter_mm"], 6)) if p["method"] == outcome.verdict_method else None
                    rows.append(
                        {
                            "session_id": row.id,
                            "method": p["method"],
                            "observer": p["observer"],
                            "diameter_mm": float(p["diameter_mm"]),
                            "threshold_contrast": _finite(p["threshold_contrast"]),
                            "ci_low": _finite(p["ci_low"]),
                            "ci_high": _finite(p["ci_high"]),
                            "n_images": int(p["n_images"]),
                            "m_alternatives": int(p["m_alternatives"]),
                            "criterion_pc": _finite(p["criterion_pc"]),
                            "note": p.get("note") or "",
                            "compared_contrast": None if v is None else _finite(v["threshold_contrast"]),
                            "acceptable": None if v is None else _finite(v["acceptable"]),
                            "verdict": None if v is None else v["verdict"],
                        }
                    )
                s.execute(insert(ThresholdRow), rows)
                r = outcome.responses
                image_ids = [ids[h] for h in r["image"].tolist()]
                n = len(image_ids)
                self._insert_many(
                    s,
                    ResponseRow.__table__,
                    {
                        "session_id": [row.id] * n,
                        "image_id": image_ids,
                        "target": [str(t) for t in r["target"].tolist()],
                        "diameter_mm": r["diameter_mm"].astype(float).tolist(),
                        "contrast": r["contrast"].astype(float).tolist(),
                        "site": r["site"].astype(int).tolist(),
                        "is_signal": r["is_signal"].astype(bool).tolist(),
                        "response": r["response"].astype(float).tolist(),
                        "row_px": r["row_px"].astype(float).tolist(),
                        "col_px": r["col_px"].astype(float).tolist(),
                    },
                )
                fault_point("mid-write")
                s.flush()
                changes = AlertChanges()
                for method in dict.fromkeys(p["method"] for p in outcome.thresholds):
                    changes.extend(
                        self.refresh_alerts(
                            s,
                            row.detector,
                            method,
                            det.baseline_sessions,
                            rules,
                            since=(row.session_date, row.id),
                            human_factor=det.human_factor,
                        )
                    )
                alerts = [
                    Alert(**{k: a[k] for k in Alert.__dataclass_fields__})
                    for a in changes.added
                    if a["session_id"] == row.id
                ]
                changes.added = [a for a in changes.added if a["session_id"] != row.id]
                return SessionWrite(alerts, changes)
        except ClaimTaken:
            return None
