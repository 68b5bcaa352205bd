"""Account names and the account's session generation.

**Names.** An account name is 1–64 characters from a safe ASCII set (letters, digits, ``.``, ``_``, ``-``,
starting with a letter or digit): no look-alike letters of other scripts (Cyrillic ``а`` beside Latin ``a``),
no invisible characters.  Two names are the same account when their *keys* are equal: the key is the name
Unicode-normalised (NFKC) and case-folded (Unicode Standard Annex #15 and the Unicode case-folding rule of
chapter 3 of the Unicode Standard, see docs/references.md), so ``Reader1``, ``reader1`` and the full-width
``ｒｅａｄｅｒ１`` a Japanese keyboard may type all sign in to the one account ``reader1``.  The key is a column of
its own (``users.username_key``) with a unique constraint: the database itself refuses two accounts whose
names differ only by case.

**Look-alikes.** Within the safe set some characters still pass for others: ``0``/``O``, ``1``/``l``/``I`` and
``m``/``rn``.  A new name is refused when its *look-alike key* equals an existing account's: the confusable
skeleton of Unicode Technical Standard #39 (section 4, data file confusables.txt) taken around case folding,
``skeleton(casefold(skeleton(name)))``, so ``reader01``, ``Reader0l`` and ``READERO1`` are one name.  Only the
four mappings of confusables.txt whose source lies in the safe set are needed (every other character of the set
is its own prototype; checked against ICU 77.1 / Unicode 16.0 ``SpoofChecker.getSkeleton``), which is why the
6 000-entry table and a library carrying it (ICU bindings) are not used: a name with any other character is
refused by the character rule, and its message names the character (``U+0430 CYRILLIC SMALL LETTER A``).

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
    odd = next((ch for ch in name if not (ch.isascii() and ch.isprintable())), None)
    if odd is not None:  # a look-alike or invisible character: say which, so the reader sees why
        what = unicodedata.name(odd, "unnamed character")
        raise LimenError(f"user name {shown}: character U+{ord(odd):04X} {what} is not allowed; use {NAME_RULE}")
    raise LimenError(f"user name {shown}: use {NAME_RULE}")


#: UTS #39 confusables.txt prototypes of the safe set's characters that have one (Unicode 16.0): DIGIT ZERO → O,
#: DIGIT ONE → l, LATIN CAPITAL LETTER I → l, LATIN SMALL LETTER M → rn.  Every other allowed character maps to
#: itself (checked against ICU 77.1 SpoofChecker.getSkeleton over the whole set).
_PROTOTYPES = str.maketrans({"0": "O", "1": "l", "I": "l", "m": "rn"})


def _skeleton(text: str) -> str:
    """UTS #39 skeleton, restricted to the safe set: NFD, each character to its prototype, NFD."""
    return unicodedata.normalize("NFD", unicodedata.normalize("NFD", text).translate(_PROTOTYPES))


def look_alike_key(name: str) -> str:
    """Names with the same look-alike key pass for one another (case aside): ``skeleton(casefold(skeleton(·)))``
    of the NFKC-normalised name, so ``reader01``, ``Reader0l``, ``READERO1`` and ``reader0I`` share one."""
    return _skeleton(_skeleton(unicodedata.normalize("NFKC", name or "").strip()).casefold())


def look_alike_of(session, name: str):
    """The existing account whose name ``name`` could pass for (same key, or same look-alike key), or None."""
    from sqlalchemy import select

    from webapp.models import User

    key, look = name_key(name), look_alike_key(name)
    users = session.execute(select(User).order_by(User.id)).scalars().all()
    return next((u for u in users if name_key(u.username) == key), None) or next(
        (u for u in users if look_alike_key(u.username) == look), None
    )


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
