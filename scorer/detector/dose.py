"""The dose axis: contrast-detail thresholds scored at several air kermas, and the kerma each panel needs.

**Dose response.**  Phantom images are grouped by the air kerma at the detector; each
group is scored as ``limen score`` scores it (one call per group, so each group's thresholds
and CIs are exactly those ``limen score`` gives for its images; the files are read by
:func:`scorer.workflow.score_dose_series`, which calls :func:`dose_series`).
Per diameter the thresholds are fitted by

    C_T(K) = a · K^(−β),   i.e.   log C_T = α − β·(log K − x̄)

by weighted least squares on the logarithms, each group weighted by 1/se², se the
standard error of its log threshold read off its 95 % CI, se = log(high/low)/(2·1.96);
x̄ is the weighted mean of log K, so α and β are uncorrelated.  The variances are
taken as known (cov = (XᵀWX)⁻¹); when the residuals are over-dispersed (χ² test,
p < 0.01) the covariance is scaled by χ²/dof and the CI uses Student's t.  For an
ideal quantum-limited detector β = 0.5: C_T ∝ 1/√(fluence) (Rose 1948).  Electronic
noise makes the curve steeper (β > 0.5) where it matters, at low kerma; structure
noise flatter (β < 0.5) at high kerma, since σ²(K)/K² = e/K² + q/K + s.
Censored thresholds (count method, outside the contrasts offered) are left out of
the fit.

**Kerma for a limit.**  The kerma at which the fitted threshold (times the human/model
factor for limits written for human readers, as ``limen score`` does) meets the limit
L: log K_L = x̄ + (α + log f − log L)/β; its 95 % CI from draws of (α, β, log f) from
their normal approximations (seeded).

**Figure of merit** per group: FOM = 1/(C_T²·K), constant where the detector is
quantum-limited (C_T ∝ K^(−1/2)); its CI follows from the threshold's.

**Equal image quality.**  For two panels A and B, the kerma ratio per diameter
R = K_B(C*)/K_A(C*) at the threshold C* that A reaches at the centre of its series,
log R = x̄_B − x̄_A + (α_B − α_A)/β_B, with its CI from draws of both fits (independent
panels).  The same ratio is predicted from each panel's MTF and NNPS (Fourier NPW
model, :mod:`scorer.detector.predict`) with the NNPS carried to other kermas by the
panel's noise components: NNPS(K) = NNPS(K₀)·r(K)/r(K₀), r(K) = σ²(K)/K² (the
components' spectral shapes are taken as equal — an approximation for an indirect
panel, whose electronic noise is white while its quantum noise is spread).

References
----------
.. [1] Rose, A., J. Opt. Soc. Am. 38 (1948) — C_T ∝ 1/√fluence for a quantum-limited system.
.. [2] Draper, N. R. & Smith, H. *Applied Regression Analysis* (3rd ed., 1998) — weighted least squares.
.. [3] ICRU Report 54 (1996) — NPW detectability from MTF and NPS.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

import scorer.observer.flags as flags
from scorer.detector.dose_groups import (  # noqa: F401  (re-exported: the dose series' grouping)
    CLUSTER_RTOL,
    SAME_KERMA_RTOL,
    background_kerma_ugy,
    check_kerma_agreement,
    check_one_panel,
    group_by_kerma,
)
from scorer.errors import LimenError
from scorer.observer.flags import kerma_flags, threshold_flags
from scorer.observer.limits import HumanFactor, Limits

Z95 = 1.959963984540054


# ----------------------------------------------------------------------------- fitting


@dataclass
class PowerLawFit:
    """log C_T = α − β·(log K − x̄), weighted least squares (module docstring)."""

    diameter_mm: float
    beta: float
    beta_ci: tuple[float, float]
    alpha: float  # log threshold at K = exp(x̄)
    x_center: float  # x̄, weighted mean of log K
    cov: np.ndarray  # 2 × 2 covariance of (α, β)
    chi2: float
    dof: int
    overdispersion: float
    n_groups: int
    kermas_ugy: list[float]
    note: str = ""

    @property
    def reference_kerma_ugy(self) -> float:
        return float(np.exp(self.x_center))

    def threshold_at(self, kerma_ugy: ArrayLike) -> NDArray[np.float64]:
        c: NDArray[np.float64] = np.exp(
            self.alpha - self.beta * (np.log(np.asarray(kerma_ugy, dtype=float)) - self.x_center)
        )
        return c

    def draws(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return rng.multivariate_normal([self.alpha, self.beta], self.cov, size=n, method="svd")

    def to_dict(self) -> dict[str, Any]:
        return {
            "diameter_mm": self.diameter_mm,
            "beta": self.beta,
            "beta_ci_low": self.beta_ci[0],
            "beta_ci_high": self.beta_ci[1],
            "log_threshold_at_reference": self.alpha,
            "reference_kerma_ugy": self.reference_kerma_ugy,
            "threshold_at_reference": float(np.exp(self.alpha)),
            "cov_alpha_beta": self.cov.tolist(),
            "chi2": self.chi2,
            "dof": self.dof,
            "overdispersion": self.overdispersion,
            "n_groups": self.n_groups,
            "kermas_ugy": self.kermas_ugy,
            "note": self.note,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "PowerLawFit":
        return cls(
            float(d["diameter_mm"]),
            float(d["beta"]),
            (float(d["beta_ci_low"]), float(d["beta_ci_high"])),
            float(d["log_threshold_at_reference"]),
            float(np.log(d["reference_kerma_ugy"])),
            np.asarray(d["cov_alpha_beta"], dtype=float),
            float(d.get("chi2") or 0),
            int(d.get("dof") or 0),
            float(d.get("overdispersion") or 1),
            int(d.get("n_groups") or 0),
            list(d.get("kermas_ugy") or []),
            str(d.get("note") or ""),
        )


def log_se_from_ci(t: float, lo: float, hi: float) -> float:
    """Standard error of log C from a 95 % CI (normal on the log scale)."""
    if not (np.isfinite(lo) and np.isfinite(hi) and lo > 0 and hi > lo):
        return float("nan")
    return float(np.log(hi / lo) / (2 * Z95))


def _columns(rows: Sequence[tuple[float, float, float]]) -> tuple[list[float], list[float], list[float]]:
    """(kerma, threshold, log SE) rows as three columns (what ``*zip(*rows)`` gave, typed)."""
    k, c, se = ([r[i] for r in rows] for i in range(3))
    return k, c, se


def fit_power_law(
    kerma_ugy: ArrayLike, threshold: ArrayLike, log_se: ArrayLike, diameter_mm: float = float("nan")
) -> PowerLawFit:
    """Weighted log–log fit of C_T = a·K^(−β) over kerma groups (module docstring)."""
    k = np.asarray(kerma_ugy, dtype=float)
    c = np.asarray(threshold, dtype=float)
    se = np.asarray(log_se, dtype=float)
    ok = np.isfinite(k) & (k > 0) & np.isfinite(c) & (c > 0) & np.isfinite(se) & (se > 0)
    k, c, se = k[ok], c[ok], se[ok]
    if np.unique(k).size < 2:
        raise LimenError(
            f"at {diameter_mm:g} mm fewer than two kerma groups have a threshold with a CI: β cannot be fitted"
        )
    x, y, w = np.log(k), np.log(c), 1.0 / se**2
    xc = float(np.sum(w * x) / np.sum(w))
    sxx = float(np.sum(w * (x - xc) ** 2))
    slope = float(np.sum(w * (x - xc) * y) / sxx)
    alpha = float(np.sum(w * y) / np.sum(w))
    r = y - alpha - slope * (x - xc)
    chi2 = float(np.sum(w * r * r))
    dof = int(k.size - 2)
    factor, q = 1.0, Z95
    note = ""
    if dof >= 1 and stats.chi2.sf(chi2, dof) < 0.01:
        factor = chi2 / dof
        q = float(stats.t.ppf(0.975, dof))
        note = f"over-dispersed (χ² = {chi2:.1f} on {dof} dof): CI widened by √{factor:.2f}, Student t"
    if dof == 0:
        note = "two kerma groups: no test of the power law"
    cov = np.diag([1.0 / np.sum(w), 1.0 / sxx]) * factor
    beta = -slope
    half = q * np.sqrt(cov[1, 1])
    return PowerLawFit(
        float(diameter_mm),
        beta,
        (beta - half, beta + half),
        alpha,
        xc,
        cov,
        chi2,
        dof,
        factor,
        int(k.size),
        [float(v) for v in k],
        note,
    )


def _percentiles(x: np.ndarray) -> tuple[float, float]:
    x = np.sort(x[~np.isnan(x)])
    if not x.size:
        return float("nan"), float("nan")
    return float(x[int(np.floor(0.025 * (x.size - 1)))]), float(x[int(np.ceil(0.975 * (x.size - 1)))])


def kerma_for_threshold(
    fit: PowerLawFit, target: float, factor: HumanFactor | None = None, *, n_draws: int = 4000, seed: int = 0
) -> tuple[float, float, float]:
    """Kerma (µGy) at which factor × C_T(K) equals ``target``, with its 95 % CI (draws; module docstring)."""
    lf = 0.0 if factor is None else float(np.log(factor.value))
    se_f = 0.0
    if factor is not None and factor.has_ci and factor.ci_low is not None and factor.ci_high is not None:
        se_f = float(np.log(factor.ci_high / factor.ci_low) / (2 * Z95))
    if not (fit.beta > 0 and target > 0):
        return float("nan"), float("nan"), float("nan")
    est = float(np.exp(fit.x_center + (fit.alpha + lf - np.log(target)) / fit.beta))
    rng = np.random.default_rng(seed)
    d = fit.draws(n_draws, rng)
    lfd = lf + se_f * rng.standard_normal(n_draws)
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        kd = np.where(d[:, 1] > 0, np.exp(fit.x_center + (d[:, 0] + lfd - np.log(target)) / d[:, 1]), np.inf)
    lo, hi = _percentiles(kd)
    return est, lo, hi


# ----------------------------------------------------------------------------- scoring a series


@dataclass
class DoseGroup:
    kerma_ugy: float
    paths: list[str]
    thresholds: list[dict[str, Any]]  # ThresholdPoint dicts of the fitted method
    result: object = None  # the group's ScoreResult (not serialised)

    def to_dict(self) -> dict[str, Any]:
        fom = []
        for p in self.thresholds:
            t, lo, hi = p["threshold_contrast"], p["ci_low"], p["ci_high"]
            ok = t is not None and np.isfinite(t) and t > 0 and not p.get("censored")
            fom.append(
                {
                    "diameter_mm": p["diameter_mm"],
                    "fom_per_ugy": 1.0 / (t * t * self.kerma_ugy) if ok else None,
                    "ci_low": 1.0 / (hi * hi * self.kerma_ugy) if ok and np.isfinite(hi) and hi > 0 else None,
                    "ci_high": 1.0 / (lo * lo * self.kerma_ugy) if ok and np.isfinite(lo) and lo > 0 else None,
                    # the threshold's flags (an FOM from an extrapolated threshold is extrapolated too)
                    "flags": [f for f in threshold_flags(p) if f != flags.ABOVE_100] if ok else [flags.NOT_ESTIMABLE],
                }
            )
        images = getattr(self.result, "images", None) or []
        return {
            "kerma_ugy": self.kerma_ugy,
            "n_images": len(self.paths),
            # images written by Limen's simulator (DICOM Manufacturer), so the report can say so on the page
            "n_simulated": sum(1 for im in images if (im.metadata or {}).get("manufacturer") == "Limen simulation"),
            "paths": self.paths,
            "thresholds": self.thresholds,
            "figure_of_merit": fom,
        }


@dataclass
class DoseSeriesResult:
    groups: list[DoseGroup]
    fits: list[dict[str, Any]]
    observer: str
    method: str
    limits: Limits | None
    human_factor: HumanFactor | None
    settings: dict[str, Any]
    warnings: list[str] = field(default_factory=list)

    def fit_objects(self) -> list[PowerLawFit]:
        return [PowerLawFit.from_dict(f) for f in self.fits if f.get("beta") is not None]

    def to_json(self) -> dict[str, Any]:
        return {
            "observer": self.observer,
            "method": self.method,
            "groups": [g.to_dict() for g in self.groups],
            "fits": self.fits,
            "limits": None if self.limits is None else self.limits.to_dict(),
            "human_factor": None if self.human_factor is None else self.human_factor.value,
            "human_factor_ci": None
            if self.human_factor is None or not self.human_factor.has_ci
            else [self.human_factor.ci_low, self.human_factor.ci_high],
            "settings": self.settings,
            "warnings": self.warnings,
        }


def _factor_for(limits: Limits | None, observer: str, human_factor: float | HumanFactor | None) -> HumanFactor | None:
    """The factor that turns this observer's thresholds into the limits' observer's (as limits.evaluate does)."""
    if limits is None:
        return None
    if limits.observer == "human" and observer in ("npw", "npwe"):
        if human_factor is None:
            raise LimenError(
                f"{limits.path or 'limits'}: these limits are for human readers and the thresholds come "
                f"from the {observer.upper()} model observer; give a human/model factor (--human-factor)",
                "--human-factor",
            )
        f = human_factor if isinstance(human_factor, HumanFactor) else HumanFactor(float(human_factor))
        if not f.value > 0:
            raise LimenError(f"--human-factor must be positive, got {f.value}", "--human-factor")
        return f
    if limits.observer != observer:
        raise LimenError(
            f"{limits.path or 'limits'}: these limits are for the {limits.observer} observer, the "
            f"thresholds come from {observer}"
        )
    return None


def fit_series(
    groups: list[DoseGroup], *, limits: Limits | None = None, factor: HumanFactor | None = None, seed: int = 0
) -> tuple[list[dict[str, Any]], list[str]]:
    """Per diameter: β over all groups (and over the lowest/highest three when there are four or more),
    the kerma for the acceptable and achievable limits, as JSON-ready dicts."""
    notes: list[str] = []
    diams = sorted({p["diameter_mm"] for g in groups for p in g.thresholds})
    fits = []
    for d in diams:
        rows, n_extrapolated = [], 0
        for g in groups:
            p = next((p for p in g.thresholds if np.isclose(p["diameter_mm"], d)), None)
            if p is None or p.get("censored") or p["threshold_contrast"] is None:
                continue
            se = log_se_from_ci(p["threshold_contrast"], p["ci_low"], p["ci_high"])
            rows.append((g.kerma_ugy, p["threshold_contrast"], se))
            n_extrapolated += flags.EXTRAPOLATED in threshold_flags(p)
        entry: dict[str, Any] = {
            "diameter_mm": d,
            "beta": None,
            "beta_ci_low": None,
            "beta_ci_high": None,
            "kerma_for_limit_ugy": None,
            "kerma_for_limit_ci": None,
        }
        try:
            fit = fit_power_law(*_columns(rows), diameter_mm=d) if rows else None
        except LimenError as exc:
            fit = None
            entry["note"] = str(exc)
        if fit is None:
            entry.setdefault("note", f"no threshold with a CI at {d:g} mm in two or more kerma groups")
            entry["flags"] = [flags.NOT_ESTIMABLE]
            fits.append(entry)
            continue
        entry.update(fit.to_dict())
        # β rests on d′ thresholds the linear observer carried beyond the contrasts offered: say so
        entry["flags"] = [flags.EXTRAPOLATED] if n_extrapolated else []
        entry["n_extrapolated_thresholds"] = int(n_extrapolated)
        if len(rows) >= 4:
            for name, sub in (("low", rows[:3]), ("high", rows[-3:])):
                f2 = fit_power_law(*_columns(sub), diameter_mm=d)
                entry[f"beta_{name}"] = {
                    "beta": f2.beta,
                    "ci_low": f2.beta_ci[0],
                    "ci_high": f2.beta_ci[1],
                    "kermas_ugy": f2.kermas_ugy,
                }
        if limits is not None:
            for which, level in (("limit", limits.acceptable_at(d)), ("achievable", limits.achievable_at(d))):
                if level is None:
                    continue
                f_d = None if factor is None else factor.at(d)
                k, lo, hi = kerma_for_threshold(fit, level, f_d, seed=seed)
                entry[f"kerma_for_{which}_ugy"] = k
                entry[f"kerma_for_{which}_ci"] = [lo, hi]
                entry[f"{which}_contrast"] = level
                entry[f"kerma_for_{which}_flags"] = kerma_flags(k, fit.kermas_ugy)
                if f_d is not None:
                    entry["human_factor"] = f_d.value
                if np.isfinite(k) and not (min(fit.kermas_ugy) <= k <= max(fit.kermas_ugy)):
                    entry[f"kerma_for_{which}_extrapolated"] = True
        fits.append(entry)
    rose_test(fits)
    return fits, notes


def rose_test(fits: list[dict[str, Any]]) -> None:
    """Per diameter, the two-sided test of β = 0.5 (the quantum-limited Rose value), Holm-adjusted over the
    diameters of the series (Holm 1979, as the reader-study page adjusts its comparisons), in place.

    With nine diameters each tested at 5 %, a quantum-limited panel shows about one β whose CI excludes 0.5 by
    chance; the adjusted p-value says whether the series as a whole departs from the Rose model.  The test uses
    the fit's own standard error and quantile (normal, or Student t on its dof when over-dispersed).
    """
    from statsmodels.stats.multitest import multipletests

    idx, pv = [], []
    for i, f in enumerate(fits):
        if f.get("beta") is None:
            continue
        cov = np.asarray(f["cov_alpha_beta"], dtype=float)
        se = float(np.sqrt(cov[1, 1]))
        if not se > 0:
            continue
        z = (f["beta"] - 0.5) / se
        t_dist = f.get("overdispersion", 1) > 1 and f.get("dof", 0) >= 1
        p = float(2 * (stats.t.sf(abs(z), f["dof"]) if t_dist else stats.norm.sf(abs(z))))
        f["p_beta_half"] = p
        idx.append(i)
        pv.append(p)
    if pv:
        for i, q in zip(idx, multipletests(pv, method="holm")[1]):
            fits[i]["p_beta_half_holm"] = float(q)


def dose_series(
    groups: OrderedDict[float, list[str]],
    score_group: Callable[..., Any],
    *,
    observer: str = "npw",
    method: str = "dprime",
    limits: Limits | None = None,
    human_factor: float | HumanFactor | None = None,
    seed: int = 0,
    on_group: Callable[..., Any] | None = None,
) -> DoseSeriesResult:
    """Score each kerma group and fit the dose response per diameter.

    ``groups`` maps each kerma (µGy) to its images (file paths: :func:`group_by_kerma`); ``score_group(images,
    methods)`` scores one group and returns its :class:`~scorer.observer.scoring.ScoreResult` —
    :func:`scorer.workflow.score_dose_series` passes :func:`scorer.workflow.score_files`, so each group's
    thresholds are exactly those ``limen score`` gives for its images.  ``on_group(kerma, images, result)``
    is called after each group.
    """
    factor = _factor_for(limits, observer, human_factor)
    methods = ["dprime", "count"] if method == "both" else [method]
    fit_method = "dprime" if "dprime" in methods else "count"
    if factor is not None:
        factor = factor.for_method(fit_method)  # like for like: the factor measured for the fitted method
    out_groups, warnings = [], []
    for k, paths in groups.items():
        res = score_group(paths, methods)
        out_groups.append(DoseGroup(float(k), list(paths), [p.to_dict() for p in res.curves[fit_method].points], res))
        warnings += [f"{k:.3g} µGy: {w}" for w in res.warnings]
        if on_group is not None:
            on_group(k, paths, res)
    if len(out_groups) == 2:
        warnings.append("only two kerma groups: β is fitted without any test of the power law")
    fits, notes = fit_series(out_groups, limits=limits, factor=factor, seed=seed)
    settings = {"observer": observer, "methods": methods, "fitted_method": fit_method, "seed": seed}
    return DoseSeriesResult(out_groups, fits, observer, fit_method, limits, factor, settings, warnings + notes)


# ----------------------------------------------------------------------------- two panels


def kerma_ratio(fit_a: PowerLawFit, fit_b: PowerLawFit, *, n_draws: int = 4000, seed: int = 0) -> dict[str, Any]:
    """K_B/K_A at the threshold A reaches at the centre of its series, with a 95 % CI (module docstring)."""
    log_c = fit_a.alpha
    if not fit_b.beta > 0:
        return {
            "ratio": None,
            "ci_low": None,
            "ci_high": None,
            "threshold_contrast": float(np.exp(log_c)),
            "reference_kerma_ugy": fit_a.reference_kerma_ugy,
            "flags": [flags.NOT_ESTIMABLE],
            "note": "panel B's β is not positive",
        }
    log_r = fit_b.x_center - fit_a.x_center + (fit_b.alpha - log_c) / fit_b.beta
    rng = np.random.default_rng(seed)
    da, db = fit_a.draws(n_draws, rng), fit_b.draws(n_draws, rng)
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        lr = np.where(db[:, 1] > 0, fit_b.x_center - fit_a.x_center + (db[:, 0] - da[:, 0]) / db[:, 1], np.inf)
        lo, hi = _percentiles(np.exp(lr))
    # panel B reaches A's threshold at K_B = R·K_ref: beyond the kermas B was measured at, the ratio rests on B's
    # power law carried past its data
    kerma_b = float(np.exp(log_r)) * fit_a.reference_kerma_ugy
    fl = kerma_flags(kerma_b, fit_b.kermas_ugy)
    note = ""
    if flags.EXTRAPOLATED in fl:
        side = "above the highest" if kerma_b > max(fit_b.kermas_ugy) else "below the lowest"
        edge = max(fit_b.kermas_ugy) if kerma_b > max(fit_b.kermas_ugy) else min(fit_b.kermas_ugy)
        note = f"extrapolated: panel B would need {kerma_b:.3g} µGy, {side} kerma it was measured at ({edge:.3g} µGy)"
    return {
        "ratio": float(np.exp(log_r)),
        "ci_low": lo,
        "ci_high": hi,
        "threshold_contrast": float(np.exp(log_c)),
        "reference_kerma_ugy": fit_a.reference_kerma_ugy,
        "kerma_b_ugy": kerma_b,
        "flags": fl,
        "note": note,
    }


def relative_variance(components: dict[str, Any] | None) -> Callable[[ArrayLike], NDArray[np.float64]]:
    """r(K) = σ²(K)/K² from a ``noise_series.components`` dict, or 1/K (quantum-limited) without one."""
    if not components:
        return lambda k: 1.0 / np.asarray(k, dtype=float)
    e, q, s = (float(components[t]["value"]) for t in ("electronic", "quantum", "structure"))
    e, s = max(e, 0.0), max(s, 0.0)
    return lambda k: (
        (e + q * np.asarray(k, dtype=float) + s * np.asarray(k, dtype=float) ** 2) / np.asarray(k, dtype=float) ** 2
    )


def predicted_kerma_ratios(
    det_a: dict[str, Any],
    det_b: dict[str, Any],
    diameters_mm: Sequence[float],
    reference_kerma_ugy: float,
    m_alternatives: int | Mapping[float, int] = 4,
) -> list[dict[str, Any]]:
    """K_B/K_A at equal predicted NPW threshold, from each panel's MTF and NNPS and its noise components."""
    from scorer.detector.predict import predict_from_detector

    out = []
    pa = predict_from_detector(det_a, diameters_mm, m_alternatives=m_alternatives, observers=("npw",))
    pb = predict_from_detector(det_b, diameters_mm, m_alternatives=m_alternatives, observers=("npw",))
    k0a, k0b = det_a.get("kerma_ugy"), det_b.get("kerma_ugy")
    if not (k0a and k0b):
        raise LimenError("the predicted kerma ratio needs each detector JSON's flat-field kerma (kerma_ugy)")
    ra = relative_variance((det_a.get("noise_series") or {}).get("components"))
    rb = relative_variance((det_b.get("noise_series") or {}).get("components"))

    def kerma_for(ct0: float, k0: float, r: Callable[[ArrayLike], NDArray[np.float64]], target: float) -> float:
        # C(K) = C(K0)·√(r(K)/r(K0)); solve r(K) = r(K0)·(target/C(K0))² on log K
        goal = float(r(k0)) * (target / ct0) ** 2

        def g(lk: float) -> float:
            return float(np.log(float(r(np.exp(lk)))) - np.log(goal))

        lo, hi = np.log(1e-3), np.log(1e6)
        if g(lo) < 0 or g(hi) > 0:
            return float("nan")
        return float(np.exp(optimize.brentq(g, lo, hi, xtol=1e-10)))

    for a, b in zip(pa, pb):
        ct_a_ref = a.threshold_contrast * np.sqrt(float(ra(reference_kerma_ugy)) / float(ra(k0a)))
        ka = kerma_for(a.threshold_contrast, k0a, ra, ct_a_ref)
        kb = kerma_for(b.threshold_contrast, k0b, rb, ct_a_ref)
        out.append(
            {
                "diameter_mm": a.diameter_mm,
                "ratio": kb / ka if np.isfinite(kb) and ka > 0 else None,
                "threshold_contrast": float(ct_a_ref),
                "kerma_a_ugy": ka,
                "kerma_b_ugy": kb,
            }
        )
    return out


def ratio_sentence(d: float, r: dict[str, Any], la: str, lb: str) -> str:
    """One plain sentence: how much air kerma B needs relative to A for the same threshold at diameter d."""
    if r.get("ratio") is None:
        return f"At {d:g} mm the kerma ratio could not be determined ({r.get('note') or 'no fit'})."
    ratio, lo, hi = r["ratio"], r.get("ci_low"), r.get("ci_high")
    ci = f"95 % CI {lo:.3g}–{hi:.3g}" if lo is not None and hi is not None and np.isfinite(hi) else "CI unbounded"
    at = f"at the threshold {la} reaches at {r['reference_kerma_ugy']:.3g} µGy, {100 * r['threshold_contrast']:.3g} %"
    if flags.EXTRAPOLATED in (r.get("flags") or []) and r.get("kerma_b_ugy"):
        at += (
            f"; extrapolated: {lb} would need {r['kerma_b_ugy']:.3g} µGy, beyond the kermas it was measured at, so "
            "this rests on its fitted power law"
        )
    if lo is not None and hi is not None and lo <= 1.0 <= hi:
        return (
            f"At {d:g} mm no clear difference: {lb} needs {ratio:.3g}× the air kerma of {la} for the same "
            f"threshold ({ci}, which includes 1; {at})."
        )
    if ratio >= 1:
        return f"At {d:g} mm {lb} needs {ratio:.3g}× the air kerma of {la} for the same threshold ({ci}; {at})."
    if lo is None or hi is None:  # kerma_ratio gives both with a ratio; said rather than a TypeError
        return f"At {d:g} mm {la} needs {1 / ratio:.3g}× the air kerma of {lb} for the same threshold ({ci}; {at})."
    return (
        f"At {d:g} mm {la} needs {1 / ratio:.3g}× the air kerma of {lb} for the same threshold "
        f"(95 % CI {1 / hi:.3g}–{1 / lo:.3g}; {at})."
    )


def compare_series(
    series_a: dict[str, Any],
    series_b: dict[str, Any],
    labels: tuple[str, str] = ("A", "B"),
    det_a: dict[str, Any] | None = None,
    det_b: dict[str, Any] | None = None,
    seed: int = 0,
) -> dict[str, Any]:
    """Per diameter the measured kerma ratio B/A at equal threshold (with CI, one sentence each) and,
    with both detector JSONs, the ratio predicted from MTF, NNPS and noise components."""
    la, lb = labels
    fa = {round(f["diameter_mm"], 6): PowerLawFit.from_dict(f) for f in series_a.get("fits", []) if f.get("beta")}
    fb = {round(f["diameter_mm"], 6): PowerLawFit.from_dict(f) for f in series_b.get("fits", []) if f.get("beta")}
    rows, sentences = [], []
    for d in sorted(set(fa) & set(fb)):
        r = kerma_ratio(fa[d], fb[d], seed=seed)
        r.update(diameter_mm=d, beta_a=fa[d].beta, beta_b=fb[d].beta)
        rows.append(r)
        sentences.append(ratio_sentence(d, r, la, lb))
    predicted = []
    if det_a and det_b and rows:
        try:
            m = {
                float(p["diameter_mm"]): int(p["m_alternatives"])
                for g in series_a.get("groups", [])[:1]
                for p in g["thresholds"]
            } or 4
            predicted = predicted_kerma_ratios(
                det_a, det_b, [r["diameter_mm"] for r in rows], rows[0]["reference_kerma_ugy"], m_alternatives=m
            )
        except LimenError as exc:
            predicted = [{"note": str(exc)}]
    pmap = {round(p["diameter_mm"], 6): p for p in predicted if "diameter_mm" in p}
    for r in rows:
        p = pmap.get(round(r["diameter_mm"], 6))
        r["predicted_ratio"] = None if p is None else p["ratio"]
    return {
        "labels": [la, lb],
        "ratios": rows,
        "sentences": sentences,
        "predicted": predicted,
        "note": "ratio = kerma panel B needs / kerma panel A needs for the same threshold contrast, at the "
        "threshold panel A reaches at the centre of its series",
    }
