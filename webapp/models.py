"""Database models of the reader-study web app (SQLAlchemy 2, one module).

SQLite in the instance folder by default; any SQLAlchemy URL otherwise (PostgreSQL is tested in CI).

Integrity rules the database itself enforces (not only the code):

* one account per user name, regardless of case and Unicode form (``users.username_key``, see
  :mod:`webapp.accounts`);
* a reader is enrolled in a study at most once;
* one trial per (study, reader, position in the reader's sequence);
* **one response per trial** (``responses.trial_id`` is unique): a response submitted twice, or from
  two tabs at once, is stored once;
* one adaptive state per (study, reader, detector, diameter) (``adaptive_cells``).
"""

from __future__ import annotations

import datetime as _dt
import json
from typing import Any, TypeAlias

from sqlalchemy import (
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    UniqueConstraint,
    create_engine,
    event,
    false,
)
from sqlalchemy.orm import (
    DeclarativeBase,
    Mapped,
    Session,
    mapped_column,
    relationship,
    scoped_session,
    sessionmaker,
    validates,
)

from scorer.databases import utcnow as utcnow  # re-exported: one definition for both databases

ROLES = ("coordinator", "reader")
STUDY_STATES = ("draft", "open", "closed")


class Base(DeclarativeBase):
    pass


class User(Base):
    __tablename__ = "users"

    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(64), unique=True, index=True)
    # NFKC + case fold of the name (webapp.accounts.name_key), set with the name: unique, so "dup" and "DUP"
    # cannot both exist; nullable only in databases upgraded from a release without it (see the baseline migration)
    username_key: Mapped[str | None] = mapped_column(String(64), unique=True, index=True)
    password_hash: Mapped[str] = mapped_column(String(255))
    role: Mapped[str] = mapped_column(String(16))
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)
    # raised by sign-out, a new password, disabling and "sign out everywhere": older session cookies stop working
    session_generation: Mapped[int] = mapped_column(Integer, default=0, server_default="0")

    @validates("username")
    def _set_key(self, _field, name):
        from webapp.accounts import name_key

        self.username_key = name_key(name)
        return name

    # Flask-Login protocol
    @property
    def is_authenticated(self) -> bool:
        return True

    @property
    def is_active(self) -> bool:
        return bool(self.active)

    @property
    def is_anonymous(self) -> bool:
        return False

    def get_id(self) -> str:
        from webapp.accounts import session_id

        return session_id(self)


class Study(Base):
    __tablename__ = "studies"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(200))
    status: Mapped[str] = mapped_column(String(16), default="draft")
    created_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)
    layout_file: Mapped[str] = mapped_column(String(300))  # path of the layout TOML on the server
    layout_name: Mapped[str] = mapped_column(String(200))
    m_alternatives: Mapped[int] = mapped_column(Integer, default=4)
    trials_per_reader: Mapped[int] = mapped_column(Integer)
    seed: Mapped[int] = mapped_column(Integer, default=0)
    repeat_fraction: Mapped[float] = mapped_column(Float, default=0.0)
    n_practice: Mapped[int] = mapped_column(Integer, default=0)
    show_feedback: Mapped[bool] = mapped_column(Boolean, default=False)
    observer: Mapped[str] = mapped_column(String(8), default="npwe")
    viewing_distance_mm: Mapped[float] = mapped_column(Float, default=500.0)
    magnification: Mapped[int] = mapped_column(Integer, default=1)  # image pixels → device pixels
    region_rows: Mapped[int] = mapped_column(Integer, default=0)
    region_cols: Mapped[int] = mapped_column(Integer, default=0)
    ugy_per_unit: Mapped[float] = mapped_column(Float, default=1.0)  # stored uint16 → linear (∝ air kerma)
    model_trials_csv: Mapped[str | None] = mapped_column(Text, nullable=True)
    # the model observer's response at every candidate site (the built-in simulated readers read them)
    model_responses_csv: Mapped[str | None] = mapped_column(Text, nullable=True)
    # the design (webapp.design): placement rule ("psi", "quest", "constant"; None: a study of an earlier release
    # with a fixed schedule), the diameters asked for (JSON list; None: every diameter of the layout), the
    # wanted half-width of each pooled threshold's 95 % CI (ln), and the plan the app made from them at opening
    placement: Mapped[str | None] = mapped_column(String(16), nullable=True)
    diameters_json: Mapped[str | None] = mapped_column(Text, nullable=True)
    half_width_ln: Mapped[float | None] = mapped_column(Float, nullable=True)
    plan_json: Mapped[str | None] = mapped_column(Text, nullable=True)
    # one window/level for the whole study (stored units), so no trial's display differs by detector
    default_window: Mapped[float | None] = mapped_column(Float, nullable=True)
    default_level: Mapped[float | None] = mapped_column(Float, nullable=True)
    opened_at: Mapped[_dt.datetime | None] = mapped_column(DateTime, nullable=True)
    closed_at: Mapped[_dt.datetime | None] = mapped_column(DateTime, nullable=True)

    images: Mapped[list["StudyImage"]] = relationship(back_populates="study", order_by="StudyImage.id")
    enrolments: Mapped[list["Enrolment"]] = relationship(back_populates="study")


class StudyImage(Base):
    """An image of the study; its pixels live in the content store under their SHA-256 name."""

    __tablename__ = "study_images"
    __table_args__ = (UniqueConstraint("study_id", "sha256"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    sha256: Mapped[str] = mapped_column(String(64))
    stored_name: Mapped[str] = mapped_column(String(80))  # <sha256>.<ext>, never a client path
    code: Mapped[str] = mapped_column(String(32))  # image id in exports: "img-<sha8>"
    detector: Mapped[str] = mapped_column(String(100))  # coordinator's label, never shown to readers
    conversion_file: Mapped[str | None] = mapped_column(String(300), nullable=True)
    pixel_spacing_mm: Mapped[float | None] = mapped_column(Float, nullable=True)  # for files without one
    label: Mapped[str] = mapped_column(String(200), default="")  # sanitised original name, coordinator only
    rows: Mapped[int] = mapped_column(Integer, default=0)
    cols: Mapped[int] = mapped_column(Integer, default=0)
    registration_json: Mapped[str | None] = mapped_column(Text, nullable=True)
    # a practice image: its regions are shown only in practice trials, never scored
    practice: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())

    study: Mapped[Study] = relationship(back_populates="images")


class Region(Base):
    """One target of one image as the readers see it: a fixed-size crop and its candidate sites."""

    __tablename__ = "regions"
    __table_args__ = (UniqueConstraint("image_id", "target"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    image_id: Mapped[int] = mapped_column(ForeignKey("study_images.id"))
    target: Mapped[str] = mapped_column(String(64))
    diameter_mm: Mapped[float] = mapped_column(Float)
    contrast: Mapped[float] = mapped_column(Float)
    true_site: Mapped[int] = mapped_column(Integer)  # never sent before the response is stored
    row0: Mapped[int] = mapped_column(Integer)
    col0: Mapped[int] = mapped_column(Integer)
    sites_json: Mapped[str] = mapped_column(Text)  # [[row, col], ...] in region pixels
    # one square tile per candidate site, centred on it (webapp.design.tile_boxes): side in pixels, and the
    # top-left corner of each site's tile in image pixels ([[row0, col0], ...], in site order)
    tile_px: Mapped[int | None] = mapped_column(Integer, nullable=True)
    tiles_json: Mapped[str | None] = mapped_column(Text, nullable=True)

    image: Mapped[StudyImage] = relationship()

    @property
    def sites(self) -> list[list[float]]:
        return json.loads(self.sites_json)


class Enrolment(Base):
    __tablename__ = "enrolments"
    __table_args__ = (UniqueConstraint("study_id", "user_id"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)

    study: Mapped[Study] = relationship(back_populates="enrolments")
    user: Mapped[User] = relationship()


class Trial(Base):
    """One presentation in a reader's sequence (practice, first reading or repeat)."""

    __tablename__ = "trials"
    __table_args__ = (
        UniqueConstraint("study_id", "reader_id", "seq"),
        Index("ix_trials_reader_seq", "study_id", "reader_id", "seq"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    public_id: Mapped[str] = mapped_column(String(32), unique=True, index=True)  # opaque, random
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"))
    reader_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    seq: Mapped[int] = mapped_column(Integer)
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    practice: Mapped[bool] = mapped_column(Boolean, default=False)
    repeat: Mapped[int] = mapped_column(Integer, default=0)
    # the sites in the order their tiles are shown (JSON list: screen position → site); None for trials of
    # studies opened by an earlier release (one region with every site)
    tile_order: Mapped[str | None] = mapped_column(String(64), nullable=True)

    region: Mapped[Region] = relationship()

    @property
    def order(self) -> list[int] | None:
        return json.loads(self.tile_order) if self.tile_order else None

    response: Mapped["Response | None"] = relationship(back_populates="trial", uselist=False)


class Response(Base):
    __tablename__ = "responses"

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trials.id"), unique=True)  # stored once
    chosen_site: Mapped[int] = mapped_column(Integer)
    correct: Mapped[bool] = mapped_column(Boolean)
    response_ms: Mapped[int] = mapped_column(Integer)
    window: Mapped[float] = mapped_column(Float)
    level: Mapped[float] = mapped_column(Float)
    zoom: Mapped[int] = mapped_column(Integer, default=1)
    inverted: Mapped[bool] = mapped_column(Boolean, default=False)
    session_id: Mapped[int | None] = mapped_column(ForeignKey("reading_sessions.id"), nullable=True)
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)

    trial: Mapped[Trial] = relationship(back_populates="response")


class AdaptiveCell(Base):
    """What one reader's answers in one cell (detector × diameter) say about their threshold there: the JSON state
    of :mod:`scorer.study.adaptive`, updated with each stored response (``n_trials`` guards the update)."""

    __tablename__ = "adaptive_cells"
    __table_args__ = (UniqueConstraint("study_id", "reader_id", "detector", "diameter_mm"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    reader_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    detector: Mapped[str] = mapped_column(String(100))
    diameter_mm: Mapped[float] = mapped_column(Float)
    state_json: Mapped[str] = mapped_column(Text)
    n_trials: Mapped[int] = mapped_column(Integer, default=0)


class ReadingSession(Base):
    """A sitting of one reader: the display check and the viewing conditions recorded with it."""

    __tablename__ = "reading_sessions"

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    reader_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    number: Mapped[int] = mapped_column(Integer, default=1)
    started_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)
    check_site: Mapped[int] = mapped_column(Integer)  # the display check's answer (server only)
    check_seed: Mapped[int] = mapped_column(Integer)
    check_attempts: Mapped[int] = mapped_column(Integer, default=0)
    check_passed: Mapped[bool] = mapped_column(Boolean, default=False)
    screen_width: Mapped[int | None] = mapped_column(Integer, nullable=True)
    screen_height: Mapped[int | None] = mapped_column(Integer, nullable=True)
    device_pixel_ratio: Mapped[float | None] = mapped_column(Float, nullable=True)
    browser_zoom: Mapped[float | None] = mapped_column(Float, nullable=True)
    viewing_distance_mm: Mapped[float | None] = mapped_column(Float, nullable=True)
    user_agent: Mapped[str | None] = mapped_column(String(300), nullable=True)


class TrialShown(Base):
    """When a trial was first handed to its reader (:mod:`webapp.activity`): a trial shown and not answered for
    longer than the stated time marks a reader who stopped mid-trial (:mod:`webapp.progress`)."""

    __tablename__ = "trials_shown"
    __table_args__ = (Index("ix_trials_shown_study", "study_id", "reader_id"),)

    trial_public_id: Mapped[str] = mapped_column(String(32), primary_key=True)
    study_id: Mapped[int] = mapped_column(Integer)
    reader_id: Mapped[int] = mapped_column(Integer)
    first_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)


class AuditEntry(Base):
    __tablename__ = "audit_log"

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow, index=True)
    user_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    action: Mapped[str] = mapped_column(String(64))
    study_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    detail: Mapped[str] = mapped_column(Text, default="{}")

    user: Mapped[User | None] = relationship()


class AnalysisRun(Base):
    """A stored analysis of a study's responses (report HTML and JSON), keyed by the responses' hash."""

    __tablename__ = "analysis_runs"

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)
    responses_sha256: Mapped[str] = mapped_column(String(64))
    n_responses: Mapped[int] = mapped_column(Integer)
    report_html: Mapped[str] = mapped_column(Text)
    analysis_json: Mapped[str] = mapped_column(Text)


class SignInFailure(Base):
    """One failed sign-in, kept while it counts for the throttle (:mod:`webapp.throttle`).

    ``name_key`` is the typed name's key (an account's, or a name no account has); ``client`` is what the
    attempt is charged to: ``"addr:<address>"``, or ``"dev:<id>"`` for a browser holding a device cookie for
    that name.  Rows older than the throttle's window are deleted.
    """

    __tablename__ = "sign_in_failures"
    __table_args__ = (
        Index("ix_sign_in_failures_pair", "name_key", "client", "at"),
        Index("ix_sign_in_failures_name", "name_key", "at"),
        Index("ix_sign_in_failures_address", "address", "at"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow, index=True)
    name_key: Mapped[str] = mapped_column(String(80))
    client: Mapped[str] = mapped_column(String(80))
    address: Mapped[str] = mapped_column(String(64))


JOB_STATES = ("queued", "running", "done", "failed")


class Job(Base):
    """A long operation (opening a study, an analysis, a planning run) run in the background.

    ``active_key`` names the operation (e.g. ``open_study:3``) while the job is queued or running and is cleared
    when it ends: the unique constraint lets the database itself refuse a second start of the same operation.
    ``heartbeat_at`` is refreshed by the server running the job; a queued or running job whose heartbeat has
    stopped was left by a server that was killed (see :func:`webapp.jobs.fail_stale_jobs`).
    """

    __tablename__ = "jobs"

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(32))
    study_id: Mapped[int | None] = mapped_column(ForeignKey("studies.id"), nullable=True, index=True)
    created_by: Mapped[int] = mapped_column(ForeignKey("users.id"))
    state: Mapped[str] = mapped_column(String(16), default="queued")
    active_key: Mapped[str | None] = mapped_column(String(100), unique=True, nullable=True)
    params_json: Mapped[str] = mapped_column(Text, default="{}")
    progress_text: Mapped[str] = mapped_column(String(300), default="waiting for a free worker")
    progress_fraction: Mapped[float] = mapped_column(Float, default=0.0)
    result_ref: Mapped[str | None] = mapped_column(String(100), nullable=True)  # "study:3", "analysis_run:7"
    result_json: Mapped[str | None] = mapped_column(Text, nullable=True)  # planning's power table
    error: Mapped[str | None] = mapped_column(String(500), nullable=True)  # one line
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime, default=utcnow)
    started_at: Mapped[_dt.datetime | None] = mapped_column(DateTime, nullable=True)
    finished_at: Mapped[_dt.datetime | None] = mapped_column(DateTime, nullable=True)
    heartbeat_at: Mapped[_dt.datetime | None] = mapped_column(DateTime, nullable=True)

    @property
    def finished(self) -> bool:
        return self.state in ("done", "failed")


# --------------------------------------------------------------------------- engine and sessions
def make_engine(url: str):
    """An engine for ``url`` (checked by :func:`scorer.databases.check_url`); SQLite gets WAL, a busy timeout and
    foreign keys on.  Raises LimenError (one line) for a URL that cannot be used."""
    from scorer.databases import WEB_APP, check_url, display_url, short_error
    from scorer.errors import LimenError

    u = check_url(url, WEB_APP, create=True)
    kwargs: dict[str, Any] = {"future": True}
    sqlite = u.get_backend_name() == "sqlite"
    if sqlite:
        kwargs["connect_args"] = {"check_same_thread": False, "timeout": 30}
    else:
        kwargs.update(pool_size=10, max_overflow=20, pool_pre_ping=True)
        if u.get_backend_name() == "postgresql" and "connect_timeout" not in u.query:
            kwargs["connect_args"] = {"connect_timeout": 20}  # an unreachable server: a message, not a long hang
    try:
        engine = create_engine(u, **kwargs)
    except Exception as exc:  # missing driver, bad options
        raise LimenError(f"cannot use database {display_url(url)}: {short_error(exc)}", "--db") from None
    if sqlite:

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_conn, _record):
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute("PRAGMA busy_timeout=30000")
            cur.close()

    return engine


#: what the query functions take: a plain session (jobs, the command line) or the app's scoped one (requests)
AnySession: TypeAlias = "Session | scoped_session[Session]"


def db() -> scoped_session[Session]:
    """The app's database session (``create_app`` stores the session factory as ``extensions["limen_db"]``)."""
    from flask import current_app

    return current_app.extensions["limen_db"]


def make_session_factory(engine) -> scoped_session[Session]:
    return scoped_session(sessionmaker(bind=engine, expire_on_commit=False, future=True))


def create_schema(engine) -> None:
    """Check that ``engine``'s database is a reader-study one; create its schema, or migrate it, with Alembic.

    The migrations live in ``webapp/migrations`` (shipped in the package).  A database of a release before
    Alembic is adopted by the baseline revision (the tables and columns it lacks added); one written by a later
    Limen, or of another kind (a nightly QC database), is refused in one line.  Everything runs in one
    transaction holding the database's write lock, so two servers starting at once on a new database create it
    once (:func:`scorer.databases.prepare`).
    """
    from scorer.databases import WEB_APP, prepare

    prepare(engine, engine.url.render_as_string(hide_password=False), WEB_APP, create=True)
