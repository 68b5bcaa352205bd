"""M-alternative forced choice: proportion correct as a function of d′ and back.

For an unbiased observer choosing the largest of M independent, equal-variance
Gaussian responses, one of which has its mean shifted by d′::

    Pc(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx

References
----------
.. [1] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
.. [2] Hacker, M. J. & Ratcliff, R. "A revised table of d′ for M-alternative forced
       choice", Perception & Psychophysics 26 (1979).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import integrate, optimize, stats


def _check_m(m: int) -> int:
    m = int(m)
    if m < 2:
        raise ValueError(f"M-AFC needs at least 2 alternatives, got {m}")
    return m


@lru_cache(maxsize=4096)
def _pc_scalar(dprime: float, m: int) -> float:
    if m == 2:
        return float(stats.norm.cdf(dprime / np.sqrt(2.0)))

    def integrand(x: float) -> float:
        return stats.norm.pdf(x - dprime) * stats.norm.cdf(x) ** (m - 1)

    lo, hi = dprime - 10.0, dprime + 10.0
    value, _ = integrate.quad(integrand, lo, hi, epsabs=1e-12, epsrel=1e-10, limit=200)
    return float(min(max(value, 1.0 / m), 1.0))


def pc_mafc(dprime, m: int):
    """Proportion correct in M-AFC for detectability ``dprime`` (scalar or array).

    Negative d′ is allowed (Pc falls below chance).  Computed by numerical
    integration of the M-AFC formula, not from a table.
    """
    m = _check_m(m)
    d = np.asarray(dprime, dtype=float)
    if m == 2:
        out = stats.norm.cdf(d / np.sqrt(2.0))
    else:
        flat = d.ravel()
        out = np.empty_like(flat)
        for i, v in enumerate(flat):
            if v >= 0:
                out[i] = _pc_scalar(round(float(v), 12), m)
            else:  # no chance floor clamp below zero d′
                val, _ = integrate.quad(
                    lambda x, v=v: stats.norm.pdf(x - v) * stats.norm.cdf(x) ** (m - 1),
                    v - 10.0,
                    v + 10.0,
                    epsabs=1e-12,
                    limit=200,
                )
                out[i] = val
        out = out.reshape(d.shape)
    return float(out) if np.ndim(out) == 0 else out


def dprime_for_pc(pc: float, m: int) -> float:
    """The d′ that gives proportion correct ``pc`` in M-AFC (inverse of :func:`pc_mafc`)."""
    m = _check_m(m)
    pc = float(pc)
    if not (1.0 / m < pc < 1.0):
        raise ValueError(f"proportion correct must lie between chance 1/{m} and 1, got {pc}")
    if m == 2:
        return float(np.sqrt(2.0) * stats.norm.ppf(pc))
    return float(optimize.brentq(lambda d: pc_mafc(d, m) - pc, 0.0, 12.0, xtol=1e-10))


def halfway_criterion(m: int) -> float:
    """Proportion correct halfway between chance (1/M) and 1 (common practice)."""
    m = _check_m(m)
    return 0.5 * (1.0 + 1.0 / m)
