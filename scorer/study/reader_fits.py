"""Per-reader contrast-detail curves (one M-AFC fit per reader × group × diameter, bootstrap CI over the
reader's images) and the between-reader spread of their thresholds.

References
----------
.. [1] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
.. [2] Hesterberg, T. C. "What teachers should know about the bootstrap", The American Statistician 69 (2015).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from scorer.observer.bootstrap import expanded_percentile_ci, unit_counts
from scorer.observer.psychometric import fit_psychometric
from scorer.observer.psychometric_bootstrap import bootstrap_threshold
from scorer.study.alternatives import criterion_at, m_at


def reader_curves(
    df: pd.DataFrame,
    m: int,
    rng: np.random.Generator,
    n_boot: int = 1000,
    by: str = "detector",
    criterion_pc: float | None = None,
    ci: float = 0.95,
) -> pd.DataFrame:
    """Per reader × group × diameter: ML M-AFC fit, threshold, bootstrap CI over images
    (expanded percentile interval, Hesterberg, The American Statistician 69 (2015)).

    Images are resampled with replacement within the reader (all trials of an image —
    every target and every repeat — move together).  Columns: reader, <by>, diameter_mm,
    threshold_contrast, ci_low, ci_high, log10_se (bootstrap SD of log10 threshold),
    n_trials, n_images, pc_observed, k, converged, censored, offered_min, offered_max, note.
    ``censored`` is "above" ("below") when the fitted threshold lies above the highest (below the lowest)
    contrast this reader was shown at that diameter: the data then only bound it, and reports show it as
    "> highest" ("< lowest"); the fitted value is kept for the statistics that pool readers.
    """
    m_all = m
    rows = []
    for (reader, grp, diam), g in df.groupby(["reader", by, "diameter_mm"], sort=True):
        m, p = m_at(m_all, diam), criterion_at(m_all, diam, criterion_pc)
        u = unit_counts(g["contrast"].to_numpy(), g["correct"].to_numpy(), g["image"].to_numpy())
        fit = fit_psychometric(u.levels, u.y.sum(0), u.n.sum(0), m)
        note = fit.note
        t = fit.threshold(p)
        lo = hi = se = float("nan")
        if u.n_units >= 2 and n_boot > 0:
            res = bootstrap_threshold(u, n_boot, rng, m_alternatives=m, criterion_pc=p, ci=ci)
            # few images per reader: Hesterberg's expanded percentile interval (as for the scorer)
            lo, hi = expanded_percentile_ci(res.samples, u.n_units, ci)
            s = res.samples[np.isfinite(res.samples) & (res.samples > 0)]
            se = float(np.std(np.log10(s), ddof=1)) if s.size > 1 else float("nan")
            if res.note:
                note = "; ".join(x for x in (note, res.note) if x)
        else:
            note = "; ".join(x for x in (note, "one image only: no bootstrap CI") if x)
        rows.append(
            {
                "reader": reader,
                by: grp,
                "diameter_mm": float(diam),
                "threshold_contrast": t,
                "ci_low": lo,
                "ci_high": hi,
                "log10_se": se,
                "n_trials": int(len(g)),
                "n_images": int(u.n_units),
                "pc_observed": float(g["correct"].mean()),
                "k": fit.params["k"],
                "converged": bool(fit.converged),
                "censored": _censored(t, g["contrast"]),
                "offered_min": float(g["contrast"].min()),
                "offered_max": float(g["contrast"].max()),
                "note": note,
            }
        )
    return pd.DataFrame(rows)


def _censored(threshold: float, contrasts: pd.Series) -> str:
    """'above' / 'below' when a threshold lies outside the contrasts offered, else ''."""
    if threshold is None or not np.isfinite(threshold):
        return ""
    if threshold > float(contrasts.max()):
        return "above"
    if threshold < float(contrasts.min()):
        return "below"
    return ""


def between_reader_cv(curves: pd.DataFrame, by: str = "detector") -> pd.DataFrame:
    """Between-reader coefficient of variation of thresholds per group × diameter.

    ``cv_observed`` is SD/mean of the per-reader thresholds.  ``cv_between`` removes the
    within-reader sampling variance (mean squared bootstrap SE) from the variance of log
    thresholds (method of moments, floored at 0) and converts with CV = √(exp(s²) − 1)
    (log-normal).  Needs ≥ 2 converged readers.
    """
    rows = []
    ok = curves[curves["converged"]]
    for (grp, diam), g in ok.groupby([by, "diameter_mm"], sort=True):
        if len(g) < 2:
            continue
        t = g["threshold_contrast"].to_numpy()
        ln = np.log(t)
        var_obs = float(np.var(ln, ddof=1))
        se_ln = g["log10_se"].to_numpy() * np.log(10)
        within = float(np.nanmean(se_ln**2)) if np.isfinite(se_ln).any() else 0.0
        var_b = max(var_obs - within, 0.0)
        rows.append(
            {
                by: grp,
                "diameter_mm": float(diam),
                "n_readers": int(len(g)),
                "cv_observed": float(np.std(t, ddof=1) / np.mean(t)),
                "cv_between": float(np.sqrt(np.expm1(var_b))),
                "sd_log_observed": float(np.sqrt(var_obs)),
                "sd_log_within": float(np.sqrt(within)),
            }
        )
    return pd.DataFrame(rows)


def model_curves(
    model: pd.DataFrame, m: int, rng: np.random.Generator, n_boot: int, by: str, criterion_pc: float | None
) -> pd.DataFrame:
    """Model-observer thresholds (same fits and bootstrap as the readers)."""
    return reader_curves(model, m, rng, n_boot, by, criterion_pc)
