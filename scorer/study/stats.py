"""Reader-study statistics: per-reader and pooled contrast-detail curves, human/model factor,
detector comparison.

Input is the tidy trial table (one row per trial; columns in
:data:`scorer.study.reader_model.TRIAL_COLUMNS`, plus optional ``response_ms``, ``session``,
``repeat``).  Model-observer trials from ``limen score --out`` have the same shape with
``reader`` = the observer's name.

Methods (each documented where it is computed):

* per reader × group × diameter: ML fit of the linear-observer M-AFC psychometric function
  (:mod:`scorer.observer.psychometric`), threshold at the scorer's criterion, percentile bootstrap
  CI resampling images within the reader (Efron & Tibshirani 1993);
* pooled curve: a GEE with reader clusters (Liang & Zeger 1986; statsmodels GEE) whose
  mean is the M-AFC linear-observer function through a custom link — see :class:`MafcLink`;
* between-reader CV of thresholds, with the within-reader sampling variance removed;
* human/model factor: ratio of pooled human to model thresholds, CI by a bootstrap over
  readers and images (crossed); Bland & Altman (1986) agreement on log thresholds;
* group comparison (detector B vs A): linear mixed model on log10 per-reader thresholds
  with reader random intercepts (statsmodels MixedLM), Holm-adjusted p-values (Holm 1979).

References
----------
.. [1] Liang, K.-Y. & Zeger, S. L. "Longitudinal data analysis using generalized linear
       models", Biometrika 73 (1986).
.. [2] Mancl, L. A. & DeRouen, T. A. "A covariance estimator for GEE with improved
       small-sample properties", Biometrics 57 (2001).
.. [3] Bland, J. M. & Altman, D. G. Lancet (1986).
.. [4] Holm, S. "A simple sequentially rejective multiple test procedure",
       Scand. J. Statist. 6 (1979).
.. [5] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats as sps

from scorer.errors import LimenError
from scorer.observer.mafc import halfway_criterion
from scorer.resources import check_limit
from scorer.observer.bootstrap import bootstrap_weights, expanded_percentile_ci, percentile_ci, unit_counts
from scorer.observer.mafc_fast import _dprime_for, dpc_mafc_fast, dprime_for_pc_fast, fit_k_batch, pc_mafc_fast
from scorer.observer.psychometric import fit_psychometric
from scorer.observer.psychometric_bootstrap import bootstrap_threshold
from scorer.study.reader_model import TRIAL_COLUMNS

OPTIONAL_COLUMNS = ["response_ms", "session", "repeat", "n_alternatives"]


# =========================================================================== input
def load_trials(path) -> pd.DataFrame:
    """Read a trial table (CSV) and validate it (see :func:`validate_trials`)."""
    path = Path(path)
    if not path.is_file():
        raise LimenError("file not found", path)
    try:
        df = pd.read_csv(path, dtype={"reader": str, "detector": str, "image": str, "target": str})
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
    for c in ("reader", "detector", "image", "target"):
        out[c] = out[c].astype(str)
    for c in ("contrast", "diameter_mm"):
        num = pd.to_numeric(out[c], errors="coerce")
        bad = num.isna().to_numpy()
        if bad.any():
            raise LimenError(
                f"{_row_label(out, bad)}: {c} {out[c].iloc[np.flatnonzero(bad)[0]]!r} is not a number", source
            )
        bad = ~np.isfinite(num.to_numpy()) | (num.to_numpy() <= 0)
        if bad.any():
            what = "negative" if num.iloc[np.flatnonzero(bad)[0]] < 0 else "not a positive number"
            raise LimenError(
                f"{_row_label(out, bad)}: {c} {num.iloc[np.flatnonzero(bad)[0]]:g} is {what} "
                f"({c} must be a positive fraction{'' if c == 'contrast' else ' in mm'})",
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
            f"{_row_label(out, bad)}: correct must be 0 or 1, got {raw.iloc[np.flatnonzero(bad)[0]]!r}", source
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
    key = ["reader", "detector", "image", "target"] + [c for c in ("session", "repeat") if c in out.columns]
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


def m_alternatives_of(df: pd.DataFrame, source="responses") -> int | dict[float, int]:
    """Number of alternatives M, one for the study or one per diameter (a plate may use different cells
    for different diameters): the ``n_alternatives`` column if present (one value per diameter),
    otherwise the number of distinct site labels in chosen_site ∪ true_site at each diameter."""
    per: dict[float, int] = {}
    for diam, g in df.groupby("diameter_mm", sort=True):
        if "n_alternatives" in df.columns:
            vals = pd.unique(g["n_alternatives"])
            if len(vals) != 1:
                raise LimenError(
                    f"n_alternatives must be the same on every row of one diameter (found "
                    f"{', '.join(str(int(v)) for v in sorted(vals))} at {float(diam):g} mm)",
                    source,
                )
            m = int(vals[0])
        else:
            m = len(set(g["chosen_site"]).union(set(g["true_site"])))
        if m < 2:
            raise LimenError(
                f"only {m} candidate site seen at {float(diam):g} mm; M-AFC needs at least 2 (add an "
                "n_alternatives column)",
                source,
            )
        per[float(diam)] = m
    ms = set(per.values())
    return ms.pop() if len(ms) == 1 else per


def m_at(m: int | dict[float, int], diameter_mm: float) -> int:
    """M at one diameter, from a study-wide M or a per-diameter mapping."""
    if isinstance(m, dict):
        for d, v in m.items():
            if np.isclose(float(d), float(diameter_mm)):
                return int(v)
        raise LimenError(f"no number of alternatives known for {float(diameter_mm):g} mm")
    return int(m)


def criterion_at(m: int | dict[float, int], diameter_mm: float, criterion_pc: float | None) -> float:
    """Proportion correct at threshold: the given criterion, or halfway between chance and 1 for that M."""
    return halfway_criterion(m_at(m, diameter_mm)) if criterion_pc is None else float(criterion_pc)


# =========================================================================== per-reader curves
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


# =========================================================================== pooled curve (GEE)
def _mafc_link_class():
    from statsmodels.genmod.families import links

    class MafcLink(links.Link):
        """Link g(μ) = log d′_M(μ): the inverse of μ = Pc_M(exp η), the M-AFC proportion correct.

        With η = log k + log C (log contrast entering as an offset with coefficient 1),
        the mean is Pc_M(k·C): the linear-observer psychometric function, whose floor at
        d′ = 0 is the guess rate 1/M.  This is how the guess rate enters the pooled model.
        """

        def __init__(self, m: int):
            self.m = int(m)

        def _clip_p(self, p):
            return np.clip(p, 1.0 / self.m + 1e-9, 1.0 - 1e-9)

        def __call__(self, p):
            return np.log(np.maximum(dprime_for_pc_fast(self._clip_p(p), self.m), 1e-6))

        def inverse(self, z):
            return np.clip(
                pc_mafc_fast(np.exp(np.clip(z, -30, np.log(12.0))), self.m), 1.0 / self.m + 1e-12, 1.0 - 1e-12
            )

        def inverse_deriv(self, z):
            d = np.exp(np.clip(z, -30, np.log(12.0)))
            return np.maximum(dpc_mafc_fast(d, self.m) * d, 1e-12)

        def deriv(self, p):
            return 1.0 / self.inverse_deriv(self(p))

        def deriv2(self, p):
            h = 1e-5
            return (self.deriv(self._clip_p(p + h)) - self.deriv(self._clip_p(p - h))) / (2 * h)

        def inverse_deriv2(self, z):
            h = 1e-5
            return (self.inverse_deriv(z + h) - self.inverse_deriv(z - h)) / (2 * h)

    return MafcLink


def fit_pooled_gee(g: pd.DataFrame, m: int):
    """GEE fit of Pc = Pc_M(k·C) to one group × diameter with reader clusters; returns the results object.

    Working correlation: independence (so the point estimate equals the pooled binomial ML
    fit); standard errors: cluster-robust with the Mancl–DeRouen small-sample bias
    correction (``cov_type="bias_reduced"``), clusters = readers.
    """
    import statsmodels.api as sm

    u = unit_counts(g["contrast"].to_numpy(), g["correct"].to_numpy(), g["reader"].to_numpy())
    k0, _ = fit_k_batch(u.levels, u.y.sum(0)[None], u.n.sum(0)[None], m)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels warns that a custom link is not one of its own
        family = sm.families.Binomial(link=_mafc_link_class()(m), check_link=False)
        model = sm.GEE(
            g["correct"].to_numpy(float),
            np.ones((len(g), 1)),
            groups=g["reader"].to_numpy(),
            offset=np.log(g["contrast"].to_numpy(float)),
            family=family,
            cov_struct=sm.cov_struct.Independence(),
        )
        res = model.fit(start_params=np.log(k0), cov_type="bias_reduced", maxiter=100)
    return res


@dataclass
class PooledFit:
    """Pooled M-AFC fit with reader clusters: log k and its standard errors.

    se_robust / se_bias_reduced: one-way cluster-robust by reader (the latter with the
    Mancl–DeRouen correction; statsmodels GEE's "robust" and "bias_reduced").
    se_two_way: readers and images as crossed clusters (Cameron, Gelbach & Miller 2011),
    the reader part bias-reduced; NaN when no image axis was given.
    """

    log_k: float
    se_robust: float
    se_bias_reduced: float
    se_two_way: float
    at_bound: bool
    n_clusters: int
    n_images: int = 0


def pooled_mafc_gee(levels, y, n, m: int) -> PooledFit:
    """The GEE of :func:`fit_pooled_gee` in closed form, on counts (fast).

    One parameter θ = log k, mean μ_l = Pc_M(k·C_l), variance μ(1 − μ), independence
    working correlation.  With D_l = dμ_l/dθ, the estimating equation Σ_i U_i = 0 with
    U_i = Σ_l D_l (y_il − n_il μ_l)/V_l is the binomial score, so θ̂ is the pooled ML
    estimate.  Bread A = Σ_il n_il D_l²/V_l; robust variance Σ_i U_i² / A² (Liang & Zeger
    1986); Mancl & DeRouen (2001) bias-reduced: U_i replaced by U_i / (1 − h_i) with
    h_i = Σ_l n_il D_l²/V_l / A (the leverage of cluster i; exact here because the
    one-parameter hat matrix has rank one).  Checked against statsmodels GEE in the tests.

    Every reader reads the same images, so the image's noise is shared by all readers:
    trials are correlated within images as well as within readers (crossed).  Given an
    image axis, the two-way cluster-robust variance (Cameron, Gelbach & Miller, J. Bus.
    Econ. Stat. 29, 2011) V = V_reader + V_image − V_reader×image is also returned; it is
    the one the pooled CI uses.

    y, n : (R, L) counts per reader and contrast level, or (R, I, L) per reader, image, level.
    """
    levels = np.asarray(levels, float)
    y, n = np.asarray(y, float), np.asarray(n, float)
    two_way = y.ndim == 3
    y_r, n_r = (y.sum(1), n.sum(1)) if two_way else (y, n)
    k, at_b = fit_k_batch(levels, y_r.sum(0)[None], n_r.sum(0)[None], m)
    d = k[0] * levels
    mu = np.clip(pc_mafc_fast(d, m), 1e-12, 1 - 1e-12)
    dmu = dpc_mafc_fast(d, m) * d
    v = mu * (1 - mu)
    w_info, w_score = dmu**2 / v, dmu / v
    nan = float("nan")
    info_r = n_r @ w_info
    a = float(info_r.sum())
    if a <= 0 or not np.isfinite(a):
        return PooledFit(float(np.log(k[0])), nan, nan, nan, True, int(y.shape[0]), int(y.shape[1]) if two_way else 0)

    def one_way(yy, nn):
        info = nn @ w_info
        u = (yy - nn * mu) @ w_score
        h = info / a
        s_r = float(np.sum(u**2))
        s_bc = float(np.sum((u / (1 - h)) ** 2)) if np.all(h < 1) else nan
        return s_r, s_bc

    s_r, s_bc = one_way(y_r, n_r)
    se_tw = nan
    if two_way:
        s_img, _ = one_way(y.sum(0), n.sum(0))  # many images: no small-sample correction needed
        u_cell = (y - n * mu) @ w_score
        total = s_bc + s_img - float(np.sum(u_cell**2))
        if total <= 0:  # can happen in tiny samples; fall back to readers only
            total = s_bc
        se_tw = float(np.sqrt(total) / a)
    return PooledFit(
        float(np.log(k[0])),
        float(np.sqrt(s_r) / a),
        float(np.sqrt(s_bc) / a),
        se_tw,
        bool(at_b[0]),
        int(y.shape[0]),
        int(y.shape[1]) if two_way else 0,
    )


def pooled_curves(
    df: pd.DataFrame, m: int, by: str = "detector", criterion_pc: float | None = None, ci: float = 0.95
) -> tuple[pd.DataFrame, list[str]]:
    """Population threshold per group × diameter from a GEE with reader clusters.

    The threshold is ``d′_T / k`` with d′_T = d′_M(criterion); its CI is
    ``exp(log C_T ± t · SE(log k))`` with the two-way (reader × image) cluster-robust SE,
    the reader part bias-reduced, and a t quantile with R − 1 degrees of freedom (R readers).  Needs ≥ 3 readers;
    smaller
    studies get a note instead of a row.
    """
    m_all = m
    rows, notes = [], []
    for (grp, diam), g in df.groupby([by, "diameter_mm"], sort=True):
        m, p = m_at(m_all, diam), criterion_at(m_all, diam, criterion_pc)
        d_t = _dprime_for(p, m)
        n_r = g["reader"].nunique()
        if n_r < 3:
            notes.append(f"pooled curve not estimated for {by} {grp}, {diam:g} mm: {n_r} reader(s), need at least 3")
            continue
        levels = np.unique(g["contrast"].to_numpy())
        readers, images = np.unique(g["reader"]), np.unique(g["image"])
        yc, nc = _counts_cube(g, readers, images, levels)
        fit = pooled_mafc_gee(levels, yc, nc, m)
        logk, se = fit.log_k, fit.se_two_way
        n_img = len(images)
        conv = not fit.at_bound
        note = ""
        if not np.isfinite(se) or se <= 0:
            note = "standard error not estimable"
        if fit.at_bound:
            note = "no interior maximum (all correct or at chance): threshold is only a bound"
        dof = max(n_r - 1, 1)
        tq = sps.t.ppf(0.5 + ci / 2, dof)
        t_hat = d_t / np.exp(logk)
        rows.append(
            {
                "reader": "pooled",
                by: grp,
                "diameter_mm": float(diam),
                "threshold_contrast": float(t_hat),
                "ci_low": float(t_hat * np.exp(-tq * se)) if np.isfinite(se) else float("nan"),
                "ci_high": float(t_hat * np.exp(tq * se)) if np.isfinite(se) else float("nan"),
                "log10_se": float(se / np.log(10)),
                "n_trials": int(len(g)),
                "n_readers": int(n_r),
                "n_images": int(n_img),
                "method": "GEE, M-AFC link, reader × image clusters",
                "converged": conv,
                "note": note,
            }
        )
    return pd.DataFrame(rows), notes


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


# =========================================================================== human vs model
def _counts_cube(g: pd.DataFrame, readers, images, levels) -> tuple[np.ndarray, np.ndarray]:
    ri = pd.Index(readers).get_indexer(g["reader"])
    ii = pd.Index(images).get_indexer(g["image"])
    li = np.searchsorted(levels, g["contrast"].to_numpy())
    shape = (len(readers), len(images), len(levels))
    flat = np.ravel_multi_index((ri, ii, li), shape)
    size = int(np.prod(shape))
    y = np.bincount(flat, g["correct"].to_numpy(float), size).reshape(shape)
    n = np.bincount(flat, None, size).reshape(shape)
    return y, n


def human_model_factor(
    human: pd.DataFrame,
    model: pd.DataFrame,
    m: int,
    rng: np.random.Generator,
    n_boot: int = 1000,
    by: str = "detector",
    criterion_pc: float | None = None,
    ci: float = 0.95,
    reader_curves_df: pd.DataFrame | None = None,
) -> dict:
    """Human/model threshold factor per group × diameter and overall, with bootstrap CIs.

    Human threshold: pooled ML fit (the GEE point estimate under independence) over all
    readers.  Model threshold: ML fit of the model observer's trials.  Bootstrap: readers
    with replacement and images with replacement (crossed; the same image draw applies to
    the model when it read the same images), refitting both in each resample.  Overall
    factor: geometric mean over groups × diameters, bootstrapped jointly.

    Also returns the Bland–Altman summary on log10 thresholds (each reader's threshold vs
    the model's, Bland & Altman 1986) and the human-equivalent model curve (model
    threshold × factor).
    """
    m_all = m
    observers = sorted(model["reader"].unique())
    out_all = []
    for obs in observers:
        mo = model[model["reader"] == obs]
        per, samples, notes = [], [], []
        for (grp, diam), gh in human.groupby([by, "diameter_mm"], sort=True):
            m, p = m_at(m_all, diam), criterion_at(m_all, diam, criterion_pc)
            d_t = _dprime_for(p, m)
            gm = mo[(mo[by] == grp) & np.isclose(mo["diameter_mm"], diam)]
            if gm.empty:
                notes.append(f"no {obs} trials for {by} {grp}, {diam:g} mm")
                continue
            levels = np.union1d(np.unique(gh["contrast"]), np.unique(gm["contrast"]))
            readers = np.unique(gh["reader"])
            shared = np.intersect1d(np.unique(gh["image"]), np.unique(gm["image"]))
            images_h = np.unique(gh["image"])
            yh, nh = _counts_cube(gh, readers, images_h, levels)
            gm2 = gm.assign(reader="_model")
            images_m = np.unique(gm["image"])
            ym, nm = _counts_cube(gm2, ["_model"], images_m, levels)
            ym, nm = ym[0], nm[0]
            kh, bh = fit_k_batch(levels, yh.sum((0, 1))[None], nh.sum((0, 1))[None], m)
            km, bm = fit_k_batch(levels, ym.sum(0)[None], nm.sum(0)[None], m)
            t_h, t_m = d_t / kh[0], d_t / km[0]
            # crossed bootstrap: reader weights × image weights
            wr = bootstrap_weights(len(readers), n_boot, rng)
            wi_h = bootstrap_weights(len(images_h), n_boot, rng)
            if len(shared) == len(images_m) and len(shared) > 0:
                # the model read the same images: reuse the human image draw for them
                idx = pd.Index(images_h).get_indexer(images_m)
                wi_m = wi_h[:, idx]
            else:
                wi_m = bootstrap_weights(len(images_m), n_boot, rng)
            yb = np.einsum("br,bi,ril->bl", wr, wi_h, yh, optimize=True)
            nb = np.einsum("br,bi,ril->bl", wr, wi_h, nh, optimize=True)
            kb_h, _ = fit_k_batch(levels, yb, nb, m, center=kh[0])
            kb_m, _ = fit_k_batch(levels, wi_m @ ym, wi_m @ nm, m, center=km[0])
            fb = kb_m / kb_h  # (d_t/kh)/(d_t/km)
            lo, hi = percentile_ci(fb, ci)
            note = ""
            if bh[0] or bm[0]:
                note = "a threshold is at a search bound (all correct or chance): the factor is only a bound"
            per.append(
                {
                    by: grp,
                    "diameter_mm": float(diam),
                    "human_threshold": float(t_h),
                    "model_threshold": float(t_m),
                    "factor": float(t_h / t_m),
                    "ci_low": lo,
                    "ci_high": hi,
                    "human_equivalent_threshold": float(t_m * (t_h / t_m)),
                    "n_readers": int(len(readers)),
                    "n_images": int(len(images_h)),
                    "note": note,
                }
            )
            samples.append(np.log(fb))
        if not per:
            out_all.append(
                {
                    "observer": obs,
                    "factor": None,
                    "ci_low": None,
                    "ci_high": None,
                    "per_diameter": [],
                    "bland_altman": None,
                    "note": "; ".join(notes) or "no matching model trials",
                }
            )
            continue
        est = float(np.exp(np.mean([np.log(r["factor"]) for r in per])))
        overall = np.exp(np.mean(np.stack(samples), axis=0))
        lo, hi = percentile_ci(overall, ci)
        # human-equivalent model curve: model threshold × overall factor (and its CI)
        for r in per:
            r["human_equivalent_threshold"] = r["model_threshold"] * est
            r["human_equivalent_ci_low"] = r["model_threshold"] * lo
            r["human_equivalent_ci_high"] = r["model_threshold"] * hi
        ba = None
        if reader_curves_df is not None and len(reader_curves_df):
            ba = bland_altman_log(reader_curves_df, pd.DataFrame(per), by)
        out_all.append(
            {
                "observer": obs,
                "factor": est,
                "ci_low": lo,
                "ci_high": hi,
                "per_diameter": per,
                "bland_altman": ba,
                "note": "; ".join(notes),
            }
        )
    first = dict(out_all[0]) if out_all else None
    if first is not None:
        first["by_observer"] = out_all
    return first


def bland_altman_log(reader_df: pd.DataFrame, per: pd.DataFrame, by: str) -> dict | None:
    """Bland–Altman (1986) agreement of log10 human (per reader) and model thresholds.

    Differences d = log10 T_reader − log10 T_model; bias = mean d (so 10^bias is the
    geometric-mean factor); limits of agreement = bias ± 1.96·SD(d).
    """
    ok = reader_df[reader_df["converged"]]
    merged = ok.merge(per[[by, "diameter_mm", "model_threshold"]], on=[by, "diameter_mm"])
    if len(merged) < 2:
        return None
    lh, lm = np.log10(merged["threshold_contrast"].to_numpy()), np.log10(merged["model_threshold"].to_numpy())
    d = lh - lm
    bias, sd = float(np.mean(d)), float(np.std(d, ddof=1))
    return {
        "n_pairs": int(len(d)),
        "bias_log10": bias,
        "sd_log10": sd,
        "loa_low_log10": bias - 1.96 * sd,
        "loa_high_log10": bias + 1.96 * sd,
        "factor_from_bias": float(10**bias),
        "points": [
            {"reader": r, by: gv, "diameter_mm": float(dm), "mean_log10": float(a), "diff_log10": float(b)}
            for r, gv, dm, a, b in zip(merged["reader"], merged[by], merged["diameter_mm"], (lh + lm) / 2, d)
        ],
    }


# =========================================================================== group comparison
def _pct_phrase(ratio: float) -> str:
    pct = (ratio - 1.0) * 100.0
    return f"{abs(pct):.0f} % {'higher' if pct >= 0 else 'lower'}"


def _image_sampling_se(
    trials: pd.DataFrame, by: str, ref, lev, diam: float, readers, m: int, n_boot: int, rng: np.random.Generator
) -> float:
    """Shared image-sampling SD (log10) of the mean-over-readers log threshold ratio.

    Every reader reads the same images of a group, so the images' noise is common to all
    readers and does not show in the between-reader residual of the mixed model.  Readers
    are held fixed; images are drawn with replacement within each group (Efron &
    Tibshirani 1993); each reader's threshold is refitted in every resample (vectorised).
    The shared part is the between-reader covariance of the per-reader log ratios over
    resamples: Σ_{r≠r′} Cov(Δ_r, Δ_r′) / R² (the diagonal is in the mixed model already).
    """
    means = []
    m = m_at(m, diam)
    for grp in (ref, lev):
        g = trials[(trials[by] == grp) & np.isclose(trials["diameter_mm"], diam) & trials["reader"].isin(readers)]
        levels, images = np.unique(g["contrast"].to_numpy()), np.unique(g["image"])
        y, n = _counts_cube(g, list(readers), images, levels)
        w = bootstrap_weights(len(images), n_boot, rng)
        yb = np.einsum("bi,ril->brl", w, y, optimize=True).reshape(-1, len(levels))
        nb = np.einsum("bi,ril->brl", w, n, optimize=True).reshape(-1, len(levels))
        k0, _ = fit_k_batch(levels, y.sum((0, 1))[None], n.sum((0, 1))[None], m)
        k, _ = fit_k_batch(levels, yb, nb, m, center=k0[0])
        means.append(-np.log10(k).reshape(n_boot, len(readers)))
    diff = means[1] - means[0]  # (B, R) per-reader log10 ratio in each resample
    r = diff.shape[1]
    if r < 2:
        return float(np.std(diff[:, 0], ddof=1))
    cov = np.cov(diff, rowvar=False)
    # only the covariance between readers is the shared image part; each reader's own
    # variance (diagonal) is already in the mixed model's residual
    shared = (cov.sum() - np.trace(cov)) / r**2
    return float(np.sqrt(max(shared, 0.0)))


def compare_groups(
    curves: pd.DataFrame,
    by: str = "detector",
    reference: str | None = None,
    ci: float = 0.95,
    trials: pd.DataFrame | None = None,
    m: int | None = None,
    n_boot: int = 0,
    rng: np.random.Generator | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Ratio of thresholds (level / reference) per diameter from a linear mixed model.

    Model per diameter: log10 T_{r,g} = β₀ + β_g + u_r + ε, u_r ~ N(0, τ²) (reader random
    intercept; statsmodels MixedLM, REML), on converged per-reader thresholds.  Images
    are not identifiable in per-reader thresholds (each pools all of a reader's images),
    and when all readers read the same images their noise is shared, which the residual
    ε cannot show; so with ``trials`` and ``n_boot`` > 0 the image-sampling variance of
    β_g is estimated by resampling images within each group (:func:`_image_sampling_se`)
    and added: SE² = SE²_MixedLM + SE²_images.  Ratio = 10^β_g; CI = 10^(β_g ± t_{R−1}·SE)
    with R the number of readers who read both levels; p from the same t; Holm-adjusted
    over diameters (statsmodels.stats.multitest.multipletests) for each level.
    """
    import statsmodels.formula.api as smf
    from statsmodels.stats.multitest import multipletests

    notes = []
    levels = sorted(curves[by].unique(), key=str) if len(curves) else []
    if len(levels) < 2:
        return pd.DataFrame(), [f"only one {by} in the data: no {by} comparison"]
    ref = reference if reference is not None else levels[0]
    if ref not in levels:
        raise LimenError(f"reference {by} {ref!r} not in the data (found {', '.join(map(str, levels))})")
    rows = []
    ok = curves[curves["converged"]].copy()
    dropped = int((~curves["converged"]).sum())
    if dropped:
        notes.append(f"{dropped} per-reader threshold(s) at a search bound left out of the {by} comparison")
    for lev in [x for x in levels if x != ref]:
        for diam in sorted(curves["diameter_mm"].unique()):
            g = ok[np.isclose(ok["diameter_mm"], diam) & ok[by].isin([ref, lev])].copy()
            both = g.groupby("reader")[by].nunique()
            paired = both[both == 2].index
            g = g[g["reader"].isin(paired)]
            n_r = len(paired)
            if n_r < 2:
                notes.append(
                    f"{lev} vs {ref} at {diam:g} mm: {n_r} reader(s) have an estimated threshold (not a "
                    "bound) on both, need at least 2"
                )
                continue
            g["log_t"] = np.log10(g["threshold_contrast"])
            g["grp"] = np.where(g[by] == lev, 1.0, 0.0)
            method = "MixedLM (reader random intercept)"
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    res = smf.mixedlm("log_t ~ grp", g, groups=g["reader"]).fit(reml=True)
                    beta, se = float(res.fe_params["grp"]), float(res.bse_fe["grp"])
                    if not np.isfinite(se) or se <= 0:
                        raise ValueError("singular")
                except (ValueError, np.linalg.LinAlgError):
                    # paired differences (equivalent model when the reader variance is not estimable)
                    piv = g.pivot(index="reader", columns="grp", values="log_t")
                    dlt = (piv[1.0] - piv[0.0]).to_numpy()
                    beta = float(dlt.mean())
                    se = float(dlt.std(ddof=1) / np.sqrt(dlt.size)) if dlt.size > 1 else float("nan")
                    method = "paired differences (mixed model not estimable)"
            se_mixed = se
            se_img = float("nan")
            if trials is not None and n_boot > 1 and m is not None:
                se_img = _image_sampling_se(
                    trials,
                    by,
                    ref,
                    lev,
                    float(diam),
                    sorted(paired),
                    m,
                    n_boot,
                    rng if rng is not None else np.random.default_rng(0),
                )
                se = float(np.sqrt(se_mixed**2 + se_img**2))
            dfree = n_r - 1
            tq = sps.t.ppf(0.5 + ci / 2, dfree)
            pval = float(2 * sps.t.sf(abs(beta / se), dfree)) if se > 0 else float("nan")
            rows.append(
                {
                    "level": lev,
                    "reference": ref,
                    "diameter_mm": float(diam),
                    "ratio": float(10**beta),
                    "ci_low": float(10 ** (beta - tq * se)),
                    "ci_high": float(10 ** (beta + tq * se)),
                    "log10_ratio": beta,
                    "se_log10": se,
                    "se_log10_mixedlm": se_mixed,
                    "se_log10_images": se_img,
                    "p_value": pval,
                    "n_readers": int(n_r),
                    "method": method,
                }
            )
    table = pd.DataFrame(rows)
    if table.empty:
        return table, notes
    table["p_adjusted"] = np.nan
    for idx in table.groupby("level").groups.values():
        pv = table.loc[idx, "p_value"].to_numpy()
        fin = np.isfinite(pv)
        adj = np.full(pv.shape, np.nan)
        if fin.any():
            adj[fin] = multipletests(pv[fin], method="holm")[1]
        table.loc[idx, "p_adjusted"] = adj
    table["sentence"] = [comparison_sentence(r, by, ci) for r in table.to_dict("records")]
    return table, notes


def comparison_sentence(r: dict, by: str = "detector", ci: float = 0.95) -> str:
    """One plain sentence, e.g. "At 0.1 mm the indirect detector's threshold is 28 % higher than the
    direct detector's (95 % CI 12 % to 46 % higher; Holm-adjusted p = 0.002)."."""
    lo, hi = r["ci_low"], r["ci_high"]

    def bound(x):
        return _pct_phrase(x)

    verdict = ""
    if lo <= 1.0 <= hi:
        verdict = " — no clear difference"
    p = r.get("p_adjusted", float("nan"))
    ptxt = f"; Holm-adjusted p = {p:.2g}" if np.isfinite(p) else ""
    return (
        f"At {r['diameter_mm']:g} mm the {r['level']} {by}'s threshold is {_pct_phrase(r['ratio'])} than the "
        f"{r['reference']} {by}'s ({ci * 100:.0f} % CI {bound(lo)} to {bound(hi)}{ptxt}){verdict}."
    )


# =========================================================================== everything
@dataclass
class Analysis:
    """All results of :func:`analyse_study` (tables as DataFrames, the rest as plain dicts)."""

    by: str
    m_alternatives: int | dict[float, int]  # one M for the study, or one per diameter
    criterion_pc: float | dict[float, float]
    readers: list
    reader_curves: pd.DataFrame
    pooled_curves: pd.DataFrame
    model_curves: pd.DataFrame
    cv: pd.DataFrame
    comparison: pd.DataFrame
    human_model: dict | None
    agreement: dict
    notes: list = field(default_factory=list)
    seed: int | None = None
    n_boot: int = 0

    def curves_records(self) -> list[dict]:
        cols = ["reader", self.by, "diameter_mm", "threshold_contrast", "ci_low", "ci_high"]
        out = []
        for df in (self.reader_curves, self.pooled_curves, self.model_curves):
            if len(df):
                extra = [
                    c for c in ("n_trials", "n_images", "n_readers", "converged", "censored", "note") if c in df.columns
                ]
                out.extend(df[cols + extra].to_dict("records"))
        return out

    def to_json(self) -> dict:
        comp = []
        if len(self.comparison):
            for r in self.comparison.to_dict("records"):
                comp.append(
                    {
                        self.by if self.by != "detector" else "detector": r["level"],
                        "reference": r["reference"],
                        "diameter_mm": r["diameter_mm"],
                        "ratio": r["ratio"],
                        "ci_low": r["ci_low"],
                        "ci_high": r["ci_high"],
                        "p_value": r["p_value"],
                        "p_adjusted": r["p_adjusted"],
                        "n_readers": r["n_readers"],
                        "method": r["method"],
                        "sentence": r["sentence"],
                    }
                )

        def keyed(v):
            return {f"{k:g}": x for k, x in v.items()} if isinstance(v, dict) else v

        return {
            "by": self.by,
            "m_alternatives": keyed(self.m_alternatives),
            "criterion_pc": keyed(self.criterion_pc),
            "readers": self.readers,
            "curves": self.curves_records(),
            "between_reader_cv": self.cv.to_dict("records") if len(self.cv) else [],
            "detector_comparison": comp,
            "human_model_factor": self.human_model,
            "agreement": self.agreement,
            "notes": self.notes,
            "seed": self.seed,
            "n_boot": self.n_boot,
        }


def model_curves(
    model: pd.DataFrame, m: int, rng: np.random.Generator, n_boot: int, by: str, criterion_pc: float | None
) -> pd.DataFrame:
    """Model-observer thresholds (same fits and bootstrap as the readers)."""
    return reader_curves(model, m, rng, n_boot, by, criterion_pc)


def bootstrap_block(trials: pd.DataFrame, model: pd.DataFrame | None, by: str) -> tuple[int, str]:
    """The most bootstrap cells one resample holds at once in :func:`analyse_study`, and where.

    A cell is one number per resample that stays in memory while a group × diameter is refitted.  Per group ×
    diameter every resample holds its draw counts, one per image (:func:`bootstrap_weights`: each reader's
    images, the human/model factor's image draw, the model's) and one per reader (the factor's crossed reader
    draw), and its resampled counts per reader × contrast level (the image-sampling variance of a comparison
    between groups refits every reader's curve in each resample at once).  With a model-observer table the
    human/model factor also keeps one estimate per group × diameter for every resample until it forms the
    overall factor.  The block is the largest images + readers + readers × levels over the group × diameter
    pairs, plus those stored estimates.  Each cell costs about 20 bytes measured with tracemalloc (correct and
    trial counts, and their floating-point copies for the fit; tests/test_stats.py).

    The likelihood grid of the fits is not counted: :func:`~scorer.observer.psychometric.fit_k_batch` evaluates
    it in chunks of at most :data:`~scorer.observer.psychometric.GRID_CHUNK_CELLS` cells (about 30 MB)
    whatever the number of resamples.
    """
    best, where = 0, ""
    pairs = trials.groupby([by, "diameter_mm"], sort=True)
    for (grp, diam), g in pairs:
        levels = set(g["contrast"].unique())
        images = g["image"].nunique()
        if model is not None:
            gm = model[(model[by] == grp) & np.isclose(model["diameter_mm"], diam)]
            levels |= set(gm["contrast"].unique())
            images = max(images, gm["image"].nunique())
        n_readers = g["reader"].nunique()
        size = images + n_readers + n_readers * len(levels)
        if size > best:
            best = int(size)
            where = (
                f"draws of {images} images and {n_readers} readers, counts of {n_readers} readers × "
                f"{len(levels)} contrast levels, {by} {grp} at {float(diam):g} mm"
            )
    if model is not None and pairs.ngroups:
        best += int(pairs.ngroups)
        where += f"; {pairs.ngroups} human/model factor estimates ({by} × diameter)"
    return best, where


def analyse_study(
    trials: pd.DataFrame,
    model: pd.DataFrame | None = None,
    *,
    by: str = "detector",
    n_boot: int = 1000,
    seed: int | None = 0,
    criterion_pc: float | None = None,
    reference: str | None = None,
    ci: float = 0.95,
    progress=None,
) -> Analysis:
    """Run every analysis of a reader study; degrade with notes when the study is too small.

    ``trials`` and ``model`` must already be validated (:func:`validate_trials`).
    ``progress`` is an optional callable(str) told which step runs.
    """
    from scorer.study.agreement import agreement_summary

    if by not in trials.columns:
        raise LimenError(f"--by column {by!r} is not in the trial table")
    if model is not None and by not in model.columns:
        raise LimenError(f"--by column {by!r} is not in the model-observer table")
    say = progress or (lambda s: None)
    if n_boot > 0:
        # the draws and resampled counts are allocated per group × diameter inside the fits (the likelihood grid
        # in chunks of bounded size); refuse before any of them
        block, where = bootstrap_block(trials, model, by)
        check_limit(
            "LIMEN_MAX_BOOTSTRAP_CELLS",
            n_boot * block,
            f"--n-boot {n_boot} resamples × {block} cells each ({where}) = {n_boot * block} cells held at once",
            "--n-boot",
        )
    rng = np.random.default_rng(seed)
    m = m_alternatives_of(trials)
    if model is not None:
        m_model = m_alternatives_of(model, "model responses")
        for d in sorted(set(trials["diameter_mm"]) & set(model["diameter_mm"])):
            if m_at(m_model, d) != m_at(m, d):
                raise LimenError(
                    f"model-observer table has {m_at(m_model, d)} alternatives per target at {d:g} mm "
                    f"but the readers' has {m_at(m, d)}",
                    "--model",
                )
    if isinstance(m, dict):
        p = {d: criterion_at(m, d, criterion_pc) for d in m}
    else:
        p = halfway_criterion(m) if criterion_pc is None else float(criterion_pc)
    if criterion_pc is not None:
        for d in sorted(set(trials["diameter_mm"])):
            md = m_at(m, d)
            if not 1.0 / md < criterion_pc < 1.0:
                raise LimenError(
                    f"{criterion_pc:g} must lie between chance (1/{md} for {md}-AFC at {d:g} mm) and 1", "--criterion"
                )
    notes = []
    if "source" in trials.columns and trials["source"].astype(str).str.contains("simulated").any():
        notes.append(
            "Simulated readers: these trials come from Limen's documented observer model "
            "(scorer/study/reader_model.py), not from people; the figures illustrate the method only."
        )
    say("per-reader fits")
    rc = reader_curves(trials, m, rng, n_boot, by, criterion_pc, ci)
    n_bad = int((~rc["converged"]).sum())
    if n_bad:
        notes.append(
            f"{n_bad} per-reader threshold(s) have no interior maximum (all correct or at chance); "
            "they are bounds, not estimates"
        )
    say("pooled curves")
    pc_df, pn = pooled_curves(trials, m, by, criterion_pc, ci)
    notes += pn
    cv = between_reader_cv(rc, by)
    if cv.empty:
        n_r = trials["reader"].nunique()
        notes.append(
            "between-reader CV needs at least 2 readers"
            if n_r < 2
            else f"between-reader CV needs at least 2 of the {n_r} readers with an estimated threshold (not a "
            "bound) at one diameter"
        )
    say(f"{by} comparison")
    comp, cn = compare_groups(rc, by, reference, ci, trials=trials, m=m, n_boot=n_boot, rng=rng)
    if len(comp) and n_boot < 2:
        notes.append(
            f"{by} comparison without the image-sampling variance (needs bootstrap resamples): "
            "its CIs are too narrow when all readers read the same images"
        )
    notes += cn
    mc = pd.DataFrame()
    hm = None
    if model is not None:
        say("model observer")
        mc = model_curves(model, m, rng, n_boot, by, criterion_pc)
        say("human/model factor")
        hm = human_model_factor(trials, model, m, rng, n_boot, by, criterion_pc, ci, rc)
    say("agreement")
    agr = agreement_summary(trials, by)
    notes += agr.get("notes", [])
    return Analysis(
        by=by,
        m_alternatives=m,
        criterion_pc=p,
        readers=sorted(trials["reader"].unique().tolist()),
        reader_curves=rc,
        pooled_curves=pc_df,
        model_curves=mc,
        cv=cv,
        comparison=comp,
        human_model=hm,
        agreement=agr,
        notes=notes,
        seed=seed,
        n_boot=n_boot,
    )
