"""``limen nightly``: score every complete, new session in an inbox once, store it, trend it, alert."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING, Any, overload

import click

from scorer.commands import options
from scorer.errors import LimenError
from scorer.reports import CAUTION, dumps

if TYPE_CHECKING:
    from pathlib import Path

    from scorer.qc.config import NightlyConfig
    from scorer.qc.nightly import NightlyResult


@overload
def db_url_option(value: str) -> str: ...


@overload
def db_url_option(value: None) -> None: ...


def db_url_option(value: str | None) -> str | None:
    """``--db``: an SQLAlchemy URL, or a plain path taken as a SQLite file."""
    if value is None or "://" in value:
        return value
    from pathlib import Path

    return f"sqlite:///{Path(value).expanduser().resolve()}"


def load_nightly_config(path: str | None) -> NightlyConfig:
    """The nightly configuration with human/model factors and MTFs read as `limen score` reads them."""
    from scorer.qc import default_config, load_config

    if path is None:
        return default_config()
    return load_config(path)


@click.command("nightly")
@click.option(
    "--inbox",
    type=click.Path(file_okay=False),
    required=True,
    help="Folder of incoming phantom images (scanned recursively).",
)
@click.option(
    "--config",
    "config_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Nightly configuration (limen-nightly/1 TOML). Without it: bundled layout, no limits, 4 images per session.",
)
@click.option(
    "--db",
    "db",
    default=None,
    help="Database: SQLAlchemy URL (postgresql+psycopg://user@host/db) or a SQLite file path "
    "(default: limen-nightly.sqlite beside the inbox).",
)
@click.option(
    "--report",
    "report_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Write the trend report (trend.html, CSV, JSON) here after the run.",
)
@click.option(
    "--workers", type=click.IntRange(1, 256), default=None, help="Score sessions on a local pool of N processes."
)
@click.option(
    "--dask",
    "dask_address",
    default=None,
    help="Score sessions on an existing Dask scheduler, e.g. tcp://10.0.0.5:8786.",
)
@click.option(
    "--quarantine",
    "quarantine_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Where unusable files are moved (default: INBOX/quarantine).",
)
@click.option(
    "--settle-seconds",
    type=click.FloatRange(0),
    default=60.0,
    show_default=True,
    help="Leave files modified more recently than this for the next run (they may still be arriving).",
)
@click.option(
    "--lease-seconds",
    type=click.FloatRange(10),
    default=1800.0,
    show_default=True,
    help="A claim on a session not renewed for this long is taken over by another run.",
)
@options.json_output()
def nightly(
    inbox: str,
    config_file: str | None,
    db: str | None,
    report_dir: str | None,
    workers: int | None,
    dask_address: str | None,
    quarantine_dir: str | None,
    settle_seconds: float,
    lease_seconds: float,
    as_json: bool,
) -> None:
    """Score new phantom images in INBOX once per session; store, trend and alert.

    Exit status: 0 all well; 1 an alert of any kind is to be reported — a control rule, baseline unstable, or
    missing QC (a session incomplete too long, a detector silent too long, every new file quarantined) raised by
    this run, or left unreported by an earlier run that was killed before its report was written; 2 bad input,
    usage or database error.
    """
    from scorer.qc import default_db_url, open_store, run_nightly

    if workers and dask_address:
        raise LimenError("give either --workers or --dask, not both")
    if dask_address:
        from scorer.extras import require

        require("nightly", "--dask")
    config = load_nightly_config(config_file)
    from pathlib import Path

    from scorer.qc.inbox import check_inbox

    check_inbox(inbox, quarantine_dir)  # before the database is opened: a run that cannot go makes nothing
    url = db_url_option(db) or default_db_url(Path(inbox).resolve().parent)
    store = open_store(url)
    try:
        result = run_nightly(
            inbox,
            config,
            store=store,
            quarantine_dir=quarantine_dir,
            workers=workers or 1,
            dask=dask_address,
            settle_s=settle_seconds,
            lease_s=lease_seconds,
            progress=not as_json,
            report=str(Path(report_dir).resolve() / "trend.html") if report_dir else None,
        )
        page = None
        if report_dir:
            from scorer.files import OutputFolder
            from scorer.reports.trend import write_trend_report

            # the report is rewritten every night: last night's files (and only those) are replaced
            folder = OutputFolder(report_dir, replace=True, command="nightly", option="--report")
            page = write_trend_report(store, report_dir, config.alerts, config.programme, config=config)
            folder.finish()
        if as_json:
            js = result.to_json()
            js["report"] = None if page is None else str(page)
            click.echo(dumps(js))
        else:
            _print(result, page)
        for e in result.errors:
            click.echo(f"warning: {e}", err=True)
        for k in result.skipped:
            click.echo(f"warning: {k['path']}: {k['reason']}", err=True)
        for r in result.repeated:
            click.echo(f"warning: {r['message']}", err=True)
        for w in result.warnings:
            click.echo(f"warning: {w}", err=True)
        # printed and the report written: these alerts are reported (a run killed before here leaves them to the next)
        store.mark_reported(
            [a["id"] for a in result.pending if a["kind"] == "alert"],
            [a["id"] for a in result.pending if a["kind"] != "alert"],
        )
    finally:
        store.close()
    if result.alerts or result.missing or result.pending:
        sys.exit(1)


def _print(result: NightlyResult, page: Path | None) -> None:
    click.echo(
        f"{result.scored_images} image(s) scored in {len(result.sessions_scored)} session(s) "
        f"[{result.runner}; {result.db}]"
    )
    for s in result.sessions_scored:
        click.echo(
            f"  scored  {s['detector']}  {s['session_date']}  {s['images']} images  "
            f"verdict: {s['overall_verdict']}  alerts: {s['alerts']}"
        )
    for w in result.waiting:
        click.echo(f"  waiting {w['detector']}  {w['session_date']}  {w['images']} of {w['needed']} images")
    for d in result.duplicates:
        click.echo(f"  duplicate {d['path']} (same content as {d['same_as']})")
    if result.arriving:
        click.echo(f"  {len(result.arriving)} file(s) still arriving: left for the next run")
    for q in result.quarantined:
        click.echo(f"  quarantined {q['path']}: {q['reason']}")
    if result.skipped_before:
        n = result.skipped_before
        click.echo(f"  {n} inbox entr{'y' if n == 1 else 'ies'} skipped, as said on an earlier run")
    for a in result.alerts:
        late = " (earlier session, re-evaluated)" if a.get("reevaluated") else ""
        click.echo(f"ALERT [{a['rule']}, {a['direction']}]{late} {a['message']}")
    for m in result.missing:
        click.echo(f"ALERT [missing QC: {m['kind']}] {m['message']}")
    for a in result.earlier:
        click.echo(f"ALERT [{a['rule']}] (raised by an earlier run that did not finish) {a['message']}")
    print_changes(result.baseline_changes, result.withdrawn, result.updated)
    if page is not None:
        click.echo(f"trend report: {page}")
    click.echo(CAUTION)


def print_changes(
    baseline_changes: list[dict[str, Any]], withdrawn: list[dict[str, Any]], updated: list[dict[str, Any]]
) -> None:
    """Say how a changed baseline changed the stored alerts of earlier sessions."""
    for b in baseline_changes:
        before = "none" if not b["before"] else "sessions " + ", ".join(map(str, b["before"]))
        after = (
            "none (no stable run of sessions yet)" if not b["after"] else "sessions " + ", ".join(map(str, b["after"]))
        )
        click.echo(f"  baseline of {b['detector']} ({b['method']}) changed: {before} -> {after}")
    for a in withdrawn:
        click.echo(f"  withdrawn [{a['rule']}] {a['message']}")
    for a in updated:
        click.echo(f"  reworded [{a['rule']}] {a['message']} (was: {a['before']})")
