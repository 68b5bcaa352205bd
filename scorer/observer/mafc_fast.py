"""The linear-observer M-AFC form, fast: tabulated Pc_M (with its derivative and inverse) and batch fits of k.

``Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx`` (Green & Swets 1966) is tabulated once per M on
d′ ∈ [0, 12] (computed by a dense trapezoid rule on the integral, which converges exponentially
for this smooth, Gaussian-weighted integrand, then refined by a cubic spline to a fine grid and
read by linear interpolation); its accuracy against the adaptive quadrature in
:func:`scorer.observer.mafc.pc_mafc` is checked to 1e-6 in the tests.

:func:`fit_k_batch` fits the one parameter k of ``Pc(C) = (1 − λ) · Pc_M(k·C) + λ · γ`` by
maximum likelihood for many count tables at once (e.g. every bootstrap resample), vectorised
over the tables and evaluated in chunks of at most :data:`GRID_CHUNK_CELLS` likelihood cells.
The general fits and their intervals are in :mod:`scorer.observer.psychometric`.

References
----------
.. [1] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import interpolate, stats
from scipy.special import ndtr

from scorer.observer.mafc import dprime_for_pc

DPRIME_MAX = 12.0  # beyond this Pc_M is 1 to double precision for any practical M
_FINE_STEP = 2e-4  # step of the fine lookup table in d′
_EPS = 1e-12  # probabilities are kept within [_EPS, 1 − _EPS] inside logs
#: most likelihood-grid cells (rows × grid points × contrast levels) a batch fit evaluates at once; larger batches
#: are fitted in chunks of rows.  The grid and its temporaries take about 60 bytes per cell (tracemalloc), so a
#: chunk holds about 30 MB whatever the number of rows (e.g. bootstrap resamples); every row is fitted on its own,
#: so chunking leaves the results unchanged to the last bit
GRID_CHUNK_CELLS = 500_000


# --------------------------------------------------------------------------- Pc_M table
@lru_cache(maxsize=32)
def _pc_table(m: int) -> np.ndarray:
    """Pc_M on the fine uniform grid d′ = 0, _FINE_STEP, …, DPRIME_MAX (read-only array)."""
    if m < 2:
        raise ValueError(f"M-AFC needs at least 2 alternatives, got {m}")
    coarse = np.linspace(0.0, DPRIME_MAX, 2401)
    z = np.arange(-9.0, 9.0 + 1e-9, 0.01)
    weights = stats.norm.pdf(z) * 0.01  # trapezoid (ends are ~1e-18)
    # Pc(d′) = ∫ φ(z) Φ(z + d′)^(M−1) dz  (x = z + d′ in the Green & Swets integral)
    pc = (ndtr(z[None, :] + coarse[:, None]) ** (m - 1)) @ weights
    fine = np.linspace(0.0, DPRIME_MAX, int(round(DPRIME_MAX / _FINE_STEP)) + 1)
    table = interpolate.CubicSpline(coarse, pc)(fine)
    table = np.clip(table, 1.0 / m, 1.0)
    table.setflags(write=False)
    return table


def pc_mafc_fast(dprime, m: int) -> np.ndarray:
    """Tabulated M-AFC proportion correct for d′ ≥ 0 (array in, array out; 1e-6 accurate).

    d′ below 0 is treated as 0 (chance) and above 12 as 12 (Pc = 1 within 1e-9 for M ≤ 64).
    """
    table = _pc_table(int(m))
    d = np.asarray(dprime, dtype=float)
    pos = np.clip(d, 0.0, DPRIME_MAX) / _FINE_STEP
    i = np.minimum(pos.astype(np.int64), table.size - 2)
    frac = pos - i
    return table[i] * (1.0 - frac) + table[i + 1] * frac


@lru_cache(maxsize=32)
def _dpc_table(m: int) -> np.ndarray:
    """dPc_M/dd′ on the fine grid (central differences of the table; second-order accurate)."""
    out = np.gradient(_pc_table(m), _FINE_STEP)
    out.setflags(write=False)
    return out


def dpc_mafc_fast(dprime, m: int) -> np.ndarray:
    """Derivative dPc_M/dd′ at ``dprime`` (tabulated; 0 outside [0, 12])."""
    table = _dpc_table(int(m))
    d = np.asarray(dprime, dtype=float)
    inside = (d >= 0) & (d <= DPRIME_MAX)
    out = np.interp(np.clip(d, 0.0, DPRIME_MAX), np.linspace(0.0, DPRIME_MAX, table.size), table)
    return np.where(inside, out, 0.0)


def dprime_for_pc_fast(pc, m: int) -> np.ndarray:
    """Inverse of :func:`pc_mafc_fast` (array in and out); Pc at or below 1/M gives 0, at 1 gives 12."""
    table = _pc_table(int(m))
    grid = np.linspace(0.0, DPRIME_MAX, table.size)
    return np.interp(np.asarray(pc, dtype=float), table, grid)


@lru_cache(maxsize=256)
def _dprime_for(pc: float, m: int) -> float:
    """:func:`scorer.observer.mafc.dprime_for_pc` (exact), cached for the few criteria a run asks for."""
    return dprime_for_pc(pc, m)


# --------------------------------------------------------------------------- batch ML fit of k
def _loglik_p(p: np.ndarray, y: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Binomial log-likelihood without the combinatorial constant, summed over the last axis."""
    p = np.clip(p, _EPS, 1.0 - _EPS)
    return np.sum(y * np.log(p) + (n - y) * np.log1p(-p), axis=-1)


def _k_bounds(levels: np.ndarray) -> tuple[float, float]:
    """Search range for k: from d′ = 0.01 at the largest contrast to d′ = 12 at the smallest positive one."""
    pos = levels[levels > 0]
    if pos.size == 0:
        return 1e-6, 1.0
    return 0.01 / pos.max(), DPRIME_MAX / pos.min()


def fit_k_batch(
    levels,
    y,
    n,
    m_alternatives: int,
    lapse: float = 0.0,
    guess_rate: float | None = None,
    n_grid: int = 121,
    n_golden: int = 44,
    center: float | None = None,
    chunk_cells: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-likelihood k of the M-AFC form for many data sets at once.

    Parameters
    ----------
    levels : (L,) contrasts shared by all data sets.
    y, n : (B, L) correct counts and trial counts, one row per data set (e.g. bootstrap resamples).
    m_alternatives, lapse, guess_rate : as in :func:`scorer.observer.psychometric.fit_psychometric`
        (lapse fixed here).
    chunk_cells : most grid cells (rows × grid points × levels) evaluated at once; default
        :data:`GRID_CHUNK_CELLS`.  Rows are fitted in chunks of that size (at least one row per chunk),
        so memory is bounded by the chunk, not by B; the results do not depend on it.

    Returns
    -------
    k : (B,) estimates; at_bound : (B,) bool, True where the estimate sits at the search
    bound (all-correct or chance-level data: the likelihood has no interior maximum).

    A coarse grid in log k finds the best cell for every row (robust to a flat or
    multi-modal likelihood), then a golden-section search refines within the
    neighbouring cells to ~1e-9 in log k.  With ``center`` (e.g. the full-data estimate
    when fitting bootstrap resamples) a local grid of 33 points over center·e^(±2) is
    searched first; rows whose best point is at the local grid's edge are refitted
    with the full grid.
    """
    if center is not None and np.isfinite(center) and center > 0:
        y2 = np.atleast_2d(np.asarray(y, dtype=float))
        n2 = np.atleast_2d(np.asarray(n, dtype=float))
        lo_f, hi_f = np.log(_k_bounds(np.asarray(levels, dtype=float)))
        lo_c, hi_c = max(np.log(center) - 2.0, lo_f), min(np.log(center) + 2.0, hi_f)
        k, at_b = _fit_k_grid(
            levels,
            y2,
            n2,
            m_alternatives,
            lapse,
            guess_rate,
            np.linspace(lo_c, hi_c, 33),
            n_golden - 8,
            (lo_f, hi_f),
            chunk_cells,
        )
        edge = ((np.log(k) - lo_c < 0.13) & (lo_c > lo_f)) | ((hi_c - np.log(k) < 0.13) & (hi_c < hi_f))
        if edge.any():
            k_e, b_e = fit_k_batch(
                levels, y2[edge], n2[edge], m_alternatives, lapse, guess_rate, n_grid, n_golden, chunk_cells=chunk_cells
            )
            k, at_b = k.copy(), at_b.copy()
            k[edge], at_b[edge] = k_e, b_e
        return k, at_b
    levels = np.asarray(levels, dtype=float)
    lo, hi = np.log(_k_bounds(levels))
    grid = np.linspace(lo, hi, n_grid)
    return _fit_k_grid(levels, y, n, m_alternatives, lapse, guess_rate, grid, n_golden, (lo, hi), chunk_cells)


def _fit_k_grid(levels, y, n, m_alternatives, lapse, guess_rate, grid, n_golden, bounds, chunk_cells=None):
    """:func:`_fit_k_rows` on chunks of rows holding at most ``chunk_cells`` grid cells each."""
    levels = np.asarray(levels, dtype=float)
    y = np.atleast_2d(np.asarray(y, dtype=float))
    n = np.atleast_2d(np.asarray(n, dtype=float))
    cells = GRID_CHUNK_CELLS if chunk_cells is None else int(chunk_cells)
    rows = max(1, cells // (grid.size * max(levels.size, 1)))
    if y.shape[0] <= rows:
        return _fit_k_rows(levels, y, n, m_alternatives, lapse, guess_rate, grid, n_golden, bounds)
    k = np.empty(y.shape[0])
    at_bound = np.empty(y.shape[0], dtype=bool)
    for s in range(0, y.shape[0], rows):
        part = slice(s, s + rows)
        k[part], at_bound[part] = _fit_k_rows(
            levels, y[part], n[part], m_alternatives, lapse, guess_rate, grid, n_golden, bounds
        )
    return k, at_bound


def _fit_k_rows(levels, y, n, m_alternatives, lapse, guess_rate, grid, n_golden, bounds):
    """Grid search then golden-section refinement of log k for every row of ``y``, ``n`` (2-D) at once."""
    m = int(m_alternatives)
    gamma = 1.0 / m if guess_rate is None else float(guess_rate)
    lo, hi = bounds
    n_grid = grid.size
    step = grid[1] - grid[0]

    def ll(logk):  # logk (B,) or (B, G) -> same shape
        logk = np.asarray(logk)
        d = np.exp(logk)[..., None] * levels
        p = (1.0 - lapse) * pc_mafc_fast(d, m) + lapse * gamma
        return _loglik_p(p, y if logk.ndim == 1 else y[:, None, :], n if logk.ndim == 1 else n[:, None, :])

    vals = ll(np.broadcast_to(grid, (y.shape[0], n_grid)))
    best = np.argmax(vals, axis=1)
    a = np.maximum(grid[best] - step, lo)
    b = np.minimum(grid[best] + step, hi)
    g = (np.sqrt(5.0) - 1.0) / 2.0
    x1, x2 = b - g * (b - a), a + g * (b - a)
    f1, f2 = ll(x1), ll(x2)
    for _ in range(n_golden):
        left = f1 >= f2  # the maximum lies in [a, x2], else in [x1, b]
        b = np.where(left, x2, b)
        a = np.where(left, a, x1)
        x1_new = np.where(left, b - g * (b - a), x2)
        x2_new = np.where(left, x1, a + g * (b - a))
        f_new = ll(np.where(left, x1_new, x2_new))
        f1, f2 = np.where(left, f_new, f2), np.where(left, f1, f_new)
        x1, x2 = x1_new, x2_new
    logk = 0.5 * (a + b)
    # a likelihood that is as high at a search bound as at the estimate has no interior
    # maximum (all correct, or chance performance): report the bound itself
    cand = np.stack([logk, np.full_like(logk, lo), np.full_like(logk, hi)], axis=1)
    cvals = ll(cand)
    flat_lo = cvals[:, 1] >= cvals[:, 0] - 1e-7
    flat_hi = cvals[:, 2] >= cvals[:, 0] - 1e-7
    logk = np.where(flat_hi, hi, np.where(flat_lo, lo, logk))
    at_bound = flat_lo | flat_hi | (logk - lo < 1e-6) | (hi - logk < 1e-6)
    return np.exp(logk), at_bound
