"""Keeping a detector's stored alerts equal to what its scored sessions and baseline say, whatever the order.

After every write that can change a detector's alerts (a scored session, ``limen baseline set`` or
``clear``), :meth:`AlertOps.refresh_alerts` runs inside the writer's transaction:

1. the automatic baseline is chosen again from *acquisition dates* (the first stable run of K sessions,
   :func:`scorer.qc.stability.choose_baseline_window`); an explicit baseline is kept;
2. the sessions whose alerts can have changed are evaluated again — every session when the baseline
   changed, otherwise the sessions acquired on or after the new one (the EWMA of a later session runs
   over it);
3. the stored alerts are compared with the new ones: new alerts are added, alerts no longer raised are
   withdrawn (deleted), alerts whose value or wording changed are updated; the changes are returned so the
   caller can say what changed.

So the stored baseline and alerts are a function of the set of scored sessions only: scoring a backlog
in any order, or in two runs at once (writes of one detector are serialised by the database), ends with
the same baseline and alerts as scoring it night by night.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from scorer.qc.control import Alert, compute_baseline, evaluate_session
from scorer.qc.queries import thresholds_in
from scorer.qc.stability import WindowTest, choose_baseline_window
from scorer.qc.tables import AlertRow, BaselineRow, SessionRow, utcnow

#: the rule name of a rejected baseline window's alert
UNSTABLE = "unstable"


@dataclass
class AlertChanges:
    """What one refresh changed: alerts added, withdrawn and updated, and the baseline before and after."""

    added: list[dict] = field(default_factory=list)
    withdrawn: list[dict] = field(default_factory=list)
    updated: list[dict] = field(default_factory=list)
    baseline_changes: list[dict] = field(default_factory=list)

    def extend(self, other: AlertChanges) -> None:
        self.added += other.added
        self.withdrawn += other.withdrawn
        self.updated += other.updated
        self.baseline_changes += other.baseline_changes

    def to_json(self) -> dict:
        return {
            "added": self.added,
            "withdrawn": self.withdrawn,
            "updated": self.updated,
            "baseline_changes": self.baseline_changes,
        }


def unstable_alerts(detector: str, method: str, tested: list[WindowTest]) -> list[Alert]:
    """One ``unstable`` alert per diameter that trends in each rejected window, on the window's last session."""
    out = []
    for w in tested:
        if w.stable:
            continue
        date, sid = w.last
        for t in w.unstable_trends():
            direction = "worse" if t.slope_log10 > 0 else "better"
            out.append(
                Alert(
                    detector,
                    sid,
                    date,
                    method,
                    t.diameter_mm,
                    UNSTABLE,
                    direction,
                    t.change_ratio,
                    None,
                    f"{detector} {date}, {t.diameter_mm:g} mm ({method}): baseline unstable — threshold contrast "
                    f"{'rose' if direction == 'worse' else 'fell'} ×{t.change_ratio:.3g} across sessions "
                    f"{w.session_dates[0]} … {w.session_dates[-1]} ("
                    + (
                        f"all diameters together: Stouffer z = {w.combined['z']:.2f}, Holm-adjusted p = "
                        f"{w.combined['p_holm']:.2g}; this diameter z = {t.z:.2f}"
                        if t.via_combined
                        else f"least-squares slope test z = {t.z:.2f}, Holm-adjusted p = {t.p_holm:.2g}"
                    )
                    + f"); these {len(w.session_ids)} sessions do not form a baseline: "
                    "waiting for a stable run of sessions, or `limen baseline set`",
                )
            )
    return out


def _key(a) -> tuple:
    return (int(a["session_id"]), a["method"], round(float(a["diameter_mm"]), 6), a["rule"])


def _row_dict(r: AlertRow) -> dict:
    return {
        "id": r.id,
        "session_id": r.session_id,
        "detector": r.detector,
        "session_date": r.session_date,
        "method": r.method,
        "diameter_mm": r.diameter_mm,
        "rule": r.rule,
        "direction": r.direction,
        "value": r.value,
        "reference": r.reference,
        "message": r.message,
    }


def _same(a: dict, r: AlertRow) -> bool:
    def close(x, y):
        return (x is None and y is None) or (x is not None and y is not None and np.isclose(x, y, rtol=1e-9))

    return a["direction"] == r.direction and a["message"] == r.message and close(a["value"], r.value)


class AlertOps:
    """Baseline choice and alert re-evaluation inside a writer's transaction (mixed into :class:`Store`)."""

    def refresh_alerts(
        self,
        s: Session,
        detector: str,
        method: str,
        k: int,
        rules,
        since: tuple[str, int] | None = None,
        human_factor=None,
    ) -> AlertChanges:
        """Choose the automatic baseline again and bring the stored alerts of ``detector`` and ``method``
        up to date; ``since`` (date, session id): only sessions from there on can have changed (None: all)."""
        changes = AlertChanges()
        hist = thresholds_in(s, detector, method)
        bl = self._baseline_in(s, detector, method)
        alpha = getattr(rules, "stability_alpha", 0.01)
        chosen, tested = choose_baseline_window(hist, k, alpha) if len(hist) else (None, [])
        if bl is None or bl[3] == "automatic":
            old_ids = sorted(bl[2]) if bl is not None else None
            new = compute_baseline(hist[hist["session_id"].isin(chosen)]) if chosen else None
            new_ids = chosen if new is not None and not new.empty else None
            if new_ids != old_ids:
                s.execute(delete(BaselineRow).where(BaselineRow.detector == detector, BaselineRow.method == method))
                bl = None
                if new_ids is not None:
                    sel = hist[hist["session_id"] == new_ids[-1]]
                    last = (str(sel["session_date"].iloc[0]), int(new_ids[-1]))
                    self.put_baseline(s, detector, method, new, new_ids, last, "automatic")
                    bl = (new, last, set(new_ids), "automatic")
                changes.baseline_changes.append(
                    {"detector": detector, "method": method, "before": old_ids, "after": new_ids}
                )
                since = None
        frame, last, bids = (None, None, set()) if bl is None else bl[:3]
        sessions = s.execute(
            select(SessionRow.id, SessionRow.session_date, SessionRow.verdict_method).where(
                SessionRow.detector == detector, SessionRow.state == "scored"
            )
        ).all()
        judged = [
            r.id
            for r in sessions
            if r.verdict_method == method and (since is None or (str(r.session_date), r.id) >= tuple(since))
        ]
        want: dict[tuple, dict] = {}
        for sid in judged:
            for a in evaluate_session(detector, sid, hist, frame, last, bids, rules, human_factor):
                d = a.to_dict()
                want[_key(d)] = d
        verdict_sessions = {r.id for r in sessions if r.verdict_method == method}
        for a in unstable_alerts(detector, method, tested):
            if a.session_id in verdict_sessions:
                d = a.to_dict()
                want[_key(d)] = d
        judged_set = set(judged)
        stored = s.scalars(select(AlertRow).where(AlertRow.detector == detector, AlertRow.method == method)).all()
        have = {}
        for r in stored:
            if r.rule == UNSTABLE or r.session_id in judged_set:
                have[_key(_row_dict(r))] = r
        now = utcnow()
        for key, r in have.items():
            if key not in want:
                changes.withdrawn.append(_row_dict(r))
                s.delete(r)
            elif not _same(want[key], r):
                before = _row_dict(r)
                a = want[key]
                r.direction, r.value, r.reference, r.message = a["direction"], a["value"], a["reference"], a["message"]
                changes.updated.append({**a, "before": before["message"], "id": r.id})
        for key, a in want.items():
            if key in have:
                continue
            row = AlertRow(
                session_id=a["session_id"],
                detector=a["detector"],
                session_date=a["session_date"],
                method=a["method"],
                diameter_mm=a["diameter_mm"],
                rule=a["rule"],
                direction=a["direction"],
                value=a["value"],
                reference=a["reference"],
                message=a["message"],
                created_at=now,
            )
            s.add(row)
            changes.added.append(a)
        s.flush()
        return changes
