"""The nightly database's connection: its URL (default, display with the password hidden) and engine.

A SQLite file by default, PostgreSQL (or any SQLAlchemy URL) otherwise.  On SQLite every
transaction begins with ``BEGIN IMMEDIATE`` (see :func:`sqlite_transactions`).
"""

from __future__ import annotations

from pathlib import Path

from sqlalchemy import create_engine, event
from sqlalchemy.engine import make_url

from scorer.errors import LimenError


def default_db_url(directory) -> str:
    """The SQLite file used without ``--db``: ``limen-nightly.sqlite`` in ``directory``."""
    return f"sqlite:///{Path(directory).resolve() / 'limen-nightly.sqlite'}"


def display_url(url: str) -> str:
    """``url`` as shown in messages and reports: the password hidden."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:
        return "<unparseable URL>"


def make_engine(url: str):
    """A SQLAlchemy engine for ``url`` (SQLite: folder checked, real transactions).

    Raises LimenError (one line, password hidden) for a URL that cannot be parsed or used.
    """
    try:
        u = make_url(url)
    except Exception:
        raise LimenError(
            f"not a database URL: {url!r} (e.g. sqlite:///nightly.sqlite or postgresql+psycopg://user@host/db)", "--db"
        ) from None
    kw = {}
    if u.get_backend_name() == "sqlite":
        if u.database and u.database != ":memory:":
            parent = Path(u.database).expanduser().resolve().parent
            if not parent.is_dir():
                raise LimenError(f"folder {parent} for the SQLite database does not exist", "--db")
        kw["connect_args"] = {"timeout": 120}
    try:
        engine = create_engine(url, **kw)
    except Exception as exc:  # missing driver, bad options
        raise LimenError(
            f"cannot use database {display_url(url)}: {' '.join(str(exc).split())[:200]}", "--db"
        ) from None
    if engine.dialect.name == "sqlite":
        sqlite_transactions(engine)
    return engine


def sqlite_transactions(engine) -> None:
    """Real transactions on SQLite: pysqlite's own BEGIN handling off, BEGIN IMMEDIATE on every transaction.

    IMMEDIATE takes the write lock at the start, so two runs' transactions are serialised
    instead of failing on a lock upgrade; WAL lets readers (a report) go on meanwhile.
    """

    @event.listens_for(engine, "connect")
    def _connect(dbapi_conn, _record):
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
    def _begin(conn):
        conn.exec_driver_sql("BEGIN IMMEDIATE")
