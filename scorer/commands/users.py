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
    click.option(
        "--instance",
        type=click.Path(file_okay=False),
        default=None,
        help="Instance folder (default: $LIMEN_INSTANCE, else reader-studies in the user's data folder).",
    ),
]


def _with_db(f):
    for opt in reversed(_db_options):
        f = opt(f)
    return f


MIN_PASSWORD_CHARS = 10


def _new_password(generate: bool, prompt: str) -> str:
    """A generated password (shown once by the caller) or one prompted twice, at least MIN_PASSWORD_CHARS long."""
    if generate:
        return secrets.token_urlsafe(12)
    password = click.prompt(prompt, hide_input=True, confirmation_prompt=True)
    if len(password) < MIN_PASSWORD_CHARS:
        raise LimenError(f"password: at least {MIN_PASSWORD_CHARS} characters")
    return password


@click.group("users")
def users():
    """Add, list, disable, enable the web app's accounts, reset passwords and end sessions."""


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

    from webapp.accounts import check_new_name

    name = check_new_name(name)
    password = _new_password(generate, "password")
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
            raise LimenError(f"user name {name!r} is taken (names are compared without regard to case)") from None
    click.echo(f"added {role} {name}")
    if generate:
        click.echo(f"password (shown once): {password}")


@users.command("sign-out")
@click.argument("name")
@_with_db
def sign_out(name, db_url, instance):
    """End every session of account NAME at its next request (it signs in again with its password)."""
    from webapp.accounts import end_sessions

    _change(name, db_url, instance, "sign_out_everywhere", {"via": "limen users sign-out"}, end_sessions)
    click.echo(f"every session of {name} has ended")


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


def _change(name, db_url, instance, action: str, detail: dict, change) -> None:
    """Apply ``change(user)`` to account NAME in one transaction with an audit entry; unknown NAME is an error."""
    from webapp.accounts import find_user, shown_name
    from webapp.models import AuditEntry
    from webapp.security import db

    app = _app(db_url, instance)
    with app.app_context():
        s = db()
        user = find_user(s, name)
        if user is None:
            raise LimenError(f"no account named {shown_name(name)!r} (see 'limen users list')")
        change(user)
        s.add(AuditEntry(user_id=None, action=action, detail=json.dumps({"username": user.username, **detail})))
        s.commit()


@users.command("disable")
@click.argument("name")
@_with_db
def disable(name, db_url, instance):
    """Disable account NAME: it can no longer sign in, and its sessions end at their next request.

    Its reads and the studies it coordinated stay as they are (nothing is deleted).
    """
    from webapp.accounts import end_sessions

    def change(user):
        user.active = False
        end_sessions(user)

    _change(name, db_url, instance, "disable_user", {"via": "limen users disable"}, change)
    click.echo(f"disabled {name}")


@users.command("enable")
@click.argument("name")
@_with_db
def enable(name, db_url, instance):
    """Enable account NAME again."""
    _change(name, db_url, instance, "enable_user", {"via": "limen users enable"}, lambda u: setattr(u, "active", True))
    click.echo(f"enabled {name}")


@users.command("password")
@click.argument("name")
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_with_db
def password(name, generate, db_url, instance):
    """Set a new password for account NAME (prompted, or generated with --generate); its sessions end."""
    from webapp.accounts import end_sessions
    from webapp.security import hash_password

    new = _new_password(generate, "new password")
    hashed = hash_password(new)

    def change(user):
        user.password_hash = hashed
        end_sessions(user)

    _change(name, db_url, instance, "reset_password", {"via": "limen users password"}, change)
    click.echo(f"new password set for {name}")
    if generate:
        click.echo(f"password (shown once): {new}")
