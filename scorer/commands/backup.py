"""``limen backup``: copy a reader-study web-app instance into a new folder that is itself an instance folder."""

from __future__ import annotations

import click


@click.command("backup")
@click.option(
    "--db",
    "db_url",
    default=None,
    help="SQLAlchemy database URL (default: $LIMEN_DATABASE_URL, else SQLite in the instance folder).",
)
@click.option(
    "--instance",
    type=click.Path(file_okay=False),
    default=None,
    help="Instance folder to back up (default: $LIMEN_INSTANCE, else reader-studies in the user's data folder).",
)
@click.option(
    "--out",
    "out",
    type=click.Path(file_okay=False),
    required=True,
    help="New folder for the backup (it becomes an instance folder: limen serve --instance OUT restores it).",
)
def backup(db_url: str | None, instance: str | None, out: str) -> None:
    """Back up the web app's SQLite database, image store and secret key into OUT (safe while the server runs).

    A PostgreSQL database is not copied: dump it with pg_dump alongside (see the README).
    """
    from scorer.commands.serve import build_config
    from scorer.extras import require

    require("web")
    from webapp import create_app
    from webapp.backup import backup_instance

    app = create_app(build_config(db_url, instance))
    summary = backup_instance(app, out)
    click.echo(f"backed up {app.instance_path} into {summary.out}")
    click.echo(f"  database: {summary.database}")
    click.echo(f"  store: {summary.files} files, {summary.bytes / 1e6:.1f} MB")
    click.echo(f"restore: limen serve --instance {summary.out}  (or copy the folder where the instance should live)")
