"""Is a run of baseline sessions stable?  A trend test per diameter before the sessions become a baseline.

The automatic baseline is the first run of K consecutive sessions (by acquisition date, sessions whose
settings were flagged left out) in which no diameter's threshold contrast trends.  A drift that starts
inside those sessions would otherwise become part of the baseline and never be flagged.

**Test** (per diameter, over the K sessions of a window, x = log10 C_T, i = 0 … K−1 the session's place
in date order): the least-squares slope b = Σ(i − ī)(x − x̄) / S_ii, S_ii = Σ(i − ī)², and
z = b √S_ii / σ, two-sided p = 2(1 − Φ(|z|)).  This is the slope test of simple linear regression with
the error SD taken as known (Draper & Smith, *Applied Regression Analysis*, 3rd ed. (1998), §1.4 and
§3.1: Var b = σ²/S_ii; from memory).  σ is the larger of the median standard error of one session's
log10 C_T (from its 95 % CI; the floor the control limits use, :mod:`scorer.qc.control`) and the
between-session SD estimated from the median moving range, median|x_(i+1) − x_i| / 0.954 (for normal
data the median of |X₁ − X₂| is √2 Φ⁻¹(0.75) σ = 0.954 σ; moving ranges estimate σ for individuals
charts because a shift barely moves them: Montgomery, *Introduction to Statistical Quality Control*, 6th
ed. (2009), §6.4, from memory).  The residual SD about the line is not used: a step misfits a line, and
the residual SD it inflates hid the very step (z 1.6 instead of 2.3 on a simulated 40 % drop).  A step
inside the window shows as a slope (a step of Δ between the 3rd and 4th of five sessions gives b = 0.33 Δ;
a single session off at the window's edge only b = 0.2 Δ, which one diameter alone rarely shows).  A change
of kerma or processing moves every diameter the same way, so the
diameters are also tested together: Stouffer's z_c = Σ z_d / √m (Stouffer et al., *The American Soldier*
(1949); Whitlock, J. Evol. Biol. 18 (2005)), which treats the diameters' slopes as independent (they come
from different discs; a day-to-day factor shared by all diameters would make it liberal).  The m diameters'
p-values and the combined one are adjusted together by Holm's procedure (Holm, Scand. J. Statist. 6
(1979)), valid under any dependence; the window is unstable when any adjusted p is below ``alpha``
(``[alerts] stability_alpha``, default 0.01).

A window that fails is *rejected*: its sessions do not form the baseline, an ``unstable`` alert is
raised on its last session, and the next window (one session later) is tried once it is complete.
The detector stays without a baseline until a window passes or a physicist sets one
(``limen baseline set``).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats

from scorer.qc.control import log_se_from_ci

DEFAULT_ALPHA = 0.01
#: median of |X₁ − X₂| for independent normal X of SD 1: √2 · Φ⁻¹(0.75) = 0.9539
MR_MEDIAN_FACTOR = float(np.sqrt(2) * stats.norm.ppf(0.75))


@dataclass
class DiameterTrend:
    """The slope test of one diameter over one window of sessions."""

    diameter_mm: float
    n_sessions: int
    slope_log10: float  # per session, in log10 C_T
    sigma_log10: float  # the σ used
    z: float
    p: float
    p_holm: float = float("nan")
    #: the fitted threshold ratio from the window's first to its last session, 10^(b (K − 1))
    change_ratio: float = float("nan")
    unstable: bool = False
    #: rejected by the test of all diameters together (Stouffer), not by this diameter's own test
    via_combined: bool = False


@dataclass
class WindowTest:
    """One window of consecutive sessions tested for a trend."""

    session_ids: list[int]
    session_dates: list[str]
    stable: bool
    trends: list[DiameterTrend] = field(default_factory=list)
    #: the diameters together: Stouffer's z = Σ z_d / √m, its p and Holm-adjusted p
    combined: dict[str, Any] = field(default_factory=dict)

    @property
    def last(self) -> tuple[str, int]:
        return self.session_dates[-1], self.session_ids[-1]

    def unstable_trends(self) -> list[DiameterTrend]:
        return [t for t in self.trends if t.unstable]


def slope_test(
    x: ArrayLike, se_within: ArrayLike, positions: ArrayLike | None = None
) -> tuple[float, float, float, float]:
    """(slope b, σ used, z, two-sided p) of ``x`` against its sessions' places (default 0 … n−1).

    ``se_within``: per-session standard errors of x (non-finite ones ignored); ``positions``: each
    value's place in the window when a session without a threshold leaves a gap.  See the module docstring.
    """
    xv = np.asarray(x, float)
    n = xv.size
    i = np.arange(n, dtype=float) if positions is None else np.asarray(positions, float)
    sii = float(np.sum((i - i.mean()) ** 2))
    b = float(np.sum((i - i.mean()) * (xv - xv.mean())) / sii)
    # scatter between sessions from the median moving range, which a step or a trend barely moves (a residual
    # SD about the line would absorb the step it is meant to find): median |x_(i+1) − x_i| = √2 Φ⁻¹(0.75) σ
    order = np.argsort(i, kind="stable")
    mr = np.abs(np.diff(xv[order]))

    s_mr = float(np.median(mr) / MR_MEDIAN_FACTOR) if mr.size else 0.0
    se = np.asarray(se_within, float)
    se = se[np.isfinite(se)]
    sigma = max(s_mr, float(np.median(se)) if se.size else 0.0)
    if sigma <= 0:
        return b, sigma, 0.0, 1.0
    z = b * np.sqrt(sii) / sigma
    return b, sigma, float(z), float(2 * stats.norm.sf(abs(z)))


def holm(p: ArrayLike) -> np.ndarray:
    """Holm-adjusted p-values (step-down, monotone, capped at 1) — Holm (1979)."""
    pv = np.asarray(p, float)
    m = pv.size
    order = np.argsort(pv)
    adj = np.empty(m)
    running = 0.0
    for rank, k in enumerate(order):
        running = max(running, min(1.0, (m - rank) * pv[k]))
        adj[k] = running
    return adj


def check_window(window: pd.DataFrame, alpha: float = DEFAULT_ALPHA) -> WindowTest:
    """Test one window (rows of its sessions × diameters: session_id, session_date, diameter_mm,
    threshold_contrast, ci_low, ci_high) for a trend per diameter; diameters with fewer than 3 finite
    thresholds are not tested."""
    order = window.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
    ids = [int(s) for s in order["session_id"]]
    rank = {sid: k for k, sid in enumerate(ids)}
    trends = []
    for d, g in window.groupby("diameter_mm"):
        g = g.assign(_k=g["session_id"].map(rank)).sort_values("_k")
        c = g["threshold_contrast"].to_numpy(float)
        ok = np.isfinite(c) & (c > 0)
        if ok.sum() < 3:
            continue
        x = np.log10(c[ok])
        pos = g["_k"].to_numpy(int)[ok]
        se = log_se_from_ci(g["ci_low"].to_numpy(float)[ok], g["ci_high"].to_numpy(float)[ok])
        b, sigma, z, p = slope_test(x, se, pos)
        trends.append(
            DiameterTrend(
                float(d),  # type: ignore[arg-type]  # the groupby key of a float column
                int(ok.sum()),
                b,
                sigma,
                z,
                p,
                change_ratio=float(10 ** (b * (len(ids) - 1))),
            )
        )
    combined = {}
    if trends:
        zs = np.array([t.z for t in trends])
        zc = float(zs.sum() / np.sqrt(zs.size)) if np.all(np.isfinite(zs)) else float("nan")
        pc = float(2 * stats.norm.sf(abs(zc))) if np.isfinite(zc) else 1.0
        # Holm over the diameters and the combined test together: the family-wise error stays at alpha
        adj = holm([t.p for t in trends] + ([pc] if len(trends) > 1 else []))
        for t, pa in zip(trends, adj):
            t.p_holm = float(pa)
            t.unstable = bool(pa < alpha)
        if len(trends) > 1:
            combined = {"z": zc, "p": pc, "p_holm": float(adj[-1])}
            if adj[-1] < alpha and not any(t.unstable for t in trends):
                # only all diameters together show the trend: the alert goes to the diameter moving most that way
                lead = max(trends, key=lambda t: t.z * np.sign(zc))
                lead.unstable, lead.via_combined = True, True
    dates = [str(x) for x in order["session_date"]]
    return WindowTest(ids, dates, not any(t.unstable for t in trends), trends, combined)


def eligible_sessions(history: pd.DataFrame) -> pd.DataFrame:
    """One row per session without setting flags, in acquisition-date order (ties by session id)."""
    sessions = history.drop_duplicates("session_id").sort_values(["session_date", "session_id"])
    return sessions[sessions["flags"].map(lambda f: not json.loads(f or "[]"))]


def choose_baseline_window(
    history: pd.DataFrame, k: int, alpha: float = DEFAULT_ALPHA
) -> tuple[list[int] | None, list[WindowTest]]:
    """The first stable run of ``k`` consecutive eligible sessions by acquisition date.

    Returns (its session ids, or None while no window passes; the windows tested, the rejected ones
    first and the accepted one last).  The result depends only on the set of scored sessions, never on
    the order in which they were scored.
    """
    sessions = eligible_sessions(history)
    ids = [int(s) for s in sessions["session_id"]]
    tested: list[WindowTest] = []
    for start in range(0, len(ids) - k + 1):
        win_ids = ids[start : start + k]
        w = check_window(history[history["session_id"].isin(win_ids)], alpha)
        tested.append(w)
        if w.stable:
            return win_ids, tested
    return None, tested


def rejected_sessions(tested: list[WindowTest], chosen: list[int] | None) -> set[int]:
    """Sessions of rejected windows that are not in the chosen baseline."""
    out = {sid for w in tested if not w.stable for sid in w.session_ids}
    return out - set(chosen or [])
