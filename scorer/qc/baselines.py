"""Baselines in the nightly database: the automatic one, an explicit one, reading and forgetting them."""

from __future__ import annotations

import json

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from scorer.errors import LimenError
from scorer.qc.queries import thresholds_in
from scorer.qc.tables import BaselineRow, utcnow


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

    def _auto_baseline(self, s, detector, method, hist, k, compute_baseline):
        """The first ``k`` sessions without setting flags become the baseline once there are ``k`` of them."""
        sessions = hist.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
        sessions = sessions[sessions["flags"].map(lambda f: not json.loads(f or "[]"))]
        if len(sessions) < k:
            return None
        chosen = sessions.head(k)
        ids = [int(x) for x in chosen["session_id"]]
        frame = compute_baseline(hist[hist["session_id"].isin(ids)])
        if frame.empty:
            return None
        last = (str(chosen["session_date"].iloc[-1]), ids[-1])
        self.put_baseline(s, detector, method, frame, ids, last, "automatic")
        return frame, last, set(ids), "automatic"

    def set_baseline(self, detector: str, session_ids: list[int]) -> dict:
        """An explicit baseline from chosen scored sessions of ``detector`` (every method); returns a summary."""
        from scorer.qc.control import compute_baseline

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
            for method, g in sel.groupby("method"):
                frame = compute_baseline(g)
                self.put_baseline(s, detector, method, frame, sorted(set(session_ids)), last, "explicit")
                out[method] = frame
            return out

    def clear_baseline(self, detector: str) -> int:
        """Forget a detector's baseline: the next session rebuilds the automatic one."""
        with self.transaction() as s:
            return int(s.execute(delete(BaselineRow).where(BaselineRow.detector == detector)).rowcount or 0)

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
