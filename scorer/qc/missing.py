"""Missing QC is not silent: alerts of their own kind for QC that did not happen.

* ``incomplete`` — a session short of its ``min_images`` longer than ``[alerts] incomplete_hours`` since its
  first image arrived (a 3-of-4 session otherwise waits forever with exit 0);
* ``silent`` — a configured detector whose latest image is older than ``[alerts] silent_days`` (0: never);
* ``quarantined`` — a run whose every new file was quarantined (a replaced panel with a new Detector ID
  looks like a good night otherwise).

Each is stored once per kind, detector and subject (the session's group, the last date seen, the run's
date) in ``qc_missing``, printed by the run that raised it, e-mailed with the other alerts, listed in the
trend report, and makes ``limen nightly`` exit 1.
"""

from __future__ import annotations

import datetime as _dt

from sqlalchemy import func, select

from scorer.qc.tables import ImageRow, MissingQcRow, utcnow

KINDS = ("incomplete", "silent", "quarantined")


def _row(r: MissingQcRow) -> dict:
    return {
        "id": r.id,
        "kind": r.kind,
        "rule": f"missing: {r.kind}",
        "detector": r.detector,
        "subject": r.subject,
        "session_date": r.session_date,
        "message": r.message,
        "created_at": r.created_at,
        "emailed": r.emailed_at is not None,
    }


class MissingOps:
    """Finding and storing missing-QC alerts (mixed into :class:`Store`)."""

    def find_missing(self, config, rules, n_new_images: int, quarantined: list[dict], now=None) -> list[dict]:
        """Missing-QC alerts raised now (each stored once; those stored before are not returned again)."""
        now = now or utcnow()
        found: list[tuple[str, str, str, str, str]] = []  # kind, detector, subject, date, message
        with self.transaction() as s:
            groups = s.execute(
                select(
                    ImageRow.group_key,
                    ImageRow.detector,
                    func.min(ImageRow.session_date),
                    func.min(ImageRow.first_seen),
                    func.count(),
                )
                .where(ImageRow.session_id.is_(None))
                .group_by(ImageRow.group_key, ImageRow.detector)
            ).all()
            for key, det, date, first, n in groups:
                need = config.by_name(det).min_images
                waited_h = (now - first).total_seconds() / 3600 if first is not None else 0.0
                if n < need and waited_h > rules.incomplete_hours:
                    found.append(
                        (
                            "incomplete",
                            det,
                            key,
                            str(date),
                            f"{det} {date}: session incomplete — {n} of {need} images, the first arrived "
                            f"{waited_h:.0f} h ago (limit {rules.incomplete_hours:g} h); the rest were never sent, or "
                            "were quarantined",
                        )
                    )
            if rules.silent_days > 0:
                last = {
                    det: seen
                    for det, seen in s.execute(
                        select(ImageRow.detector, func.max(ImageRow.session_date)).group_by(ImageRow.detector)
                    ).all()
                }
                for d in config.detectors:
                    seen = last.get(d.name)
                    if seen is None:
                        continue  # never sent anything: nothing to measure the silence from
                    days = (now.date() - _dt.date.fromisoformat(str(seen))).days
                    if days > rules.silent_days:
                        found.append(
                            (
                                "silent",
                                d.name,
                                str(seen),
                                str(seen),
                                f"{d.name}: no QC images for {days} days (last {seen}; limit "
                                f"{rules.silent_days:g} days)",
                            )
                        )
            if quarantined and n_new_images == 0:
                today = now.date().isoformat()
                reasons = sorted({q["reason"] for q in quarantined})
                found.append(
                    (
                        "quarantined",
                        "",
                        f"{today} {len(quarantined)} {quarantined[0]['path']}",
                        today,
                        f"every new file of this run was quarantined ({len(quarantined)} file(s); "
                        f"{'; '.join(reasons)[:300]}): no QC was scored — see `limen quarantine list`",
                    )
                )
            out = []
            for kind, det, subject, date, msg in found:
                # ON CONFLICT DO NOTHING: two runs at once raise it once
                res = s.execute(
                    self._insert(MissingQcRow.__table__).values(
                        kind=kind, detector=det, subject=subject, session_date=date, message=msg, created_at=now
                    )
                )
                if res.rowcount:
                    row = s.scalars(
                        select(MissingQcRow).where(
                            MissingQcRow.kind == kind, MissingQcRow.detector == det, MissingQcRow.subject == subject
                        )
                    ).one()
                    out.append(_row(row))
            return out

    def missing_alerts(self) -> list[dict]:
        with self.transaction() as s:
            return [_row(r) for r in s.scalars(select(MissingQcRow).order_by(MissingQcRow.id))]
