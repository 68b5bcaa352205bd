"""Optional parts of Limen and the packages they need (``pip install 'limen[NAME]'``).

The scoring core (``limen score``, ``detector``, ``analyse``, …) needs none of them.  A command that needs one
calls :func:`require` first, so a missing package is one line naming the extra to install, not a traceback.
"""

from __future__ import annotations

import importlib.util

from scorer.errors import LimenError

#: extra -> (what it serves, the modules it brings)
EXTRAS = {
    "web": ("the reader-study web app", ("flask", "flask_login", "flask_wtf", "waitress")),
    "nightly": ("scoring on a Dask cluster (--dask)", ("dask", "distributed")),
    "postgres": ("PostgreSQL databases", ("psycopg",)),
}


def missing(extra: str) -> list[str]:
    """The modules of ``extra`` that cannot be imported here."""
    out = []
    for m in EXTRAS[extra][1]:
        try:
            found = importlib.util.find_spec(m) is not None
        except (ImportError, ValueError):
            found = False
        if not found:
            out.append(m)
    return out


def require(extra: str, option: str | None = None) -> None:
    """Raise a one-line LimenError naming ``pip install 'limen[extra]'`` when a module of ``extra`` is missing."""
    lacking = missing(extra)
    if lacking:
        what = EXTRAS[extra][0]
        raise LimenError(
            f"{what} needs the [{extra}] extra ({', '.join(lacking)} not installed): pip install 'limen[{extra}]'",
            option,
        )
