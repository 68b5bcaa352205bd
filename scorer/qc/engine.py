"""The nightly database's connection: its URL (default, display with the password hidden) and engine.

A SQLite file by default, PostgreSQL otherwise (the URL checked by :mod:`scorer.databases`).  On SQLite every
transaction begins with ``BEGIN IMMEDIATE`` (see :func:`sqlite_transactions`).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, event
from sqlalchemy.engine import Connection, Engine

from scorer.databases import NIGHTLY, check_url, display_url, short_error
from scorer.errors import LimenError

__all__ = ["default_db_url", "display_url", "make_engine", "sqlite_transactions"]


def default_db_url(directory: str | os.PathLike[str]) -> str:
    """The SQLite file used without ``--db``: ``limen-nightly.sqlite`` in ``directory``."""
    return f"sqlite:///{Path(directory).resolve() / 'limen-nightly.sqlite'}"


def make_engine(url: str, *, create: bool = True) -> Engine:
    """A SQLAlchemy engine for ``url`` (checked by :func:`scorer.databases.check_url`; SQLite: real transactions).

    ``create`` says whether a missing SQLite file may be made (commands that write results).  Raises LimenError
    (one line, password hidden) for a URL that cannot be parsed or used.
    """
    u = check_url(url, NIGHTLY, create=create)
    kw = {}
    if u.get_backend_name() == "sqlite":
        kw["connect_args"] = {"timeout": 120}
    elif u.get_backend_name() == "postgresql" and "connect_timeout" not in u.query:
        kw["connect_args"] = {"connect_timeout": 20}  # an unreachable server: a message, not a long hang
    try:
        engine = create_engine(u, **kw)
    except Exception as exc:  # missing driver, bad options
        raise LimenError(f"cannot use database {display_url(url)}: {short_error(exc)}", "--db") from None
    if engine.dialect.name == "sqlite":
        sqlite_transactions(engine)
    return engine


def sqlite_transactions(engine: Engine) -> None:
    """Real transactions on SQLite: pysqlite's own BEGIN handling off, BEGIN IMMEDIATE on every transaction.

    IMMEDIATE takes the write lock at the start, so two runs' transactions are serialised
    instead of failing on a lock upgrade; WAL lets readers (a report) go on meanwhile.
    """

    @event.listens_for(engine, "connect")
    def _connect(dbapi_conn: Any, _record: object) -> None:  # a sqlite3.Connection
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA busy_timeout = 120000")
        cur.execute("PRAGMA foreign_keys = ON")
        if engine.url.database not in (None, "", ":memory:"):
            cur.execute("PRAGMA journal_mode = WAL")
            # WAL with synchronous NORMAL: a killed process (even SIGKILL) or a crashed machine leaves the
            # database consistent; only a power cut may undo the last commits, whose images are still in
            # the inbox and are scored again by the next run.  FULL would fsync at every commit.
            cur.execute("PRAGMA synchronous = NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _begin(conn: Connection) -> None:

        conn.exec_driver_sql("BEGIN IMMEDIATE")
