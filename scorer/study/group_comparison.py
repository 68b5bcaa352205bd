"""Group comparison (detector B vs A, or any ``--by`` column): a linear mixed model on log10 per-reader
thresholds with reader random intercepts (statsmodels MixedLM), plus the image-sampling variance shared by
readers who read the same images, Holm-adjusted p-values.

References
----------
.. [1] Holm, S. "A simple sequentially rejective multiple test procedure",
       Scand. J. Statist. 6 (1979).
.. [2] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats as sps

from scorer.errors import LimenError
from scorer.observer.bootstrap import bootstrap_weights
from scorer.observer.mafc_fast import fit_k_batch
from scorer.study.alternatives import m_at
from scorer.study.counts import counts_cube
from scorer.study.wording import comparison_sentence


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
        y, n = counts_cube(g, list(readers), images, levels)
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
