"""M-alternative forced choice: proportion correct as a function of d′ and back.

For an unbiased observer choosing the largest of M independent, equal-variance
Gaussian responses, one of which has its mean shifted by d′::

    Pc(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx

References
----------
.. [1] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
.. [2] Hacker, M. J. & Ratcliff, R. "A revised table of d′ for M-alternative forced
       choice", Perception & Psychophysics 26 (1979).

The threshold definition
------------------------
A threshold is where the observer reaches a fixed detectability d′_T, whatever the number of alternatives M
of the cell: its proportion correct is Pc_M(d′_T), which differs with M, while d′_T (and with it the
threshold contrast of a linear observer, C_T = d′_T/k) does not.  A criterion fixed in Pc instead (halfway
between chance and 1, Limen's former default) means d′ = 1.116 at M = 3 and 1.329 at M = 5, a 19 % step
in every contrast-detail curve where M changes.  The default d′_T (:data:`DEFAULT_DETECTABILITY`) is the d′
at which 3-AFC — the M of most cells of the bundled demo plate and of the test plate — reaches Pc = 2/3, so
3-AFC thresholds are unchanged; 5-AFC thresholds fall by 16 % (Pc_5 = 0.532 at threshold), 4-AFC ones by
10 % (Pc_4 = 0.588), 2-AFC ones rise by 17 % (Pc_2 = 0.785).  A Pc given by hand (``--criterion``) is one
Pc for every M, as before.
"""

from __future__ import annotations

from dataclasses import dataclass
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


#: d′ at threshold by default: the d′ at which 3-AFC reaches Pc = 2/3 (halfway between chance and 1), so the
#: thresholds of 3-AFC cells keep their former value (module docstring).  dprime_for_pc(2/3, 3), to 1e-10.
DEFAULT_DETECTABILITY = 1.1158983412


@dataclass(frozen=True)
class Detectability:
    """A threshold criterion given as the detectability d′_T the observer reaches (the same for every M)."""

    dprime: float = DEFAULT_DETECTABILITY

    def __post_init__(self):
        if not (np.isfinite(self.dprime) and 0.0 < self.dprime <= 6.0):
            raise ValueError(f"detectability d′ at threshold must lie in (0, 6], got {self.dprime:g}")

    def pc(self, m: int) -> float:
        """Proportion correct at threshold for M alternatives, Pc_M(d′_T)."""
        return float(pc_mafc(self.dprime, m))


def criterion_for(m: int, criterion=None) -> float:
    """Proportion correct at threshold for an M-AFC cell.

    ``criterion``: None (Pc_M at the default detectability :data:`DEFAULT_DETECTABILITY`), a
    :class:`Detectability` (Pc_M at its d′_T), or a number (that Pc for every M).
    """
    m = _check_m(m)
    if criterion is None:
        return Detectability().pc(m)
    if isinstance(criterion, Detectability):
        return criterion.pc(m)
    return float(criterion)


def criterion_dprime(criterion=None) -> float | None:
    """d′_T of a criterion (None when it is a Pc, whose d′ depends on M)."""
    if criterion is None:
        return DEFAULT_DETECTABILITY
    if isinstance(criterion, Detectability):
        return float(criterion.dprime)
    return None


def criterion_json(criterion, ms) -> dict:
    """The threshold definition for results JSON: d′_T (or the Pc given), and Pc and d′ for each M used."""
    d_t = criterion_dprime(criterion)
    by_m = {}
    for m in sorted({int(v) for v in ms}):
        pc = criterion_for(m, criterion)
        by_m[str(m)] = {"pc": pc, "dprime": d_t if d_t is not None else dprime_for_pc(pc, m)}
    return {
        "definition": "fixed detectability d′_T" if d_t is not None else "fixed proportion correct",
        "dprime_threshold": d_t,
        "default": criterion is None,
        "pc_by_m": by_m,
        "source": "Pc_M(d′) = ∫φ(x − d′)Φ(x)^(M−1)dx (Green & Swets 1966; Hacker & Ratcliff 1979)",
    }


def criterion_text(criterion, ms) -> str:
    """One sentence for reports: the threshold definition and its Pc for each M."""
    info = criterion_json(criterion, ms)
    pcs = ", ".join(f"Pc = {v['pc']:.3f} at {m}-AFC" for m, v in info["pc_by_m"].items())
    if info["dprime_threshold"] is not None:
        why = " (default: the d′ where 3-AFC reaches Pc = 2/3)" if info["default"] else ""
        return f"threshold where the observer reaches d′ = {info['dprime_threshold']:.4g}{why}: {pcs}"
    return f"threshold at a fixed proportion correct: {pcs}"
