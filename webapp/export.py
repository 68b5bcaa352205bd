"""The study's responses as the tidy table ``limen analyse`` reads (CSV export), and the model observer's trials."""

from __future__ import annotations

import io
import json

import pandas as pd

EXTRA_EXPORT_COLUMNS = ["window", "level", "timestamp", "seq", "tile_order", "chosen_position", "true_position"]


def export_columns() -> list[str]:
    """The responses CSV: every column ``limen analyse`` reads, then window, level, timestamp and what the reader
    was shown: the trial's place in the reader's sequence, the tile order (the sites in screen order, separated
    by spaces), and the screen positions chosen and holding the disc (empty for trials of studies opened by an
    earlier release, which showed one region with every site)."""
    from scorer.study.trials import OPTIONAL_COLUMNS, TRIAL_COLUMNS

    return list(TRIAL_COLUMNS) + [c for c in OPTIONAL_COLUMNS if c not in TRIAL_COLUMNS] + EXTRA_EXPORT_COLUMNS


def responses_frame(session, study) -> pd.DataFrame:
    """The study's stored (non-practice) responses as the tidy table ``limen analyse`` reads."""
    from sqlalchemy import select

    from webapp.models import ReadingSession, Region, Response, StudyImage, Trial, User

    q = (
        select(
            User.username,
            StudyImage.detector,
            StudyImage.code,
            Region.target,
            Region.diameter_mm,
            Region.contrast,
            Response.chosen_site,
            Region.true_site,
            Response.correct,
            Response.response_ms,
            ReadingSession.number,
            Trial.repeat,
            Response.window,
            Response.level,
            Response.created_at,
            Region.sites_json,
            Trial.seq,
            Trial.tile_order,
        )
        .join(Trial, Response.trial_id == Trial.id)
        .join(User, Trial.reader_id == User.id)
        .join(Region, Trial.region_id == Region.id)
        .join(StudyImage, Region.image_id == StudyImage.id)
        .outerjoin(ReadingSession, Response.session_id == ReadingSession.id)
        .where(Trial.study_id == study.id, Trial.practice.is_(False))
        .order_by(User.username, Trial.seq)
    )
    rows = session.execute(q).all()
    scale = float(study.ugy_per_unit or 1.0)
    df = pd.DataFrame(
        rows,
        columns=[
            "reader",
            "detector",
            "image",
            "target",
            "diameter_mm",
            "contrast",
            "chosen_site",
            "true_site",
            "correct",
            "response_ms",
            "session",
            "repeat",
            "window",
            "level",
            "timestamp",
            "sites_json",
            "seq",
            "tile_json",
        ],
    )
    df["correct"] = df["correct"].astype(int)
    df["session"] = df["session"].fillna(1).astype(int)
    # each trial's own M (a plate may use 3-site cells for some diameters and 5-site cells for others)
    df["n_alternatives"] = [len(json.loads(x)) for x in df["sites_json"]] if len(df) else pd.Series(dtype=int)
    df["window"] = df["window"].astype(float) * scale
    df["level"] = df["level"].astype(float) * scale
    df["timestamp"] = [t.isoformat(timespec="milliseconds") + "Z" if t is not None else "" for t in df["timestamp"]]
    orders = [json.loads(x) if x else None for x in df["tile_json"]]
    df["tile_order"] = [" ".join(map(str, o)) if o else "" for o in orders]
    df["chosen_position"] = pd.array(
        [o.index(int(c)) if o else None for o, c in zip(orders, df["chosen_site"])], dtype="Int64"
    )
    df["true_position"] = pd.array(
        [o.index(int(c)) if o else None for o, c in zip(orders, df["true_site"])], dtype="Int64"
    )
    return df[export_columns()]


def responses_csv(session, study) -> str:
    return responses_frame(session, study).to_csv(index=False)


def model_frame(study) -> pd.DataFrame | None:
    if not study.model_trials_csv:
        return None
    from scorer.study.trials import LABEL_COLUMNS

    return pd.read_csv(io.StringIO(study.model_trials_csv), dtype=dict.fromkeys(LABEL_COLUMNS, str))
