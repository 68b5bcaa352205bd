"""Opening Limen's two databases — nightly QC results and the reader-study web app — the same way.

Three steps, each refusing in one line (:class:`~scorer.errors.LimenError`) what it cannot use:

1. :func:`check_url`: the URL parses, names a database SQLAlchemy knows, and keeps what is written (no
   in-memory SQLite); a SQLite file is a SQLite file (not a folder, not empty, not another kind of file), and
   a missing one is created only by a command that writes results (``create=True``) in a folder it can write.
2. :func:`prepare`: the tables say which kind of database it is.  A database of the other kind, or of some
   other program, is refused by name; an empty one is set up only when ``create`` is true.
3. The schema is brought to this release's by Alembic (migrations shipped in the package, one folder per kind,
   each with its own version table), inside one transaction holding the database's write lock (SQLite
   ``BEGIN IMMEDIATE``, a PostgreSQL advisory lock), so two processes opening a new database at once create it
   once.  A database of the release before Alembic (no version table, but every table of that release) is
   *adopted*: the baseline revision's ``adopt(connection)`` adds what that release lacked, then the baseline is
   stamped.  A database whose revision this release does not know was written by a later Limen: refused.
"""

from __future__ import annotations

import datetime as _dt
import os
import zlib
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import TYPE_CHECKING

from scorer.errors import LimenError

if TYPE_CHECKING:
    from alembic.config import Config
    from sqlalchemy import MetaData
    from sqlalchemy.engine import URL, Connection, Engine

SQLITE_MAGIC = b"SQLite format 3\x00"


@dataclass(frozen=True)
class DatabaseKind:
    """One kind of Limen database.

    Attributes
    ----------
    name : str
        How messages call it ("nightly QC", "reader-study").
    version_table : str
        Alembic's version table for this kind (each kind its own, so neither is mistaken for the other).
    legacy_tables : frozenset of str
        Every database of this kind written by the release before Alembic has all of these tables.
    created_by : str
        The command that creates one (named in the message for a missing database).
    migrations : str
        The package folder holding this kind's Alembic scripts, relative to the ``scorer`` package's parent.
    """

    name: str
    version_table: str
    legacy_tables: frozenset[str]
    created_by: str
    migrations: str

    @property
    def script_location(self) -> Path:
        return Path(__file__).resolve().parent.parent / self.migrations

    @property
    def lock_key(self) -> int:
        """The PostgreSQL advisory-lock key of this kind's schema changes."""
        return zlib.crc32(self.version_table.encode()) & 0x7FFFFFFF


NIGHTLY = DatabaseKind(
    name="nightly QC",
    version_table="alembic_version_nightly",
    legacy_tables=frozenset({"limen_meta", "qc_sessions", "qc_images", "qc_thresholds"}),
    created_by="limen nightly",
    migrations="scorer/qc/migrations",
)
WEB_APP = DatabaseKind(
    name="reader-study (web app)",
    version_table="alembic_version_webapp",
    legacy_tables=frozenset({"users", "studies", "study_images", "regions", "trials", "responses"}),
    created_by="limen serve or limen users add",
    migrations="webapp/migrations",
)
KINDS = (NIGHTLY, WEB_APP)


def display_url(url: str | URL) -> str:
    """``url`` as shown in messages and reports: the password hidden."""
    from sqlalchemy.engine import make_url

    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:
        return "<unparseable URL>"


def short_error(exc: BaseException, limit: int = 200) -> str:
    """The driver's own message of a database error, on one line and cut to ``limit`` characters."""
    text = " ".join(str(getattr(exc, "orig", None) or exc).split())
    return text if len(text) <= limit else text[: limit - 1] + "…"


def check_url(url: str | URL, kind: DatabaseKind, *, create: bool, option: str = "--db") -> URL:
    """The parsed URL of a database Limen can open for ``kind``; raises LimenError (one line) otherwise.

    Parameters
    ----------
    url : str
        SQLAlchemy URL.
    kind : DatabaseKind
        The kind the command expects (named in the messages).
    create : bool
        Whether the command writes results and may create a missing SQLite file.
    option : str
        The option the URL came from, named when the URL itself cannot be shown.

    Returns
    -------
    sqlalchemy.engine.URL
    """
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import NoSuchModuleError

    try:
        u = make_url(url)
    except Exception:
        raise LimenError(
            f"not a database URL: {str(url)[:200]!r} (e.g. sqlite:///path/file.sqlite or "
            "postgresql+psycopg://user@host/db)",
            option,
        ) from None
    try:
        u.get_dialect()
    except NoSuchModuleError:
        raise LimenError(
            f"unknown kind of database {u.drivername!r} (use sqlite:/// or postgresql+psycopg://)", display_url(u)
        ) from None
    except Exception as exc:  # a dialect whose module fails to import
        raise LimenError(f"cannot use this kind of database: {short_error(exc)}", display_url(u)) from None
    if u.get_backend_name() == "sqlite":
        _check_sqlite(u, kind, create)
    elif u.get_backend_name() == "postgresql" and u.get_driver_name() == "psycopg":
        from scorer.extras import require

        require("postgres", display_url(u))
    return u


def _check_sqlite(u: URL, kind: DatabaseKind, create: bool) -> None:
    name = u.database
    if not name or name == ":memory:" or u.query.get("mode") == "memory":
        raise LimenError(
            "an in-memory SQLite database keeps nothing once the command ends: give a file "
            "(sqlite:///path/to/file.sqlite)",
            display_url(u),
        )
    if name.startswith("file:"):
        return  # a SQLite URI filename: left to SQLite
    path = Path(name).expanduser()
    if path.exists():
        if path.is_dir():
            raise LimenError("is a folder, not a SQLite database file", path)
        try:
            with open(path, "rb") as f:
                head = f.read(len(SQLITE_MAGIC))
        except OSError as exc:
            raise LimenError(f"cannot read the database file ({exc.strerror or exc})", path) from None
        if not head:
            raise LimenError(f"is an empty file (0 bytes), not a {kind.name} database; remove it first", path)
        if head != SQLITE_MAGIC:
            raise LimenError(f"is not a SQLite database file (expected a {kind.name} database)", path)
        tables = _sqlite_tables(path)
        if tables is not None:  # refused before the engine touches the file (it would turn on WAL)
            classify(tables, kind, create, path)
        return
    if not create:
        raise LimenError(f"no such database file (mistyped? `{kind.created_by}` creates one)", path)
    parent = path.resolve().parent
    if not parent.is_dir():
        raise LimenError(f"folder {parent} for the SQLite database does not exist", path)
    if not os.access(parent, os.W_OK | os.X_OK):
        raise LimenError(f"folder {parent} is not writable: cannot create the SQLite database there", path)
    _create_sqlite_file(path.resolve())


def _create_sqlite_file(path: Path) -> None:
    """Make an empty SQLite database at ``path`` that is never seen unfinished: written under a temporary name
    (header page and WAL mode), then linked into place only if ``path`` is still absent.  Connecting to a missing
    file directly would leave a 0-byte file for a moment, which another process opening it at the same time
    would refuse as not a database."""
    import sqlite3

    tmp = path.with_name(f".{path.name}.{os.getpid()}.part")
    try:
        con = sqlite3.connect(tmp)
        try:
            con.execute("PRAGMA journal_mode=WAL")  # writes the header page
        finally:
            con.close()
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass  # another process made it first: use theirs
    except (OSError, sqlite3.Error) as exc:
        raise LimenError(f"cannot create the SQLite database ({getattr(exc, 'strerror', None) or exc})", path) from None
    finally:
        for leftover in (tmp, tmp.with_name(tmp.name + "-wal"), tmp.with_name(tmp.name + "-shm")):
            try:
                leftover.unlink()
            except OSError:
                pass


def prepare(engine: Engine, url: str | URL, kind: DatabaseKind, *, create: bool) -> None:
    """Check that ``engine``'s database is of ``kind`` and bring its schema to this release's, in one transaction.

    Parameters
    ----------
    engine : sqlalchemy.engine.Engine
        Made from a URL that passed :func:`check_url`.
    url : str
        The URL, for messages (password hidden).
    kind : DatabaseKind
        The kind the command expects.
    create : bool
        Whether an empty database may be set up (commands that write results).

    Raises
    ------
    LimenError
        One line naming the database: unreachable, of another kind, empty while ``create`` is false, written by
        a later Limen, or an error of the database itself.
    """
    from sqlalchemy.exc import SQLAlchemyError

    try:
        with engine.connect() as conn:
            with conn.begin():
                if conn.dialect.name == "sqlite":
                    dbapi = conn.connection.dbapi_connection
                    assert dbapi is not None  # a connection just opened is not invalidated
                    if not dbapi.in_transaction:  # the engine leaves BEGIN to pysqlite: take the write lock now
                        conn.exec_driver_sql("BEGIN IMMEDIATE")
                elif conn.dialect.name == "postgresql":
                    conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({kind.lock_key})")
                _prepare_in(conn, url, kind, create)
    except LimenError:
        raise
    except SQLAlchemyError as exc:
        raise LimenError(f"cannot open database: {short_error(exc, 300)}", display_url(url)) from None


def classify(tables: Iterable[str], kind: DatabaseKind, create: bool, where: object) -> str:
    """What a database holding ``tables`` is for a command expecting ``kind``: ``"current"`` (Alembic's version
    table of this kind), ``"legacy"`` (every table of the release before Alembic) or ``"empty"`` (allowed only
    when ``create``); anything else is refused in one line naming ``where``."""
    tables = set(tables) - {"sqlite_sequence"}
    if kind.version_table in tables:
        return "current"
    if kind.legacy_tables <= tables:
        # also when the other kind's tables are there too: releases before this one made both schemas in one
        # database when given the other's; its data stay usable by each
        return "legacy"
    for other in KINDS:
        if other is not kind and (other.version_table in tables or other.legacy_tables <= tables):
            raise LimenError(f"is a {other.name} database, not a {kind.name} one", where)
    if tables:
        shown = ", ".join(sorted(tables)[:4]) + (", …" if len(tables) > 4 else "")
        raise LimenError(f"holds tables of another program ({shown}), not a {kind.name} database", where)
    if not create:
        raise LimenError(f"is empty, not a {kind.name} database (`{kind.created_by}` fills one)", where)
    return "empty"


def _sqlite_tables(path: Path) -> set[str] | None:
    """The tables of a SQLite file, read without changing it (read-only, no journal-mode change); None when
    SQLite cannot read it that way (left to the engine's own message)."""
    import sqlite3
    from urllib.parse import quote

    try:
        con = sqlite3.connect(f"file:{quote(str(path.resolve()))}?mode=ro", uri=True, timeout=30)
        try:
            return {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        finally:
            con.close()
    except sqlite3.Error:
        return None


def _alembic_config(conn: Connection, kind: DatabaseKind) -> Config:
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(kind.script_location))
    cfg.attributes["connection"] = conn
    cfg.attributes["version_table"] = kind.version_table
    return cfg


def _prepare_in(conn: Connection, url: str | URL, kind: DatabaseKind, create: bool) -> None:
    from alembic import command
    from alembic.runtime.migration import MigrationContext
    from alembic.script import ScriptDirectory
    from sqlalchemy import inspect

    where = display_url(url)
    legacy = classify(inspect(conn).get_table_names(), kind, create, where) == "legacy"
    cfg = _alembic_config(conn, kind)
    script = ScriptDirectory.from_config(cfg)
    if legacy:
        base = script.get_base()
        assert base is not None  # every kind ships its baseline revision

        script.get_revision(base).module.adopt(conn)
        command.stamp(cfg, base)
    heads = set(script.get_heads())
    current = set(MigrationContext.configure(conn, opts={"version_table": kind.version_table}).get_current_heads())
    known = {r.revision for r in script.walk_revisions()}
    unknown = current - known
    if unknown:
        raise LimenError(
            f"database schema revision {', '.join(sorted(unknown))} was written by a later Limen "
            f"(this one knows up to {', '.join(sorted(heads))}); upgrade Limen",
            where,
        )
    if current != heads:
        command.upgrade(cfg, "heads")


def run_migrations(context: ModuleType, kind: DatabaseKind, target_metadata: MetaData) -> None:
    """The body of each kind's ``env.py``: run Alembic on the connection :func:`prepare` passes, or, from the
    ``alembic`` command line (developers, see DEVELOPERS.md), on the database given as ``-x db=URL``."""
    cfg = context.config
    conn = cfg.attributes.get("connection")
    if conn is not None:
        _configure_and_run(context, conn, kind, target_metadata)
        return
    from sqlalchemy import create_engine

    url = context.get_x_argument(as_dictionary=True).get("db")
    if not url:
        raise SystemExit("give the database to work on: alembic -n NAME … -x db=sqlite:///path/file.sqlite")
    engine = create_engine(url)
    try:
        with engine.begin() as conn:
            _configure_and_run(context, conn, kind, target_metadata)
    finally:
        engine.dispose()


def _configure_and_run(context: ModuleType, conn: Connection, kind: DatabaseKind, target_metadata: MetaData) -> None:

    context.configure(
        connection=conn,
        target_metadata=target_metadata,
        version_table=kind.version_table,
        render_as_batch=conn.dialect.name == "sqlite",  # SQLite alters most columns by copying the table
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def utcnow() -> _dt.datetime:
    """Now in UTC, naive — as every DateTime column of both databases stores it (one definition for both)."""
    return _dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None)
