"""The threshold of a psychometric fit with a bootstrap confidence interval, resampling units.

Units are images, or readers and images within readers (draw counts from
:mod:`scorer.observer.bootstrap`); each resample is refitted (:mod:`scorer.observer.psychometric`)
and the interval is the percentile interval of the resampled thresholds (Efron & Tibshirani 1993).
For the one-parameter M-AFC form with a fixed lapse every resample is fitted at once, vectorised
over resamples (:func:`scorer.observer.mafc_fast.fit_k_batch`).

References
----------
.. [1] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
.. [2] Wichmann, F. A. & Hill, N. J. "The psychometric function: II. Bootstrap-based confidence
       intervals and sampling", Perception & Psychophysics 63 (2001).
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from scorer.errors import LimenError
from scorer.observer.bootstrap import BootstrapResult, UnitCounts, bootstrap_weights, percentile_ci
from scorer.observer.mafc import criterion_for
from scorer.observer.mafc_fast import _dprime_for, fit_k_batch
from scorer.observer.psychometric import fit_psychometric


def bootstrap_threshold(
    units: UnitCounts,
    n_boot: int,
    rng: np.random.Generator,
    *,
    m_alternatives: int,
    criterion_pc: float | None = None,
    form: str = "mafc",
    lapse: float | None = 0.0,
    ci: float = 0.95,
    weights: np.ndarray | None = None,
    fit_fn: Callable[[np.ndarray, np.ndarray, np.ndarray], float] | None = None,
) -> BootstrapResult:
    """Threshold contrast with a percentile bootstrap CI, resampling units.

    Parameters
    ----------
    units : counts per unit (see :func:`unit_counts`).
    n_boot : number of resamples.
    rng : numpy Generator (seeded by the caller).
    m_alternatives, criterion_pc, form, lapse : as in :func:`scorer.observer.psychometric.fit_psychometric`.
    weights : optional (n_boot, n_units) draw counts (e.g. from :func:`bootstrap_weights`
        with clusters, or :func:`stratified_weights`); default: units with replacement.
    fit_fn : optional ``fit_fn(levels, y, n) -> threshold`` replacing the built-in fit.

    The M-AFC form with a fixed lapse is fitted for all resamples at once (vectorised);
    other forms, or a custom ``fit_fn``, loop over resamples.
    """
    levels, y_u, n_u = units.levels, units.y, units.n
    y_all, n_all = y_u.sum(axis=0), n_u.sum(axis=0)
    keep = n_all > 0
    p = criterion_for(m_alternatives, criterion_pc)

    def one(yv, nv) -> float:
        if fit_fn is not None:
            return float(fit_fn(levels, yv, nv))
        f = fit_psychometric(levels[nv > 0], yv[nv > 0], nv[nv > 0], m_alternatives, form=form, lapse=lapse)
        return f.threshold(p)

    estimate = one(y_all, n_all)
    if weights is None:
        weights = bootstrap_weights(units.n_units, n_boot, rng)
    weights = np.asarray(weights)
    if weights.shape != (n_boot, units.n_units):
        raise LimenError(f"bootstrap weights must have shape ({n_boot}, {units.n_units}), got {weights.shape}")
    yb = weights @ y_u
    nb = weights @ n_u
    n_bound = 0
    if fit_fn is None and form == "mafc" and lapse is not None:
        k0 = _dprime_for(p, int(m_alternatives)) / estimate if np.isfinite(estimate) and estimate > 0 else None
        k, at_b = fit_k_batch(levels[keep], yb[:, keep], nb[:, keep], m_alternatives, float(lapse), center=k0)
        samples = _dprime_for(p, int(m_alternatives)) / k  # lapse-free threshold
        n_bound = int(at_b.sum())
    else:
        samples = np.empty(n_boot)
        for b in range(n_boot):
            try:
                samples[b] = one(yb[b], nb[b])
            except LimenError:
                samples[b] = np.nan
    lo, hi = percentile_ci(samples, ci)
    note = ""
    if n_bound:
        note = f"{n_bound} of {n_boot} resamples had no interior maximum (threshold at a search bound)"
    return BootstrapResult(
        estimate=float(estimate),
        ci_low=lo,
        ci_high=hi,
        samples=np.asarray(samples),
        n_boot=int(n_boot),
        n_at_bound=n_bound,
        ci=ci,
        note=note,
    )
