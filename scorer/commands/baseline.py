"""``limen baseline``: show, set or clear a detector's baseline in a nightly database."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import TYPE_CHECKING, Any

import click

from scorer.commands import options
from scorer.errors import LimenError
from scorer.reports import dumps

if TYPE_CHECKING:
    from click.decorators import FC

    from scorer.observer.limits import HumanFactor
    from scorer.qc.alerting import AlertChanges
    from scorer.qc.config import AlertRules
    from scorer.qc.store import Store


def _open(db: str) -> Store:
    from scorer.commands.nightly import db_url_option
    from scorer.qc import open_store

    return open_store(db_url_option(db), create=False)


@click.group("baseline")
def baseline() -> None:
    """Show, set or clear the baselines the nightly alerts compare with."""


@baseline.command("show")
@options.nightly_db()
@click.option("--detector", default=None, help="Only this detector (its name in the database).")
@click.option(
    "--config",
    "config_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Nightly configuration: the alert rules whose smallest detectable change is shown (default rules).",
)
@click.option("--json", "as_json", is_flag=True)
def show(db: str, detector: str | None, config_file: str | None, as_json: bool) -> None:
    """Print each detector's baseline per method and diameter, and the smallest change its rules detect."""
    from scorer.commands.nightly import load_nightly_config
    from scorer.qc.sensitivity import detectable_change, sensitivity_sentence

    rules = load_nightly_config(config_file).alerts
    store = _open(db)
    try:
        dates = _session_dates(store)
        out = []
        waiting = []
        for det in [detector] if detector else store.detectors():
            found = False
            for method in ("dprime", "count"):
                bl = store.baseline(det, method)
                if bl is None:
                    continue
                found = True
                frame, last, ids, source = bl
                sens = detectable_change(frame, rules)
                for r, sn in zip(frame.sort_values("diameter_mm").itertuples(), sens.to_dict("records")):
                    out.append(
                        {
                            "detector": det,
                            "method": method,
                            "diameter_mm": r.diameter_mm,
                            "baseline_contrast": 10**r.mean_log10,
                            "sigma_log10": r.sigma_log10,
                            "n_sessions": r.n_sessions,
                            "sessions": sorted(ids),
                            "source": source,
                            "detectable": {k: v for k, v in sn.items() if k not in ("diameter_mm", "sigma_log10")},
                            "detectable_text": sensitivity_sentence(sn),
                        }
                    )
            if not found:
                waiting.append(det)
    finally:
        store.close()
    if as_json:
        click.echo(dumps(out))
        return
    if not out:
        click.echo("no baselines yet")
    for r in out:
        click.echo(
            f"{r['detector']}  {r['method']:>6}  {r['diameter_mm']:>6g} mm  C_T {100 * r['baseline_contrast']:.3g} %"
            f"  σ(log10) {r['sigma_log10']:.3f}  {r['source']} from the sessions "
            f"{baseline_sessions_text(r['sessions'], dates)}"
        )
        click.echo(f"      detectable rise of C_T: {r['detectable_text']}")
    for det in waiting if out else []:
        click.echo(f"{det}: no baseline yet (no stable run of sessions; see the trend report)")


def _config_option() -> Callable[[FC], FC]:
    return click.option(
        "--config",
        "config_file",
        type=click.Path(dir_okay=False),
        default=None,
        help="Nightly configuration: alert rules and baseline length used to re-evaluate the stored alerts.",
    )


def baseline_sessions_text(session_ids: Iterable[int], dates: dict[int, str]) -> str:
    """The baseline's sessions by acquisition date (:func:`scorer.reports.trend.baseline_sessions_text`)."""
    from scorer.reports.trend import baseline_sessions_text as text

    return text(session_ids, dates)


def _session_dates(store: Any) -> dict[int, str]:
    """Scored session id → its acquisition date (YYYY-MM-DD), to name baselines as a physicist knows them."""
    return {int(s["id"]): str(s["session_date"]) for s in store.sessions()}


def _rules(config_file: str | None, detector: str) -> tuple[int, AlertRules, HumanFactor | float | None]:
    from scorer.commands.nightly import load_nightly_config

    config = load_nightly_config(config_file)
    det = config.by_name(detector)
    return det.baseline_sessions, config.alerts, det.human_factor


def _date(value: str | None, option: str) -> str | None:
    """A calendar date written YYYY-MM-DD (as the sessions store theirs), or a one-line LimenError."""
    import datetime as dt
    import re

    if value is None:
        return None
    text = value.strip()
    try:
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", text):
            raise ValueError
        return dt.date.fromisoformat(text).isoformat()
    except ValueError:
        shown = repr(text) if len(text) <= 40 else f"of {len(text)} characters"
        raise LimenError(f"{shown} is not a date: write YYYY-MM-DD, e.g. 2026-03-02", option) from None


@baseline.command("set")
@options.nightly_db()
@_config_option()
@click.option("--detector", required=True, help="The detector's name in the database.")
@click.option("--sessions", default=None, help="Comma-separated session ids (from `limen trend` or --json).")
@click.option("--from", "date_from", default=None, help="First session date (YYYY-MM-DD) of the baseline.")
@click.option("--to", "date_to", default=None, help="Last session date (YYYY-MM-DD) of the baseline.")
def set_(
    db: str, detector: str, sessions: str | None, date_from: str | None, date_to: str | None, config_file: str | None
) -> None:
    """Set a detector's baseline explicitly from chosen scored sessions."""
    if bool(sessions) == bool(date_from or date_to):
        raise LimenError("give either --sessions or --from/--to")
    date_from, date_to = _date(date_from, "--from"), _date(date_to, "--to")
    if date_from and date_to and date_from > date_to:
        raise LimenError(f"--from {date_from} is after --to {date_to}")
    store = _open(db)
    try:
        if sessions:
            try:
                ids = [int(x) for x in sessions.split(",") if x.strip()]
            except ValueError:
                raise LimenError(f"not a list of session ids: {sessions!r}", "--sessions") from None
        else:
            ids = [
                s["id"]
                for s in store.sessions(detector)
                if (not date_from or s["session_date"] >= date_from) and (not date_to or s["session_date"] <= date_to)
            ]
            if not ids:
                raise LimenError(
                    f"no scored sessions of {detector!r} between {date_from or '…'} and {date_to or '…'}", "--from/--to"
                )
        k, rules, factor = _rules(config_file, detector)
        _frames, changes = store.set_baseline(detector, ids, k, rules, factor)
        dates = _session_dates(store)
    finally:
        store.close()
    click.echo(f"baseline of {detector} set from the sessions {baseline_sessions_text(ids, dates)}")
    _say(changes)


def _say(changes: AlertChanges) -> None:
    from scorer.commands.nightly import print_changes

    for a in changes.added:
        click.echo(f"  new alert [{a['rule']}, {a['direction']}] {a['message']}")
    print_changes([], changes.withdrawn, changes.updated)
    if not (changes.added or changes.withdrawn or changes.updated):
        click.echo("  the stored alerts are unchanged")


@baseline.command("clear")
@options.nightly_db()
@_config_option()
@click.option("--detector", required=True, help="The detector's name in the database.")
def clear(db: str, detector: str, config_file: str | None) -> None:
    """Forget a detector's baseline; the automatic one is rebuilt from its first sessions."""
    store = _open(db)
    try:
        k, rules, factor = _rules(config_file, detector)
        n, changes = store.clear_baseline(detector, k, rules, factor)
        dates = _session_dates(store)
    finally:
        store.close()
    click.echo(f"{detector}: {n} baseline row(s) removed")
    for b in changes.baseline_changes:
        if b["after"]:
            click.echo(
                f"  automatic baseline of {detector} ({b['method']}): the sessions "
                f"{baseline_sessions_text(b['after'], dates)}"
            )
    _say(changes)
