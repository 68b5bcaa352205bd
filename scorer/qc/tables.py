"""The nightly database's tables (SQLAlchemy 2 declarative models) and row helpers.

``limen_meta`` holds the schema version (:mod:`scorer.qc.schema`); the ``qc_*`` tables hold the
file cache, images, sessions with their claims, thresholds, responses, baselines, alerts and the
quarantine log.  Times are naive UTC (:func:`utcnow`).
"""

from __future__ import annotations

import datetime as _dt
import json
from typing import Any

from sqlalchemy import Boolean, DateTime, Float, ForeignKey, Integer, String, Text, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

from scorer.databases import utcnow as utcnow  # re-exported: one definition for both databases


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
    # claimed for mailing by one run (token, when), so overlapping runs never send an alert twice
    mail_token: Mapped[str | None] = mapped_column(String(64))
    mail_claimed_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)
    # printed by a run that finished (report written): an alert still unreported makes the next run exit 1
    reported_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)


class MissingQcRow(Base):
    """Missing QC (scorer/qc/missing.py): a session short of images too long, a detector silent too long, a
    run whose every new file was quarantined.  One row per kind, detector and subject (raised once)."""

    __tablename__ = "qc_missing"
    __table_args__ = (UniqueConstraint("kind", "detector", "subject"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    kind: Mapped[str] = mapped_column(String(16))  # incomplete | silent | quarantined
    detector: Mapped[str] = mapped_column(String(200), index=True)
    subject: Mapped[str] = mapped_column(String(400))  # group key | last date seen | run date
    session_date: Mapped[str] = mapped_column(String(10))
    message: Mapped[str] = mapped_column(Text)
    created_at: Mapped[_dt.datetime] = mapped_column(DateTime)
    emailed_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)
    mail_token: Mapped[str | None] = mapped_column(String(64))
    mail_claimed_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)
    reported_at: Mapped[_dt.datetime | None] = mapped_column(DateTime)


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


def image_dict(r: ImageRow) -> dict[str, Any]:
    """An image row as the plain dict the nightly run passes between scan, claim and scoring."""
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
