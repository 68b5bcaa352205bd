"""Baseline: the reader-study schema as it stood when Alembic took over (tiles, adaptive placement, jobs).

Revision ID: webapp_0001
Revises:
Create Date: 2026-12-05

The tables are a frozen copy of ``webapp/models.py`` at that point (never import the live models in a
migration: they move on).  ``upgrade`` creates them on an empty database.  ``adopt`` brings a database of an
earlier release (no Alembic version table; the releases before took ``create_all`` plus added columns by hand)
to this revision before it is stamped: the tables it lacks are created, and the columns added since each
table's first release are added (``LATER_COLUMNS``; ``users.username_key`` filled from the names, see below).
"""

import logging
import unicodedata

import sqlalchemy as sa
from alembic import op

revision = "webapp_0001"
down_revision = None
branch_labels = None
depends_on = None

META = sa.MetaData()

sa.Table(
    "sign_in_failures",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("at", sa.DateTime(), nullable=False),
    sa.Column("name_key", sa.String(length=80), nullable=False),
    sa.Column("client", sa.String(length=80), nullable=False),
    sa.Column("address", sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index(
    "ix_sign_in_failures_address",
    META.tables["sign_in_failures"].c.address,
    META.tables["sign_in_failures"].c.at,
    unique=False,
)
sa.Index("ix_sign_in_failures_at", META.tables["sign_in_failures"].c.at, unique=False)
sa.Index(
    "ix_sign_in_failures_name",
    META.tables["sign_in_failures"].c.name_key,
    META.tables["sign_in_failures"].c.at,
    unique=False,
)
sa.Index(
    "ix_sign_in_failures_pair",
    META.tables["sign_in_failures"].c.name_key,
    META.tables["sign_in_failures"].c.client,
    META.tables["sign_in_failures"].c.at,
    unique=False,
)
sa.Table(
    "trials_shown",
    META,
    sa.Column("trial_public_id", sa.String(length=32), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("reader_id", sa.Integer(), nullable=False),
    sa.Column("first_at", sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint("trial_public_id"),
)
sa.Index(
    "ix_trials_shown_study",
    META.tables["trials_shown"].c.study_id,
    META.tables["trials_shown"].c.reader_id,
    unique=False,
)
sa.Table(
    "users",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("username", sa.String(length=64), nullable=False),
    sa.Column("username_key", sa.String(length=64), nullable=True),
    sa.Column("password_hash", sa.String(length=255), nullable=False),
    sa.Column("role", sa.String(length=16), nullable=False),
    sa.Column("active", sa.Boolean(), nullable=False),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("session_generation", sa.Integer(), server_default="0", nullable=False),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_users_username", META.tables["users"].c.username, unique=True)
sa.Index("ix_users_username_key", META.tables["users"].c.username_key, unique=True)
sa.Table(
    "audit_log",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("at", sa.DateTime(), nullable=False),
    sa.Column("user_id", sa.Integer(), nullable=True),
    sa.Column("action", sa.String(length=64), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=True),
    sa.Column("detail", sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(
        ["user_id"],
        ["users.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_audit_log_at", META.tables["audit_log"].c.at, unique=False)
sa.Table(
    "studies",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("name", sa.String(length=200), nullable=False),
    sa.Column("status", sa.String(length=16), nullable=False),
    sa.Column("created_by", sa.Integer(), nullable=False),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("layout_file", sa.String(length=300), nullable=False),
    sa.Column("layout_name", sa.String(length=200), nullable=False),
    sa.Column("m_alternatives", sa.Integer(), nullable=False),
    sa.Column("trials_per_reader", sa.Integer(), nullable=False),
    sa.Column("seed", sa.Integer(), nullable=False),
    sa.Column("repeat_fraction", sa.Float(), nullable=False),
    sa.Column("n_practice", sa.Integer(), nullable=False),
    sa.Column("show_feedback", sa.Boolean(), nullable=False),
    sa.Column("observer", sa.String(length=8), nullable=False),
    sa.Column("viewing_distance_mm", sa.Float(), nullable=False),
    sa.Column("magnification", sa.Integer(), nullable=False),
    sa.Column("region_rows", sa.Integer(), nullable=False),
    sa.Column("region_cols", sa.Integer(), nullable=False),
    sa.Column("ugy_per_unit", sa.Float(), nullable=False),
    sa.Column("model_trials_csv", sa.Text(), nullable=True),
    sa.Column("model_responses_csv", sa.Text(), nullable=True),
    sa.Column("placement", sa.String(length=16), nullable=True),
    sa.Column("diameters_json", sa.Text(), nullable=True),
    sa.Column("half_width_ln", sa.Float(), nullable=True),
    sa.Column("plan_json", sa.Text(), nullable=True),
    sa.Column("default_window", sa.Float(), nullable=True),
    sa.Column("default_level", sa.Float(), nullable=True),
    sa.Column("opened_at", sa.DateTime(), nullable=True),
    sa.Column("closed_at", sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(
        ["created_by"],
        ["users.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
)
sa.Table(
    "adaptive_cells",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("reader_id", sa.Integer(), nullable=False),
    sa.Column("detector", sa.String(length=100), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("state_json", sa.Text(), nullable=False),
    sa.Column("n_trials", sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(
        ["reader_id"],
        ["users.id"],
    ),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("study_id", "reader_id", "detector", "diameter_mm"),
)
sa.Index("ix_adaptive_cells_study_id", META.tables["adaptive_cells"].c.study_id, unique=False)
sa.Table(
    "analysis_runs",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("responses_sha256", sa.String(length=64), nullable=False),
    sa.Column("n_responses", sa.Integer(), nullable=False),
    sa.Column("report_html", sa.Text(), nullable=False),
    sa.Column("analysis_json", sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_analysis_runs_study_id", META.tables["analysis_runs"].c.study_id, unique=False)
sa.Table(
    "enrolments",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("user_id", sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.ForeignKeyConstraint(
        ["user_id"],
        ["users.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("study_id", "user_id"),
)
sa.Index("ix_enrolments_study_id", META.tables["enrolments"].c.study_id, unique=False)
sa.Index("ix_enrolments_user_id", META.tables["enrolments"].c.user_id, unique=False)
sa.Table(
    "jobs",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("kind", sa.String(length=32), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=True),
    sa.Column("created_by", sa.Integer(), nullable=False),
    sa.Column("state", sa.String(length=16), nullable=False),
    sa.Column("active_key", sa.String(length=100), nullable=True),
    sa.Column("params_json", sa.Text(), nullable=False),
    sa.Column("progress_text", sa.String(length=300), nullable=False),
    sa.Column("progress_fraction", sa.Float(), nullable=False),
    sa.Column("result_ref", sa.String(length=100), nullable=True),
    sa.Column("result_json", sa.Text(), nullable=True),
    sa.Column("error", sa.String(length=500), nullable=True),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("started_at", sa.DateTime(), nullable=True),
    sa.Column("finished_at", sa.DateTime(), nullable=True),
    sa.Column("heartbeat_at", sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(
        ["created_by"],
        ["users.id"],
    ),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("active_key"),
)
sa.Index("ix_jobs_study_id", META.tables["jobs"].c.study_id, unique=False)
sa.Table(
    "reading_sessions",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("reader_id", sa.Integer(), nullable=False),
    sa.Column("number", sa.Integer(), nullable=False),
    sa.Column("started_at", sa.DateTime(), nullable=False),
    sa.Column("check_site", sa.Integer(), nullable=False),
    sa.Column("check_seed", sa.Integer(), nullable=False),
    sa.Column("check_attempts", sa.Integer(), nullable=False),
    sa.Column("check_passed", sa.Boolean(), nullable=False),
    sa.Column("screen_width", sa.Integer(), nullable=True),
    sa.Column("screen_height", sa.Integer(), nullable=True),
    sa.Column("device_pixel_ratio", sa.Float(), nullable=True),
    sa.Column("browser_zoom", sa.Float(), nullable=True),
    sa.Column("viewing_distance_mm", sa.Float(), nullable=True),
    sa.Column("user_agent", sa.String(length=300), nullable=True),
    sa.ForeignKeyConstraint(
        ["reader_id"],
        ["users.id"],
    ),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_reading_sessions_reader_id", META.tables["reading_sessions"].c.reader_id, unique=False)
sa.Index("ix_reading_sessions_study_id", META.tables["reading_sessions"].c.study_id, unique=False)
sa.Table(
    "study_images",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("sha256", sa.String(length=64), nullable=False),
    sa.Column("stored_name", sa.String(length=80), nullable=False),
    sa.Column("code", sa.String(length=32), nullable=False),
    sa.Column("detector", sa.String(length=100), nullable=False),
    sa.Column("conversion_file", sa.String(length=300), nullable=True),
    sa.Column("pixel_spacing_mm", sa.Float(), nullable=True),
    sa.Column("label", sa.String(length=200), nullable=False),
    sa.Column("rows", sa.Integer(), nullable=False),
    sa.Column("cols", sa.Integer(), nullable=False),
    sa.Column("registration_json", sa.Text(), nullable=True),
    sa.Column("practice", sa.Boolean(), server_default=sa.false(), nullable=False),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("study_id", "sha256"),
)
sa.Index("ix_study_images_study_id", META.tables["study_images"].c.study_id, unique=False)
sa.Table(
    "regions",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("image_id", sa.Integer(), nullable=False),
    sa.Column("target", sa.String(length=64), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("contrast", sa.Float(), nullable=False),
    sa.Column("true_site", sa.Integer(), nullable=False),
    sa.Column("row0", sa.Integer(), nullable=False),
    sa.Column("col0", sa.Integer(), nullable=False),
    sa.Column("sites_json", sa.Text(), nullable=False),
    sa.Column("tile_px", sa.Integer(), nullable=True),
    sa.Column("tiles_json", sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(
        ["image_id"],
        ["study_images.id"],
    ),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("image_id", "target"),
)
sa.Index("ix_regions_study_id", META.tables["regions"].c.study_id, unique=False)
sa.Table(
    "trials",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("public_id", sa.String(length=32), nullable=False),
    sa.Column("study_id", sa.Integer(), nullable=False),
    sa.Column("reader_id", sa.Integer(), nullable=False),
    sa.Column("seq", sa.Integer(), nullable=False),
    sa.Column("region_id", sa.Integer(), nullable=False),
    sa.Column("practice", sa.Boolean(), nullable=False),
    sa.Column("repeat", sa.Integer(), nullable=False),
    sa.Column("tile_order", sa.String(length=64), nullable=True),
    sa.ForeignKeyConstraint(
        ["reader_id"],
        ["users.id"],
    ),
    sa.ForeignKeyConstraint(
        ["region_id"],
        ["regions.id"],
    ),
    sa.ForeignKeyConstraint(
        ["study_id"],
        ["studies.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("study_id", "reader_id", "seq"),
)
sa.Index("ix_trials_public_id", META.tables["trials"].c.public_id, unique=True)
sa.Index(
    "ix_trials_reader_seq",
    META.tables["trials"].c.study_id,
    META.tables["trials"].c.reader_id,
    META.tables["trials"].c.seq,
    unique=False,
)
sa.Table(
    "responses",
    META,
    sa.Column("id", sa.Integer(), nullable=False),
    sa.Column("trial_id", sa.Integer(), nullable=False),
    sa.Column("chosen_site", sa.Integer(), nullable=False),
    sa.Column("correct", sa.Boolean(), nullable=False),
    sa.Column("response_ms", sa.Integer(), nullable=False),
    sa.Column("window", sa.Float(), nullable=False),
    sa.Column("level", sa.Float(), nullable=False),
    sa.Column("zoom", sa.Integer(), nullable=False),
    sa.Column("inverted", sa.Boolean(), nullable=False),
    sa.Column("session_id", sa.Integer(), nullable=True),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(
        ["session_id"],
        ["reading_sessions.id"],
    ),
    sa.ForeignKeyConstraint(
        ["trial_id"],
        ["trials.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("trial_id"),
)


#: columns added after the first release of each table: (table, column, SQL type, NOT NULL default or None)
LATER_COLUMNS = (
    ("users", "session_generation", "INTEGER", 0),
    ("studies", "model_responses_csv", "TEXT", None),
    ("studies", "placement", "VARCHAR(16)", None),
    ("studies", "diameters_json", "TEXT", None),
    ("studies", "half_width_ln", "FLOAT", None),
    ("studies", "plan_json", "TEXT", None),
    ("studies", "default_window", "FLOAT", None),
    ("studies", "default_level", "FLOAT", None),
    ("study_images", "practice", "BOOLEAN", False),
    ("regions", "tile_px", "INTEGER", None),
    ("regions", "tiles_json", "TEXT", None),
    ("trials", "tile_order", "VARCHAR(64)", None),
)


def upgrade() -> None:
    META.create_all(op.get_bind())


def downgrade() -> None:
    META.drop_all(op.get_bind())


def adopt(conn) -> None:
    """Bring a database of a release before Alembic to this revision (called before the stamp).

    Its open studies keep their fixed schedules (``studies.placement`` NULL) and their trials show one region
    with every site (``trials.tile_order`` NULL).  ``users.username_key`` (NFKC + case fold of the name) is
    filled from the names; of accounts whose names differ only by case the oldest keeps the name and the others
    get no key, so they can no longer sign in (a warning names them).
    """
    META.create_all(conn, checkfirst=True)
    insp = sa.inspect(conn)
    have = {t: {c["name"] for c in insp.get_columns(t)} for t in {row[0] for row in LATER_COLUMNS}}
    for table, column, sql_type, default in LATER_COLUMNS:
        if column in have[table]:
            continue
        tail = ""
        if default is not None:
            if isinstance(default, bool):
                literal = ("true" if default else "false") if conn.dialect.name == "postgresql" else str(int(default))
            else:
                literal = str(default)
            tail = f" NOT NULL DEFAULT {literal}"
        conn.execute(sa.text(f"ALTER TABLE {table} ADD COLUMN {column} {sql_type}{tail}"))
    if "username_key" in have["users"]:
        return

    def name_key(name):  # webapp.accounts.name_key as it was then (frozen: a migration must not move)
        return unicodedata.normalize("NFKC", name or "").strip().casefold()

    conn.execute(sa.text("ALTER TABLE users ADD COLUMN username_key VARCHAR(64)"))
    owner: dict[str, str] = {}
    for uid, name in conn.execute(sa.text("SELECT id, username FROM users ORDER BY id")).all():
        key = name_key(name)
        if key in owner:
            logging.getLogger("limen").warning(
                "account %r differs from %r only by case: it can no longer sign in", name, owner[key]
            )
            continue
        owner[key] = name
        conn.execute(sa.text("UPDATE users SET username_key = :k WHERE id = :i"), {"k": key, "i": uid})
    conn.execute(sa.text("CREATE UNIQUE INDEX ix_users_username_key ON users (username_key)"))
