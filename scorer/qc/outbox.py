"""Alerts on their way out: claimed in the database before they are mailed, and remembered as reported.

* **Mailing.** A run claims the pending alerts (control-rule alerts and missing-QC alerts not yet e-mailed)
  by compare-and-set of a random token, ``UPDATE … SET mail_token = :t WHERE emailed_at IS NULL AND
  (mail_token IS NULL OR mail_claimed_at < :stale)``, then mails exactly the rows carrying its token: two
  overlapping runs never send one alert twice.  After the SMTP server accepted the message the rows get
  ``emailed_at``; when it did not (an outage) the claim is dropped and the next run sends them, marked late.
  A run killed between claim and send leaves a claim that is taken over after ``MAIL_LEASE``.
* **Reporting.** An alert is *reported* once a run that printed it finished (its trend report written).  A
  run killed before that leaves the alert unreported, and the next run lists it and exits 1 again, so the
  night's alert status is never lost to a crash.
"""

from __future__ import annotations

import datetime as _dt
import secrets

from sqlalchemy import or_, select, update

from scorer.qc.tables import AlertRow, MissingQcRow, utcnow

MAIL_LEASE = _dt.timedelta(minutes=10)


def _alert(a: AlertRow) -> dict:
    return {
        "id": a.id,
        "kind": "alert",
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
        "created_at": a.created_at,
    }


def _missing(m: MissingQcRow) -> dict:
    return {
        "id": m.id,
        "kind": m.kind,
        "detector": m.detector,
        "session_date": m.session_date,
        "rule": f"missing: {m.kind}",
        "direction": "missing",
        "diameter_mm": None,
        "value": None,
        "reference": None,
        "message": m.message,
        "created_at": m.created_at,
    }


class OutboxOps:
    """Claiming alerts for mail and remembering which were reported (mixed into :class:`Store`)."""

    def claim_for_mail(self) -> tuple[str, list[dict]]:
        """(token, the pending alerts this run now holds: control-rule alerts first, then missing QC)."""
        token = secrets.token_hex(16)
        now = utcnow()
        stale = now - MAIL_LEASE
        out = []
        with self.transaction() as s:
            for table, conv in ((AlertRow, _alert), (MissingQcRow, _missing)):
                s.execute(
                    update(table)
                    .where(
                        table.emailed_at.is_(None),
                        or_(table.mail_token.is_(None), table.mail_claimed_at < stale),
                    )
                    .values(mail_token=token, mail_claimed_at=now)
                )
                out += [conv(r) for r in s.scalars(select(table).where(table.mail_token == token).order_by(table.id))]
        return token, out

    def mail_done(self, token: str, sent: bool) -> None:
        """After the send: mark the token's rows e-mailed, or drop the claim so the next run retries."""
        with self.transaction() as s:
            for table in (AlertRow, MissingQcRow):
                values = {"emailed_at": utcnow()} if sent else {"mail_token": None, "mail_claimed_at": None}
                s.execute(update(table).where(table.mail_token == token, table.emailed_at.is_(None)).values(**values))

    def unreported(self) -> list[dict]:
        """Alerts no finished run has reported (a run killed before its report was written)."""
        with self.transaction() as s:
            return [_alert(r) for r in s.scalars(select(AlertRow).where(AlertRow.reported_at.is_(None)))] + [
                _missing(r) for r in s.scalars(select(MissingQcRow).where(MissingQcRow.reported_at.is_(None)))
            ]

    def mark_reported(self, alert_ids, missing_ids) -> None:
        now = utcnow()
        with self.transaction() as s:
            if alert_ids:
                s.execute(update(AlertRow).where(AlertRow.id.in_(list(alert_ids))).values(reported_at=now))
            if missing_ids:
                s.execute(update(MissingQcRow).where(MissingQcRow.id.in_(list(missing_ids))).values(reported_at=now))
