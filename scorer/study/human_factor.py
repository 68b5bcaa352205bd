"""Human/model factor: the ratio of pooled human to model-observer thresholds, per threshold method, with a
crossed bootstrap over readers and images, a test of its dependence on diameter, and Bland–Altman agreement
on log thresholds.

*Like for like.*  ``limen score`` computes a model threshold by one of two methods — the count method
(M-AFC decisions) or the d′ method (the responses themselves) — and a factor turns one of them into a
human-equivalent threshold.  So the factor is measured per method: human threshold / model count-method
threshold from the model's trials, and human threshold / model d′-method threshold from the model's
per-site responses (:mod:`scorer.observer.threshold`), and each is applied only to thresholds of its
own method (:meth:`scorer.observer.limits.HumanFactor.for_method`).

*Bootstrap.*  Every reader reads every image, so a resample draws the readers once (with replacement) and,
per group (e.g. detector), the group's images once, and every group × diameter cell of that resample uses
those same draws (Efron & Tibshirani 1993; crossed random effects, Owen 2007).  Drawing afresh per cell
averages the reader effect that every cell shares away in the overall factor, whose interval then covers the
readers' factor too rarely (83 % measured for a nominal 95 %, issue 21).

*Overall factor.*  The human threshold of a cell is the geometric mean of the readers' own ML thresholds (the
factor is then the readers' geometric-mean factor; one fit pooled over readers of different thresholds reads a
few % higher, more the more they differ).  The overall factor is the geometric mean over cells whose fits are
estimable and inside the search range; its percentile interval is widened for the few readers a study has
(:func:`few_readers_widening`).  A cell whose human or model fit sits at a search bound (every trial correct,
or all at chance) gives only a bound on its factor and is left out, and how many were left out is said.  So is a
cell whose pooled human or model threshold is not estimable by the study's rule (``exclude``,
:mod:`scorer.study.estimability`): its row says why, without numbers.  No usable cell: no factor.

*Dependence on diameter.*  The weighted least-squares slope of log factor on log diameter over the usable
cells (weights 1/bootstrap variance), with its bootstrap standard error; a two-sided z test (p < 0.05) says
the factor depends on diameter, and then the fitted trend log F = a + b·(log d − x̄) with the bootstrap
covariance of (a, b) is kept (:class:`scorer.observer.limits.FactorTrend`), so each diameter gets its own
factor and CI.

References
----------
.. [1] Bland, J. M. & Altman, D. G. Lancet (1986).
.. [2] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
.. [3] Owen, A. B. "The pigeonhole bootstrap", Annals of Applied Statistics 1 (2007) — resampling both
       factors of a crossed design (readers × images) once per replicate.
.. [4] Rao, J. N. K. & Wu, C. F. J. "Resampling inference with complex survey data", J. Amer. Statist. Assoc.
       83 (1988) — drawing n − 1 of n units per resample gives the unbiased variance of a mean.
.. [5] Satterthwaite, F. E. "An approximate distribution of estimates of variance components", Biometrics
       Bulletin 2 (1946).
.. [6] Draper, N. R. & Smith, H. *Applied Regression Analysis* (3rd ed., 1998) — weighted least squares.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from scorer.observer.bootstrap import percentile_ci
from scorer.observer.flags import ABOVE_100, NOT_ESTIMABLE
from scorer.observer.limits import FactorTrend
from scorer.observer.mafc_fast import _dprime_for, fit_k_batch
from scorer.observer.threshold import _dprime_arrays, _dprime_k
from scorer.study.alternatives import criterion_at, m_at
from scorer.study.counts import counts_cube

METHODS = ("count", "dprime")
METHOD_LABEL = {"count": "count method (model decisions)", "dprime": "d′ method (model responses)"}
#: a factor depends on diameter when the slope test's p is below this (two-sided)
TREND_ALPHA = 0.05


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
    model_responses: pd.DataFrame | None = None,
    exclude: dict | None = None,
) -> dict | None:
    """Human/model threshold factor per method, per group × diameter and overall, with bootstrap CIs.

    Human threshold: pooled ML fit over all readers.  Model threshold: ML fit of the model observer's
    trials (count method) and, with ``model_responses``, its d′-method threshold.  Returns the count-method
    result of the first model observer at the top level, every method in ``by_method`` and every observer
    in ``by_observer`` (each with its own ``by_method``); see the module docstring.

    ``exclude`` maps (group, diameter) to the reason the cell's human or model threshold is not estimable
    (:mod:`scorer.study.estimability`): such a cell gets a row saying so, without numbers, and stays out of the
    overall factor (counted with the cells at a search bound).
    """
    readers_all = np.unique(human["reader"])
    groups = sorted(set(human[by]), key=str)
    images_of = {}
    for g in groups:
        imgs = set(human.loc[human[by] == g, "image"]) | set(model.loc[model[by] == g, "image"])
        if model_responses is not None and by in model_responses.columns:
            imgs |= set(model_responses.loc[model_responses[by] == g, "image"])
        images_of[g] = np.array(sorted(imgs, key=str), dtype=object)
    # one draw of the readers and one of each group's images per resample, shared by every cell (docstring)
    wr_all = draws(len(readers_all), n_boot, rng)
    wi_all = {g: draws(len(images_of[g]), n_boot, rng) for g in groups}
    human_cells = {}
    for (grp, diam), gh in human.groupby([by, "diameter_mm"], sort=True):
        human_cells[(grp, float(diam))] = _human_cell(
            gh, grp, diam, m, criterion_pc, readers_all, images_of, wr_all, wi_all
        )
    out_all = []
    for obs in sorted(model["reader"].unique()):
        mo = model[model["reader"] == obs]
        mr = None
        if model_responses is not None:
            mr = model_responses[model_responses["observer"].astype(str) == str(obs)]
            mr = mr if len(mr) else None
        by_method = {}
        for method in METHODS:
            if method == "dprime" and mr is None:
                continue
            data = mo if method == "count" else mr
            by_method[method] = _factor_one_method(
                human_cells,
                data,
                method,
                str(obs),
                by,
                m,
                criterion_pc,
                images_of,
                wi_all,
                ci,
                reader_curves_df,
                exclude or {},
            )
        entry = dict(by_method["count"])
        entry["by_method"] = by_method
        out_all.append(entry)
    if not out_all:
        return None
    first = dict(out_all[0])
    first["by_observer"] = out_all
    return first


def draws(n_units: int, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """(n_boot, n_units) draw counts: n − 1 of the n units with replacement per resample (Rao & Wu 1988).

    For a mean over n units the plain bootstrap's variance is (n − 1)/n of the unbiased one; drawing n − 1
    units makes it unbiased, which matters with the 4–8 readers of a typical study (a 6-reader study's
    interval covered 92.5 % for a nominal 95 % with n draws).  One unit: drawn once (no spread to estimate).
    """
    if n_boot <= 0:
        return np.zeros((0, n_units), dtype=np.int64)
    return rng.multinomial(max(n_units - 1, 1), np.full(n_units, 1.0 / n_units), size=n_boot)


def _human_cell(gh, grp, diam, m_all, criterion_pc, readers_all, images_of, wr_all, wi_all) -> dict:
    """The pooled human fit of one group × diameter, and its resamples under the shared draws."""
    m, p = m_at(m_all, diam), criterion_at(m_all, diam, criterion_pc)
    d_t = _dprime_for(p, m)
    readers = np.unique(gh["reader"])
    images = images_of[grp]
    levels = np.unique(gh["contrast"])
    yh, nh = counts_cube(gh, readers, images, levels)
    R, L = len(readers), len(levels)
    kr, br = fit_k_batch(levels, yh.sum(1), nh.sum(1), m)  # each reader's own fit
    k_geo = float(np.exp(np.mean(np.log(kr))))
    cell = {"m": m, "pc": p, "d_t": d_t, "k": k_geo, "at_bound": bool(br.any()), "levels": levels}
    cell.update(n_readers=int(R), n_images=int(len(np.unique(gh["image"]))), n_readers_at_bound=int(br.sum()))
    cell["n_trials"] = int(len(gh))
    with np.errstate(divide="ignore"):
        cell["log_t_readers"] = dict(zip(readers.tolist(), np.log(d_t / kr).tolist()))
    if len(wr_all):
        wr = wr_all[:, pd.Index(readers_all).get_indexer(readers)].astype(float)
        wi = wi_all[grp]
        yb = np.einsum("bi,ril->brl", wi, yh, optimize=True).reshape(-1, L)
        nb = np.einsum("bi,ril->brl", wi, nh, optimize=True).reshape(-1, L)
        center = float(np.exp(np.mean(np.log(kr))))
        kb, bb = fit_k_batch(levels, yb, nb, m, center=center)
        kb, bb = kb.reshape(-1, R), bb.reshape(-1, R)
        # the readers drawn in a resample, each as often as drawn: the geometric mean of their slopes
        with np.errstate(divide="ignore", invalid="ignore"):
            kg = np.exp((wr * np.log(kb)).sum(1) / wr.sum(1))
        cell.update(k_boot=kg, bound_boot=(bb & (wr > 0)).any(1))
    else:
        cell.update(k_boot=np.zeros(0), bound_boot=np.zeros(0, bool))
    return cell


def _model_cell(gm: pd.DataFrame, method: str, cell: dict, images: np.ndarray, wi: np.ndarray):
    """Model slope k (d′ = k·C), whether its fit sits at a bound, and its resamples under the group's draws."""
    m = cell["m"]
    if method == "count":
        levels = np.union1d(cell["levels"], np.unique(gm["contrast"]))
        ym, nm = counts_cube(gm.assign(reader="_model"), ["_model"], images, levels)
        ym, nm = ym[0], nm[0]
        km, bm = fit_k_batch(levels, ym.sum(0)[None], nm.sum(0)[None], m)
        kb = fit_k_batch(levels, wi @ ym, wi @ nm, m, center=km[0])[0] if len(wi) else np.zeros(0)
        return float(km[0]), bool(bm[0]), kb
    # d′ method: per image × target responses; the group's image draws reweight the images the model read
    S, B, C, m_resp = _dprime_arrays(gm)
    if m_resp != m:
        return float("nan"), False, np.full(len(wi), np.nan)
    own = np.unique(gm["image"].to_numpy())
    W1 = np.ones((1, own.size))
    k0 = float(_dprime_k(S, B, C, W1, cell["d_t"])[0][0])
    if not len(wi):
        return k0, False, np.zeros(0)
    Wb = wi[:, pd.Index(images).get_indexer(own)].astype(float)
    empty = Wb.sum(axis=1) == 0  # a resample that drew none of the model's images (it read fewer)
    Wb[empty] = 1.0
    kb = _dprime_k(S, B, C, Wb, cell["d_t"])[0]
    kb[empty] = np.nan
    return k0, False, kb


def _factor_one_method(
    human_cells, data, method, obs, by, m_all, criterion_pc, images_of, wi_all, ci, reader_curves_df, exclude
) -> dict:
    per, samples, notes, excluded = [], [], [], []
    per_reader: dict = {}  # reader → log(reader's threshold / model's) over the usable cells
    for (grp, diam), cell in human_cells.items():
        why = exclude.get((grp, float(diam)))
        if why:  # the pooled human or the model threshold is not estimable: no numbers, the reason
            row = _not_estimable_row(by, grp, diam, method, why, cell)
            per.append(row)
            excluded.append(row)
            continue
        sel = (data[by] == grp) & np.isclose(data["diameter_mm"], diam)
        gm = data[sel]
        if gm.empty:
            notes.append(f"no {obs} {'trials' if method == 'count' else 'responses'} for {by} {grp}, {diam:g} mm")
            continue
        km, bm, kb_m = _model_cell(gm, method, cell, images_of[grp], wi_all[grp])
        kh = cell["k"]
        t_h = cell["d_t"] / kh if kh > 0 else float("nan")
        t_m = cell["d_t"] / km if km > 0 else float("nan")
        factor = t_h / t_m if np.isfinite(t_h) and np.isfinite(t_m) else float("nan")
        with np.errstate(divide="ignore", invalid="ignore"):
            fb = kb_m / cell["k_boot"] if len(cell["k_boot"]) else np.zeros(0)
        lo, hi = percentile_ci(fb, ci) if len(fb) else (float("nan"), float("nan"))
        reason = ""
        if not np.isfinite(factor) or factor <= 0:
            reason = "not estimable (no signal in the model's or the readers' fit)"
        elif cell["at_bound"] or bm:
            who = "readers'" if cell["at_bound"] else "model's"
            reason = f"the {who} fit sits at a search bound (all correct or at chance): the factor is only a bound"
        row = {
            by: grp,
            "diameter_mm": float(diam),
            "method": method,
            "human_threshold": t_h,
            "model_threshold": t_m,
            "factor": factor,
            "ci_low": lo,
            "ci_high": hi,
            "n_readers": cell["n_readers"],
            "n_images": cell["n_images"],
            "n_trials": cell["n_trials"],
            "used": not reason,
            "estimable": not reason,
            "not_estimable": reason.removeprefix("not estimable (").removesuffix(")") if reason else "",
            "note": reason,
            "flags": [NOT_ESTIMABLE] if reason else ([ABOVE_100] if max(t_h, t_m) > 1 else []),
        }
        n_bound_boot = int(np.sum(cell["bound_boot"])) if len(cell["bound_boot"]) else 0
        if n_bound_boot and not reason:
            row["note"] = f"{n_bound_boot} of {len(fb)} resamples of the readers' fit at a search bound"
        per.append(row)
        if reason:
            excluded.append(row)
        else:
            samples.append(np.log(fb))
            for reader, lt in cell["log_t_readers"].items():
                per_reader.setdefault(reader, []).append(lt - np.log(t_m))
    used = [r for r in per if r["used"]]
    base = {
        "observer": obs,
        "method": method,
        "method_label": METHOD_LABEL[method],
        "n_cells": len(per),
        "n_used": len(used),
        "n_excluded": len(excluded),
        "excluded": [{by: r[by], "diameter_mm": r["diameter_mm"], "reason": r["note"]} for r in excluded],
    }
    if not used:
        why = (
            f"no usable cell: all {len(per)} {by} × diameter cells have a fit at a search bound or not estimable"
            if per
            else "no matching model data"
        )
        for r in per:
            r.update(human_equivalent_threshold=None, human_equivalent_ci_low=None, human_equivalent_ci_high=None)
        return {
            **base,
            "factor": None,
            "ci_low": None,
            "ci_high": None,
            "per_diameter": per,
            "diameter_trend": None,
            "bland_altman": None,
            "note": "; ".join([why] + notes),
        }
    est = float(np.exp(np.mean([np.log(r["factor"]) for r in used])))
    lo = hi = float("nan")
    df_readers = None
    if samples and len(samples[0]):
        log_overall = np.nanmean(np.stack(samples), axis=0)
        lo, hi = percentile_ci(np.exp(log_overall), ci)
        lo, hi = min(lo, est), max(hi, est)
        lo, hi, df_readers = few_readers_widening(est, lo, hi, log_overall, per_reader, ci)
    few = sorted({str(r[by]) for r in used if r["n_images"] < 2}, key=str)
    # with one image in a group the resamples hold no image noise: a slope test on them finds trends that are not
    # there (35–45 % of studies in bench design C), so it is not made
    trend = None if few else diameter_trend(used, np.stack(samples) if samples else None, ci)
    if trend is not None:
        trend["degrees_of_freedom"] = df_readers  # the same few-readers widening as the overall interval
    for r in per:
        f, flo, fhi = est, lo, hi
        if trend is not None and trend["depends_on_diameter"]:
            f, flo, fhi = trend_at(trend, r["diameter_mm"], ci)
            r["trend_factor"], r["trend_ci_low"], r["trend_ci_high"] = f, flo, fhi
        t_m = r["model_threshold"]
        ok = t_m is not None and np.isfinite(t_m)
        r["human_equivalent_threshold"] = t_m * f if ok else None
        r["human_equivalent_ci_low"] = t_m * flo if ok else None
        r["human_equivalent_ci_high"] = t_m * fhi if ok else None
        if ok and np.isfinite(fhi) and t_m * fhi > 1 and ABOVE_100 not in r["flags"]:
            r["flags"] = r["flags"] + [ABOVE_100]
    note = list(notes)
    if few:
        note.append(
            f"one image for {by} {', '.join(few)}: resampling images cannot show the image-sampling variance, "
            "so the CI is too narrow and the dependence on diameter is not tested"
        )
    if excluded:
        note.insert(
            0,
            f"{len(excluded)} of {len(per)} {by} × diameter cells left out of the overall factor (fit at a search "
            "bound or not estimable)",
        )
    ba = None
    if reader_curves_df is not None and len(reader_curves_df):
        ba = bland_altman_log(reader_curves_df, pd.DataFrame(used), by)
    return {
        **base,
        "factor": est,
        "ci_low": lo,
        "ci_high": hi,
        "ci_degrees_of_freedom": df_readers,
        "per_diameter": per,
        "diameter_trend": trend,
        "bland_altman": ba,
        "note": "; ".join(note),
    }


def _not_estimable_row(by, grp, diam, method: str, why: str, cell: dict) -> dict:
    """A per-diameter row of a cell left out because its pooled human or model threshold is not estimable
    (:mod:`scorer.study.estimability`): no numbers, the reason and the trials."""
    row = {by: grp, "diameter_mm": float(diam), "method": method}
    for c in ("human_threshold", "model_threshold", "factor", "ci_low", "ci_high", "human_equivalent_threshold"):
        row[c] = None
    row.update(
        n_readers=cell["n_readers"],
        n_images=cell["n_images"],
        n_trials=cell["n_trials"],
        used=False,
        estimable=False,
        not_estimable=why,
        note=f"not estimable: {why}",
        flags=[NOT_ESTIMABLE],
    )
    return row


def few_readers_widening(est, lo, hi, log_samples, per_reader: dict, ci: float = 0.95):
    """Widen the percentile interval for the few readers a study has: Student's t on Satterthwaite's degrees of
    freedom instead of the normal quantile.

    The bootstrap variance v of the log factor holds a reader part v_R, estimated as the spread of the readers'
    own mean log(threshold / model threshold) over the cells, s²/R on R − 1 degrees of freedom, and a part from
    the images that is known far better (taken as exact).  Satterthwaite's ν = v² / (v_R²/(R − 1)); each end
    of the interval moves away from the estimate by t_ν/z on the log scale.  With 6 readers and a reader part
    of about three quarters the plain interval covered 86–90 % of simulated studies for a nominal 95 %
    (bench/bench_human_factor.py).  Returns (low, high, ν) (ν None when not widened).

    References: Satterthwaite, F. E. Biometrics Bulletin 2 (1946); Hesterberg (2015) for widening a bootstrap
    percentile interval by a small-sample quantile ratio.
    """
    means = np.array([np.mean(v) for v in per_reader.values() if len(v)])
    means = means[np.isfinite(means)]
    s = np.asarray(log_samples, float)
    s = s[np.isfinite(s)]
    if means.size < 2 or s.size < 3 or not (np.isfinite(lo) and np.isfinite(hi) and lo > 0):
        return lo, hi, None
    r = means.size
    v_tot = float(np.var(s, ddof=1))
    v_r = min(float(np.var(means, ddof=1)) / r, v_tot)
    if not (v_r > 0 and v_tot > 0):
        return lo, hi, None
    nu = v_tot**2 / (v_r**2 / (r - 1))
    z = stats.norm.ppf(0.5 + ci / 2)
    scale = float(stats.t.ppf(0.5 + ci / 2, nu) / z)
    le = np.log(est)
    return float(np.exp(le + scale * (np.log(lo) - le))), float(np.exp(le + scale * (np.log(hi) - le))), float(nu)


def diameter_trend(used: list[dict], log_samples: np.ndarray | None, ci: float = 0.95) -> dict | None:
    """Does the factor depend on diameter?  WLS slope of log factor on log diameter and its bootstrap test.

    ``used``: the usable cells (factor, diameter_mm); ``log_samples``: (cells, resamples) bootstrap log factors
    under shared draws.  Returns None with fewer than two diameters or no resamples.
    """
    if log_samples is None or log_samples.shape[1] < 2:
        return None
    x = np.log([r["diameter_mm"] for r in used])
    if np.unique(np.round(x, 9)).size < 2:
        return None
    y = np.log([r["factor"] for r in used])
    finite = np.isfinite(log_samples)
    var = np.array([np.var(s[f], ddof=1) if f.sum() > 2 else np.nan for s, f in zip(log_samples, finite)])
    if not np.all(np.isfinite(var) & (var > 0)):
        var = np.where(np.isfinite(var) & (var > 0), var, np.nanmax(var) if np.isfinite(var).any() else 1.0)
    w = 1.0 / var
    xc = float(np.sum(w * x) / np.sum(w))
    sxx = float(np.sum(w * (x - xc) ** 2))

    def fit(yv):
        a = np.sum(w[:, None] * yv, axis=0) / np.sum(w)
        b = np.sum((w * (x - xc))[:, None] * yv, axis=0) / sxx
        return a, b

    a0, b0 = fit(y[:, None])
    ok = finite.all(axis=0)
    ab, bb = fit(log_samples[:, ok])
    se_b = float(np.std(bb, ddof=1))
    z = float(b0[0] / se_b) if se_b > 0 else float("inf")
    p = float(2 * stats.norm.sf(abs(z)))
    b_lo, b_hi = percentile_ci(bb, ci)
    cov = np.cov(np.vstack([ab, bb]))
    return {
        "slope": float(b0[0]),
        "slope_ci_low": b_lo,
        "slope_ci_high": b_hi,
        "slope_se": se_b,
        "p_value": p,
        "depends_on_diameter": bool(p < TREND_ALPHA),
        "intercept": float(a0[0]),
        "reference_diameter_mm": float(np.exp(xc)),
        "cov_intercept_slope": cov.tolist(),
        "diameter_range_mm": [float(np.exp(x.min())), float(np.exp(x.max()))],
        "n_cells": int(len(used)),
        "test": "two-sided z test of the WLS slope of log factor on log diameter, bootstrap SE "
        f"({int(ok.sum())} resamples); depends on diameter when p < {TREND_ALPHA:g}",
    }


def trend_at(trend: dict, diameter_mm: float, ci: float = 0.95) -> tuple[float, float, float]:
    """The trend's factor at one diameter and its CI (:meth:`scorer.observer.limits.FactorTrend.at`)."""
    return FactorTrend.from_dict(trend).at(diameter_mm, ci)


def bland_altman_log(reader_df: pd.DataFrame, per: pd.DataFrame, by: str) -> dict | None:
    """Bland–Altman (1986) agreement of log10 human (per reader) and model thresholds.

    Differences d = log10 T_reader − log10 T_model; bias = mean d (so 10^bias is the
    geometric-mean factor); limits of agreement = bias ± 1.96·SD(d).
    """
    if per.empty:
        return None
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
