"""The nightly results database: SQLAlchemy 2 models, schema version, claims and one-transaction writes.

A SQLite file by default, PostgreSQL (or any SQLAlchemy URL) otherwise.  The schema is created on
first use and records its version in ``limen_meta``; a database written by a later Limen is
refused, one written by an earlier one is migrated by :data:`MIGRATIONS` (none yet).

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

import datetime as _dt
import json
import os
import socket
import uuid
from contextlib import contextmanager
from pathlib import Path

from sqlalchemy import (
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    String,
    Text,
    UniqueConstraint,
    bindparam,
    create_engine,
    delete,
    event,
    func,
    insert,
    select,
    text,
    update,
)
from sqlalchemy.engine import make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column

from scorer.errors import LimenError

SCHEMA_VERSION = 1
#: from-version -> function(connection) bringing the schema to from-version + 1
MIGRATIONS: dict = {}
DEFAULT_LEASE_S = 1800.0


class Base(DeclarativeBase):
    pass


class MetaRow(Base):
    __tablename__ = "limen_meta"
    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(Text)


class SessionRow(Base):
    __tablename__ = "qc_sessions"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    detector: Mapped[str] = mapped_column(String(200), index=True)
    session_date: Mapped[str] = mapped_column(String(10), index=True)
    group_key: Mapped[str] = mapped_column(String(400))
    state: Mapped[str] = mapped_column(String(16), index=True)  # claimed | scored
    claim_token: Mapped[str | None] = mapped_column(String(64))
    claim_host: Mapped[str | None] = mapped_column(String(255))
    claim_pid: Mapped[int | None] = mapped_column(Integer)
    claim_expires: Mapped[_dt.datetime | None] = mapped_column(DateTime)
    claimed_at: Mapped[_dt.datetime] = mapped_column(DateTime)
    scored_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)
    n_images: Mapped[int] = mapped_column(Integer)
    observer: Mapped[str | None] = mapped_column(String(16))
    verdict_method: Mapped[str | None] = mapped_column(String(16))
    overall_verdict: Mapped[str | None] = mapped_column(String(32))
    kvp: Mapped[float | None] = mapped_column(Float)
    anode: Mapped[str | None] = mapped_column(String(32))
    filter: Mapped[str | None] = mapped_column(String(32))
    flags: Mapped[str] = mapped_column(Text, default="[]")  # JSON list of setting flags
    settings: Mapped[str] = mapped_column(Text, default="{}")  # JSON: scoring settings
    warnings: Mapped[str] = mapped_column(Text, default="[]")
    scoring_s: Mapped[float | None] = mapped_column(Float)


class ImageRow(Base):
    __tablename__ = "qc_images"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    sha256: Mapped[str] = mapped_column(String(64), unique=True)
    path: Mapped[str] = mapped_column(Text)
    detector: Mapped[str] = mapped_column(String(200), index=True)
    group_key: Mapped[str] = mapped_column(String(400), index=True)
    session_date: Mapped[str] = mapped_column(String(10))
    acquired: Mapped[str | None] = mapped_column(String(40))
    detector_id: Mapped[str | None] = mapped_column(String(200))
    device_serial: Mapped[str | None] = mapped_column(String(200))
    station_name: Mapped[str | None] = mapped_column(String(200))
    kvp: Mapped[float | None] = mapped_column(Float)
    exposure_uas: Mapped[float | None] = mapped_column(Float)
    anode: Mapped[str | None] = mapped_column(String(32))
    filter: Mapped[str | None] = mapped_column(String(32))
    flags: Mapped[str] = mapped_column(Text, default="[]")
    first_seen: Mapped[_dt.datetime] = mapped_column(DateTime)
    session_id: Mapped[int | None] = mapped_column(ForeignKey("qc_sessions.id"), index=True)
    registration: Mapped[str | None] = mapped_column(Text)  # JSON, once scored
    blur_sigma_px: Mapped[float | None] = mapped_column(Float)
    n_correct: Mapped[int | None] = mapped_column(Integer)
    n_trials: Mapped[int | None] = mapped_column(Integer)


class ThresholdRow(Base):
    __tablename__ = "qc_thresholds"
    __table_args__ = (UniqueConstraint("session_id", "method", "diameter_mm"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    session_id: Mapped[int] = mapped_column(ForeignKey("qc_sessions.id"), index=True)
    method: Mapped[str] = mapped_column(String(16))
    observer: Mapped[str] = mapped_column(String(16))
    diameter_mm: Mapped[float] = mapped_column(Float)
    threshold_contrast: Mapped[float | None] = mapped_column(Float)
    ci_low: Mapped[float | None] = mapped_column(Float)
    ci_high: Mapped[float | None] = mapped_column(Float)
    n_images: Mapped[int] = mapped_column(Integer)
    m_alternatives: Mapped[int] = mapped_column(Integer)
    criterion_pc: Mapped[float | None] = mapped_column(Float)
    note: Mapped[str] = mapped_column(Text, default="")
    compared_contrast: Mapped[float | None] = mapped_column(Float)  # as compared with the limit (× human factor)
    acceptable: Mapped[float | None] = mapped_column(Float)  # limit, when limits are configured
    verdict: Mapped[str | None] = mapped_column(String(32))


class ResponseRow(Base):
    __tablename__ = "qc_responses"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    session_id: Mapped[int] = mapped_column(ForeignKey("qc_sessions.id"), index=True)
    image_id: Mapped[int] = mapped_column(ForeignKey("qc_images.id"))
    target: Mapped[str] = mapped_column(String(64))
    diameter_mm: Mapped[float] = mapped_column(Float)
    contrast: Mapped[float] = mapped_column(Float)
    site: Mapped[int] = mapped_column(Integer)
    is_signal: Mapped[bool] = mapped_column(Boolean)
    response: Mapped[float] = mapped_column(Float)
    row_px: Mapped[float] = mapped_column(Float)
    col_px: Mapped[float] = mapped_column(Float)


class BaselineRow(Base):
    __tablename__ = "qc_baselines"
    __table_args__ = (UniqueConstraint("detector", "method", "diameter_mm"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    detector: Mapped[str] = mapped_column(String(200), index=True)
    method: Mapped[str] = mapped_column(String(16))
    diameter_mm: Mapped[float] = mapped_column(Float)
    mean_log10: Mapped[float] = mapped_column(Float)
    sigma_log10: Mapped[float] = mapped_column(Float)
    sd_between_log10: Mapped[float | None] = mapped_column(Float)
    se_within_log10: Mapped[float | None] = mapped_column(Float)
    n_sessions: Mapped[int] = mapped_column(Integer)
    session_ids: Mapped[str] = mapped_column(Text)  # JSON list
    last_session_date: Mapped[str] = mapped_column(String(10))
    last_session_id: Mapped[int] = mapped_column(Integer)
    source: Mapped[str] = mapped_column(String(16))  # automatic | explicit
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime)


class AlertRow(Base):
    __tablename__ = "qc_alerts"
    __table_args__ = (UniqueConstraint("session_id", "method", "diameter_mm", "rule"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    session_id: Mapped[int] = mapped_column(ForeignKey("qc_sessions.id"), index=True)
    detector: Mapped[str] = mapped_column(String(200), index=True)
    session_date: Mapped[str] = mapped_column(String(10))
    method: Mapped[str] = mapped_column(String(16))
    diameter_mm: Mapped[float] = mapped_column(Float)
    rule: Mapped[str] = mapped_column(String(16))
    direction: Mapped[str] = mapped_column(String(8))  # worse | better
    value: Mapped[float | None] = mapped_column(Float)
    reference: Mapped[float | None] = mapped_column(Float)
    message: Mapped[str] = mapped_column(Text)
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime)
    emailed_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)


class QuarantineRow(Base):
    __tablename__ = "qc_quarantine"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    sha256: Mapped[str | None] = mapped_column(String(64), index=True)
    original_path: Mapped[str] = mapped_column(Text)
    moved_to: Mapped[str | None] = mapped_column(Text)
    reason: Mapped[str] = mapped_column(Text)
    at: Mapped[_dt.datetime] = mapped_column(DateTime)


class FileRow(Base):
    """Cache of file path, size and modification time → SHA-256, so unchanged files are not re-read."""

    __tablename__ = "qc_files"
    path: Mapped[str] = mapped_column(String(1024), primary_key=True)
    size: Mapped[int] = mapped_column(Integer)
    mtime_ns: Mapped[str] = mapped_column(String(32))
    sha256: Mapped[str] = mapped_column(String(64))


def utcnow() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None)


def default_db_url(directory) -> str:
    """The SQLite file used without ``--db``: ``limen-nightly.sqlite`` in ``directory``."""
    return f"sqlite:///{Path(directory).resolve() / 'limen-nightly.sqlite'}"


def _display(url: str) -> str:
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:
        return "<unparseable URL>"


def open_store(url: str) -> Store:
    """Connect, create the schema on first use, check (and migrate) its version.

    Raises LimenError (one line, password hidden) when the database cannot be reached or
    was written by a later version of Limen.
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
        raise LimenError(f"cannot use database {_display(url)}: {' '.join(str(exc).split())[:200]}", "--db") from None
    if engine.dialect.name == "sqlite":
        _sqlite_transactions(engine)
    store = Store(engine, url)
    try:
        with engine.begin() as conn:
            if engine.dialect.name == "postgresql":
                conn.execute(text("SELECT pg_advisory_xact_lock(6177001)"))  # one creator at a time
            Base.metadata.create_all(conn)
            row = conn.execute(select(MetaRow.value).where(MetaRow.key == "schema_version")).scalar()
            version = int(row) if row is not None else None
            if version is None:
                conn.execute(insert(MetaRow).values(key="schema_version", value=str(SCHEMA_VERSION)))
            elif version > SCHEMA_VERSION:
                raise LimenError(
                    f"database schema version {version} is newer than this Limen's ({SCHEMA_VERSION}); upgrade Limen",
                    _display(url),
                )
            else:
                while version < SCHEMA_VERSION:
                    MIGRATIONS[version](conn)
                    version += 1
                conn.execute(update(MetaRow).where(MetaRow.key == "schema_version").values(value=str(version)))
    except LimenError:
        engine.dispose()
        raise
    except SQLAlchemyError as exc:
        engine.dispose()
        raise LimenError(
            f"cannot open database: {' '.join(str(getattr(exc, 'orig', None) or exc).split())[:300]}", _display(url)
        ) from None
    return store


def _sqlite_transactions(engine) -> None:
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


def dumps(obj) -> str:
    return json.dumps(obj, default=str)


# =========================================================================== operations
def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class _Taken(Exception):
    """A claim lost to another run (rolls its transaction back)."""


class _Ops:
    """Store operations; each method is one transaction."""

    # ---------------------------------------------------------------- files and images
    def file_cache(self) -> dict:
        with self.transaction() as s:
            return {r.path: (r.size, r.mtime_ns, r.sha256) for r in s.scalars(select(FileRow))}

    def remember_files(self, rows: list[tuple[str, int, str, str]]) -> None:
        """(path, size, mtime_ns, sha256) rows into the file cache (insert or replace)."""
        if not rows:
            return
        values = [
            {"path": p, "size": n, "mtime_ns": m, "sha256": h} for p, n, m, h in dict((r[0], r) for r in rows).values()
        ]
        with self.transaction() as s:
            if self.is_sqlite or self.engine.dialect.name == "postgresql":
                # an upsert: two runs scanning the same inbox at once both remember its files (a delete then an
                # insert let the second run's insert hit the first's row on PostgreSQL: duplicate key)
                stmt = self._dialect_insert(FileRow.__table__)
                stmt = stmt.on_conflict_do_update(
                    index_elements=[FileRow.__table__.c.path],
                    set_={c: getattr(stmt.excluded, c) for c in ("size", "mtime_ns", "sha256")},
                )
                s.execute(stmt, values)
            else:  # pragma: no cover - other databases
                s.execute(delete(FileRow).where(FileRow.path.in_([v["path"] for v in values])))
                s.execute(insert(FileRow), values)

    def known_images(self, shas) -> dict:
        """sha256 → path recorded, for the given hashes that are already in the database."""
        shas = list(shas)
        out = {}
        with self.transaction() as s:
            for i in range(0, len(shas), 500):
                out.update(
                    dict(
                        s.execute(
                            select(ImageRow.sha256, ImageRow.path).where(ImageRow.sha256.in_(shas[i : i + 500]))
                        ).all()
                    )
                )
        return out

    def quarantined(self, shas) -> dict:
        """sha256 → reason, for contents quarantined before."""
        shas = [h for h in shas if h]
        out = {}
        with self.transaction() as s:
            for i in range(0, len(shas), 500):
                out.update(
                    dict(
                        s.execute(
                            select(QuarantineRow.sha256, QuarantineRow.reason).where(
                                QuarantineRow.sha256.in_(shas[i : i + 500])
                            )
                        ).all()
                    )
                )
        return out

    def add_images(self, images) -> int:
        """Insert new inbox images; an image already present (same content) is left alone."""
        if not images:
            return 0
        now = utcnow()
        rows = [
            {
                "sha256": im.sha256,
                "path": im.path,
                "detector": im.detector,
                "group_key": im.group_key,
                "session_date": im.session_date,
                "acquired": im.acquired,
                "detector_id": im.detector_id,
                "device_serial": im.device_serial,
                "station_name": im.station_name,
                "kvp": im.kvp,
                "exposure_uas": im.exposure_uas,
                "anode": im.anode,
                "filter": im.filter,
                "flags": json.dumps(im.flags),
                "first_seen": now,
            }
            for im in images
        ]
        with self.transaction() as s:
            res = s.execute(self._insert(ImageRow.__table__), rows)
            return int(res.rowcount or 0)

    def record_quarantine(self, sha256, original_path, moved_to, reason) -> None:
        """Record a quarantined file (completing the record a released session left, if there is one)."""
        moved = None if moved_to is None else str(moved_to)
        with self.transaction() as s:
            res = s.execute(
                update(QuarantineRow)
                .where(
                    QuarantineRow.sha256 == sha256,
                    QuarantineRow.original_path == str(original_path),
                    QuarantineRow.moved_to.is_(None),
                )
                .values(moved_to=moved)
            )
            if not res.rowcount:
                s.add(
                    QuarantineRow(
                        sha256=sha256, original_path=str(original_path), moved_to=moved, reason=reason, at=utcnow()
                    )
                )

    def free_groups(self) -> dict:
        """group_key → images not bound to any session (dicts), oldest first."""
        with self.transaction() as s:
            rows = s.scalars(select(ImageRow).where(ImageRow.session_id.is_(None)).order_by(ImageRow.id)).all()
        out: dict = {}
        for r in rows:
            out.setdefault(r.group_key, []).append(_image_dict(r))
        return out

    def other_sessions(self, group_key: str, session_id: int) -> list[dict]:
        """Sessions other than ``session_id`` with the same detector, day and settings (their id and image count)."""
        with self.transaction() as s:
            rows = s.execute(
                select(SessionRow.id, SessionRow.n_images, SessionRow.state).where(
                    SessionRow.group_key == group_key, SessionRow.id != session_id
                )
            ).all()
        return [{"id": r.id, "n_images": r.n_images, "state": r.state} for r in rows]

    # ---------------------------------------------------------------- claims
    def claim(self, group_key: str, images: list[dict], lease_s: float = DEFAULT_LEASE_S):
        """Claim a new session of ``images``; returns (session_id, token), or None when any was taken."""
        try:
            return self._claim(group_key, images, lease_s)
        except _Taken:
            return None

    def _claim(self, group_key, images, lease_s):
        token = uuid.uuid4().hex
        first = images[0]
        now = utcnow()
        with self.transaction() as s:
            row = SessionRow(
                detector=first["detector"],
                session_date=first["session_date"],
                group_key=group_key,
                state="claimed",
                claim_token=token,
                claim_host=self.host,
                claim_pid=self.pid,
                claim_expires=now + _dt.timedelta(seconds=lease_s),
                claimed_at=now,
                n_images=len(images),
                kvp=first["kvp"],
                anode=first["anode"],
                filter=first["filter"],
                flags=json.dumps(sorted({f for im in images for f in im["flags"]})),
            )
            s.add(row)
            s.flush()
            res = s.execute(
                update(ImageRow)
                .where(ImageRow.id.in_([im["id"] for im in images]), ImageRow.session_id.is_(None))
                .values(session_id=row.id)
            )
            if res.rowcount != len(images):
                raise _Taken()  # another run bound one of them first: roll the whole claim back
            return row.id, token

    def stale_claims(self) -> list[tuple[int, str]]:
        """(session_id, token) of claims whose holder is gone: lease run out, or same host and process dead."""
        now = utcnow()
        with self.transaction() as s:
            rows = s.execute(
                select(
                    SessionRow.id,
                    SessionRow.claim_token,
                    SessionRow.claim_host,
                    SessionRow.claim_pid,
                    SessionRow.claim_expires,
                ).where(SessionRow.state == "claimed")
            ).all()
        out = []
        for sid, token, host, pid, expires in rows:
            mine = host == self.host and pid == self.pid
            dead = host == self.host and pid is not None and not _pid_alive(pid)
            if not mine and (dead or (expires is not None and expires < now)):
                out.append((sid, token))
        return out

    def take_over(self, session_id: int, old_token: str, lease_s: float = DEFAULT_LEASE_S) -> str | None:
        """Take over a stale claim (compare-and-set on its token); the new token, or None if another run did."""
        token = uuid.uuid4().hex
        with self.transaction() as s:
            res = s.execute(
                update(SessionRow)
                .where(SessionRow.id == session_id, SessionRow.state == "claimed", SessionRow.claim_token == old_token)
                .values(
                    claim_token=token,
                    claim_host=self.host,
                    claim_pid=self.pid,
                    claim_expires=utcnow() + _dt.timedelta(seconds=lease_s),
                )
            )
            return token if res.rowcount == 1 else None

    def renew(self, claims: dict, lease_s: float = DEFAULT_LEASE_S) -> None:
        """Extend the leases of this run's claims (session_id → token)."""
        if not claims:
            return
        with self.transaction() as s:
            for sid, token in claims.items():
                s.execute(
                    update(SessionRow)
                    .where(SessionRow.id == sid, SessionRow.claim_token == token)
                    .values(claim_expires=utcnow() + _dt.timedelta(seconds=lease_s))
                )

    def session_images(self, session_id: int) -> list[dict]:
        with self.transaction() as s:
            return [
                _image_dict(r)
                for r in s.scalars(select(ImageRow).where(ImageRow.session_id == session_id).order_by(ImageRow.id))
            ]

    def release(
        self,
        session_id: int,
        token: str,
        drop_sha: str | None = None,
        drop_path: str | None = None,
        reason: str | None = None,
    ) -> bool:
        """Give a claimed session up: its images become free again.

        With ``drop_sha`` that image leaves the database and its quarantine is recorded (reason)
        in the same transaction, so the next scan quarantines the file even if this run dies first.
        """
        with self.transaction() as s:
            row = s.get(SessionRow, session_id, with_for_update=not self.is_sqlite)
            if row is None or row.state != "claimed" or row.claim_token != token:
                return False
            s.execute(update(ImageRow).where(ImageRow.session_id == session_id).values(session_id=None))
            if drop_sha:
                s.execute(delete(ImageRow).where(ImageRow.sha256 == drop_sha))
                s.add(
                    QuarantineRow(
                        sha256=drop_sha, original_path=str(drop_path), moved_to=None, reason=reason or "", at=utcnow()
                    )
                )
            s.delete(row)
            return True

    # ---------------------------------------------------------------- reading results
    def thresholds_frame(self, detector: str | None = None, method: str | None = None, session: Session | None = None):
        """Scored thresholds joined with their sessions (one row per session, method and diameter)."""
        if session is not None:
            return _thresholds(session, detector, method)
        with self.transaction() as s:
            return _thresholds(s, detector, method)

    def write_session(self, outcome, det, rules) -> list | None:
        """Write a scored session in one transaction: thresholds, responses, registrations, baseline, alerts.

        Returns the alerts raised, or None when the claim was lost (nothing written).
        """
        from scorer.qc.control import compute_baseline, evaluate_session
        from scorer.qc.faults import fault_point

        try:
            with self.transaction() as s:
                row = s.get(SessionRow, outcome.session_id, with_for_update=not self.is_sqlite)
                if row is None or row.state != "claimed" or row.claim_token != outcome.token:
                    raise _Taken()
                if self.engine.dialect.name == "postgresql":  # one writer per detector: baselines stay unique
                    s.execute(text("SELECT pg_advisory_xact_lock(hashtext(:d))"), {"d": row.detector})
                now = utcnow()
                row.state, row.scored_at, row.claim_expires = "scored", now, None
                row.observer, row.verdict_method = outcome.observer, outcome.verdict_method
                row.overall_verdict = outcome.overall_verdict
                row.settings, row.warnings = dumps(outcome.settings), dumps(outcome.warnings)
                row.scoring_s = float(outcome.scoring_s)
                ids = dict(s.execute(select(ImageRow.sha256, ImageRow.id).where(ImageRow.session_id == row.id)).all())
                if set(ids) != {im["sha256"] for im in outcome.images}:
                    raise LimenError(
                        f"session {row.id}: scored images differ from the claimed ones", _display(self.url)
                    )
                s.connection().execute(
                    update(ImageRow.__table__).where(ImageRow.__table__.c.id == bindparam("image_pk")),
                    [
                        {
                            "image_pk": ids[im["sha256"]],
                            "registration": dumps(im["registration"]),
                            "blur_sigma_px": float(im["blur_sigma_px"]),
                            "n_correct": int(im["n_correct"]),
                            "n_trials": int(im["n_trials"]),
                        }
                        for im in outcome.images
                    ],
                )
                verdicts = {round(v["diameter_mm"], 6): v for v in (outcome.verdicts or [])}
                rows = []
                for p in outcome.thresholds:
                    v = verdicts.get(round(p["diameter_mm"], 6)) if p["method"] == outcome.verdict_method else None
                    rows.append(
                        {
                            "session_id": row.id,
                            "method": p["method"],
                            "observer": p["observer"],
                            "diameter_mm": float(p["diameter_mm"]),
                            "threshold_contrast": _finite(p["threshold_contrast"]),
                            "ci_low": _finite(p["ci_low"]),
                            "ci_high": _finite(p["ci_high"]),
                            "n_images": int(p["n_images"]),
                            "m_alternatives": int(p["m_alternatives"]),
                            "criterion_pc": _finite(p["criterion_pc"]),
                            "note": p.get("note") or "",
                            "compared_contrast": None if v is None else _finite(v["threshold_contrast"]),
                            "acceptable": None if v is None else _finite(v["acceptable"]),
                            "verdict": None if v is None else v["verdict"],
                        }
                    )
                s.execute(insert(ThresholdRow), rows)
                r = outcome.responses
                image_ids = [ids[h] for h in r["image"].tolist()]
                n = len(image_ids)
                self._insert_many(
                    s,
                    ResponseRow.__table__,
                    {
                        "session_id": [row.id] * n,
                        "image_id": image_ids,
                        "target": [str(t) for t in r["target"].tolist()],
                        "diameter_mm": r["diameter_mm"].astype(float).tolist(),
                        "contrast": r["contrast"].astype(float).tolist(),
                        "site": r["site"].astype(int).tolist(),
                        "is_signal": r["is_signal"].astype(bool).tolist(),
                        "response": r["response"].astype(float).tolist(),
                        "row_px": r["row_px"].astype(float).tolist(),
                        "col_px": r["col_px"].astype(float).tolist(),
                    },
                )
                fault_point("mid-write")
                s.flush()
                alerts = []
                for method in dict.fromkeys(p["method"] for p in outcome.thresholds):
                    hist = _thresholds(s, row.detector, method)
                    bl = self._baseline_in(s, row.detector, method)
                    if bl is None:
                        bl = self._auto_baseline(s, row.detector, method, hist, det.baseline_sessions, compute_baseline)
                    if method != outcome.verdict_method:
                        continue
                    frame, last, bids = (None, None, set()) if bl is None else bl[:3]
                    alerts = evaluate_session(row.detector, row.id, hist, frame, last, bids, rules)
                    for a in alerts:
                        s.add(
                            AlertRow(
                                session_id=row.id,
                                detector=a.detector,
                                session_date=a.session_date,
                                method=a.method,
                                diameter_mm=a.diameter_mm,
                                rule=a.rule,
                                direction=a.direction,
                                value=a.value,
                                reference=a.reference,
                                message=a.message,
                                created_at=now,
                            )
                        )
                return alerts
        except _Taken:
            return None

    def _baseline_in(self, s: Session, detector, method):
        rows = s.scalars(
            select(BaselineRow).where(BaselineRow.detector == detector, BaselineRow.method == method)
        ).all()
        if not rows:
            return None
        import pandas as pd

        df = pd.DataFrame(
            [
                {
                    "diameter_mm": r.diameter_mm,
                    "mean_log10": r.mean_log10,
                    "sigma_log10": r.sigma_log10,
                    "sd_between_log10": r.sd_between_log10,
                    "se_within_log10": r.se_within_log10,
                    "n_sessions": r.n_sessions,
                }
                for r in rows
            ]
        )
        r0 = rows[0]
        return df, (r0.last_session_date, r0.last_session_id), set(json.loads(r0.session_ids)), r0.source

    def _auto_baseline(self, s, detector, method, hist, k, compute_baseline):
        """The first ``k`` sessions without setting flags become the baseline once there are ``k`` of them."""
        sessions = hist.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
        sessions = sessions[sessions["flags"].map(lambda f: not json.loads(f or "[]"))]
        if len(sessions) < k:
            return None
        chosen = sessions.head(k)
        ids = [int(x) for x in chosen["session_id"]]
        frame = compute_baseline(hist[hist["session_id"].isin(ids)])
        if frame.empty:
            return None
        last = (str(chosen["session_date"].iloc[-1]), ids[-1])
        self.put_baseline(s, detector, method, frame, ids, last, "automatic")
        return frame, last, set(ids), "automatic"

    def set_baseline(self, detector: str, session_ids: list[int]) -> dict:
        """An explicit baseline from chosen scored sessions of ``detector`` (every method); returns a summary."""
        from scorer.qc.control import compute_baseline

        with self.transaction() as s:
            hist = _thresholds(s, detector, None)
            have = set(int(x) for x in hist["session_id"].unique())
            missing = sorted(set(session_ids) - have)
            if missing:
                raise LimenError(
                    f"session(s) {', '.join(map(str, missing))} are not scored sessions of detector {detector!r}",
                    "--sessions",
                )
            if len(set(session_ids)) < 2:
                raise LimenError("a baseline needs at least two sessions", "--sessions")
            sel = hist[hist["session_id"].isin(session_ids)]
            order = sel.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
            last = (str(order["session_date"].iloc[-1]), int(order["session_id"].iloc[-1]))
            out = {}
            for method, g in sel.groupby("method"):
                frame = compute_baseline(g)
                self.put_baseline(s, detector, method, frame, sorted(set(session_ids)), last, "explicit")
                out[method] = frame
            return out

    def clear_baseline(self, detector: str) -> int:
        """Forget a detector's baseline: the next session rebuilds the automatic one."""
        with self.transaction() as s:
            return int(s.execute(delete(BaselineRow).where(BaselineRow.detector == detector)).rowcount or 0)

    def baseline(self, detector: str, method: str):
        """(baseline frame, (last date, last id), session ids, source) or None."""
        with self.transaction() as s:
            return self._baseline_in(s, detector, method)

    def put_baseline(
        self, s: Session, detector: str, method: str, frame, session_ids: list[int], last: tuple[str, int], source: str
    ) -> None:
        """Replace a detector's baseline for one method (inside the caller's transaction)."""
        s.execute(delete(BaselineRow).where(BaselineRow.detector == detector, BaselineRow.method == method))
        now = utcnow()
        for r in frame.itertuples():
            s.add(
                BaselineRow(
                    detector=detector,
                    method=method,
                    diameter_mm=float(r.diameter_mm),
                    mean_log10=float(r.mean_log10),
                    sigma_log10=float(r.sigma_log10),
                    sd_between_log10=float(r.sd_between_log10),
                    se_within_log10=float(r.se_within_log10),
                    n_sessions=int(r.n_sessions),
                    session_ids=json.dumps(sorted(session_ids)),
                    last_session_date=last[0],
                    last_session_id=int(last[1]),
                    source=source,
                    created_at=now,
                )
            )

    def alerts(self, detector: str | None = None, unsent_only: bool = False) -> list[dict]:
        q = select(AlertRow).order_by(AlertRow.session_date, AlertRow.id)
        if detector is not None:
            q = q.where(AlertRow.detector == detector)
        if unsent_only:
            q = q.where(AlertRow.emailed_at.is_(None))
        with self.transaction() as s:
            return [
                {
                    "id": a.id,
                    "session_id": a.session_id,
                    "detector": a.detector,
                    "session_date": a.session_date,
                    "method": a.method,
                    "diameter_mm": a.diameter_mm,
                    "rule": a.rule,
                    "direction": a.direction,
                    "value": a.value,
                    "reference": a.reference,
                    "message": a.message,
                    "emailed": a.emailed_at is not None,
                }
                for a in s.scalars(q)
            ]

    def mark_emailed(self, alert_ids) -> None:
        with self.transaction() as s:
            s.execute(update(AlertRow).where(AlertRow.id.in_(list(alert_ids))).values(emailed_at=utcnow()))

    def detectors(self) -> list[str]:
        with self.transaction() as s:
            return list(
                s.scalars(
                    select(SessionRow.detector)
                    .where(SessionRow.state == "scored")
                    .distinct()
                    .order_by(SessionRow.detector)
                )
            )

    def sessions(self, detector: str | None = None, state: str | None = "scored") -> list[dict]:
        q = select(SessionRow).order_by(SessionRow.detector, SessionRow.session_date, SessionRow.id)
        if detector is not None:
            q = q.where(SessionRow.detector == detector)
        if state is not None:
            q = q.where(SessionRow.state == state)
        with self.transaction() as s:
            return [
                {
                    "id": r.id,
                    "detector": r.detector,
                    "session_date": r.session_date,
                    "state": r.state,
                    "n_images": r.n_images,
                    "kvp": r.kvp,
                    "anode": r.anode,
                    "filter": r.filter,
                    "flags": json.loads(r.flags or "[]"),
                    "overall_verdict": r.overall_verdict,
                    "observer": r.observer,
                    "verdict_method": r.verdict_method,
                    "scored_at": r.scored_at,
                    "scoring_s": r.scoring_s,
                    "warnings": json.loads(r.warnings or "[]"),
                }
                for r in s.scalars(q)
            ]

    def quarantine_log(self) -> list[dict]:
        with self.transaction() as s:
            return [
                {"path": r.original_path, "moved_to": r.moved_to, "reason": r.reason, "at": r.at}
                for r in s.scalars(select(QuarantineRow).order_by(QuarantineRow.id))
            ]

    def counts(self) -> dict:
        """Row counts per table (for tests and the bench)."""
        with self.transaction() as s:
            return {
                t.__tablename__: int(s.scalar(select(func.count()).select_from(t)))
                for t in (SessionRow, ImageRow, ThresholdRow, ResponseRow, BaselineRow, AlertRow, QuarantineRow)
            }


def _finite(v):
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if v == v and v not in (float("inf"), float("-inf")) else None


def _thresholds(s: Session, detector, method):
    import pandas as pd

    q = (
        select(
            SessionRow.id.label("session_id"),
            SessionRow.detector,
            SessionRow.session_date,
            SessionRow.n_images,
            SessionRow.flags,
            SessionRow.overall_verdict,
            SessionRow.kvp,
            ThresholdRow.method,
            ThresholdRow.observer,
            ThresholdRow.diameter_mm,
            ThresholdRow.threshold_contrast,
            ThresholdRow.ci_low,
            ThresholdRow.ci_high,
            ThresholdRow.compared_contrast,
            ThresholdRow.acceptable,
            ThresholdRow.verdict,
        )
        .join(ThresholdRow, ThresholdRow.session_id == SessionRow.id)
        .where(SessionRow.state == "scored")
    )
    if detector is not None:
        q = q.where(SessionRow.detector == detector)
    if method is not None:
        q = q.where(ThresholdRow.method == method)
    rows = (
        s.execute(
            q.order_by(
                SessionRow.detector,
                SessionRow.session_date,
                SessionRow.id,
                ThresholdRow.method,
                ThresholdRow.diameter_mm,
            )
        )
        .mappings()
        .all()
    )
    cols = [
        "session_id",
        "detector",
        "session_date",
        "n_images",
        "flags",
        "overall_verdict",
        "kvp",
        "method",
        "observer",
        "diameter_mm",
        "threshold_contrast",
        "ci_low",
        "ci_high",
        "compared_contrast",
        "acceptable",
        "verdict",
    ]
    df = pd.DataFrame([dict(r) for r in rows], columns=cols)
    for c in ("threshold_contrast", "ci_low", "ci_high", "compared_contrast", "acceptable", "diameter_mm"):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype(float)
    return df


def _image_dict(r: ImageRow) -> dict:
    return {
        "id": r.id,
        "sha256": r.sha256,
        "path": r.path,
        "detector": r.detector,
        "group_key": r.group_key,
        "session_date": r.session_date,
        "kvp": r.kvp,
        "anode": r.anode,
        "filter": r.filter,
        "exposure_uas": r.exposure_uas,
        "flags": json.loads(r.flags or "[]"),
        "session_id": r.session_id,
    }


class Store(_Ops):
    """One nightly database.  Open with :func:`open_store`; methods each run their own transaction."""

    def __init__(self, engine, url: str):
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
                f"database error: {' '.join(str(exc.orig or exc).split())[:300]}", _display(self.url)
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
