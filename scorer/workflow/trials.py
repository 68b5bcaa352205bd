"""Reading a reader-study trial table from a CSV file; the checks on its columns and values are
:func:`scorer.study.trials.validate_trials`."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from scorer.errors import LimenError, plain_value
from scorer.files import PathArg
from scorer.study.trials import LABEL_COLUMNS, validate_trials


def load_trials(path: PathArg) -> pd.DataFrame:
    """Read a trial table (CSV) and validate it (see :func:`scorer.study.trials.validate_trials`).

    Parameters
    ----------
    path : str or path-like
        The CSV file.

    Returns
    -------
    pandas.DataFrame
        The trials, validated.
    """
    path = Path(path)
    if not path.is_file():
        raise LimenError("file not found", path)
    try:
        df = pd.read_csv(path, dtype=dict.fromkeys(LABEL_COLUMNS, str))
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise LimenError(f"cannot read as CSV ({str(exc).splitlines()[0]})", path) from None
    except (OSError, ValueError) as exc:
        raise LimenError(f"cannot read as CSV ({' '.join(str(exc).split())})", path) from None
    if len(df.columns) == 1 and ";" in str(df.columns[0]):
        raise LimenError(
            "columns are separated by semicolons; Limen reads comma-separated CSV (export with ',' as the separator)",
            path,
        )
    return validate_trials(df, source=path)


#: columns of a model observer's per-site responses table (``responses.csv`` of ``limen score --out``)
RESPONSE_COLUMNS = ["image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "is_signal", "response"]


def load_model_table(path: PathArg) -> tuple[pd.DataFrame, pd.DataFrame | None]:
    """The model observer's table for ``limen analyse --model``: its trials, and its responses when given.

    A trial table (``trials.csv`` of ``limen score --out``) gives the model's decisions only, so the
    human/model factor is measured for the count method; a responses table (``responses.csv``: one row per
    candidate site with ``is_signal`` and ``response``) gives both — the decisions are its M-AFC choices
    (:func:`scorer.observer.npw.decide`) and the d′ method reads the responses themselves.

    Parameters
    ----------
    path : str or path-like
        ``trials.csv`` or ``responses.csv`` of ``limen score --out``.

    Returns
    -------
    trials : pandas.DataFrame
        The model's M-AFC trials.
    responses : pandas.DataFrame or None
        Its per-site responses, when the file holds them.
    """
    from scorer.observer.npw import decide

    path = Path(path)
    if not path.is_file():
        raise LimenError("file not found", path)
    try:
        head = pd.read_csv(path, nrows=0).columns
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError, ValueError) as exc:
        raise LimenError(f"cannot read as CSV ({' '.join(str(exc).split())})", path) from None
    if not {"is_signal", "response"} <= set(head):
        return load_trials(path), None
    missing = [c for c in RESPONSE_COLUMNS if c not in head]
    if missing:
        raise LimenError(f"responses table lacks column(s) {', '.join(missing)}", path)
    df = pd.read_csv(path, dtype={c: str for c in ("image", "target", "detector", "observer")})
    if "observer" not in df.columns:
        df["observer"] = "model"
    for c in ("diameter_mm", "contrast", "response", "m_alternatives", "site"):
        num = pd.to_numeric(df[c], errors="coerce")
        bad = ~np.isfinite(num.to_numpy(float))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise LimenError(
                f"row {i + 1} (line {i + 2}): {c} {plain_value(df[c].iloc[i])} is not a finite number", path
            )
        df[c] = num
    sig = df["is_signal"].map({True: True, False: False, "True": True, "False": False})
    if sig.isna().any():
        i = int(np.flatnonzero(sig.isna().to_numpy())[0])
        raise LimenError(f"row {i + 1} (line {i + 2}): is_signal must be True or False", path)
    df["is_signal"] = sig.astype(bool)
    per = df.groupby(["observer", "image", "target"], sort=False)["is_signal"].sum()
    if (per != 1).any():
        obs, image, target = per.index[int(np.flatnonzero((per != 1).to_numpy())[0])]
        raise LimenError(f"image {image}, target {target}: needs exactly one signal site", path)
    df["m_alternatives"] = df["m_alternatives"].astype(int)
    trials = decide(df).rename(columns={"m_alternatives": "n_alternatives"})
    return validate_trials(trials, source=path), df
