"""``limen users``: accounts of the reader-study web app."""

from __future__ import annotations


import click


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


def _new_password(generate: bool, prompt: str) -> str:
    """A generated password (shown once by the caller) or one prompted twice (webapp.account_admin's rules)."""
    from webapp.account_admin import check_password, generate_password

    if generate:
        return generate_password()
    return check_password(click.prompt(prompt, hide_input=True, confirmation_prompt=True))


@click.group("users")
def users():
    """Add, list, disable, enable the web app's accounts, reset passwords and end sessions."""
    from scorer.extras import require

    require("web")


@users.command("add")
@click.argument("name")
@click.option("--role", type=click.Choice(["coordinator", "reader"]), required=True)
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_with_db
def add(name, role, generate, db_url, instance):
    """Create an account NAME (password prompted, or generated with --generate)."""
    from webapp.account_admin import add_account
    from webapp.accounts import check_new_name
    from webapp.security import db

    name = check_new_name(name)
    password = _new_password(generate, "password")
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
def sign_out(name, db_url, instance):
    """End every session of account NAME at its next request (it signs in again with its password)."""
    from webapp.account_admin import sign_out_everywhere

    _change(name, db_url, instance, lambda u: sign_out_everywhere(u, via="limen users sign-out"))
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


def _change(name, db_url, instance, change) -> None:
    """Apply ``change(user)`` (a webapp.account_admin operation, which audits) to account NAME in one transaction;
    an unknown NAME is a one-line error."""
    from webapp.account_admin import account
    from webapp.security import db

    app = _app(db_url, instance)
    with app.app_context():
        change(account(db(), name))
        db().commit()


@users.command("disable")
@click.argument("name")
@_with_db
def disable(name, db_url, instance):
    """Disable account NAME: it can no longer sign in, and its sessions end at their next request.

    Its reads and the studies it coordinated stay as they are (nothing is deleted).
    """
    from webapp import account_admin

    _change(name, db_url, instance, lambda u: account_admin.disable(u, via="limen users disable"))
    click.echo(f"disabled {name}")


@users.command("enable")
@click.argument("name")
@_with_db
def enable(name, db_url, instance):
    """Enable account NAME again."""
    from webapp import account_admin

    _change(name, db_url, instance, lambda u: account_admin.enable(u, via="limen users enable"))
    click.echo(f"enabled {name}")


@users.command("password")
@click.argument("name")
@click.option("--generate", is_flag=True, help="Generate a password and show it once instead of prompting.")
@_with_db
def password(name, generate, db_url, instance):
    """Set a new password for account NAME (prompted, or generated with --generate); its sessions end."""
    from webapp import account_admin

    new = _new_password(generate, "new password")
    _change(name, db_url, instance, lambda u: account_admin.reset_password(u, new, via="limen users password"))
    click.echo(f"new password set for {name}")
    if generate:
        click.echo(f"password (shown once): {new}")
