"""Which thresholds of a reader study are estimates, and which are not: the rule, and the tables it marks.

A fitted threshold is reported as a number only when the data pin it down.  A cell (one reader's, the pooled
readers' or the model observer's threshold for one group × diameter) is **not estimable** when

* the likelihood has no interior maximum (every trial correct, or all at chance): the fit only bounds it;
* it rests on fewer than ``min_trials`` trials (for the pooled readers: per reader, on average);
* its confidence interval is missing (when one was computed), or spans more than a factor ``max_ci_ratio``
  (``ci_high / ci_low``);
* the threshold, or the upper end of its interval, lies above 100 % contrast (a disc cannot remove more than
  all of the kerma: the data then say only that the reader did not see the disc at the contrasts shown).

Such a cell keeps its reason and its trial count; every output (analysis.json, the CSV tables, the HTML
tables and plots, ``limen analyse`` and the web app) shows "not estimable" there, never the fitted number
(:func:`public_curves`).  The rule is common practice for reporting psychometric thresholds (an estimate needs
an interior maximum and a finite interval; Wichmann & Hill 2001, part II); the two numbers are stated
defaults, not published constants.

References
----------
.. [1] Wichmann, F. A. & Hill, N. J. "The psychometric function: II. Bootstrap-based confidence intervals and
       sampling", Perception & Psychophysics 63 (2001).
(in docs/references.md)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from scorer.errors import LimenError

#: the numbers of a curve row that are blanked when the row is not estimable
ESTIMATE_COLUMNS = ("threshold_contrast", "ci_low", "ci_high", "log10_se", "k")


@dataclass(frozen=True)
class EstimabilityRule:
    """When a threshold counts as estimated.

    min_trials : fewest trials behind one reader's threshold (pooled rows: per reader, on average).
    max_ci_ratio : widest interval accepted, as ci_high / ci_low (10: one decade).
    max_contrast : highest contrast a threshold or its interval may reach (1.0 = 100 %).
    """

    min_trials: int = 10
    max_ci_ratio: float = 10.0
    max_contrast: float = 1.0

    def __post_init__(self):
        if not (isinstance(self.min_trials, (int, np.integer)) and self.min_trials >= 1):
            raise LimenError(f"the fewest trials per threshold must be a whole number ≥ 1, got {self.min_trials!r}")
        if not (math.isfinite(self.max_ci_ratio) and self.max_ci_ratio > 1):
            raise LimenError(f"the widest CI accepted must be a factor above 1, got {self.max_ci_ratio!r}")
        if not (math.isfinite(self.max_contrast) and 0 < self.max_contrast <= 1):
            raise LimenError(f"the highest contrast must lie in (0, 1], got {self.max_contrast!r}")

    def to_json(self) -> dict:
        return {
            "min_trials": int(self.min_trials),
            "max_ci_ratio": float(self.max_ci_ratio),
            "max_contrast": float(self.max_contrast),
        }


def _finite(v) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def reasons_for(row: dict, rule: EstimabilityRule, ci_expected: bool = True) -> list[str]:
    """Why one curve row (a dict with threshold_contrast, ci_low, ci_high, n_trials, converged and, for pooled
    rows, n_readers) is not an estimate; empty when it is."""
    out = []
    bound = not bool(row.get("converged", True))
    if bound:
        out.append("no interior maximum (every trial correct, or all at chance)")
    n = int(row.get("n_trials") or 0)
    n_readers = int(row.get("n_readers") or 1) if _finite(row.get("n_readers")) else 1
    need = rule.min_trials * max(n_readers, 1)
    if n < need:
        per = f" ({rule.min_trials} per reader)" if n_readers > 1 else ""
        out.append(f"{n} trials, fewer than {need}{per}")
    if bound:
        return out  # the fitted value is a search bound: its size and interval say nothing more
    t, lo, hi = row.get("threshold_contrast"), row.get("ci_low"), row.get("ci_high")
    if not _finite(t) or float(t) <= 0:
        out.append("no threshold")
    elif float(t) > rule.max_contrast:
        out.append(f"threshold above {100 * rule.max_contrast:g} % contrast")
    if _finite(lo) and _finite(hi) and float(lo) > 0:
        ratio = float(hi) / float(lo)
        if ratio > rule.max_ci_ratio:
            size = f"a factor of {ratio:.3g}" if ratio < 1000 else "more than a factor of 1000"
            out.append(f"95 % CI spans {size} (more than {rule.max_ci_ratio:g})")
        if float(hi) > rule.max_contrast and not (_finite(t) and float(t) > rule.max_contrast):
            out.append(f"95 % CI reaches above {100 * rule.max_contrast:g} % contrast")
    elif ci_expected:
        out.append("no confidence interval")
    return out


def judge_curves(df: pd.DataFrame, rule: EstimabilityRule, ci_expected: bool = True) -> pd.DataFrame:
    """The curve table with ``estimable`` (bool) and ``not_estimable`` (the reasons, "" when estimable) added.

    The fitted numbers stay in the returned frame for the statistics that pool estimable rows; outputs use
    :func:`public_curves`.  ``ci_expected`` False (no bootstrap asked for) leaves a missing interval unjudged.
    """
    if df is None or not len(df):
        return df if df is not None else pd.DataFrame()
    out = df.copy()
    why = ["; ".join(reasons_for(r, rule, ci_expected)) for r in out.to_dict("records")]
    out["not_estimable"] = why
    out["estimable"] = [not w for w in why]
    return out


def public_curves(df: pd.DataFrame) -> pd.DataFrame:
    """The curve table as reports show it: the estimates of a not-estimable row blanked (NaN), its reason and
    trial count kept."""
    if df is None or not len(df) or "estimable" not in df.columns:
        return df
    out = df.copy()
    bad = ~out["estimable"].astype(bool)
    for c in ESTIMATE_COLUMNS:
        if c in out.columns:
            out[c] = out[c].astype(float)
            out.loc[bad, c] = np.nan
    return out


def not_estimable_text(row: dict) -> str:
    """What a report prints instead of a number: 'not estimable (reasons; N trials)'."""
    n, why = row.get("n_trials"), row.get("not_estimable") or "see notes"
    trials = f"; {int(n)} trials" if _finite(n) and f"{int(n)} trials, fewer" not in why else ""
    return f"not estimable ({why}{trials})"
