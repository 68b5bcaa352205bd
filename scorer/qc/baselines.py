"""Baselines in the nightly database: an explicit one, reading and forgetting them.

The automatic baseline (the first stable run of K sessions by acquisition date) is chosen by
:meth:`scorer.qc.alerting.AlertOps.refresh_alerts` after every write.
"""

from __future__ import annotations

import json

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from scorer.errors import LimenError
from scorer.qc.queries import thresholds_in
from scorer.qc.tables import BaselineRow, SessionRow, ThresholdRow, utcnow


class BaselineOps:
    """Store operations on baselines; public methods are one transaction each (mixed into :class:`Store`)."""

    def _baseline_in(self, s: Session, detector, method):
        rows = s.scalars(
            select(BaselineRow).where(BaselineRow.detector == detector, BaselineRow.method == method)
        ).all()
        if not rows:
            return None
        import pandas as pd

        df = pd.DataFrame(
            [
                {
                    "diameter_mm": r.diameter_mm,
                    "mean_log10": r.mean_log10,
                    "sigma_log10": r.sigma_log10,
                    "sd_between_log10": r.sd_between_log10,
                    "se_within_log10": r.se_within_log10,
                    "n_sessions": r.n_sessions,
                }
                for r in rows
            ]
        )
        r0 = rows[0]
        return df, (r0.last_session_date, r0.last_session_id), set(json.loads(r0.session_ids)), r0.source

    def _methods_in(self, s: Session, detector: str) -> list[str]:
        return list(
            s.scalars(
                select(ThresholdRow.method)
                .join(SessionRow, SessionRow.id == ThresholdRow.session_id)
                .where(SessionRow.detector == detector, SessionRow.state == "scored")
                .distinct()
            )
        )

    def set_baseline(self, detector: str, session_ids: list[int], k: int = 5, rules=None, human_factor=None):
        """An explicit baseline from chosen scored sessions of ``detector`` (every method).

        The stored alerts of every session are evaluated again against it.  Returns (baseline frame per
        method, :class:`~scorer.qc.alerting.AlertChanges`).
        """
        from scorer.qc.alerting import AlertChanges
        from scorer.qc.config import AlertRules
        from scorer.qc.control import compute_baseline

        rules = rules or AlertRules()
        with self.transaction() as s:
            hist = thresholds_in(s, detector, None)
            have = set(int(x) for x in hist["session_id"].unique())
            missing = sorted(set(session_ids) - have)
            if missing:
                raise LimenError(
                    f"session(s) {', '.join(map(str, missing))} are not scored sessions of detector {detector!r}",
                    "--sessions",
                )
            if len(set(session_ids)) < 2:
                raise LimenError("a baseline needs at least two sessions", "--sessions")
            sel = hist[hist["session_id"].isin(session_ids)]
            order = sel.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
            last = (str(order["session_date"].iloc[-1]), int(order["session_id"].iloc[-1]))
            out = {}
            changes = AlertChanges()
            for method, g in sel.groupby("method"):
                before = self._baseline_in(s, detector, method)
                frame = compute_baseline(g)
                self.put_baseline(s, detector, method, frame, sorted(set(session_ids)), last, "explicit")
                out[method] = frame
                changes.baseline_changes.append(
                    {
                        "detector": detector,
                        "method": method,
                        "before": None if before is None else sorted(before[2]),
                        "after": sorted(set(session_ids)),
                    }
                )
                changes.extend(self.refresh_alerts(s, detector, method, k, rules, human_factor=human_factor))
            return out, changes

    def clear_baseline(self, detector: str, k: int = 5, rules=None, human_factor=None):
        """Forget a detector's baseline: the automatic one is chosen again from its sessions' dates.

        Returns (rows removed, :class:`~scorer.qc.alerting.AlertChanges`).
        """
        from scorer.qc.alerting import AlertChanges
        from scorer.qc.config import AlertRules

        rules = rules or AlertRules()
        with self.transaction() as s:
            n = int(s.execute(delete(BaselineRow).where(BaselineRow.detector == detector)).rowcount or 0)
            changes = AlertChanges()
            for method in self._methods_in(s, detector):
                changes.extend(self.refresh_alerts(s, detector, method, k, rules, human_factor=human_factor))
            return n, changes

    def baseline(self, detector: str, method: str):
        """(baseline frame, (last date, last id), session ids, source) or None."""
        with self.transaction() as s:
            return self._baseline_in(s, detector, method)

    def put_baseline(
        self, s: Session, detector: str, method: str, frame, session_ids: list[int], last: tuple[str, int], source: str
    ) -> None:
        """Replace a detector's baseline for one method (inside the caller's transaction)."""
        s.execute(delete(BaselineRow).where(BaselineRow.detector == detector, BaselineRow.method == method))
        now = utcnow()
        for r in frame.itertuples():
            s.add(
                BaselineRow(
                    detector=detector,
                    method=method,
                    diameter_mm=float(r.diameter_mm),
                    mean_log10=float(r.mean_log10),
                    sigma_log10=float(r.sigma_log10),
                    sd_between_log10=float(r.sd_between_log10),
                    se_within_log10=float(r.se_within_log10),
                    n_sessions=int(r.n_sessions),
                    session_ids=json.dumps(sorted(session_ids)),
                    last_session_date=last[0],
                    last_session_id=int(last[1]),
                    source=source,
                    created_at=now,
                )
            )
