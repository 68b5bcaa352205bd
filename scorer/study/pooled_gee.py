"""Pooled contrast-detail curve: a GEE with reader clusters whose mean is the M-AFC linear-observer function
through a custom link (:func:`fit_pooled_gee`), and the same estimate in closed form on counts with
reader × image cluster-robust standard errors (:func:`pooled_mafc_gee`).

References
----------
.. [1] Liang, K.-Y. & Zeger, S. L. "Longitudinal data analysis using generalized linear
       models", Biometrika 73 (1986).
.. [2] Mancl, L. A. & DeRouen, T. A. "A covariance estimator for GEE with improved
       small-sample properties", Biometrics 57 (2001).
.. [3] Cameron, A. C., Gelbach, J. B. & Miller, D. L. "Robust inference with multiway clustering",
       J. Bus. Econ. Stat. 29 (2011).
.. [4] Kauermann, G. & Carroll, R. J. "A note on the efficiency of sandwich covariance matrix estimation",
       J. Am. Stat. Assoc. 96 (2001).
.. [5] Li, P. & Redden, D. T. "Small sample performance of bias-corrected sandwich estimators for
       cluster-randomized trials with binary outcomes", Stat. Med. 34 (2015).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats as sps

from scorer.observer.bootstrap import unit_counts
from scorer.observer.mafc_fast import _dprime_for, dpc_mafc_fast, dprime_for_pc_fast, fit_k_batch, pc_mafc_fast
from scorer.study.alternatives import criterion_at, m_at
from scorer.study.counts import counts_cube


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
    se_kc: one-way by reader with the Kauermann–Carroll correction (the one the CI uses).
    se_two_way: readers and images as crossed clusters (Cameron, Gelbach & Miller 2011),
    each part Kauermann–Carroll corrected; NaN when no image axis was given.
    """

    log_k: float
    se_robust: float
    se_bias_reduced: float
    se_two_way: float
    at_bound: bool
    n_clusters: int
    n_images: int = 0
    se_kc: float = float("nan")


def pooled_mafc_gee(levels, y, n, m: int) -> PooledFit:
    """The GEE of :func:`fit_pooled_gee` in closed form, on counts (fast).

    One parameter θ = log k, mean μ_l = Pc_M(k·C_l), variance μ(1 − μ), independence
    working correlation.  With D_l = dμ_l/dθ, the estimating equation Σ_i U_i = 0 with
    U_i = Σ_l D_l (y_il − n_il μ_l)/V_l is the binomial score, so θ̂ is the pooled ML
    estimate.  Bread A = Σ_il n_il D_l²/V_l; robust variance Σ_i U_i² / A² (Liang & Zeger
    1986); Mancl & DeRouen (2001) bias-reduced: U_i replaced by U_i / (1 − h_i) with
    h_i = Σ_l n_il D_l²/V_l / A (the leverage of cluster i; exact here because the
    one-parameter hat matrix has rank one).  Checked against statsmodels GEE in the tests.

    The CI uses Kauermann & Carroll's (2001) correction instead, U_i² / (1 − h_i): for a
    one-parameter mean the residual score has E[U_i²] = (1 − h_i)·σ_i², so KC's sandwich is
    unbiased, while Mancl–DeRouen's U_i²/(1 − h_i)² overstates the variance by 1/(1 − h_i)
    (× R/(R − 1) with R equal clusters: +20 % variance for 6 readers).  With equal leverages
    KC's variance is the one-sample t statistic's s²/R, so the t quantile with R − 1 df that
    :func:`pooled_curves` applies is the matching reference (Li & Redden 2015 compare both
    corrections with t quantiles for few clusters).  Mancl–DeRouen together with t_{R−1}
    corrected twice for the few readers: on the adaptive bench the RMS of its SE exceeded the
    SD of the estimates by 3–8 % (fresh noise, 640 cells), KC's lay within 1–7 % of it.

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
        """(robust, Mancl–DeRouen, Kauermann–Carroll) sums of squared cluster scores."""
        info = nn @ w_info
        u = (yy - nn * mu) @ w_score
        h = info / a
        s_r = float(np.sum(u**2))
        ok = bool(np.all(h < 1))
        s_bc = float(np.sum((u / (1 - h)) ** 2)) if ok else nan
        s_kc = float(np.sum(u**2 / (1 - h))) if ok else nan
        return s_r, s_bc, s_kc

    s_r, s_bc, s_kc = one_way(y_r, n_r)
    se_tw = nan
    if two_way:
        # every part with the same (KC) correction, as Cameron, Gelbach & Miller (2011) correct each one-way term
        _, _, s_img = one_way(y.sum(0), n.sum(0))
        _, _, s_cell = one_way(y.reshape(-1, y.shape[-1]), n.reshape(-1, n.shape[-1]))
        total = s_kc + s_img - s_cell
        if not total > 0:  # can happen in tiny samples; fall back to readers only
            total = s_kc
        se_tw = float(np.sqrt(total) / a)
    return PooledFit(
        float(np.log(k[0])),
        float(np.sqrt(s_r) / a),
        float(np.sqrt(s_bc) / a),
        se_tw,
        bool(at_b[0]),
        int(y.shape[0]),
        int(y.shape[1]) if two_way else 0,
        float(np.sqrt(s_kc) / a),
    )


def pooled_curves(
    df: pd.DataFrame, m: int, by: str = "detector", criterion_pc: float | None = None, ci: float = 0.95
) -> tuple[pd.DataFrame, list[str]]:
    """Population threshold per group × diameter from a GEE with reader clusters.

    The threshold is ``d′_T / k`` with d′_T = d′_M(criterion); its CI is
    ``exp(log C_T ± t · SE(log k))`` with the two-way (reader × image) cluster-robust SE,
    each part Kauermann–Carroll corrected, and a t quantile with R − 1 degrees of freedom (R readers).
    Needs ≥ 3 readers; smaller studies get a note instead of a row.
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
        yc, nc = counts_cube(g, readers, images, levels)
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
                # the contrasts shown: a pooled threshold beyond them is the fitted curve carried there (flagged)
                "offered_min": float(levels.min()),
                "offered_max": float(levels.max()),
                "note": note,
            }
        )
    return pd.DataFrame(rows), notes
