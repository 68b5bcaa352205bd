"""E-mailing the alerts of a nightly run through the programme's SMTP server (standard library smtplib)."""

from __future__ import annotations

import os
import smtplib
from email.message import EmailMessage
from typing import TYPE_CHECKING, Any

from scorer.errors import LimenError

if TYPE_CHECKING:
    import datetime as _dt

    from scorer.qc.config import SmtpConfig

CAUTION = (
    "These alerts support, and never replace, the judgement of a qualified medical physicist; "
    "local regulations and licensed practice prevail."
)


def _worst(alerts: list[dict[str, Any]]) -> dict[str, Any] | None:
    """The control-rule alert furthest beyond its reference on the worse side (value / reference), if any."""
    ranked = [
        a
        for a in alerts
        if a.get("diameter_mm") is not None and a.get("value") and a.get("reference") and a["direction"] == "worse"
    ]
    if not ranked:
        ranked = [a for a in alerts if a.get("diameter_mm") is not None]
        return ranked[0] if ranked else None
    return max(ranked, key=lambda a: a["value"] / a["reference"])


def alert_message(
    smtp: SmtpConfig,
    alerts: list[dict[str, Any]],
    programme: str,
    report: str | None = None,
    run_started: _dt.datetime | None = None,
) -> EmailMessage:
    """One message for a run's alerts: the subject names detector(s), date(s) and the worst diameter; the body
    lists each alert's date, diameter, rule, value and reference, marks those raised by an earlier run (an
    SMTP outage) as late, and gives the trend report's path."""
    detectors = sorted({a["detector"] or "(unknown detector)" for a in alerts})
    dates = sorted({a["session_date"] for a in alerts})
    worst = _worst(alerts)
    when = dates[0] if len(dates) == 1 else f"{dates[0]} … {dates[-1]}"
    subject = f"[Limen] {programme}: {len(alerts)} QC alert(s), {', '.join(detectors)}, {when}"
    if worst is not None:
        subject += f", worst {worst['diameter_mm']:g} mm ({worst['rule']})"
    msg = EmailMessage()
    msg["Subject"] = subject
    msg["From"] = smtp.sender
    msg["To"] = ", ".join(smtp.recipients)
    lines = [f"Limen nightly phantom scoring, {programme}: {len(alerts)} alert(s).", ""]
    late = [a for a in alerts if run_started is not None and a.get("created_at") and a["created_at"] < run_started]
    if late:
        lines += [
            f"{len(late)} alert(s) marked LATE were raised by an earlier run whose e-mail could not be sent.",
            "",
        ]
    for det in detectors:
        lines.append(f"{det}:")
        for a in alerts:
            if (a["detector"] or "(unknown detector)") != det:
                continue
            tag = " LATE (raised " + f"{a['created_at']:%Y-%m-%d %H:%M} UTC)" if a in late else ""
            where = f"{a['session_date']}" + (f", {a['diameter_mm']:g} mm" if a.get("diameter_mm") is not None else "")
            lines.append(f"  - {where} [{a['rule']}, {a['direction']}]{tag}")
            lines.append(f"    {a['message']}")
        lines.append("")
    if report:
        lines += [f"Trend report: {report}", ""]
    lines += [CAUTION, ""]
    msg.set_content("\n".join(lines))
    return msg


def send_alerts(
    smtp: SmtpConfig,
    alerts: list[dict[str, Any]],
    programme: str,
    report: str | None = None,
    run_started: _dt.datetime | None = None,
) -> None:
    """Send one message listing ``alerts``; a failure raises a one-line LimenError naming the server."""
    if not alerts:
        return
    msg = alert_message(smtp, alerts, programme, report, run_started)
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
