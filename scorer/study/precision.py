"""How many trials per reader per cell a study needs for a wanted precision of the threshold, by simulation.

Invented readers whose true thresholds spread log-normally around an expected threshold (between-reader
coefficient of variation ``cv_between``) answer M-AFC trials placed by the study's own rule
(:mod:`scorer.study.adaptive`: Psi, QUEST or constant stimuli) on the plate's contrast levels.  Their
answers follow the linear-observer M-AFC function Pc = (1 − λ_r)·Pc_M(d′_T·C/C_T) + λ_r/M (Green & Swets
1966).  After every trial each reader's posterior of ln C_T gives a 95 % credible interval; with a broad
prior it matches the likelihood interval of the answers (Bernstein–von Mises; checked for coverage in
``tests/test_adaptive.py``).  The plan is the smallest number of trials per reader per cell from which on

* ``n_readers=None`` (per reader): a share ``assurance`` of the simulated readers have an interval of
  half-width (in ln threshold) at most ``half_width_ln``;
* ``n_readers=R`` (pooled): the interval of the mean ln threshold of R readers, t_{R−1} ·
  √(σ_b² + mean within-reader variance)/√R, is that narrow (σ_b = the between-reader SD of ln C_T).

A simulation study in the sense of Burton et al. (2006): the rule under test, a stated generator, a stated
criterion, a seed.

References
----------
.. [1] Burton, A., Altman, D. G., Royston, P. & Holder, R. L. "The design of simulation studies in medical
       statistics", Statistics in Medicine 25 (2006).
.. [2] Kontsevich, L. L. & Tyler, C. W. Vision Research 39 (1999); Watson, A. B. & Pelli, D. G. Perception &
       Psychophysics 33 (1983) (the placement rules, :mod:`scorer.study.adaptive`).
.. [3] Green, D. M. & Swets, J. A. *Signal Detection Theory and Psychophysics* (1966).
(all in docs/references.md)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats as sps

from scorer.errors import LimenError
from scorer.observer.mafc_fast import _dprime_for, pc_mafc_fast
from scorer.study.adaptive import DEFAULT_LAPSE, _choose, _logsumexp, _prob, _quantiles, new_state


@dataclass
class PrecisionPlan:
    """Trials per reader per cell needed for the wanted CI half-width, and the simulated curve behind it.

    n_trials : the plan (None when ``n_max`` trials do not reach it; ``notes`` say what to change).
    curve : per number of trials n: share of simulated readers reaching the half-width (``share_reaching``),
        their median half-width, and the pooled half-width for ``n_readers`` readers (NaN per reader).
    """

    method: str
    half_width_ln: float
    ci: float
    assurance: float
    n_readers: int | None
    n_trials: int | None
    curve: pd.DataFrame
    levels: tuple
    m_alternatives: int
    threshold: float
    cv_between: float
    reader_lapse: float
    n_sim: int
    seed: int
    notes: list = field(default_factory=list)
    max_per_level: int | None = None

    def to_json(self) -> dict:
        step = max(1, len(self.curve) // 100)
        rows = self.curve[(self.curve["n"] % step == 0) | (self.curve["n"] == (self.n_trials or -1))]
        return {
            "method": self.method,
            "half_width_ln": self.half_width_ln,
            "ci": self.ci,
            "assurance": self.assurance,
            "n_readers": self.n_readers,
            "n_trials": self.n_trials,
            "levels": list(self.levels),
            "m_alternatives": self.m_alternatives,
            "threshold": self.threshold,
            "cv_between": self.cv_between,
            "reader_lapse": self.reader_lapse,
            "n_sim": self.n_sim,
            "seed": self.seed,
            "max_per_level": self.max_per_level,
            "curve": rows.to_dict("records"),
            "notes": self.notes,
            "generator": "simulated linear-observer readers, scorer/study/precision.py",
        }


def trials_for_precision(
    levels,
    m_alternatives: int,
    half_width_ln: float = 0.2,
    *,
    method: str = "psi",
    threshold: float | None = None,
    cv_between: float = 0.15,
    reader_lapse: float = 0.0,
    n_readers: int | None = None,
    ci: float = 0.95,
    assurance: float = 0.8,
    n_max: int = 2000,
    n_sim: int = 200,
    seed: int = 0,
    lapse: float = DEFAULT_LAPSE,
    criterion_pc: float | None = None,
    prior_threshold: float | None = None,
    prior_sd_ln: float | None = None,
    max_per_level: int | None = None,
    progress=None,
) -> PrecisionPlan:
    """Trials per reader per cell for a ``ci`` interval of half-width ``half_width_ln`` in ln threshold.

    Parameters
    ----------
    levels, m_alternatives : the plate's contrasts for the cell's diameter, and M.
    half_width_ln : wanted half-width of the interval of ln C_T (0.2: about ±20 %).
    method : placement rule (``"psi"``, ``"quest"``, ``"constant"``; :mod:`scorer.study.adaptive`).
    threshold : expected (median) reader threshold; default the geometric centre of the levels.
    cv_between : between-reader coefficient of variation of the threshold (log-normal).
    reader_lapse : lapse rate of the simulated readers; ``lapse`` is the placement model's.
    n_readers : None for the per-reader plan; R for the pooled plan (mean ln threshold of R readers).
    assurance : share of simulated readers that must reach the half-width (per-reader plan).
    n_max, n_sim, seed : most trials tried, simulated readers, seed.
    max_per_level : trials a reader can have at one level of the cell (a study shows a reader each region once:
        the images of the detector × the targets at that contrast); None for no limit.  The rule then chooses
        among the levels with trials left, as the web app does, and a reader who has used every level stops.
    progress : optional callable(done, total).
    """
    if not (np.isfinite(half_width_ln) and half_width_ln > 0):
        raise LimenError(f"the wanted half-width must be a positive number (ln units), got {half_width_ln}")
    if not 0 < ci < 1 or not 0 < assurance < 1:
        raise LimenError("ci and assurance must lie between 0 and 1")
    if not (np.isfinite(cv_between) and cv_between >= 0):
        raise LimenError(f"cv_between must be a number ≥ 0, got {cv_between}")
    if not 0 <= reader_lapse < 1:
        raise LimenError(f"reader_lapse must lie in [0, 1), got {reader_lapse}")
    if n_readers is not None and int(n_readers) < 2:
        raise LimenError(f"a pooled plan needs at least 2 readers, got {n_readers}")
    if int(n_max) < 1 or int(n_sim) < 2:
        raise LimenError("n_max must be at least 1 and n_sim at least 2")
    if max_per_level is not None and int(max_per_level) < 1:
        raise LimenError(f"max_per_level must be at least 1, got {max_per_level}")
    s0 = new_state(
        levels,
        m_alternatives,
        method,
        criterion_pc=criterion_pc,
        lapse=lapse,
        prior_threshold=prior_threshold,
        prior_sd_ln=prior_sd_ln,
    )
    if method == "constant" and len(s0.levels) < 2:
        raise LimenError("a precision plan needs at least 2 contrast levels")
    t = s0._table
    m = s0.m_alternatives
    ln_lv = t.ln_levels
    ct = float(threshold) if threshold is not None else math.exp(float(ln_lv.mean()))
    if not (np.isfinite(ct) and ct > 0):
        raise LimenError(f"threshold must be a positive contrast, got {threshold}")
    n_max, n_sim = int(n_max), int(n_sim)
    rng = np.random.default_rng(seed)
    sigma_b = math.sqrt(math.log1p(cv_between**2))
    theta = math.log(ct) + sigma_b * rng.standard_normal(n_sim)
    d_t = _dprime_for(s0.criterion_pc, m)
    p_true = (1 - reader_lapse) * pc_mafc_fast(d_t * np.exp(ln_lv[None, :] - theta[:, None]), m) + reader_lapse / m
    lp = np.repeat(s0._log_post[None], n_sim, axis=0)
    counts = np.zeros((n_sim, ln_lv.size), np.int64)
    allowed = np.ones_like(counts, dtype=bool)
    rows_idx = np.arange(n_sim)
    a = 0.5 * (1 - ci)
    tq = sps.t.ppf(0.5 + ci / 2, int(n_readers) - 1) if n_readers else float("nan")
    rec, first_ok = [], None
    if max_per_level is not None:
        n_max = min(n_max, int(max_per_level) * ln_lv.size)  # every region of the cell shown once
    for n in range(1, n_max + 1):
        if max_per_level is not None:
            allowed = counts < int(max_per_level)
        idx = _choose(method, lp, counts, t, rng, allowed)
        correct = rng.random(n_sim) < p_true[rows_idx, idx]
        lp = lp + np.where(correct[:, None], t.log_p[idx], t.log_q[idx])
        lp -= _logsumexp(lp)[:, None]
        counts[rows_idx, idx] += 1
        w = _prob(lp)
        hw = 0.5 * (_quantiles(t.grid, w, 1 - a) - _quantiles(t.grid, w, a))
        share = float(np.mean(hw <= half_width_ln))
        pooled = float("nan")
        if n_readers:
            mean = np.einsum("sg,g->s", w, t.grid)
            var_w = np.maximum(np.einsum("sg,g->s", w, t.grid**2) - mean**2, 0.0)
            pooled = float(tq * math.sqrt((sigma_b**2 + var_w.mean()) / int(n_readers)))
        rec.append((n, share, float(np.median(hw)), pooled))
        ok = pooled <= half_width_ln if n_readers else share >= assurance
        if not ok:
            first_ok = None
        elif first_ok is None:
            first_ok = n
        if progress is not None:
            progress(n, n_max)
        if first_ok is not None and n - first_ok >= max(20, first_ok // 4):
            break  # has held for a quarter of the way again: the curve only falls further in expectation
    curve = pd.DataFrame(rec, columns=["n", "share_reaching", "median_half_width_ln", "pooled_half_width_ln"])
    notes = []
    if first_ok is None:
        what = (
            f"{ci:.0%} CI of ±{half_width_ln:g} (ln) for the pooled threshold of {n_readers} readers"
            if n_readers
            else f"{ci:.0%} CI of ±{half_width_ln:g} (ln) for {assurance:.0%} of readers"
        )
        cap = f" ({max_per_level} per contrast level: the regions of the cell)" if max_per_level is not None else ""
        notes.append(f"{n_max} trials per reader per cell{cap} with the {method} rule do not give a {what}")
        if n_readers and tq * sigma_b / math.sqrt(int(n_readers)) >= half_width_ln:
            notes.append(
                f"readers differ (CV {cv_between:.0%}): with {n_readers} readers no number of trials narrows the "
                f"pooled CI below ±{tq * sigma_b / math.sqrt(int(n_readers)):.2f} (ln); add readers"
            )
        elif max_per_level is not None and n_max == int(max_per_level) * ln_lv.size:
            notes.append("add images (each reader sees each region once), or widen the wanted interval")
        else:
            notes.append(
                "add trials, widen the wanted interval, use an adaptive rule, or use a plate with more contrast "
                "levels near the expected threshold"
            )
    return PrecisionPlan(
        method=method,
        half_width_ln=float(half_width_ln),
        ci=float(ci),
        assurance=float(assurance),
        n_readers=int(n_readers) if n_readers else None,
        n_trials=first_ok,
        curve=curve,
        levels=s0.levels,
        m_alternatives=m,
        threshold=ct,
        cv_between=float(cv_between),
        reader_lapse=float(reader_lapse),
        n_sim=n_sim,
        seed=int(seed),
        notes=notes,
        max_per_level=int(max_per_level) if max_per_level is not None else None,
    )
