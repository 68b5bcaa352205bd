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
the criterion proportion correct (Pc_M at the default d′_T, :func:`scorer.observer.mafc.criterion_for`, unless given):
lapses describe inattention, not sensitivity (Wichmann & Hill 2001, part I).
``threshold(..., lapse_adjusted=True)`` instead solves the fitted function
including the lapse.  With ``λ = 0`` both are the same.

For speed, ``Pc_M`` is read from a table and the M-AFC form's k is fitted by a vectorised grid
and golden-section search (:mod:`scorer.observer.mafc_fast`).

Confidence intervals: :meth:`PsychometricFit.threshold_ci` gives a profile
likelihood-ratio interval; :func:`scorer.observer.psychometric_bootstrap.bootstrap_threshold`
resamples units (images, or readers and images within readers) and gives percentile intervals
(Efron & Tibshirani 1993).

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
from typing import Callable, Sequence

import numpy as np
from scipy import optimize, stats
from scipy.special import expit, gammaln, logit

from scorer.errors import LimenError
from scorer.observer.mafc import criterion_for
from scorer.observer.mafc_fast import _EPS, _dprime_for, _k_bounds, _loglik_p, fit_k_batch, pc_mafc_fast

LAPSE_MAX = 0.1  # a fitted lapse rate is kept within [0, LAPSE_MAX]

FORMS = ("mafc", "logistic")


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
        p = criterion_for(self.m_alternatives, criterion_pc)
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

        Default criterion: Pc_M at the default detectability d′_T (:func:`scorer.observer.mafc.criterion_for`).
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
        p = criterion_for(self.m_alternatives, criterion_pc)
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
