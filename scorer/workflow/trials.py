"""Reading a reader-study trial table from a CSV file; the checks on its columns and values are
:func:`scorer.study.trials.validate_trials`."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from scorer.errors import LimenError
from scorer.study.trials import LABEL_COLUMNS, validate_trials


def load_trials(path) -> pd.DataFrame:
    """Read a trial table (CSV) and validate it (see :func:`scorer.study.trials.validate_trials`)."""
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
