"""Generic bootstrap helpers: counts per resampling unit, resampling weights, percentile intervals.

Nothing here knows what statistic is resampled: :func:`unit_counts` tabulates forced-choice
outcomes per unit (an image, or a reader × image), :func:`bootstrap_weights` and
:func:`stratified_weights` say how often each unit is drawn in each resample, and
:func:`percentile_ci` / :func:`expanded_percentile_ci` turn the resampled statistic into an
interval that :func:`enclose_estimate` keeps around its estimate.  The threshold bootstrap built
on them is :func:`scorer.observer.psychometric_bootstrap.bootstrap_threshold`.

References
----------
.. [1] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
.. [2] Davison, A. C. & Hinkley, D. V. *Bootstrap Methods and their Application* (1997).
.. [3] Hesterberg, T. C. "What teachers should know about the bootstrap", The American
       Statistician 69 (2015).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from scorer.errors import LimenError


@dataclass
class UnitCounts:
    """Forced-choice counts per resampling unit (an image, or a reader × image) on shared contrast levels.

    ``y[u, l]`` correct and ``n[u, l]`` trials of unit ``u`` at contrast ``levels[l]``;
    ``cluster[u]`` optionally names the higher-level unit (e.g. the reader) for two-stage resampling.
    """

    levels: np.ndarray
    y: np.ndarray
    n: np.ndarray
    unit: np.ndarray
    cluster: np.ndarray | None = None

    @property
    def n_units(self) -> int:
        return int(self.y.shape[0])


def unit_counts(contrast, correct, unit, cluster=None) -> UnitCounts:
    """Tabulate per-trial 0/1 outcomes into :class:`UnitCounts` (one row per distinct ``unit``).

    ``cluster`` (same length as the trials) must be constant within each unit.
    """
    c = np.asarray(contrast, dtype=float)
    r = np.asarray(correct, dtype=float)
    u = np.asarray(unit)
    levels, li = np.unique(c, return_inverse=True)
    units, ui = np.unique(u, return_inverse=True)
    shape = (units.size, levels.size)
    flat = ui * levels.size + li
    y = np.bincount(flat, r, shape[0] * shape[1]).reshape(shape)
    n = np.bincount(flat, None, shape[0] * shape[1]).reshape(shape)
    cl = None
    if cluster is not None:
        cv = np.asarray(cluster)
        first = np.zeros(units.size, dtype=np.int64)
        first[ui[::-1]] = np.arange(ui.size)[::-1]
        cl = cv[first]
        if np.any(cv != cl[ui]):
            raise LimenError("each resampling unit must belong to one cluster")
    return UnitCounts(levels=levels, y=y, n=n, unit=units, cluster=cl)


def bootstrap_weights(n_units: int, n_boot: int, rng: np.random.Generator, cluster=None) -> np.ndarray:
    """How many times each unit is drawn in each resample: an (n_boot, n_units) integer array.

    Without ``cluster``: units are drawn with replacement (Efron & Tibshirani 1993, ch. 6).
    With ``cluster`` (one label per unit): two-stage resampling — clusters (e.g. readers)
    with replacement, then units (e.g. images) with replacement within each drawn cluster
    (Davison & Hinkley, *Bootstrap Methods and their Application* (1997), sec. 3.8).
    """
    if n_units < 1:
        raise LimenError("bootstrap needs at least one unit")
    if cluster is None:
        return rng.multinomial(n_units, np.full(n_units, 1.0 / n_units), size=n_boot)
    cluster = np.asarray(cluster)
    labels, ci = np.unique(cluster, return_inverse=True)
    members = [np.flatnonzero(ci == j) for j in range(labels.size)]
    w = np.zeros((n_boot, n_units), dtype=np.int64)
    draws = rng.integers(0, labels.size, size=(n_boot, labels.size))
    for j, idx in enumerate(members):
        times = np.sum(draws == j, axis=1)  # how often cluster j is drawn, per resample
        total = int(times.sum())
        if total == 0:
            continue
        # each of the `times[b]` copies draws len(idx) units with replacement
        per = rng.multinomial(idx.size, np.full(idx.size, 1.0 / idx.size), size=total)
        owner = np.repeat(np.arange(n_boot), times)
        np.add.at(w, (owner[:, None], idx[None, :]), per)
    return w


def stratified_weights(strata, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """Resample units with replacement within each stratum (e.g. images within a reader)."""
    strata = np.asarray(strata)
    w = np.zeros((n_boot, strata.size), dtype=np.int64)
    for s in np.unique(strata):
        idx = np.flatnonzero(strata == s)
        w[:, idx] = rng.multinomial(idx.size, np.full(idx.size, 1.0 / idx.size), size=n_boot)
    return w


def percentile_ci(samples, ci: float = 0.95) -> tuple[float, float]:
    """Percentile interval of finite bootstrap samples (NaN, NaN if none)."""
    s = np.asarray(samples, dtype=float)
    s = s[np.isfinite(s)]
    if s.size == 0:
        return float("nan"), float("nan")
    a = (1.0 - ci) / 2.0
    lo, hi = np.quantile(s, [a, 1.0 - a])
    return float(lo), float(hi)


def enclose_estimate(estimate: float, ci_low: float, ci_high: float) -> tuple[float, float]:
    """The interval widened, where needed, so that it contains its estimate.

    A percentile interval can miss its own estimate (a skewed bootstrap distribution, or
    floating-point noise when every resample gives the same value); an interval reported
    beside an estimate must hold it, so the nearer end moves to the estimate.  Non-finite
    values are left as they are.
    """
    lo, hi = float(ci_low), float(ci_high)
    est = float(estimate)
    if np.isfinite(est):
        if np.isfinite(lo) and lo > est:
            lo = est
        if np.isfinite(hi) and hi < est:
            hi = est
    return lo, hi


def expanded_percentile_ci(samples, n_units: int, ci: float = 0.95) -> tuple[float, float]:
    """Expanded percentile bootstrap interval for a statistic of ``n_units`` resampled units.

    The nominal level is widened to α′/2 = Φ(−√(n/(n−1))·t_{1−α/2, n−1}) to undo the
    percentile interval's narrowness in small samples (Hesterberg 2015).
    """
    if n_units < 2:
        return float("nan"), float("nan")
    alpha = 1.0 - ci
    z = np.sqrt(n_units / (n_units - 1.0)) * stats.t.ppf(1.0 - alpha / 2.0, n_units - 1)
    return percentile_ci(samples, 1.0 - 2.0 * stats.norm.cdf(-z))


@dataclass
class BootstrapResult:
    """A statistic, its bootstrap samples and percentile CI."""

    estimate: float
    ci_low: float
    ci_high: float
    samples: np.ndarray
    n_boot: int
    n_at_bound: int = 0
    ci: float = 0.95
    note: str = ""

    def __post_init__(self):
        self.ci_low, self.ci_high = enclose_estimate(self.estimate, self.ci_low, self.ci_high)
