"""``limen quarantine``: list the files the nightly run quarantined, release one once its cause is fixed."""

from __future__ import annotations

import click

from scorer.commands import options
from scorer.errors import LimenError
from scorer.reports import dumps


@click.group("quarantine")
def quarantine() -> None:
    """List the nightly run's quarantined files; release one once its cause is fixed."""


@quarantine.command("list")
@options.nightly_db()
@click.option("--json", "as_json", is_flag=True)
def list_(db: str, as_json: bool) -> None:
    """Print every quarantined file with its entry number and reason."""
    from scorer.commands.baseline import _open

    store = _open(db)
    try:
        rows = store.quarantine_entries()
    finally:
        store.close()
    if as_json:
        click.echo(dumps(rows))
        return
    if not rows:
        click.echo("nothing quarantined")
    for r in rows:
        click.echo(
            f"{r['id']:>5}  {r['at']:%Y-%m-%d %H:%M}  {r['path']}\n       {r['reason']}\n       now: {r['moved_to']}"
        )


@quarantine.command("release")
@options.nightly_db()
@click.argument("entries", nargs=-1, type=int, required=True)
@click.option(
    "--to",
    "to_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Move the files into this folder (default: back where they came from).",
)
def release(db: str, entries: tuple[int, ...], to_dir: str | None) -> None:
    """Move quarantined files back (entry numbers from `limen quarantine list`); the next run reads them afresh."""
    from scorer.commands.baseline import _open

    store = _open(db)
    try:
        for e in entries:
            try:
                r = store.release_quarantined(e, to_dir)
            except OSError as exc:
                raise LimenError(f"cannot move the file of entry {e} ({exc.strerror or exc})", "release") from None
            click.echo(f"released {r['id']}: {r['released_to']} (was: {r['reason']})")
    finally:
        store.close()
