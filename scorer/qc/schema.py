"""The nightly database's schema version: created on first use, recorded in ``limen_meta``, migrated.

A database written by a later Limen is refused; one written by an earlier one is migrated by
:data:`MIGRATIONS` (none yet).
"""

from __future__ import annotations

from sqlalchemy import insert, select, text, update

from scorer.errors import LimenError
from scorer.qc.engine import display_url
from scorer.qc.tables import Base, MetaRow

SCHEMA_VERSION = 1
#: from-version -> function(connection) bringing the schema to from-version + 1
MIGRATIONS: dict = {}


def ensure_schema(conn, url: str) -> None:
    """Create the tables on first use, check (and migrate) the recorded version, inside ``conn``'s transaction.

    Raises LimenError when the database was written by a later version of Limen.
    """
    if conn.dialect.name == "postgresql":
        conn.execute(text("SELECT pg_advisory_xact_lock(6177001)"))  # one creator at a time
    Base.metadata.create_all(conn)
    row = conn.execute(select(MetaRow.value).where(MetaRow.key == "schema_version")).scalar()
    version = int(row) if row is not None else None
    if version is None:
        conn.execute(insert(MetaRow).values(key="schema_version", value=str(SCHEMA_VERSION)))
    elif version > SCHEMA_VERSION:
        raise LimenError(
            f"database schema version {version} is newer than this Limen's ({SCHEMA_VERSION}); upgrade Limen",
            display_url(url),
        )
    else:
        while version < SCHEMA_VERSION:
            MIGRATIONS[version](conn)
            version += 1
        conn.execute(update(MetaRow).where(MetaRow.key == "schema_version").values(value=str(version)))
