"""The nightly results database: :class:`Store` (one object, each method one transaction) and :func:`open_store`.

A SQLite file by default, PostgreSQL (or any SQLAlchemy URL) otherwise (:mod:`scorer.qc.engine`).
The schema is created on first use and migrated by Alembic (:mod:`scorer.qc.schema`); a database written
by a later Limen, or of another kind, is refused.
The store's operations live in one module per concern, mixed into :class:`Store`:
:mod:`~scorer.qc.tables` (the models), :mod:`~scorer.qc.intake` (file cache, new images,
quarantine), :mod:`~scorer.qc.claims` (the claim protocol), :mod:`~scorer.qc.results` (writing
a scored session), :mod:`~scorer.qc.baselines` and :mod:`~scorer.qc.queries` (reading results).

Concurrency and crashes
-----------------------
* An image is identified by the SHA-256 of its file (unique column): a renamed copy is the same
  image, and two runs inserting the same image meet on the unique constraint.
* A session is *claimed* in one transaction: a session row is inserted with a random claim
  token, and its images are bound to it with ``UPDATE … SET session_id = :new WHERE sha256 IN
  (…) AND session_id IS NULL``.  Unless every image was still free the transaction is rolled
  back.  The update is a compare-and-set on rows the database locks, so two runs can never
  bind one image to two sessions (PostgreSQL re-checks the condition after the other
  transaction commits; SQLite serialises write transactions, begun here with BEGIN IMMEDIATE).
* The scored session (thresholds, responses, registrations, baseline, alerts) is written in one
  transaction that first moves the session from ``claimed`` to ``scored`` *with the same token*;
  a run that lost its claim writes nothing.
* A claim whose holder died (same host, process gone) or whose lease has run out is taken over
  by the next run, again by compare-and-set on the token.  Nothing is written outside these
  transactions, so a run killed at any point leaves either the claim (taken over later) or the
  whole session.
"""

from __future__ import annotations

import os
import socket
from contextlib import contextmanager

from sqlalchemy import insert
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

from scorer.errors import LimenError
from scorer.qc.alerting import AlertOps
from scorer.qc.baselines import BaselineOps
from scorer.qc.claims import ClaimOps
from scorer.qc.engine import display_url, make_engine
from scorer.qc.intake import IntakeOps
from scorer.qc.missing import MissingOps
from scorer.qc.outbox import OutboxOps
from scorer.qc.queries import QueryOps
from scorer.qc.releases import ReleaseOps
from scorer.qc.results import ResultOps
from scorer.qc.schema import ensure_schema
from scorer.qc.tables import MetaRow


def open_store(url: str, *, create: bool = True) -> Store:
    """Connect, check that it is a nightly database, create (``create=True``) or migrate its schema.

    ``create=False`` is for the commands that only read or adjust results (``trend``, ``baseline``): a missing
    or empty database is then refused instead of made.  Raises LimenError (one line, password hidden) when the
    database cannot be reached, is of another kind, or was written by a later version of Limen.
    """
    engine = make_engine(url, create=create)
    try:
        ensure_schema(engine, url, create=create)
    except LimenError:
        engine.dispose()
        raise
    return Store(engine, url)


class Store(IntakeOps, ClaimOps, ResultOps, BaselineOps, AlertOps, MissingOps, OutboxOps, ReleaseOps, QueryOps):
    """One nightly database.  Open with :func:`open_store`; methods each run their own transaction."""

    def __init__(self, engine, url: str) -> None:
        self.engine = engine
        self.url = url
        self.is_sqlite = engine.dialect.name == "sqlite"
        self.host = socket.gethostname()
        self.pid = os.getpid()

    # ---------------------------------------------------------------- transactions
    @contextmanager
    def transaction(self):
        """A Session in one transaction: committed on success, rolled back on any error."""
        try:
            with Session(self.engine, expire_on_commit=False) as s, s.begin():
                yield s
        except SQLAlchemyError as exc:
            raise LimenError(
                f"database error: {' '.join(str(exc.orig or exc).split())[:300]}", display_url(self.url)
            ) from None

    def _dialect_insert(self, table):
        """The database's own INSERT construct (with ON CONFLICT clauses) for SQLite and PostgreSQL."""
        if self.is_sqlite:
            from sqlalchemy.dialects.sqlite import insert as dialect_insert
        else:
            from sqlalchemy.dialects.postgresql import insert as dialect_insert
        return dialect_insert(table)

    def _insert(self, table):
        """INSERT … ON CONFLICT DO NOTHING in the database's own dialect."""
        if not (self.is_sqlite or self.engine.dialect.name == "postgresql"):  # pragma: no cover - plain insert
            return insert(table)
        return self._dialect_insert(table).on_conflict_do_nothing()

    def _insert_many(self, s: Session, table, columns: dict[str, list]) -> None:
        """Insert many rows given as equal-length column lists through the driver's own executemany.

        The ORM and Core paths build a parameter dictionary per row, which for the ~350 responses of
        each image cost more than the scoring budget allows (issue 13: database time under 5 % of
        scoring time); one prepared statement with plain tuples does the same insert in a fraction.
        """
        names = list(columns)
        rows = list(zip(*(columns[c] for c in names)))
        if not rows:
            return
        mark = "?" if self.engine.dialect.paramstyle == "qmark" else "%s"
        sql = f"INSERT INTO {table.name} ({', '.join(names)}) VALUES ({', '.join([mark] * len(names))})"
        s.connection().exec_driver_sql(sql, rows)

    def close(self) -> None:
        self.engine.dispose()

    # ---------------------------------------------------------------- schema
    def schema_version(self) -> int:
        with self.transaction() as s:
            row = s.get(MetaRow, "schema_version")
            return int(row.value) if row else 0
