"""Account names and the account's session generation.

**Names.** An account name is 1–64 characters from a safe ASCII set (letters, digits, ``.``, ``_``, ``-``,
starting with a letter or digit): no look-alike letters of other scripts (Cyrillic ``а`` beside Latin ``a``),
no invisible characters.  Two names are the same account when their *keys* are equal: the key is the name
Unicode-normalised (NFKC) and case-folded (Unicode Standard Annex #15 and the Unicode case-folding rule of
chapter 3 of the Unicode Standard, see docs/references.md), so ``Reader1``, ``reader1`` and the full-width
``ｒｅａｄｅｒ１`` a Japanese keyboard may type all sign in to the one account ``reader1``.  The key is a column of
its own (``users.username_key``) with a unique constraint: the database itself refuses two accounts whose
names differ only by case.

**Sessions.** Every account carries a session generation (``users.session_generation``), written into the
signed session cookie at sign-in (Flask-Login's user id is ``"<id>:<generation>"``).  Sign-out, a new
password, disabling the account and a coordinator's "sign out everywhere" raise the generation, so every
cookie issued before — on this browser, another device, or a copy — stops working at its next request.
"""

from __future__ import annotations

import re
import unicodedata

from scorer.errors import LimenError

MAX_NAME_CHARS = 64
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
NAME_RULE = "1–64 letters (a–z, A–Z), digits, '.', '_' or '-', starting with a letter or digit"


def name_key(name: str) -> str:
    """The key two names are compared by: NFKC-normalised, case-folded, surrounding spaces removed."""
    return unicodedata.normalize("NFKC", name or "").strip().casefold()


def check_new_name(name: str) -> str:
    """The name of a new account, or a one-line LimenError that never repeats a long name whole."""
    name = (name or "").strip()
    if _NAME.fullmatch(name):
        return name
    shown = repr(name) if len(name) <= MAX_NAME_CHARS else f"of {len(name)} characters"
    raise LimenError(f"user name {shown}: use {NAME_RULE}")


def valid_key(key: str) -> bool:
    """Whether a key can belong to an account (so a 100 000-character name is never looked up or stored)."""
    return bool(_NAME.fullmatch(key))


def find_user(session, name: str):
    """The account whose key equals ``name``'s key, or None."""
    from sqlalchemy import select

    from webapp.models import User

    key = name_key(name)
    if not valid_key(key):
        return None
    return session.execute(select(User).where(User.username_key == key)).scalars().first()


def shown_name(name: str) -> str:
    """A typed user name as it may appear in the audit log: at most 64 characters."""
    name = name or ""
    return name if len(name) <= MAX_NAME_CHARS else name[: MAX_NAME_CHARS - 1] + "…"


# --------------------------------------------------------------------------- sessions
def session_id(user) -> str:
    """Flask-Login's id for ``user``: the account id and its current session generation."""
    return f"{user.id}:{int(user.session_generation or 0)}"


def parse_session_id(raw: str) -> tuple[int, int] | None:
    """(account id, generation) from a session's id; None for anything else (a cookie of an older release
    carried the bare id: it is no longer honoured, so such a session signs in again once)."""
    try:
        uid, gen = str(raw).split(":")
        return int(uid), int(gen)
    except (TypeError, ValueError):
        return None


def end_sessions(user) -> None:
    """End every session of ``user`` at its next request (the caller commits)."""
    user.session_generation = int(user.session_generation or 0) + 1
