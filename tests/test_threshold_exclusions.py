"""The d′ method when whole M-AFC trials were excluded for defects (scorer.observer.checks).

Checked against the method's own published formulas, computed here by hand on the trials that remain:
d′_j = (mean signal − mean non-signal response over the images that score target j) / σ, σ² pooled from the
non-signal sites' spread within each remaining trial; k = Σd′C/ΣC² (least squares through the origin) and
C_T = d′_T/k (Green & Swets 1966 for d′_T); var(k) of an unweighted least-squares slope with known unequal
variances v_j = M/((M−1)·n_j) is ΣC²v/(ΣC²)² (Cramér 1946), plus 1/(2·df) for σ̂ (docs/references.md).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from scorer.errors import LimenError
from scorer.observer import criterion_for, dprime_for_pc, dprime_thresholds

M = 4
C = np.array([0.01, 0.02, 0.04, 0.08, 0.16])


def _responses(n_images=6, k_true=40.0, seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_images):
        for j, c in enumerate(C):
            for s in range(M):
                r = rng.standard_normal() + (k_true * c if s == 0 else 0.0)
                rows.append((f"i{i}", f"t{j}", 0.5, c, M, s, s == 0, r / k_true, "npw"))
    cols = ["image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "is_signal", "response", "observer"]
    return pd.DataFrame(rows, columns=cols)


def _by_hand(df):
    n_t = len(C)
    ms, mb, nj = np.zeros(n_t), np.zeros(n_t), np.zeros(n_t)
    ss, df_ = 0.0, 0
    for j in range(n_t):
        g = df[df["target"] == f"t{j}"]
        sig = g[g["is_signal"]].groupby("image")["response"].first()
        bg = g[~g["is_signal"]]
        ms[j], nj[j] = sig.mean(), sig.size
        mb[j] = bg["response"].mean()
        for _img, b in bg.groupby("image"):
            v = b["response"].to_numpy()
            ss += float(((v - v.mean()) ** 2).sum())
            df_ += v.size - 1
    sigma = np.sqrt(ss / df_)
    d = (ms - mb) / sigma
    k = float(d @ C / (C @ C))
    dt = dprime_for_pc(criterion_for(M), M)
    v = M / ((M - 1.0) * nj)
    var_logk = float(C**2 @ v) / (k * k * (C @ C) ** 2) + 1.0 / (2.0 * df_)
    half = stats.norm.ppf(0.975) * np.sqrt(var_logk)
    est = dt / k
    return est, est * np.exp(-half), est * np.exp(half)


def test_dprime_threshold_on_the_trials_that_remain():
    df = _responses()
    drop = ((df["image"] == "i0") & (df["target"] == "t1")) | (
        (df["image"].isin(["i2", "i3"])) & (df["target"] == "t4")
    )
    kept = df[~drop]
    p = dprime_thresholds(kept, n_boot=0).points[0]
    est, lo, hi = _by_hand(kept)
    assert p.threshold_contrast == pytest.approx(est, rel=1e-10)
    # the interval of the over-dispersion-free case (the test's noise is the model's)
    if "scatter" not in p.note:
        assert (p.ci_low, p.ci_high) == pytest.approx((lo, hi), rel=1e-10)
    # fewer trials: a wider interval than the full set's
    full = dprime_thresholds(df, n_boot=0).points[0]
    assert p.ci_high / p.ci_low > full.ci_high / full.ci_low


def test_no_exclusion_gives_the_same_numbers_as_before():
    df = _responses(seed=3)
    est, lo, hi = _by_hand(df)
    p = dprime_thresholds(df, n_boot=0).points[0]
    assert p.threshold_contrast == pytest.approx(est, rel=1e-12)


def test_a_trial_with_a_site_missing_is_refused():
    df = _responses()
    part = df[~((df["image"] == "i0") & (df["target"] == "t1") & (df["site"] == 2))]
    with pytest.raises(LimenError, match="incomplete"):
        dprime_thresholds(part, n_boot=0)


def test_bootstrap_ci_with_excluded_trials_is_finite():
    df = _responses()
    kept = df[~((df["image"] == "i1") & (df["target"] == "t0"))]
    p = dprime_thresholds(kept, n_boot=200, ci_method="bootstrap", seed=1).points[0]
    assert np.isfinite(p.ci_low) and np.isfinite(p.ci_high) and p.ci_low < p.threshold_contrast < p.ci_high


def test_two_afc_sigma_from_paired_differences_on_the_trials_that_remain():
    # 2-AFC: σ² is half the variance over images of each target's difference signal − non-signal, pooled over
    # the targets on Σ(n_j − 1) degrees of freedom (the pooled variance of one-way ANOVA; Cramér 1946), computed
    # here by hand on the trials left after exclusions; d′_j, k and C_T as in the module docstring
    rng = np.random.default_rng(5)
    k_true, rows = 40.0, []
    for i in range(7):
        for j, c in enumerate(C):
            common = rng.standard_normal()  # a background error shared by both sites cancels in the difference
            for s in range(2):
                r = common + rng.standard_normal() + (k_true * c if s == 0 else 0.0)
                rows.append((f"i{i}", f"t{j}", 0.5, c, 2, s, s == 0, r / k_true, "npw"))
    cols = ["image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "is_signal", "response", "observer"]
    df = pd.DataFrame(rows, columns=cols)
    drop = ((df["image"] == "i1") & (df["target"] == "t0")) | (df["image"].isin(["i4", "i5"]) & (df["target"] == "t3"))
    kept = df[~drop]
    ss, dof, dj = 0.0, 0, []
    for j in range(len(C)):
        g = kept[kept["target"] == f"t{j}"].pivot(index="image", columns="site", values="response")
        diff = (g[0] - g[1]).to_numpy()
        ss += float(((diff - diff.mean()) ** 2).sum()) / 2.0
        dof += diff.size - 1
        dj.append(diff.mean())
    d = np.asarray(dj) / np.sqrt(ss / dof)
    est = dprime_for_pc(criterion_for(2), 2) / float(d @ C / (C @ C))
    p = dprime_thresholds(kept, n_boot=0).points[0]
    assert p.threshold_contrast == pytest.approx(est, rel=1e-10)
