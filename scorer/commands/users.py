"""``limen users``: accounts of the reader-study web app."""

from __future__ import annotations

import json
import secrets

import click

from scorer.errors import LimenError


def _app(db_url, instance):
    from scorer.commands.serve import build_config
    from webapp import create_app

    return create_app(build_config(db_url, instance))


_db_options = [
    click.option(
        "--db",
        "db_url",
        default=None,
        help="SQLAlchemy database URL (default: $LIMEN_DATABASE_URL, else SQLite in the instance folder).",
    ),
    click.option("--instance", type=click.Path(file_okay=False), default=None, help="Instance folder."),
]


def _with_db(f):
    for opt in reversed(_db_options):
        f = opt(f)
    return f


@click.group("users")
def users():
    """Add and list the web app's accounts."""


@users.command("add")
@click.argument("name")
@click.option("--role", type=click.Choice(["coordinator", "reader"]), required=True)
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_with_db
def add(name, role, generate, db_url, instance):
    """Create an account NAME (password prompted, or generated with --generate)."""
    from sqlalchemy.exc import IntegrityError

    from webapp.models import AuditEntry, User
    from webapp.security import db, hash_password

    if not name or len(name) > 64 or not all(ch.isalnum() or ch in "._-" for ch in name):
        raise LimenError(f"user name {name!r}: use 1–64 letters, digits, '.', '_' or '-'")
    if generate:
        password = secrets.token_urlsafe(12)
    else:
        password = click.prompt("password", hide_input=True, confirmation_prompt=True)
        if len(password) < 10:
            raise LimenError("password: at least 10 characters")
    app = _app(db_url, instance)
    with app.app_context():
        s = db()
        s.add(User(username=name, password_hash=hash_password(password), role=role))
        s.add(
            AuditEntry(
                user_id=None,
                action="add_user",
                detail=json.dumps({"username": name, "role": role, "via": "limen users add"}),
            )
        )
        try:
            s.commit()
        except IntegrityError:
            s.rollback()
            raise LimenError(f"user name {name!r} is taken") from None
    click.echo(f"added {role} {name}")
    if generate:
        click.echo(f"password (shown once): {password}")


@users.command("list")
@_with_db
def list_users(db_url, instance):
    """List accounts (name, role, active)."""
    from sqlalchemy import select

    from webapp.models import User
    from webapp.security import db

    app = _app(db_url, instance)
    with app.app_context():
        for u in db().execute(select(User).order_by(User.username)).scalars():
            click.echo(f"{u.username:<24}{u.role:<13}{'active' if u.active else 'disabled'}")
