"""The nightly database's schema: recognised, created on first use and migrated by Alembic.

The migrations live in ``scorer/qc/migrations`` (shipped in the package); :func:`scorer.databases.prepare`
runs them when a database is opened.  A database of the release before Alembic (``limen_meta`` schema
version 1) is adopted by the baseline revision; one written by a later Limen is refused.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from scorer.databases import NIGHTLY, prepare

if TYPE_CHECKING:
    from sqlalchemy.engine import Engine


#: ``limen_meta.schema_version`` since Alembic took over; the releases before (version 1) refuse a higher one
SCHEMA_VERSION = 2


def ensure_schema(engine: Engine, url: str, *, create: bool = True) -> None:
    """Check that ``engine``'s database is a nightly one and bring its schema to this release's.

    ``create``: set up an empty database (commands that write results).  Raises LimenError (one line) for a
    database of another kind, an empty one when ``create`` is false, one written by a later Limen, or a
    database that cannot be reached.
    """
    prepare(engine, url, NIGHTLY, create=create)
