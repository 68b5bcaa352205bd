"""E-mailing the alerts of a nightly run through the programme's SMTP server (standard library smtplib)."""

from __future__ import annotations

import os
import smtplib
from email.message import EmailMessage

from scorer.errors import LimenError

CAUTION = (
    "These alerts support, and never replace, the judgement of a qualified medical physicist; "
    "local regulations and licensed practice prevail."
)


def alert_message(smtp, alerts: list[dict], programme: str) -> EmailMessage:
    detectors = sorted({a["detector"] for a in alerts})
    msg = EmailMessage()
    msg["Subject"] = f"[Limen] {programme}: {len(alerts)} QC alert(s) for {', '.join(detectors)}"
    msg["From"] = smtp.sender
    msg["To"] = ", ".join(smtp.recipients)
    lines = [f"Limen nightly phantom scoring, {programme}: {len(alerts)} alert(s).", ""]
    for det in detectors:
        lines.append(f"{det}:")
        lines += [f"  - [{a['rule']}, {a['direction']}] {a['message']}" for a in alerts if a["detector"] == det]
        lines.append("")
    lines += [CAUTION, ""]
    msg.set_content("\n".join(lines))
    return msg


def send_alerts(smtp, alerts: list[dict], programme: str) -> None:
    """Send one message listing ``alerts``; a failure raises a one-line LimenError naming the server."""
    if not alerts:
        return
    msg = alert_message(smtp, alerts, programme)
    where = f"[smtp] {smtp.host}:{smtp.port}"
    try:
        with smtplib.SMTP(smtp.host, smtp.port, timeout=smtp.timeout_s) as conn:
            if smtp.starttls:
                conn.starttls()
            if smtp.username:
                password = os.environ.get(smtp.password_env or "", "")
                if not password:
                    raise LimenError(f"no SMTP password in the environment variable {smtp.password_env!r}", where)
                conn.login(smtp.username, password)
            conn.send_message(msg)
    except (OSError, smtplib.SMTPException) as exc:
        raise LimenError(f"cannot send the alert e-mail ({' '.join(str(exc).split())[:200]})", where) from None
