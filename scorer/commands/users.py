"""``limen users``: accounts of the reader-study web app."""

from __future__ import annotations

import os
import sys
from typing import TYPE_CHECKING, TypeVar

import click

from scorer.errors import LimenError

if TYPE_CHECKING:
    from collections.abc import Callable

    from flask import Flask

    from webapp.models import User

_F = TypeVar("_F", bound="Callable[..., None]")


def _app(db_url: str | None, instance: str | None) -> Flask:
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


def _with_db(f: _F) -> _F:
    for opt in reversed(_db_options):
        f = opt(f)
    return f


def _new_password(generate: bool, from_stdin: bool, prompt: str) -> str:
    """A generated password (shown once by the caller), one line of standard input (``--password-stdin``), or
    one prompted twice on the terminal (webapp.account_admin's rules).  Without a terminal to prompt on, a one-line
    error says what to give instead (getpass would print its warnings and read the password visibly)."""
    from webapp.account_admin import check_password, generate_password

    if generate and from_stdin:
        raise LimenError("give --generate or --password-stdin, not both")
    if generate:
        return generate_password()
    if from_stdin:
        line = sys.stdin.readline() if sys.stdin is not None else ""
        if not line:
            raise LimenError("no password on standard input (one line expected)", "--password-stdin")
        return check_password(line.rstrip("\r\n"))
    no_terminal = LimenError(
        "no terminal to ask for the password on: give --password-stdin (one line on standard input) or --generate"
    )
    if sys.stdin is sys.__stdin__ and not _terminal():  # the process's own input (a test harness gives its own)
        raise no_terminal
    import getpass
    import warnings

    with warnings.catch_warnings():  # getpass falls back to an echoed prompt with a warning: refuse instead
        warnings.simplefilter("error", getpass.GetPassWarning)
        try:
            return check_password(click.prompt(prompt, hide_input=True, confirmation_prompt=True))
        except getpass.GetPassWarning:
            raise no_terminal from None


def _terminal() -> bool:
    """Whether a hidden prompt can be shown: the controlling terminal opens (as getpass opens it), or standard
    input is a terminal."""
    try:
        fd = os.open("/dev/tty", os.O_RDWR | os.O_NOCTTY)
    except OSError:
        try:
            return sys.stdin is not None and sys.stdin.isatty()
        except ValueError:  # closed
            return False
    os.close(fd)
    return True


_password_stdin = click.option(
    "--password-stdin",
    "password_stdin",
    is_flag=True,
    help="Read the password from the first line of standard input (for scripts; nothing is echoed).",
)


@click.group("users")
def users() -> None:
    """Add, list, disable, enable the web app's accounts, reset passwords and end sessions."""
    from scorer.extras import require

    require("web")


@users.command("add")
@click.argument("name")
@click.option("--role", type=click.Choice(["coordinator", "reader"]), required=True)
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_password_stdin
@_with_db
def add(name: str, role: str, generate: bool, password_stdin: bool, db_url: str | None, instance: str | None) -> None:
    """Create an account NAME (password prompted, read with --password-stdin, or generated with --generate)."""
    from webapp.account_admin import add_account
    from webapp.accounts import check_new_name
    from webapp.models import db

    name = check_new_name(name)
    password = _new_password(generate, password_stdin, "password")
    app = _app(db_url, instance)
    with app.app_context():
        add_account(db(), name, role, password, via="limen users add")
        db().commit()
    click.echo(f"added {role} {name}")
    if generate:
        click.echo(f"password (shown once): {password}")


@users.command("sign-out")
@click.argument("name")
@_with_db
def sign_out(name: str, db_url: str | None, instance: str | None) -> None:
    """End every session of account NAME at its next request (it signs in again with its password)."""
    from webapp.account_admin import sign_out_everywhere

    _change(name, db_url, instance, lambda u: sign_out_everywhere(u, via="limen users sign-out"))
    click.echo(f"every session of {name} has ended")


@users.command("list")
@_with_db
def list_users(db_url: str | None, instance: str | None) -> None:
    """List accounts (name, role, active)."""
    from sqlalchemy import select

    from webapp.models import User, db

    app = _app(db_url, instance)
    with app.app_context():
        for u in db().execute(select(User).order_by(User.username)).scalars():
            click.echo(f"{u.username:<24}{u.role:<13}{'active' if u.active else 'disabled'}")


def _change(name: str, db_url: str | None, instance: str | None, change: Callable[[User], object]) -> None:
    """Apply ``change(user)`` (a webapp.account_admin operation, which audits) to account NAME in one transaction;
    an unknown NAME is a one-line error."""
    from webapp.account_admin import account
    from webapp.models import db

    app = _app(db_url, instance)
    with app.app_context():
        change(account(db(), name))
        db().commit()


@users.command("disable")
@click.argument("name")
@_with_db
def disable(name: str, db_url: str | None, instance: str | None) -> None:
    """Disable account NAME: it can no longer sign in, and its sessions end at their next request.

    Its reads and the studies it coordinated stay as they are (nothing is deleted).
    """
    from webapp import account_admin

    _change(name, db_url, instance, lambda u: account_admin.disable(u, via="limen users disable"))
    click.echo(f"disabled {name}")


@users.command("enable")
@click.argument("name")
@_with_db
def enable(name: str, db_url: str | None, instance: str | None) -> None:
    """Enable account NAME again."""
    from webapp import account_admin

    _change(name, db_url, instance, lambda u: account_admin.enable(u, via="limen users enable"))
    click.echo(f"enabled {name}")


@users.command("password")
@click.argument("name")
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_password_stdin
@_with_db
def password(name: str, generate: bool, password_stdin: bool, db_url: str | None, instance: str | None) -> None:
    """Set a new password for account NAME (prompted, read with --password-stdin, or generated with --generate);
    its sessions end."""
    from webapp import account_admin

    new = _new_password(generate, password_stdin, "new password")
    _change(name, db_url, instance, lambda u: account_admin.reset_password(u, new, via="limen users password"))
    click.echo(f"new password set for {name}")
    if generate:
        click.echo(f"password (shown once): {new}")
