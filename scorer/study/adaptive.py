"""Adaptive trial placement for M-alternative forced-choice reader studies on a plate's discrete contrasts.

One :class:`AdaptiveState` per reader × cell (detector × diameter) holds what has been learnt about that
reader's threshold in that cell: the trials and correct answers at each of the plate's contrast levels for
the diameter, and the placement rule.  ``next_level(state, rng)`` says which level to show next,
``update(state, level, correct)`` returns the state after the answer.  Both are pure; the state is a
frozen dataclass that round-trips through JSON (:meth:`AdaptiveState.to_json`, :func:`state_from_json`)
so that a web app can store it between requests.

Psychometric model (the one Limen's threshold fits use, :mod:`scorer.observer.psychometric`)
--------------------------------------------------------------------------------------------
A linear observer's d′ grows in proportion to contrast, d′ = k·C, so in M-AFC::

    Pc(C) = (1 − λ)·Pc_M(k·C) + λ/M ,      Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx

(Green & Swets 1966; lapse λ as in Wichmann & Hill 2001, part I).  The threshold is where the lapse-free
function reaches the criterion Pc (Pc_M at the default d′_T unless given): C_T = d′_T/k.  The unknown
is θ = ln C_T; the posterior over θ lives on a uniform grid.  The prior is Gaussian in θ (broad by default:
centred on the plate's levels, SD half their ln span).  The lapse in the placement model (default 0.02)
keeps one inattentive error at a high contrast from ruling out every low threshold; the analysis of the
answers is separate (:mod:`scorer.study.analysis`) and is not changed by the rule that placed them.

Placement rules
---------------
``"psi"``
    The Psi method (Kontsevich & Tyler 1999): the next level is the one whose answer is expected to leave
    the least posterior entropy, E[H](C) = Σ_r p(r | C) H(θ | r, C), over the two outcomes r (correct,
    wrong).  The slope of the linear-observer function is fixed by M, so the posterior is over the
    threshold alone (the one-parameter case of the method).
``"quest"``
    QUEST (Watson & Pelli 1983): the next level is the one nearest (in ln contrast) to the posterior mode
    of the threshold, moved to the point of the psychometric function where one trial carries most
    Fisher information about θ (the "ideal sweat factor" placement of that paper), d′_opt/d′_T times the
    threshold.
``"constant"``
    The method of constant stimuli: every level equally often, in a random order (each pass over the
    levels is a random permutation).

No maintained library offers this psychometric model (M-AFC linear observer, Limen's criterion), and the
rules are a few lines of numpy each, so they are written here; ``tests/test_adaptive.py`` checks the Psi
choice against a brute-force expected-entropy computation with scipy.

References
----------
.. [1] Kontsevich, L. L. & Tyler, C. W. "Bayesian adaptive estimation of psychometric slope and threshold",
       Vision Research 39 (1999) 2729–2737.
.. [2] Watson, A. B. & Pelli, D. G. "QUEST: a Bayesian adaptive psychometric method", Perception &
       Psychophysics 33 (1983) 113–120.
.. [3] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
.. [4] Wichmann, F. A. & Hill, N. J. "The psychometric function: I. Fitting, sampling, and goodness of fit",
       Perception & Psychophysics 63 (2001).
(all in docs/references.md)
"""

from __future__ import annotations

import copy
import dataclasses
import math
from collections.abc import Hashable, Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property, lru_cache
from typing import TypeVar

import numpy as np

from scorer.errors import LimenError
from scorer.observer.mafc import criterion_for
from scorer.observer.mafc_fast import _dprime_for, dpc_mafc_fast, pc_mafc_fast
from scorer.observer.psychometric import LAPSE_MAX

METHODS = ("psi", "quest", "constant")
STATE_FORMAT = "limen-adaptive/1"
DEFAULT_LAPSE = 0.02  # lapse of the placement model (common practice: a few % of trials are inattentive)
GRID_POINTS = 401  # grid of ln threshold
GRID_MARGIN = 3.0  # the grid reaches this factor beyond the lowest and highest level
_EPS = 1e-12  # probabilities are kept within [_EPS, 1 − _EPS] inside logs
_TIE = 1e-12  # expected entropies this close count as a tie, broken at random


# =========================================================================== state
@dataclass(frozen=True)
class AdaptiveState:
    """What one reader's answers in one cell say about the reader's threshold there, and the placement rule.

    Attributes
    ----------
    method : ``"psi"``, ``"quest"`` or ``"constant"``.
    levels : the plate's contrast levels for the cell's diameter (fractions, ascending, distinct).
    m_alternatives : sites per target (M of M-AFC).
    criterion_pc : proportion correct that defines the threshold (of the lapse-free function).
    lapse : lapse rate of the placement model, in [0, 0.1].
    prior_ln_mean, prior_ln_sd : Gaussian prior of ln threshold.
    grid_points, grid_margin : the ln-threshold grid runs from ln(min level / margin) to ln(max level · margin).
    n_by_level, correct_by_level : trials and correct answers so far at each level (the posterior's
        sufficient statistics: the likelihood depends on the answers only through these counts).
    """

    method: str
    levels: tuple[float, ...]
    m_alternatives: int
    criterion_pc: float
    lapse: float
    prior_ln_mean: float
    prior_ln_sd: float
    grid_points: int
    grid_margin: float
    n_by_level: tuple[int, ...]
    correct_by_level: tuple[int, ...]

    def __post_init__(self):
        _validate(self)

    # ----------------------------------------------------------------- derived (cached; never serialised)
    @property
    def n_trials(self) -> int:
        return int(sum(self.n_by_level))

    @cached_property
    def _table(self) -> _Table:
        return _likelihood_table(
            self.levels, self.m_alternatives, self.criterion_pc, self.lapse, self.grid_points, self.grid_margin
        )

    @cached_property
    def _log_post(self) -> np.ndarray:
        """Normalised log posterior of ln threshold on the grid (read-only)."""
        t = self._table
        n, y = np.asarray(self.n_by_level, float), np.asarray(self.correct_by_level, float)
        z = (t.grid - self.prior_ln_mean) / self.prior_ln_sd
        lp = -0.5 * z * z + y @ t.log_p + (n - y) @ t.log_q
        lp = lp - _logsumexp(lp)
        lp.setflags(write=False)
        return lp

    def to_json(self) -> dict:
        """Plain JSON-ready dict (``"format": "limen-adaptive/1"``); :func:`state_from_json` reads it back."""
        d = {"format": STATE_FORMAT}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            d[f.name] = list(v) if isinstance(v, tuple) else v
        return d


@dataclass(frozen=True)
class _Table:
    grid: np.ndarray  # (G,) ln threshold
    log_p: np.ndarray  # (L, G) log P(correct | level, θ)
    log_q: np.ndarray  # (L, G) log P(wrong | level, θ)
    p: np.ndarray  # (L, G)
    ln_levels: np.ndarray  # (L,)
    h: np.ndarray  # (L, G) binary entropy of the answer, −P ln P − Q ln Q
    ln_offset_opt: float  # ln(d′_opt / d′_T): QUEST's placement relative to the threshold


@dataclass(frozen=True)
class ThresholdEstimate:
    """Posterior summary of one reader's threshold in one cell.

    threshold_contrast = exp(posterior mean of ln C_T); ci_low/ci_high the equal-tailed credible interval;
    half_width_ln = (ln ci_high − ln ci_low)/2; censored = "below"/"above" when the posterior mean lies outside
    the levels offered (the threshold is then only bounded by them), else "".
    """

    threshold_contrast: float
    mean_ln: float
    sd_ln: float
    ci_low: float
    ci_high: float
    half_width_ln: float
    n_trials: int
    censored: str

    def to_json(self) -> dict:
        return dataclasses.asdict(self)


def _validate(s: AdaptiveState) -> None:
    where = "adaptive state"
    if s.method not in METHODS:
        raise LimenError(f"{where}: method must be one of {', '.join(METHODS)}, got {s.method!r}")
    lv = np.asarray(s.levels, dtype=float)
    if lv.ndim != 1 or lv.size < 1 or not np.all(np.isfinite(lv)) or np.any(lv <= 0) or np.any(lv > 1):
        raise LimenError(f"{where}: levels must be contrasts in (0, 1], got {list(s.levels)}")
    if np.any(np.diff(lv) <= 0):
        raise LimenError(f"{where}: levels must be distinct and ascending, got {list(s.levels)}")
    if s.method != "constant" and lv.size < 2:
        raise LimenError(f"{where}: the {s.method} rule needs at least 2 contrast levels, got {lv.size}")
    if not isinstance(s.m_alternatives, int) or s.m_alternatives < 2:
        raise LimenError(f"{where}: m_alternatives must be an integer of at least 2, got {s.m_alternatives!r}")
    if not (1.0 / s.m_alternatives < s.criterion_pc < 1.0):
        raise LimenError(f"{where}: criterion_pc must lie between 1/{s.m_alternatives} and 1, got {s.criterion_pc}")
    if not (0.0 <= s.lapse <= LAPSE_MAX):
        raise LimenError(f"{where}: lapse must lie in [0, {LAPSE_MAX}], got {s.lapse}")
    if not (math.isfinite(s.prior_ln_mean) and math.isfinite(s.prior_ln_sd) and s.prior_ln_sd > 0):
        raise LimenError(f"{where}: the prior needs a finite mean and a positive SD of ln threshold")
    if not isinstance(s.grid_points, int) or s.grid_points < 11:
        raise LimenError(f"{where}: grid_points must be an integer of at least 11, got {s.grid_points!r}")
    if not (math.isfinite(s.grid_margin) and s.grid_margin >= 1.0):
        raise LimenError(f"{where}: grid_margin must be at least 1, got {s.grid_margin}")
    n, y = s.n_by_level, s.correct_by_level
    if len(n) != lv.size or len(y) != lv.size:
        raise LimenError(f"{where}: n_by_level and correct_by_level need one count per level ({lv.size})")
    for a, b in zip(n, y):
        if not (isinstance(a, int) and isinstance(b, int) and 0 <= b <= a):
            raise LimenError(f"{where}: counts must be integers with 0 ≤ correct ≤ trials, got {a!r}, {b!r}")


def new_state(
    levels: Iterable[float],
    m_alternatives: int,
    method: str = "psi",
    *,
    criterion_pc: float | None = None,
    lapse: float = DEFAULT_LAPSE,
    prior_threshold: float | None = None,
    prior_sd_ln: float | None = None,
    grid_points: int = GRID_POINTS,
    grid_margin: float = GRID_MARGIN,
) -> AdaptiveState:
    """A state with no trials yet.

    Parameters
    ----------
    levels : the plate's contrast levels for this cell's diameter (any order; duplicates are merged).
    m_alternatives : M of M-AFC at this diameter.
    method : ``"psi"`` (default), ``"quest"`` or ``"constant"``.
    criterion_pc : threshold criterion; default Pc_M at the default detectability d′_T (criterion_for).
    lapse : lapse rate of the placement model.
    prior_threshold, prior_sd_ln : prior median threshold (contrast) and SD of its ln; default the geometric
        centre of the levels and half the ln span of the levels (at least ln 2).
    """
    try:
        lv = np.unique(np.asarray(list(levels), dtype=float))
    except (TypeError, ValueError):
        raise LimenError("adaptive state: levels must be numbers") from None
    m = int(m_alternatives)
    crit = criterion_for(m, criterion_pc) if m >= 2 else criterion_pc
    ok = lv.size and np.all(np.isfinite(lv)) and np.all(lv > 0)
    ln_lv = np.log(lv) if ok else np.zeros(1)
    mean = math.log(prior_threshold) if prior_threshold else float(ln_lv.mean() if ok else 0.0)
    if prior_threshold is not None and not (np.isfinite(prior_threshold) and prior_threshold > 0):
        raise LimenError(f"adaptive state: prior_threshold must be a positive contrast, got {prior_threshold}")
    sd = float(prior_sd_ln) if prior_sd_ln is not None else max(0.5 * float(np.ptp(ln_lv)), math.log(2.0))
    return AdaptiveState(
        method=str(method),
        levels=tuple(float(v) for v in lv),
        m_alternatives=m,
        criterion_pc=float(crit) if crit is not None else float("nan"),
        lapse=float(lapse),
        prior_ln_mean=float(mean),
        prior_ln_sd=sd,
        grid_points=int(grid_points),
        grid_margin=float(grid_margin),
        n_by_level=(0,) * lv.size,
        correct_by_level=(0,) * lv.size,
    )


def state_from_json(data, source="adaptive state") -> AdaptiveState:
    """Read a state written by :meth:`AdaptiveState.to_json`; a bad one raises a one-line LimenError."""
    if not isinstance(data, Mapping) or data.get("format") != STATE_FORMAT:
        raise LimenError(f"{source}: not a {STATE_FORMAT} state")
    names = [f.name for f in dataclasses.fields(AdaptiveState)]
    missing = [n for n in names if n not in data]
    if missing:
        raise LimenError(f"{source}: missing {', '.join(missing)}")
    extra = sorted(set(data) - set(names) - {"format"})
    if extra:
        raise LimenError(f"{source}: unknown key(s) {', '.join(extra)}")
    try:
        kw = {n: data[n] for n in names}
        kw["levels"] = tuple(float(v) for v in data["levels"])
        kw["n_by_level"] = tuple(_as_int(v) for v in data["n_by_level"])
        kw["correct_by_level"] = tuple(_as_int(v) for v in data["correct_by_level"])
        kw["m_alternatives"] = _as_int(data["m_alternatives"])
        kw["grid_points"] = _as_int(data["grid_points"])
        for n in ("criterion_pc", "lapse", "prior_ln_mean", "prior_ln_sd", "grid_margin"):
            kw[n] = float(data[n])
        kw["method"] = str(data["method"])
    except (TypeError, ValueError) as exc:
        raise LimenError(f"{source}: {exc}") from None
    try:
        return AdaptiveState(**kw)
    except LimenError as exc:
        raise LimenError(str(exc).replace("adaptive state", source, 1)) from None


def _as_int(v) -> int:
    if isinstance(v, bool) or not float(v).is_integer():
        raise ValueError(f"expected an integer, got {v!r}")
    return int(v)


# =========================================================================== model tables
@lru_cache(maxsize=256)
def _likelihood_table(levels, m, criterion_pc, lapse, grid_points, grid_margin) -> _Table:
    ln_lv = np.log(np.asarray(levels, float))
    grid = np.linspace(ln_lv[0] - math.log(grid_margin), ln_lv[-1] + math.log(grid_margin), grid_points)
    d_t = _dprime_for(float(criterion_pc), int(m))
    d = d_t * np.exp(ln_lv[:, None] - grid[None, :])  # d′ = k·C = d′_T · C / C_T
    p = (1.0 - lapse) * pc_mafc_fast(d, m) + lapse / m
    p = np.clip(p, _EPS, 1.0 - _EPS)
    # QUEST's placement: the d′ where one trial's Fisher information about ln C_T, (d·P′(d))²/(P(1 − P)), peaks
    dd = np.linspace(0.01, 8.0, 8000)
    pp = np.clip((1.0 - lapse) * pc_mafc_fast(dd, m) + lapse / m, _EPS, 1 - _EPS)
    info = ((1.0 - lapse) * dpc_mafc_fast(dd, m) * dd) ** 2 / (pp * (1 - pp))
    offset = math.log(dd[int(np.argmax(info))] / d_t)
    for a in (grid, p, ln_lv):
        a.setflags(write=False)
    log_p, log_q = np.log(p), np.log1p(-p)
    h = -(p * log_p + (1.0 - p) * log_q)
    for a in (log_p, log_q, h):
        a.setflags(write=False)
    return _Table(grid, log_p, log_q, p, ln_lv, h, offset)


def _prob(log_p: np.ndarray) -> np.ndarray:
    """exp(log_p) with values below e⁻²³⁰ (≈1e-100) set to 0: subnormal numbers would slow the matrix products
    a hundredfold and weigh nothing."""
    return np.where(log_p > -230.0, np.exp(np.maximum(log_p, -230.0)), 0.0)


def _logsumexp(a: np.ndarray, axis=-1):
    mx = np.max(a, axis=axis, keepdims=True)
    out = mx + np.log(np.sum(np.exp(a - mx), axis=axis, keepdims=True))
    return np.squeeze(out, axis=axis)


# =========================================================================== placement
def _expected_entropy(log_post: np.ndarray, t: _Table) -> np.ndarray:
    """E[H] after one more trial at each level, for each row of ``log_post`` (S, G) → (S, L), in nats.

    With posterior π, P = P(correct | level, θ), Q = 1 − P and p₁ = Σ π P, the posterior after a correct answer
    is πP/p₁ and after a wrong one πQ/p₀; weighting their entropies by p₁ and p₀ gives
    E[H] = H(π) + Σ_θ π h(P) − h(p₁), with h the binary entropy (the posterior entropy falls on average by the
    mutual information of θ and the answer).  The sums run in numpy's own loops (einsum), not BLAS: threaded
    BLAS on these small products was a hundred times slower on a busy machine.
    """
    post = _prob(log_post)
    h_now = -np.sum(post * np.where(post > 0, log_post, 0.0), axis=1, keepdims=True)
    p1 = np.clip(np.einsum("sg,lg->sl", post, t.p), _EPS, 1.0 - _EPS)
    mean_h = np.einsum("sg,lg->sl", post, t.h)
    return h_now + mean_h + p1 * np.log(p1) + (1.0 - p1) * np.log1p(-p1)


def _choose(method: str, log_post: np.ndarray, n: np.ndarray, t: _Table, rng, allowed: np.ndarray) -> np.ndarray:
    """Level index for each row: log_post (S, G), n (S, L) trials so far, allowed (S, L) bool → (S,)."""
    s = log_post.shape[0]
    if method == "quest":
        mode = t.grid[np.argmax(log_post, axis=1)]
        dist = np.abs(t.ln_levels[None, :] - (mode + t.ln_offset_opt)[:, None])
        return np.argmin(np.where(allowed, dist, np.inf), axis=1)
    if method == "psi":
        score = _expected_entropy(log_post, t)
        score = np.where(allowed, score, np.inf)
        best = score <= score.min(axis=1, keepdims=True) + _TIE
    else:  # constant stimuli: the least-shown levels, one of them at random (a random permutation per pass)
        cnt = np.where(allowed, n, np.iinfo(np.int64).max)
        best = cnt == cnt.min(axis=1, keepdims=True)
    key = np.where(best, rng.random((s, n.shape[1])), np.inf)
    return np.argmin(key, axis=1)


def _level_index(state: AdaptiveState, level: float) -> int:
    try:
        return state.levels.index(float(level))  # exact (the levels this module hands out)
    except (ValueError, TypeError):
        pass
    lv = np.asarray(state.levels)
    try:
        hit = np.flatnonzero(np.isclose(lv, float(level), rtol=1e-9, atol=0.0))
    except (TypeError, ValueError):
        hit = np.array([], int)
    if hit.size != 1:
        raise LimenError(f"adaptive state: contrast {level!r} is not one of the levels {list(state.levels)}")
    return int(hit[0])


def next_level(state: AdaptiveState, rng: np.random.Generator, allowed: Iterable[float] | None = None) -> float:
    """The contrast level to show next (one of ``state.levels``).

    ``allowed`` restricts the choice to some levels (e.g. those with regions the reader has not yet seen);
    ``rng`` breaks ties (Psi), and orders the levels (constant stimuli).
    """
    lv = np.asarray(state.levels)
    ok = np.ones(lv.size, bool)
    if allowed is not None:
        ok[:] = False
        for a in allowed:
            ok[_level_index(state, a)] = True
        if not ok.any():
            raise LimenError("adaptive state: no contrast level is allowed")
    if state.method == "constant":
        idx = _choose("constant", np.zeros((1, 1)), np.asarray([state.n_by_level]), None, rng, ok[None])
    else:
        idx = _choose(state.method, state._log_post[None], np.asarray([state.n_by_level]), state._table, rng, ok[None])
    return float(lv[int(idx[0])])


def update(state: AdaptiveState, level: float, correct) -> AdaptiveState:
    """The state after one answer at contrast ``level`` (``correct`` true or false)."""
    if isinstance(correct, (bool, np.bool_)) or correct in (0, 1):
        c = int(bool(correct))
    else:
        raise LimenError(f"adaptive state: correct must be true/false or 1/0, got {correct!r}")
    i = _level_index(state, level)
    n, y = list(state.n_by_level), list(state.correct_by_level)
    n[i] += 1
    y[i] += c
    # the state was validated when made and the new counts are valid by construction, so the copy skips
    # __post_init__; it keeps the cached likelihood table and recomputes the posterior from the counts
    new = copy.copy(state)
    new.__dict__.pop("_log_post", None)
    object.__setattr__(new, "n_by_level", tuple(n))
    object.__setattr__(new, "correct_by_level", tuple(y))
    return new


def expected_entropy(state: AdaptiveState) -> np.ndarray:
    """Expected posterior entropy (nats, on the ln-threshold grid) after one more trial at each level: the
    quantity the Psi rule minimises (Kontsevich & Tyler 1999)."""
    if len(state.levels) < 2:
        raise LimenError("adaptive state: the expected entropy needs at least 2 contrast levels")
    return _expected_entropy(state._log_post[None], state._table)[0]


def posterior(state: AdaptiveState) -> tuple[np.ndarray, np.ndarray]:
    """(grid of ln threshold, posterior probability on it)."""
    if len(state.levels) < 2:
        raise LimenError("adaptive state: the posterior needs at least 2 contrast levels")
    return state._table.grid.copy(), _prob(state._log_post)


def _quantiles(grid: np.ndarray, w: np.ndarray, a: float) -> np.ndarray:
    """The a-quantile of each row's distribution ``w`` (S, G) on ``grid`` (linear between grid points)."""
    cdf = np.cumsum(w, axis=1)
    cdf /= cdf[:, -1:]
    j = np.clip((cdf < a).sum(axis=1), 1, grid.size - 1)
    rows = np.arange(w.shape[0])
    c0, c1 = cdf[rows, j - 1], cdf[rows, j]
    f = np.clip((a - c0) / np.maximum(c1 - c0, 1e-300), 0.0, 1.0)
    out = grid[j - 1] + f * (grid[j] - grid[j - 1])
    return np.where(cdf[:, 0] >= a, grid[0], out)


def _summaries(grid: np.ndarray, log_post: np.ndarray, ci: float):
    """Posterior mean, SD and equal-tailed interval of ln threshold for each row of log_post (S, G)."""
    w = _prob(log_post)
    mean = np.einsum("sg,g->s", w, grid)
    sd = np.sqrt(np.maximum(np.einsum("sg,g->s", w, grid**2) - mean**2, 0.0))
    a = 0.5 * (1.0 - ci)
    return mean, sd, _quantiles(grid, w, a), _quantiles(grid, w, 1.0 - a)


def estimate(state: AdaptiveState, ci: float = 0.95) -> ThresholdEstimate:
    """Posterior mean, SD and credible interval of the threshold (the state's own summary; a study's reported
    thresholds come from :func:`scorer.study.analyse_study`)."""
    if not 0 < ci < 1:
        raise LimenError(f"ci must lie between 0 and 1, got {ci}")
    grid, _ = posterior(state)
    mean, sd, lo, hi = (float(v[0]) for v in _summaries(grid, state._log_post[None], ci))
    ln_lv = state._table.ln_levels
    censored = "below" if mean < ln_lv[0] else "above" if mean > ln_lv[-1] else ""
    return ThresholdEstimate(
        threshold_contrast=math.exp(mean),
        mean_ln=mean,
        sd_ln=sd,
        ci_low=math.exp(lo),
        ci_high=math.exp(hi),
        half_width_ln=0.5 * (hi - lo),
        n_trials=state.n_trials,
        censored=censored,
    )


# =========================================================================== interleaving cells
_Cell = TypeVar("_Cell", bound=Hashable)  # a cell key, e.g. (detector, diameter_mm)


def next_cell(states: Mapping[_Cell, AdaptiveState], rng: np.random.Generator, trials_per_cell) -> _Cell | None:
    """The cell (key of ``states``, e.g. (detector, diameter)) whose trial comes next, or None when every cell
    has its trials.

    Cells are interleaved in a random order that stays balanced: the next cell is drawn at random among the
    unfinished cells with the fewest trials so far, so each pass over the cells is a random permutation and a
    reader cannot tell from the order which detector or diameter comes next.  ``trials_per_cell`` is one
    number or a mapping per cell.
    """
    keys = list(states)
    if not keys:
        raise LimenError("adaptive interleaving needs at least one cell")
    if isinstance(trials_per_cell, Mapping):
        want = [int(trials_per_cell[k]) for k in keys]
    else:
        want = [int(trials_per_cell)] * len(keys)
    done = np.array([states[k].n_trials for k in keys])
    open_ = done < np.asarray(want)
    if not open_.any():
        return None
    fewest = np.flatnonzero(open_ & (done == done[open_].min()))
    return keys[int(fewest[rng.integers(fewest.size)])]


def plate_levels(layout) -> dict[float, tuple[tuple[float, ...], int]]:
    """{diameter_mm: (contrast levels ascending, M)} of a phantom layout (:class:`scorer.phantom.Layout`)."""
    out = {}
    for d in layout.diameters_mm:
        ts = layout.targets_with_diameter(d)
        ms = {t.m_alternatives for t in ts}
        if len(ms) != 1:
            raise LimenError(f"layout: targets of {d:g} mm have different numbers of sites ({sorted(ms)})")
        out[float(d)] = (tuple(sorted({float(t.contrast) for t in ts})), ms.pop())
    return out
