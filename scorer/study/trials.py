"""The trial table: its columns, spelled out once, and the check that turns a raw table into a clean, typed one.

One row per trial: the columns of :data:`TRIAL_COLUMNS`, plus the optional ones of :data:`OPTIONAL_COLUMNS`.
Model-observer trials from ``limen score --out`` have the same shape with ``reader`` = the observer's name.
Reading a table from a file is the workflow layer's job (:func:`scorer.workflow.trials.load_trials`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from scorer.errors import LimenError, plain_value

#: columns holding labels (read as text, never as numbers); together they name one trial
LABEL_COLUMNS = ["reader", "detector", "image", "target"]
#: columns every trial table has, in this order
TRIAL_COLUMNS = [*LABEL_COLUMNS, "diameter_mm", "contrast", "chosen_site", "true_site", "correct"]
#: columns :func:`validate_trials` checks when present
OPTIONAL_COLUMNS = ["response_ms", "session", "repeat", "n_alternatives"]


#: what a number column must hold, as the errors say it
RULES = {
    "contrast": "contrast must be a positive fraction",
    "diameter_mm": "diameter_mm must be a positive number of mm",
}


def _row_label(df: pd.DataFrame, mask) -> str:
    i = int(np.flatnonzero(np.asarray(mask))[0])
    return f"row {i + 1} (line {i + 2})"


def validate_trials(df: pd.DataFrame, source="responses") -> pd.DataFrame:
    """Check columns and values of a trial table; return a clean, typed copy.

    Errors (:class:`LimenError`) name the source and the first offending row (1-based
    data row and its CSV line).  Checks: required columns present; no missing values in
    them; ``correct`` is 0/1; ``contrast`` and ``diameter_mm`` are positive finite
    numbers; ``correct`` agrees with ``chosen_site == true_site``.
    """
    if not isinstance(df, pd.DataFrame):
        raise LimenError("trial table must be a table (DataFrame)", source)
    missing = [c for c in TRIAL_COLUMNS if c not in df.columns]
    if missing:
        raise LimenError(
            f"missing column(s) {', '.join(missing)}; a trial table needs {', '.join(TRIAL_COLUMNS)}", source
        )
    if len(df) == 0:
        raise LimenError("trial table has no rows", source)
    out = df.copy()
    for c in TRIAL_COLUMNS:
        bad = out[c].isna().to_numpy()
        if bad.any():
            raise LimenError(f"{_row_label(out, bad)}: empty {c}", source)
    for c in LABEL_COLUMNS:
        out[c] = out[c].astype(str)
    for c in ("contrast", "diameter_mm"):
        num = pd.to_numeric(out[c], errors="coerce")
        bad = num.isna().to_numpy()
        if bad.any():
            raise LimenError(
                f"{_row_label(out, bad)}: {c} {plain_value(out[c].iloc[np.flatnonzero(bad)[0]])} is not a number",
                source,
            )
        bad = ~np.isfinite(num.to_numpy()) | (num.to_numpy() <= 0)
        if bad.any():
            what = "negative" if num.iloc[np.flatnonzero(bad)[0]] < 0 else "not a positive number"
            raise LimenError(
                f"{_row_label(out, bad)}: {c} {num.iloc[np.flatnonzero(bad)[0]]:g} is {what} ({RULES[c]})",
                source,
            )
        out[c] = num.astype(float)
    bad = (out["contrast"] >= 1).to_numpy()
    if bad.any():
        raise LimenError(
            f"{_row_label(out, bad)}: contrast {out['contrast'].iloc[np.flatnonzero(bad)[0]]:g} is not "
            "below 1; contrasts are fractions (0.012 for 1.2 %), not per cent",
            source,
        )
    raw = out["correct"]
    mapped = raw.map(
        lambda v: {True: 1, False: 0, "1": 1, "0": 0, "true": 1, "false": 0, "True": 1, "False": 0}.get(v, None)
    )  # 1/0 and 1.0/0.0 hash as True/False
    bad = mapped.isna().to_numpy()
    if bad.any():
        raise LimenError(
            f"{_row_label(out, bad)}: correct must be 0 or 1, got {plain_value(raw.iloc[np.flatnonzero(bad)[0]])}",
            source,
        )
    out["correct"] = mapped.astype(int)
    for c in ("chosen_site", "true_site"):
        out[c] = out[c].astype(str).str.strip()
        out[c] = out[c].str.replace(r"\.0$", "", regex=True)  # 2.0 read as float means site 2
    agree = (out["chosen_site"] == out["true_site"]).astype(int).to_numpy()
    bad = agree != out["correct"].to_numpy()
    if bad.any():
        i = np.flatnonzero(bad)[0]
        raise LimenError(
            f"{_row_label(out, bad)}: correct = {out['correct'].iloc[i]} but chosen_site "
            f"{out['chosen_site'].iloc[i]} {'equals' if agree[i] else 'differs from'} true_site "
            f"{out['true_site'].iloc[i]}",
            source,
        )
    for c in ("repeat", "session"):
        if c in out.columns:
            num = pd.to_numeric(out[c], errors="coerce")
            bad = num.isna().to_numpy()
            if bad.any():
                raise LimenError(f"{_row_label(out, bad)}: {c} must be a whole number", source)
            out[c] = num.astype(int)
    if "n_alternatives" in out.columns:
        num = pd.to_numeric(out["n_alternatives"], errors="coerce")
        bad = (num.isna() | (num < 2)).to_numpy()
        if bad.any():
            raise LimenError(f"{_row_label(out, bad)}: n_alternatives must be a whole number ≥ 2", source)
        out["n_alternatives"] = num.astype(int)
    key = LABEL_COLUMNS + [c for c in ("session", "repeat") if c in out.columns]
    dup = out.duplicated(subset=key, keep=False).to_numpy()
    if dup.any():
        i = np.flatnonzero(dup)
        first = out.iloc[i[0]]
        j = next(k for k in i[1:] if all(out.iloc[k][c] == first[c] for c in key))
        raise LimenError(
            f"{_row_label(out, np.arange(len(out)) == j)} repeats {_row_label(out, dup)}: the same "
            f"{', '.join(key)} twice (add a 'repeat' column if a reader read a target twice)",
            source,
        )
    return out
