"""Maximum-likelihood psychometric functions for M-alternative forced choice, with CIs.

Two forms are offered for proportion correct ``Pc`` against contrast ``C``
(a fraction), with guess rate ``γ`` (``1/M`` unless given) and lapse rate ``λ``:

``form="mafc"`` (the default; one parameter ``k`` per call)
    The linear-observer form.  A linear observer's d′ grows in proportion to
    contrast, d′ = k·C, so its proportion correct follows the M-AFC integral::

        Pc(C) = (1 − λ) · Pc_M(k·C) + λ · γ

    where ``Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx`` (Green & Swets 1966).  A lapse
    is a trial on which the observer guesses whatever the stimulus; the
    lapse-free observer is ``Pc_M(k·C)``.
``form="logistic"`` (documented alternative)
    ``Pc(C) = γ + (1 − γ − λ) / (1 + exp(−β (log10 C − α)))`` with parameters
    α (log10 contrast at the midpoint) and β (slope per decade).  For a linear
    observer this form puts the threshold about 10 % low (docs/references.md), so it
    is not the default.  With γ = 0 and λ = 0 it is a plain logistic regression.

The lapse rate is fixed at ``lapse`` when a number is given, or fitted within
[0, 0.1] when ``lapse=None`` (Wichmann & Hill 2001, part I).

The threshold contrast is, by default, where the *lapse-free* function reaches
the criterion proportion correct (halfway between chance and 1 unless given):
lapses describe inattention, not sensitivity (Wichmann & Hill 2001, part I).
``threshold(..., lapse_adjusted=True)`` instead solves the fitted function
including the lapse.  With ``λ = 0`` both are the same.

For speed, ``Pc_M`` is tabulated once per M on d′ ∈ [0, 12] (computed by a
dense trapezoid rule on the integral, which converges exponentially for this
smooth, Gaussian-weighted integrand, then refined by a cubic spline to a fine
grid and read by linear interpolation); its accuracy against the adaptive
quadrature in :func:`scorer.observer.mafc.pc_mafc` is checked to 1e-6 in the tests.

Confidence intervals: :meth:`PsychometricFit.threshold_ci` gives a profile
likelihood-ratio interval; :func:`bootstrap_threshold` resamples units (images,
or readers and images within readers) and gives percentile intervals
(Efron & Tibshirani 1993).  The bootstrap fits every resample at once
(vectorised over resamples) for the one-parameter M-AFC form.

References
----------
.. [1] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
.. [2] Wichmann, F. A. & Hill, N. J. "The psychometric function: I. Fitting, sampling,
       and goodness of fit" and "II. Bootstrap-based confidence intervals and
       sampling", Perception & Psychophysics 63 (2001).
.. [3] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable, Sequence

import numpy as np
from scipy import interpolate, optimize, stats
from scipy.special import expit, gammaln, logit, ndtr

from scorer.errors import LimenError
from scorer.observer.mafc import dprime_for_pc, halfway_criterion

DPRIME_MAX = 12.0  # beyond this Pc_M is 1 to double precision for any practical M
LAPSE_MAX = 0.1  # a fitted lapse rate is kept within [0, LAPSE_MAX]
_FINE_STEP = 2e-4  # step of the fine lookup table in d′
_EPS = 1e-12  # probabilities are kept within [_EPS, 1 − _EPS] inside logs
#: most likelihood-grid cells (rows × grid points × contrast levels) a batch fit evaluates at once; larger batches
#: are fitted in chunks of rows.  The grid and its temporaries take about 60 bytes per cell (tracemalloc), so a
#: chunk holds about 30 MB whatever the number of rows (e.g. bootstrap resamples); every row is fitted on its own,
#: so chunking leaves the results unchanged to the last bit
GRID_CHUNK_CELLS = 500_000

FORMS = ("mafc", "logistic")


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
    return dprime_for_pc(pc, m)


# --------------------------------------------------------------------------- data helpers
def _aggregate(contrast, n_correct, n_trials) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    c = np.asarray(contrast, dtype=float).ravel()
    y = np.asarray(n_correct, dtype=float).ravel()
    n = np.asarray(n_trials, dtype=float).ravel()
    if not (c.size == y.size == n.size):
        raise LimenError(f"contrast, n_correct and n_trials differ in length ({c.size}, {y.size}, {n.size})")
    if c.size == 0:
        raise LimenError("no trials to fit")
    if not (np.all(np.isfinite(c)) and np.all(np.isfinite(y)) and np.all(np.isfinite(n))):
        raise LimenError("contrast and counts must be finite numbers")
    if np.any(c < 0):
        raise LimenError(f"contrast must not be negative (smallest {c.min():g})")
    if np.any(n < 0) or np.any(y < 0) or np.any(y > n):
        raise LimenError("counts must satisfy 0 ≤ n_correct ≤ n_trials")
    keep = n > 0
    c, y, n = c[keep], y[keep], n[keep]
    if c.size == 0:
        raise LimenError("no trials to fit (all n_trials are zero)")
    levels, inverse = np.unique(c, return_inverse=True)
    return levels, np.bincount(inverse, y, levels.size), np.bincount(inverse, n, levels.size)


def _binom_const(y: np.ndarray, n: np.ndarray) -> float:
    return float(np.sum(gammaln(n + 1) - gammaln(y + 1) - gammaln(n - y + 1)))


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
    m_alternatives, lapse, guess_rate : as in :func:`fit_psychometric` (lapse fixed here).
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


# --------------------------------------------------------------------------- result type
@dataclass
class PsychometricFit:
    """A fitted psychometric function.

    Attributes
    ----------
    form : "mafc" or "logistic".
    m_alternatives : number of alternatives M.
    params : fitted parameters: ``k`` (per unit contrast) for "mafc", ``alpha`` (log10 C)
        and ``beta`` (per decade) for "logistic"; always ``lapse`` and ``guess_rate``.
    loglik : maximised binomial log-likelihood (including the binomial coefficients).
    n_trials_total : number of trials fitted.
    converged : False when the optimum sits on a search bound (e.g. all trials correct)
        or the optimiser failed; ``note`` says which.
    stderr : approximate standard errors of the free parameters (observed information).
    """

    form: str
    m_alternatives: int
    params: dict
    loglik: float
    n_trials_total: int
    converged: bool
    note: str = ""
    stderr: dict = field(default_factory=dict)
    lapse_fixed: bool = True
    _levels: np.ndarray = field(default=None, repr=False)
    _y: np.ndarray = field(default=None, repr=False)
    _n: np.ndarray = field(default=None, repr=False)

    # .................................................................. evaluation
    @property
    def guess_rate(self) -> float:
        return float(self.params["guess_rate"])

    def pc(self, contrast):
        """Fitted proportion correct (lapse included) at ``contrast`` (fraction; scalar or array)."""
        out = _pc_model(self.form, self.params, self.m_alternatives, np.asarray(contrast, dtype=float))
        return float(out) if np.ndim(out) == 0 else out

    def _target_fraction(self, criterion_pc: float | None, lapse_adjusted: bool) -> float:
        p = halfway_criterion(self.m_alternatives) if criterion_pc is None else float(criterion_pc)
        gamma, lam = self.guess_rate, float(self.params["lapse"]) if lapse_adjusted else 0.0
        top = 1.0 - lam * (1.0 - gamma) if self.form == "mafc" else 1.0 - lam
        if not (gamma < p < top):
            raise LimenError(
                f"criterion proportion correct {p:g} must lie between the guess rate "
                f"{gamma:g} and the fitted ceiling {top:g}"
            )
        return p

    def threshold(self, criterion_pc: float | None = None, lapse_adjusted: bool = False) -> float:
        """Threshold contrast (fraction) where Pc reaches ``criterion_pc``.

        Default criterion: halfway between chance and 1 (:func:`scorer.observer.mafc.halfway_criterion`).
        By default the lapse-free function is solved; ``lapse_adjusted=True`` solves the
        fitted function including the lapse rate.
        """
        p = self._target_fraction(criterion_pc, lapse_adjusted)
        return _threshold_from_params(self.form, self.params, self.m_alternatives, p, lapse_adjusted)

    # .................................................................. intervals
    def threshold_ci(self, level: float = 0.95, criterion_pc: float | None = None) -> tuple[float, float]:
        """Profile likelihood-ratio confidence interval for the (lapse-free) threshold.

        The set of thresholds t for which 2·(loglik − max loglik given t) ≤ χ²₁(level)
        (Wilks' theorem).  Ends at a search bound are returned as the bound itself.
        """
        p = self._target_fraction(criterion_pc, False)
        t_hat = self.threshold(p)
        cut = 0.5 * stats.chi2.ppf(level, 1)
        best = self._profile_ll(np.log(t_hat), p)
        ref = max(best, self.loglik - _binom_const(self._y, self._n))
        lo_b, hi_b = self._log_threshold_bounds(p)

        def g(logt):
            return ref - self._profile_ll(logt, p) - cut

        def solve(a, b):
            try:
                if g(b) < 0:
                    return b
                return optimize.brentq(g, a, b, xtol=1e-7)
            except ValueError:
                return b

        x0 = float(np.log(t_hat))
        low = solve(x0, lo_b) if lo_b < x0 else x0
        high = solve(x0, hi_b) if hi_b > x0 else x0
        return float(np.exp(low)), float(np.exp(high))

    def _log_threshold_bounds(self, p: float) -> tuple[float, float]:
        levels = self._levels[self._levels > 0]
        span = np.log(levels.max() / levels.min()) if levels.size else 1.0
        return float(np.log(levels.min()) - 3 * span - 3), float(np.log(levels.max()) + 3 * span + 3)

    def _profile_ll(self, logt: float, p: float) -> float:
        """Max log-likelihood (no binomial constant) with the lapse-free threshold fixed at exp(logt)."""
        m, gamma = self.m_alternatives, self.guess_rate
        lv, y, n = self._levels, self._y, self._n
        t = float(np.exp(logt))
        if self.form == "mafc":
            k = _dprime_for(p, m) / t

            def ll_lapse(lam):
                return float(_loglik_p((1 - lam) * pc_mafc_fast(k * lv, m) + lam * gamma, y, n))

            if self.lapse_fixed:
                return ll_lapse(float(self.params["lapse"]))
            r = optimize.minimize_scalar(
                lambda lam: -ll_lapse(lam), bounds=(0.0, LAPSE_MAX), method="bounded", options={"xatol": 1e-7}
            )
            return float(-r.fun)
        # logistic: alpha = log10 t − logit(F_p)/beta ; profile over beta (and lapse)
        fp = logit((p - gamma) / (1 - gamma))
        x = np.log10(lv)

        def ll_beta(theta):
            beta = np.exp(theta[0])
            lam = float(self.params["lapse"]) if self.lapse_fixed else theta[1]
            alpha = np.log10(t) - fp / beta
            return float(_loglik_p(gamma + (1 - gamma - lam) * expit(beta * (x - alpha)), y, n))

        b0 = np.log(self.params["beta"])
        if self.lapse_fixed:
            r = optimize.minimize_scalar(
                lambda th: -ll_beta([th]),
                bounds=(np.log(0.01), np.log(1000.0)),
                method="bounded",
                options={"xatol": 1e-7},
            )
            return float(-r.fun)
        r = optimize.minimize(
            lambda th: -ll_beta(th),
            x0=[b0, float(self.params["lapse"])],
            bounds=[(np.log(0.01), np.log(1000.0)), (0.0, LAPSE_MAX)],
            method="L-BFGS-B",
        )
        return float(-r.fun)

    # .................................................................. display
    def summary(self, criterion_pc: float | None = None) -> str:
        """A plain-text summary table (model, fit quality, parameters, threshold with LR CI)."""
        lines = []
        width = 64
        lines.append("Psychometric function fit".center(width))
        lines.append("=" * width)
        p = halfway_criterion(self.m_alternatives) if criterion_pc is None else float(criterion_pc)
        left = [
            ("Form:", self.form),
            ("Alternatives M:", str(self.m_alternatives)),
            ("Guess rate:", f"{self.guess_rate:.4g}"),
            ("Lapse:", ("fitted" if not self.lapse_fixed else "fixed") + f" {self.params['lapse']:.4g}"),
        ]
        right = [
            ("Trials:", str(self.n_trials_total)),
            ("Levels:", str(len(self._levels))),
            ("Log-likelihood:", f"{self.loglik:.4f}"),
            ("Converged:", "yes" if self.converged else "no"),
        ]
        for (a, b), (c, d) in zip(left, right):
            lines.append(f"{a:<16}{b:>15}  {c:<16}{d:>15}")
        lines.append("-" * width)
        lines.append(f"{'':<14}{'estimate':>14}{'std err':>14}")
        for name, value in self.params.items():
            if name == "guess_rate":
                continue
            se = self.stderr.get(name)
            se_text = f"{se:.5g}" if se is not None and np.isfinite(se) else "—"
            lines.append(f"{name:<14}{value:>14.6g}{se_text:>14}")
        lines.append("-" * width)
        try:
            t = self.threshold(p)
            lo, hi = self.threshold_ci(0.95, p)
            lines.append(f"Threshold at Pc = {p:.4g}: {t:.5g}  (95 % LR CI {lo:.5g} – {hi:.5g})")
        except LimenError as exc:
            lines.append(f"Threshold at Pc = {p:.4g}: not available ({exc})")
        if self.note:
            lines.append(f"Note: {self.note}")
        lines.append("=" * width)
        return "\n".join(lines)


# --------------------------------------------------------------------------- model functions
def _pc_model(form: str, params: dict, m: int, contrast: np.ndarray) -> np.ndarray:
    gamma, lam = float(params["guess_rate"]), float(params["lapse"])
    if form == "mafc":
        return (1.0 - lam) * pc_mafc_fast(params["k"] * contrast, m) + lam * gamma
    with np.errstate(divide="ignore"):
        x = np.log10(contrast)
    return gamma + (1.0 - gamma - lam) * expit(params["beta"] * (x - params["alpha"]))


def _threshold_from_params(form: str, params: dict, m: int, p: float, lapse_adjusted: bool) -> float:
    gamma, lam = float(params["guess_rate"]), float(params["lapse"]) if lapse_adjusted else 0.0
    if form == "mafc":
        target = (p - lam * gamma) / (1.0 - lam)  # Pc_M value giving Pc = p with the lapse
        if not (1.0 / m < target < 1.0):
            raise LimenError(f"criterion {p:g} cannot be reached by the fitted function")
        return _dprime_for(float(target), m) / float(params["k"])
    frac = (p - gamma) / (1.0 - gamma - lam)
    return float(10 ** (params["alpha"] + logit(frac) / params["beta"]))


def _numeric_stderr(
    nll: Callable[[np.ndarray], float],
    x: np.ndarray,
    names: Sequence[str],
    transform: Sequence[Callable[[float], float]],
) -> dict:
    """Standard errors from the inverse observed information (finite-difference Hessian), delta method."""
    x = np.asarray(x, dtype=float)
    k = x.size
    h = 1e-4 * np.maximum(1.0, np.abs(x))
    hess = np.empty((k, k))
    for i in range(k):
        for j in range(i, k):
            ei, ej = np.eye(k)[i] * h[i], np.eye(k)[j] * h[j]
            v = (nll(x + ei + ej) - nll(x + ei - ej) - nll(x - ei + ej) + nll(x - ei - ej)) / (4 * h[i] * h[j])
            hess[i, j] = hess[j, i] = v
    try:
        cov = np.linalg.inv(hess)
        var = np.diag(cov)
    except np.linalg.LinAlgError:
        var = np.full(k, np.nan)
    out = {}
    for i, name in enumerate(names):
        if not np.isfinite(var[i]) or var[i] <= 0:
            out[name] = float("nan")
            continue
        # delta method: derivative of transform at x[i]
        d = (transform[i](x[i] + h[i]) - transform[i](x[i] - h[i])) / (2 * h[i])
        out[name] = float(abs(d) * np.sqrt(var[i]))
    return out


# --------------------------------------------------------------------------- fitting
def fit_psychometric(
    contrast,
    n_correct,
    n_trials,
    m_alternatives: int,
    form: str = "mafc",
    lapse: float | None = 0.0,
    guess_rate: float | None = None,
) -> PsychometricFit:
    """Maximum-likelihood (binomial) fit of a psychometric function to forced-choice counts.

    Parameters
    ----------
    contrast : array of contrasts (fractions, ≥ 0; > 0 for the logistic form), one per row.
    n_correct, n_trials : arrays of counts per row (rows with the same contrast are pooled;
        per-trial 0/1 data with ``n_trials=1`` is fine).
    m_alternatives : number of alternatives M (≥ 2).
    form : "mafc" (linear observer, one parameter k; default) or "logistic" (α, β).
    lapse : fixed lapse rate λ, or None to fit it within [0, 0.1].
    guess_rate : γ; default 1/M.  (γ = 0 with λ = 0 makes the logistic form a plain
        logistic regression on log10 C.)

    Returns
    -------
    PsychometricFit
        Never raises for degenerate but valid data (all correct, all at chance): the
        estimate then sits on a finite search bound, ``converged`` is False and
        ``note`` explains.

    References
    ----------
    Wichmann & Hill (2001) part I; Green & Swets (1966).
    """
    if form not in FORMS:
        raise LimenError(f"unknown psychometric form {form!r}; use one of {', '.join(FORMS)}")
    m = int(m_alternatives)
    if m < 2:
        raise LimenError(f"M-AFC needs at least 2 alternatives, got {m}")
    gamma = 1.0 / m if guess_rate is None else float(guess_rate)
    if not (0.0 <= gamma < 1.0):
        raise LimenError(f"guess rate must lie in [0, 1), got {gamma:g}")
    if lapse is not None and not (0.0 <= float(lapse) <= LAPSE_MAX):
        raise LimenError(f"lapse rate must lie in [0, {LAPSE_MAX}], got {lapse}")
    levels, y, n = _aggregate(contrast, n_correct, n_trials)
    const = _binom_const(y, n)
    notes = []
    if form == "mafc":
        if guess_rate is not None and abs(gamma - 1.0 / m) > 1e-12:
            raise LimenError("the M-AFC form has guess rate 1/M by construction; do not pass guess_rate")
        if np.all(levels == 0):
            raise LimenError("the M-AFC form needs at least one positive contrast")
        if lapse is not None:
            k, at_b = fit_k_batch(levels, y[None], n[None], m, float(lapse))
            k, at_b, lam = float(k[0]), bool(at_b[0]), float(lapse)
        else:

            def prof(lam):
                kk, _ = fit_k_batch(levels, y[None], n[None], m, lam)
                p = (1 - lam) * pc_mafc_fast(kk[0] * levels, m) + lam * gamma
                return -float(_loglik_p(p, y, n)), float(kk[0])

            r = optimize.minimize_scalar(
                lambda lam: prof(lam)[0], bounds=(0.0, LAPSE_MAX), method="bounded", options={"xatol": 1e-7}
            )
            # the bounded search never evaluates the end points exactly; check them
            cands = [(r.fun, float(r.x)), (prof(0.0)[0], 0.0), (prof(LAPSE_MAX)[0], LAPSE_MAX)]
            _, lam = min(cands)
            k_arr, at_arr = fit_k_batch(levels, y[None], n[None], m, lam)
            k, at_b = float(k_arr[0]), bool(at_arr[0])
        params = {"k": k, "lapse": lam, "guess_rate": gamma}
        p_fit = _pc_model(form, params, m, levels)
        ll = float(_loglik_p(p_fit, y, n)) + const
        if at_b:
            lo, hi = _k_bounds(levels)
            side = "upper" if abs(np.log(k / hi)) < abs(np.log(k / lo)) else "lower"
            notes.append(
                f"k at its {side} search bound "
                f"({'all or nearly all trials correct' if side == 'upper' else 'performance at chance'}); "
                "the threshold is only a bound"
            )
        free_x = [np.log(k)] + ([lam] if lapse is None else [])
        names = ["k"] + (["lapse"] if lapse is None else [])

        def nll(x):
            lam_ = x[1] if lapse is None else lam
            return -float(_loglik_p((1 - lam_) * pc_mafc_fast(np.exp(x[0]) * levels, m) + lam_ * gamma, y, n))

        tr = [np.exp] + ([lambda v: v] if lapse is None else [])
        stderr = _numeric_stderr(nll, np.array(free_x), names, tr) if not at_b else {"k": float("nan")}
        converged = not at_b
    else:
        if np.any(levels <= 0):
            raise LimenError("the logistic form needs positive contrasts (it uses log10 contrast)")
        x = np.log10(levels)
        lam_fixed = lapse is not None
        span = max(float(x.max() - x.min()), 0.1)
        a_lo, a_hi = float(x.min() - 2 * span - 1), float(x.max() + 2 * span + 1)
        b_lo, b_hi = 1e-2, 1e3

        def unpack(theta):
            a, lb = theta[0], theta[1]
            lam_ = float(lapse) if lam_fixed else theta[2]
            return a, np.exp(lb), lam_

        def nll_grad(theta):
            a, b, lam_ = unpack(theta)
            f = expit(b * (x - a))
            s = 1.0 - gamma - lam_
            p = np.clip(gamma + s * f, _EPS, 1 - _EPS)
            val = -np.sum(y * np.log(p) + (n - y) * np.log1p(-p))
            dp = -(y / p - (n - y) / (1 - p))  # d nll / d p
            fd = f * (1 - f)
            g = [np.sum(dp * s * fd * (-b)), np.sum(dp * s * fd * (x - a)) * b]
            if not lam_fixed:
                g.append(np.sum(dp * (-f)))
            return float(val), np.array(g)

        # start: grid over alpha (and a few slopes), take the best
        best = None
        lam0 = float(lapse) if lam_fixed else 0.01
        for a0 in np.linspace(x.min(), x.max(), 7) if x.size > 1 else [x[0]]:
            for b0 in (1.0, 3.0, 10.0):
                th = [a0, np.log(b0)] + ([] if lam_fixed else [lam0])
                v = nll_grad(th)[0]
                if best is None or v < best[0]:
                    best = (v, th)
        bounds = [(a_lo, a_hi), (np.log(b_lo), np.log(b_hi))] + ([] if lam_fixed else [(0.0, LAPSE_MAX)])
        res = optimize.minimize(
            nll_grad,
            x0=best[1],
            jac=True,
            method="L-BFGS-B",
            bounds=bounds,
            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000},
        )
        a, b, lam = unpack(res.x)
        params = {"alpha": float(a), "beta": float(b), "lapse": float(lam), "guess_rate": gamma}
        ll = -float(res.fun) + const
        tol_a, tol_b = 1e-6 * (a_hi - a_lo), 1e-6
        at_b = (
            abs(a - a_lo) < tol_a
            or abs(a - a_hi) < tol_a
            or abs(res.x[1] - np.log(b_lo)) < tol_b
            or abs(res.x[1] - np.log(b_hi)) < tol_b
        )
        if at_b:
            notes.append(
                "a parameter is at its search bound (no interior maximum: e.g. all trials correct, "
                "at chance, or a single contrast level); the threshold is only a bound"
            )
        if not res.success and not at_b:
            notes.append(f"optimiser: {res.message}")
        converged = bool(res.success) and not at_b
        names = ["alpha", "beta"] + ([] if lam_fixed else ["lapse"])
        tr = [lambda v: v, np.exp] + ([] if lam_fixed else [lambda v: v])
        stderr = _numeric_stderr(lambda th: nll_grad(th)[0], np.asarray(res.x), names, tr) if converged else {}
    if lapse is None and params["lapse"] >= LAPSE_MAX - 1e-6:
        notes.append(f"fitted lapse rate at its upper bound {LAPSE_MAX}")
    return PsychometricFit(
        form=form,
        m_alternatives=m,
        params=params,
        loglik=ll,
        n_trials_total=int(round(n.sum())),
        converged=converged,
        note="; ".join(notes),
        stderr=stderr,
        lapse_fixed=lapse is not None,
        _levels=levels,
        _y=y,
        _n=n,
    )


# --------------------------------------------------------------------------- bootstrap
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
    m_alternatives, criterion_pc, form, lapse : as in :func:`fit_psychometric`.
    weights : optional (n_boot, n_units) draw counts (e.g. from :func:`bootstrap_weights`
        with clusters, or :func:`stratified_weights`); default: units with replacement.
    fit_fn : optional ``fit_fn(levels, y, n) -> threshold`` replacing the built-in fit.

    The M-AFC form with a fixed lapse is fitted for all resamples at once (vectorised);
    other forms, or a custom ``fit_fn``, loop over resamples.
    """
    levels, y_u, n_u = units.levels, units.y, units.n
    y_all, n_all = y_u.sum(axis=0), n_u.sum(axis=0)
    keep = n_all > 0
    p = halfway_criterion(m_alternatives) if criterion_pc is None else float(criterion_pc)

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
