"""Human/model factor: the ratio of pooled human to model-observer thresholds, with a crossed bootstrap over
readers and images, and Bland–Altman agreement on log thresholds.

References
----------
.. [1] Bland, J. M. & Altman, D. G. Lancet (1986).
.. [2] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from scorer.observer.psychometric import _dprime_for, bootstrap_weights, fit_k_batch, percentile_ci
from scorer.study.alternatives import criterion_at, m_at
from scorer.study.counts import counts_cube


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
    exclude: dict | None = None,
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

    ``exclude`` maps (group, diameter) to the reason the cell's human or model threshold is not estimable
    (:mod:`scorer.study.estimability`): such a cell gets a row saying so, without numbers, and stays out of the
    overall factor.
    """
    m_all = m
    observers = sorted(model["reader"].unique())
    out_all = []
    for obs in observers:
        mo = model[model["reader"] == obs]
        per, samples, notes = [], [], []
        for (grp, diam), gh in human.groupby([by, "diameter_mm"], sort=True):
            why = (exclude or {}).get((grp, float(diam)))
            if why:
                per.append(_not_estimable_row(by, grp, diam, why, gh))
                continue
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
            yh, nh = counts_cube(gh, readers, images_h, levels)
            gm2 = gm.assign(reader="_model")
            images_m = np.unique(gm["image"])
            ym, nm = counts_cube(gm2, ["_model"], images_m, levels)
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
                    "n_trials": int(len(gh)),
                    "estimable": True,
                    "not_estimable": "",
                    "note": note,
                }
            )
            samples.append(np.log(fb))
        estimated = [r for r in per if r.get("factor") is not None]
        if not estimated:
            if per:
                notes.append("no group × diameter has estimable human and model thresholds")
            out_all.append(
                {
                    "observer": obs,
                    "factor": None,
                    "ci_low": None,
                    "ci_high": None,
                    "per_diameter": per,
                    "bland_altman": None,
                    "note": "; ".join(notes) or "no matching model trials",
                }
            )
            continue
        est = float(np.exp(np.mean([np.log(r["factor"]) for r in estimated])))
        overall = np.exp(np.mean(np.stack(samples), axis=0))
        lo, hi = percentile_ci(overall, ci)
        # human-equivalent model curve: model threshold × overall factor (and its CI)
        for r in estimated:
            r["human_equivalent_threshold"] = r["model_threshold"] * est
            r["human_equivalent_ci_low"] = r["model_threshold"] * lo
            r["human_equivalent_ci_high"] = r["model_threshold"] * hi
        ba = None
        if reader_curves_df is not None and len(reader_curves_df):
            ba = bland_altman_log(reader_curves_df, pd.DataFrame(estimated), by)
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


def _not_estimable_row(by, grp, diam, why: str, gh: pd.DataFrame) -> dict:
    """A per-diameter row of a cell left out of the factor: no numbers, the reason and the trials."""
    row = {by: grp, "diameter_mm": float(diam)}
    for c in ("human_threshold", "model_threshold", "factor", "ci_low", "ci_high", "human_equivalent_threshold"):
        row[c] = None
    row.update(
        n_readers=int(gh["reader"].nunique()),
        n_images=int(gh["image"].nunique()),
        n_trials=int(len(gh)),
        estimable=False,
        not_estimable=why,
        note=f"not estimable: {why}",
    )
    return row


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
