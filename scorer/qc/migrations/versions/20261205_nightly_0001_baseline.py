"""Baseline: the nightly QC schema of the last release before Alembic (limen_meta schema version 1).

Revision ID: nightly_0001
Revises:
Create Date: 2026-12-05

The tables are a frozen copy of ``scorer/qc/tables.py`` as it stood then (never import the live models in a
migration: they move on).  ``upgrade`` creates them on an empty database; ``adopt`` brings a database written
by that release (no Alembic version table) to this revision before it is stamped: its tables are already these,
so only ``limen_meta.schema_version`` changes, to 2, which the releases before Alembic refuse as "newer than
this Limen" instead of writing into a schema they no longer know.
"""

import sqlalchemy as sa
from alembic import op

revision = "nightly_0001"
down_revision = None
branch_labels = None
depends_on = None

#: limen_meta.schema_version from here on: the releases before Alembic (version 1) refuse anything higher
SCHEMA_VERSION = 2

META = sa.MetaData()

sa.Table(
    "limen_meta",
    META,
    sa.Column("key", sa.String(length=64), nullable=False),
    sa.Column("value", sa.Text(), nullable=False),
    sa.PrimaryKeyConstraint("key"),
)
sa.Table(
    "qc_baselines",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("detector", sa.String(length=200), nullable=False),
    sa.Column("method", sa.String(length=16), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("mean_log10", sa.Float(), nullable=False),
    sa.Column("sigma_log10", sa.Float(), nullable=False),
    sa.Column("sd_between_log10", sa.Float(), nullable=True),
    sa.Column("se_within_log10", sa.Float(), nullable=True),
    sa.Column("n_sessions", sa.Integer(), nullable=False),
    sa.Column("session_ids", sa.Text(), nullable=False),
    sa.Column("last_session_date", sa.String(length=10), nullable=False),
    sa.Column("last_session_id", sa.Integer(), nullable=False),
    sa.Column("source", sa.String(length=16), nullable=False),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("detector", "method", "diameter_mm"),
)
sa.Index("ix_qc_baselines_detector", META.tables["qc_baselines"].c.detector, unique=False)
sa.Table(
    "qc_files",
    META,
    sa.Column("path", sa.String(length=1024), nullable=False),
    sa.Column("size", sa.Integer(), nullable=False),
    sa.Column("mtime_ns", sa.String(length=32), nullable=False),
    sa.Column("sha256", sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint("path"),
)
sa.Table(
    "qc_quarantine",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("sha256", sa.String(length=64), nullable=True),
    sa.Column("original_path", sa.Text(), nullable=False),
    sa.Column("moved_to", sa.Text(), nullable=True),
    sa.Column("reason", sa.Text(), nullable=False),
    sa.Column("at", sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_qc_quarantine_sha256", META.tables["qc_quarantine"].c.sha256, unique=False)
sa.Table(
    "qc_sessions",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("detector", sa.String(length=200), nullable=False),
    sa.Column("session_date", sa.String(length=10), nullable=False),
    sa.Column("group_key", sa.String(length=400), nullable=False),
    sa.Column("state", sa.String(length=16), nullable=False),
    sa.Column("claim_token", sa.String(length=64), nullable=True),
    sa.Column("claim_host", sa.String(length=255), nullable=True),
    sa.Column("claim_pid", sa.Integer(), nullable=True),
    sa.Column("claim_expires", sa.DateTime(), nullable=True),
    sa.Column("claimed_at", sa.DateTime(), nullable=False),
    sa.Column("scored_at", sa.DateTime(), nullable=True),
    sa.Column("n_images", sa.Integer(), nullable=False),
    sa.Column("observer", sa.String(length=16), nullable=True),
    sa.Column("verdict_method", sa.String(length=16), nullable=True),
    sa.Column("overall_verdict", sa.String(length=32), nullable=True),
    sa.Column("kvp", sa.Float(), nullable=True),
    sa.Column("anode", sa.String(length=32), nullable=True),
    sa.Column("filter", sa.String(length=32), nullable=True),
    sa.Column("flags", sa.Text(), nullable=False),
    sa.Column("settings", sa.Text(), nullable=False),
    sa.Column("warnings", sa.Text(), nullable=False),
    sa.Column("scoring_s", sa.Float(), nullable=True),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_qc_sessions_detector", META.tables["qc_sessions"].c.detector, unique=False)
sa.Index("ix_qc_sessions_session_date", META.tables["qc_sessions"].c.session_date, unique=False)
sa.Index("ix_qc_sessions_state", META.tables["qc_sessions"].c.state, unique=False)
sa.Table(
    "qc_alerts",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("session_id", sa.Integer(), nullable=False),
    sa.Column("detector", sa.String(length=200), nullable=False),
    sa.Column("session_date", sa.String(length=10), nullable=False),
    sa.Column("method", sa.String(length=16), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("rule", sa.String(length=16), nullable=False),
    sa.Column("direction", sa.String(length=8), nullable=False),
    sa.Column("value", sa.Float(), nullable=True),
    sa.Column("reference", sa.Float(), nullable=True),
    sa.Column("message", sa.Text(), nullable=False),
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("emailed_at", sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(
        ["session_id"],
        ["qc_sessions.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("session_id", "method", "diameter_mm", "rule"),
)
sa.Index("ix_qc_alerts_detector", META.tables["qc_alerts"].c.detector, unique=False)
sa.Index("ix_qc_alerts_session_id", META.tables["qc_alerts"].c.session_id, unique=False)
sa.Table(
    "qc_images",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("sha256", sa.String(length=64), nullable=False),
    sa.Column("path", sa.Text(), nullable=False),
    sa.Column("detector", sa.String(length=200), nullable=False),
    sa.Column("group_key", sa.String(length=400), nullable=False),
    sa.Column("session_date", sa.String(length=10), nullable=False),
    sa.Column("acquired", sa.String(length=40), nullable=True),
    sa.Column("detector_id", sa.String(length=200), nullable=True),
    sa.Column("device_serial", sa.String(length=200), nullable=True),
    sa.Column("station_name", sa.String(length=200), nullable=True),
    sa.Column("kvp", sa.Float(), nullable=True),
    sa.Column("exposure_uas", sa.Float(), nullable=True),
    sa.Column("anode", sa.String(length=32), nullable=True),
    sa.Column("filter", sa.String(length=32), nullable=True),
    sa.Column("flags", sa.Text(), nullable=False),
    sa.Column("first_seen", sa.DateTime(), nullable=False),
    sa.Column("session_id", sa.Integer(), nullable=True),
    sa.Column("registration", sa.Text(), nullable=True),
    sa.Column("blur_sigma_px", sa.Float(), nullable=True),
    sa.Column("n_correct", sa.Integer(), nullable=True),
    sa.Column("n_trials", sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(
        ["session_id"],
        ["qc_sessions.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("sha256"),
)
sa.Index("ix_qc_images_detector", META.tables["qc_images"].c.detector, unique=False)
sa.Index("ix_qc_images_group_key", META.tables["qc_images"].c.group_key, unique=False)
sa.Index("ix_qc_images_session_id", META.tables["qc_images"].c.session_id, unique=False)
sa.Table(
    "qc_thresholds",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("session_id", sa.Integer(), nullable=False),
    sa.Column("method", sa.String(length=16), nullable=False),
    sa.Column("observer", sa.String(length=16), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("threshold_contrast", sa.Float(), nullable=True),
    sa.Column("ci_low", sa.Float(), nullable=True),
    sa.Column("ci_high", sa.Float(), nullable=True),
    sa.Column("n_images", sa.Integer(), nullable=False),
    sa.Column("m_alternatives", sa.Integer(), nullable=False),
    sa.Column("criterion_pc", sa.Float(), nullable=True),
    sa.Column("note", sa.Text(), nullable=False),
    sa.Column("compared_contrast", sa.Float(), nullable=True),
    sa.Column("acceptable", sa.Float(), nullable=True),
    sa.Column("verdict", sa.String(length=32), nullable=True),
    sa.ForeignKeyConstraint(
        ["session_id"],
        ["qc_sessions.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
    sa.UniqueConstraint("session_id", "method", "diameter_mm"),
)
sa.Index("ix_qc_thresholds_session_id", META.tables["qc_thresholds"].c.session_id, unique=False)
sa.Table(
    "qc_responses",
    META,
    sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
    sa.Column("session_id", sa.Integer(), nullable=False),
    sa.Column("image_id", sa.Integer(), nullable=False),
    sa.Column("target", sa.String(length=64), nullable=False),
    sa.Column("diameter_mm", sa.Float(), nullable=False),
    sa.Column("contrast", sa.Float(), nullable=False),
    sa.Column("site", sa.Integer(), nullable=False),
    sa.Column("is_signal", sa.Boolean(), nullable=False),
    sa.Column("response", sa.Float(), nullable=False),
    sa.Column("row_px", sa.Float(), nullable=False),
    sa.Column("col_px", sa.Float(), nullable=False),
    sa.ForeignKeyConstraint(
        ["image_id"],
        ["qc_images.id"],
    ),
    sa.ForeignKeyConstraint(
        ["session_id"],
        ["qc_sessions.id"],
    ),
    sa.PrimaryKeyConstraint("id"),
)
sa.Index("ix_qc_responses_session_id", META.tables["qc_responses"].c.session_id, unique=False)


def _mark(conn: sa.Connection) -> None:
    meta = META.tables["limen_meta"]
    done = conn.execute(sa.update(meta).where(meta.c.key == "schema_version").values(value=str(SCHEMA_VERSION)))
    if done.rowcount == 0:
        conn.execute(sa.insert(meta).values(key="schema_version", value=str(SCHEMA_VERSION)))


def upgrade() -> None:
    conn = op.get_bind()
    META.create_all(conn)
    _mark(conn)


def adopt(conn: sa.Connection) -> None:
    """Bring a database of the release before Alembic to this revision (called before the stamp)."""
    META.create_all(conn, checkfirst=True)
    _mark(conn)


def downgrade() -> None:
    META.drop_all(op.get_bind())
