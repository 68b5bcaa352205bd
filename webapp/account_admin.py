"""Account operations shared by ``limen users`` and the coordinator's Accounts page.

Each operation changes the account and adds its audit entry in the caller's transaction (the caller commits):
the command line and the browser apply the same rules — names by :func:`webapp.accounts.check_new_name`, one
account per name key and per look-alike key (:func:`webapp.accounts.look_alike_of`), sessions ended by
:func:`webapp.accounts.end_sessions` — and leave the same trace
(``add_user``, ``disable_user``, ``enable_user``, ``reset_password``, ``sign_out_everywhere``; the command line
adds ``via``, the browser's entries name the coordinator).  A coordinator cannot disable, or reset the password
of, their own account from the browser (that would lock them out mid-page; the server's ``limen users`` can).
"""

from __future__ import annotations

import secrets

from scorer.errors import LimenError
from webapp.accounts import check_new_name, end_sessions, find_user, look_alike_of, name_key, shown_name
from webapp.models import ROLES, User
from webapp.security import audit, hash_password

MIN_PASSWORD_CHARS = 10


def generate_password() -> str:
    """A random password of 16 URL-safe characters (96 bits), shown once to whoever made it."""
    return secrets.token_urlsafe(12)


def check_password(password: str) -> str:
    """A chosen password, or a one-line LimenError when it is shorter than :data:`MIN_PASSWORD_CHARS`."""
    if len(password or "") < MIN_PASSWORD_CHARS:
        raise LimenError(f"password: at least {MIN_PASSWORD_CHARS} characters")
    return password


def add_account(session, name: str, role: str, password: str, **detail) -> User:
    """Create the account ``name`` with ``role``; a taken name (compared by key) is a one-line error."""
    from sqlalchemy.exc import IntegrityError

    name = check_new_name(name)
    if role not in ROLES:
        raise LimenError(f"role must be one of {', '.join(ROLES)}, got {shown_name(role)!r}")
    other = look_alike_of(session, name)
    if other is not None and name_key(other.username) == name_key(name):
        raise LimenError(f"user name {name!r} is taken (names are compared without regard to case)")
    if other is not None:
        raise LimenError(
            f"user name {name!r} looks like the account {other.username!r} (0/O, 1/l/I and m/rn pass for one "
            "another): choose another name"
        )
    user = User(username=name, password_hash=hash_password(password), role=role)
    session.add(user)
    try:
        session.flush()
    except IntegrityError:
        session.rollback()
        raise LimenError(f"user name {name!r} is taken (names are compared without regard to case)") from None
    audit("add_user", username=name, role=role, **detail)
    return user


def account(session, name: str) -> User:
    """The account ``name`` is a name of (by key), or a one-line LimenError."""
    user = find_user(session, name)
    if user is None:
        raise LimenError(f"no account named {shown_name(name)!r} (see 'limen users list')")
    return user


def _not_self(user: User, acting_id: int | None, what: str) -> None:
    if acting_id is not None and user.id == acting_id:
        raise LimenError(f"you cannot {what} your own account here (use 'limen users' on the server)")


def disable(user: User, acting_id: int | None = None, **detail) -> None:
    """Disable ``user``: it can no longer sign in and its sessions end at their next request (reads are kept)."""
    _not_self(user, acting_id, "disable")
    user.active = False
    end_sessions(user)
    audit("disable_user", username=user.username, **detail)


def enable(user: User, **detail) -> None:
    """Let ``user`` sign in again (with the password it had)."""
    user.active = True
    audit("enable_user", username=user.username, **detail)


def reset_password(user: User, password: str, acting_id: int | None = None, **detail) -> None:
    """Give ``user`` a new password; every session it had ends."""
    _not_self(user, acting_id, "reset the password of")
    user.password_hash = hash_password(check_password(password))
    end_sessions(user)
    audit("reset_password", username=user.username, **detail)


def sign_out_everywhere(user: User, **detail) -> None:
    """End every session of ``user`` at its next request; it signs in again with its password."""
    end_sessions(user)
    audit("sign_out_everywhere", username=user.username, **detail)
