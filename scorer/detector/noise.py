"""Noise components of a flat panel from flat fields at several air kermas.

The pixel variance of a linearised flat field (air-kerma units, µGy²) is modelled as
the sum of three independent terms (common practice)::

    σ²(K) = e + q·K + s·K²

* **e** — electronic (additive) noise, independent of kerma;
* **q·K** — quantum noise: Poisson counting (plus the Swank excess) grows with the
  number of quanta, so its variance in kerma units grows ∝ K;
* **s·K²** — structure (fixed-pattern) noise: residual gain variations scale with
  the signal, so their variance grows ∝ K²; √s is their relative standard deviation.

Quantum noise is the largest term for e/q < K < q/s: the *quantum-limited range*,
where the threshold contrast falls as K^(−1/2) (Rose model).

Variance per flat: the central region is tiled with non-overlapping ROIs
(``roi_px`` square), each detrended with the same 2-D second-order polynomial as
the NNPS (:mod:`scorer.detector.nnps`), and its residual variance taken (with the
6 fitted parameters removed from the degrees of freedom).  Per kerma the mean over
ROIs is the variance and the ROI-to-ROI spread over √(number of ROIs) its standard
error.

Fit: weighted least squares of σ² on (1, K, K²) with weights 1/SE², i.e. the
variances are taken as known: cov = (XᵀWX)⁻¹ (the generalised least-squares
estimator, checked against statsmodels WLS with ``cov_type="fixed scale"``).  When the
residuals are over-dispersed (χ² test, p < 0.01) the covariance is scaled by χ²/dof,
as the threshold fits do.  95 % CIs are normal (z = 1.96).  The same fit applied to
the noise power spectrum (NNPS × mean²) averaged over a frequency band gives the
components per band.

References
----------
.. [1] Rose, A., J. Opt. Soc. Am. 38 (1948) — quantum noise, SNR ∝ √fluence.
.. [2] Draper, N. R. & Smith, H. *Applied Regression Analysis* (3rd ed., 1998), ch. 9 —
       weighted (generalised) least squares, cov(β̂) = (XᵀWX)⁻¹.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, TypedDict

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from scorer.detector.nnps import DEFAULT_REGION_MM, NNPSResult, _poly_basis
from scorer.errors import LimenError
from scorer.images.image import Image

Z95 = 1.959963984540054
TERMS = ("electronic", "quantum", "structure")
#: frequency bands (fraction of Nyquist) for the per-band fit
BANDS_NYQUIST = ((0.05, 0.25), (0.25, 0.6), (0.6, 1.0))


class QuantumRange(TypedDict):
    """Kermas where the quantum term dominates (``ComponentFit.quantum_limited_range``); None without one."""

    low_ugy: float | None
    high_ugy: float | None
    low_ci: list[float] | None
    high_ci: list[float] | None
    note: str


def flat_roi_variances(
    pixels: ArrayLike,
    spacing_mm: Sequence[float] | NDArray[np.float64],
    *,
    roi_px: int = 128,
    region_mm: float | None = DEFAULT_REGION_MM,
) -> tuple[np.ndarray, float]:
    """Detrended variance of each non-overlapping ROI of a linearised flat field, and the region's mean."""
    a = np.asarray(pixels, dtype=np.float64)
    if region_mm is not None:
        h = min(a.shape[0], int(round(region_mm / spacing_mm[0])))
        w = min(a.shape[1], int(round(region_mm / spacing_mm[1])))
        r0, c0 = (a.shape[0] - h) // 2, (a.shape[1] - w) // 2
        a = a[r0 : r0 + h, c0 : c0 + w]
    n_r, n_c = a.shape[0] // roi_px, a.shape[1] // roi_px
    if n_r < 1 or n_c < 1:
        raise LimenError(f"flat field {a.shape[0]}x{a.shape[1]} px is smaller than one {roi_px}x{roi_px} ROI")
    basis = _poly_basis(roi_px)
    r0, c0 = (a.shape[0] - n_r * roi_px) // 2, (a.shape[1] - n_c * roi_px) // 2
    blocks = (
        a[r0 : r0 + n_r * roi_px, c0 : c0 + n_c * roi_px]
        .reshape(n_r, roi_px, n_c, roi_px)
        .transpose(0, 2, 1, 3)
        .reshape(n_r * n_c, roi_px * roi_px)
    )
    resid = blocks - (blocks @ basis) @ basis.T
    var = (resid**2).sum(axis=1) / (roi_px * roi_px - basis.shape[1])
    return var, float(a.mean())


@dataclass
class ComponentFit:
    """σ²(K) = e + q·K + s·K² fitted by weighted least squares (see the module docstring)."""

    kerma_ugy: np.ndarray
    variance: np.ndarray
    variance_se: np.ndarray
    params: np.ndarray  # (e, q, s); s = 0 when fixed
    cov: np.ndarray  # 3 × 3 (zeros for a fixed term)
    chi2: float
    dof: int
    overdispersion: float  # factor the covariance was scaled by (1 when not over-dispersed)
    terms: tuple[str, ...]
    units: str = "µGy²"

    def ci(self, i: int) -> tuple[float, float]:
        se = float(np.sqrt(max(self.cov[i, i], 0.0)))
        return float(self.params[i] - Z95 * se), float(self.params[i] + Z95 * se)

    def predict(self, kerma_ugy: ArrayLike) -> NDArray[np.float64]:
        k = np.asarray(kerma_ugy, dtype=float)
        e, q, s = self.params
        variance: NDArray[np.float64] = e + q * k + s * k * k
        return variance

    def quantum_limited_range(self, n_draws: int = 4000, seed: int = 0) -> QuantumRange:
        """Kermas where q·K is the largest term, [e/q, q/s], with 95 % CIs from draws of the fitted parameters."""
        e, q, s = self.params
        if not q > 0:
            return {
                "low_ugy": None,
                "high_ugy": None,
                "low_ci": None,
                "high_ci": None,
                "note": "no positive quantum term: the noise is not quantum-limited at any kerma measured",
            }
        rng = np.random.default_rng(seed)
        draws = rng.multivariate_normal(self.params, self.cov, size=n_draws, method="svd")
        dq = np.where(draws[:, 1] > 0, draws[:, 1], np.nan)
        lo_d = np.clip(draws[:, 0], 0, None) / dq
        with np.errstate(divide="ignore"):
            hi_d = np.where(draws[:, 2] > 0, dq / np.where(draws[:, 2] > 0, draws[:, 2], 1.0), np.inf)
        lo_d = np.where(np.isfinite(dq), lo_d, np.inf)
        hi_d = np.where(np.isfinite(dq), hi_d, 0.0)
        low = max(e, 0.0) / q
        high = q / s if s > 0 else float("inf")
        return {
            "low_ugy": float(low),
            "high_ugy": float(high),
            "low_ci": _percentiles(lo_d),
            "high_ci": _percentiles(hi_d),
            "note": "",
        }

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kerma_ugy": self.kerma_ugy.tolist(),
            "variance": self.variance.tolist(),
            "variance_se": self.variance_se.tolist(),
            "chi2": self.chi2,
            "dof": self.dof,
            "overdispersion": self.overdispersion,
            "units": self.units,
            "terms": list(self.terms),
        }
        for i, name in enumerate(TERMS):
            lo, hi = self.ci(i)
            fixed = name not in self.terms
            out[name] = {
                "value": float(self.params[i]),
                "ci_low": None if fixed else lo,
                "ci_high": None if fixed else hi,
                "fixed": fixed,
            }
        out["quantum_limited"] = self.quantum_limited_range()
        return out


def _percentiles(x: np.ndarray) -> list[float]:
    """2.5th and 97.5th percentiles of draws that may hold ±inf (order statistics, no interpolation)."""
    x = np.sort(x[~np.isnan(x)])
    return [float(x[int(np.floor(0.025 * (x.size - 1)))]), float(x[int(np.ceil(0.975 * (x.size - 1)))])]


def fit_components(
    kerma_ugy: ArrayLike,
    variance: ArrayLike,
    variance_se: ArrayLike,
    *,
    structure: bool | None = None,
    units: str = "µGy²",
    path: object | None = None,
) -> ComponentFit:
    """Weighted least-squares fit of σ²(K) = e + q·K + s·K² (s fixed at 0 with ``structure=False``).

    Parameters
    ----------
    kerma_ugy, variance, variance_se : one entry per kerma (µGy, variance, its standard error)
    structure : fit the K² term; by default when there are ≥ 3 distinct kermas
    """
    k = np.asarray(kerma_ugy, dtype=float).ravel()
    y = np.asarray(variance, dtype=float).ravel()
    se = np.asarray(variance_se, dtype=float).ravel()
    if not (k.size == y.size == se.size):
        raise LimenError("noise components: kerma, variance and standard-error lists differ in length", path)
    if np.any(~np.isfinite(k)) or np.any(k <= 0):
        raise LimenError("noise components: air kermas must be positive numbers (µGy)", path)
    n_k = np.unique(np.round(k, 9)).size
    if n_k < 2:
        raise LimenError("noise components need flat fields at two or more different air kermas", path)
    if structure is None:
        structure = n_k >= 3
    if structure and n_k < 3:
        raise LimenError("the structure-noise term needs flat fields at three or more different air kermas", path)
    if np.any(~(se > 0)):
        raise LimenError(
            "noise components: each kerma needs a positive variance standard error (more than one ROI)", path
        )
    cols = [np.ones_like(k), k] + ([k * k] if structure else [])
    x = np.column_stack(cols)
    w = 1.0 / se**2
    xtwx = x.T @ (w[:, None] * x)
    cov_r = np.linalg.inv(xtwx)
    beta = cov_r @ (x.T @ (w * y))
    r = y - x @ beta
    chi2 = float(np.sum(w * r * r))
    dof = int(k.size - x.shape[1])
    factor = 1.0
    if dof >= 1 and stats.chi2.sf(chi2, dof) < 0.01:
        factor = chi2 / dof
    cov_r = cov_r * factor
    params = np.zeros(3)
    params[: x.shape[1]] = beta
    cov = np.zeros((3, 3))
    cov[: x.shape[1], : x.shape[1]] = cov_r
    terms = TERMS if structure else TERMS[:2]
    return ComponentFit(k, y, se, params, cov, chi2, dof, factor, terms, units)


@dataclass
class KermaGroupNoise:
    """Flats of one air kerma: pixel variance (mean over ROIs) and its standard error."""

    kerma_ugy: float
    n_images: int
    n_rois: int
    mean_signal: float
    variance: float
    variance_se: float
    paths: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "kerma_ugy": self.kerma_ugy,
            "n_images": self.n_images,
            "n_rois": self.n_rois,
            "mean_signal": self.mean_signal,
            "variance": self.variance,
            "variance_se": self.variance_se,
            "relative_sd": float(np.sqrt(self.variance) / self.mean_signal) if self.mean_signal > 0 else None,
            "paths": self.paths,
        }


def group_flats(images: Sequence[Image], kerma_ugy: Sequence[float], *, roi_px: int = 128) -> list[KermaGroupNoise]:
    """Per distinct kerma: the mean ROI variance of its flats and its standard error."""
    by_k: dict[float, list[Image]] = {}
    for im, k in zip(images, kerma_ugy):
        by_k.setdefault(float(k), []).append(im)
    out = []
    for k in sorted(by_k):
        v_all, means, paths = [], [], []
        for im in by_k[k]:
            v, m = flat_roi_variances(im.pixels, im.spacing_mm, roi_px=roi_px)
            v_all.append(v)
            means.append(m)
            paths.append(im.metadata.source_path or "")
        v = np.concatenate(v_all)
        se = float(v.std(ddof=1) / np.sqrt(v.size)) if v.size > 1 else float("nan")
        out.append(KermaGroupNoise(k, len(by_k[k]), int(v.size), float(np.mean(means)), float(v.mean()), se, paths))
    return out


def band_components(
    kermas: Sequence[float], nnps_results: Sequence[NNPSResult], *, structure: bool | None = None
) -> list[dict[str, Any]]:
    """The same fit per frequency band, on the noise power NPS = NNPS × mean² (µGy²·mm²) of each kerma."""
    out = []
    ref = nnps_results[0]
    nyq = float(ref.frequency_per_mm.max())
    for lo_f, hi_f in BANDS_NYQUIST:
        sel = (ref.frequency_per_mm >= lo_f * nyq) & (ref.frequency_per_mm <= hi_f * nyq)
        if not sel.any():
            continue
        vals, ses = [], []
        for n in nnps_results:
            m2 = n.mean_signal**2
            v = 0.5 * (n.x_mm2[sel] + n.y_mm2[sel]) * m2
            s = 0.5 * np.sqrt(n.x_se_mm2[sel] ** 2 + n.y_se_mm2[sel] ** 2) * m2
            vals.append(float(v.mean()))
            # neighbouring frequencies of one cut share ROIs; treat the band's errors as fully correlated
            ses.append(float(s.mean()))
        try:
            fit = fit_components(kermas, vals, ses, structure=structure, units="µGy²·mm²")
        except LimenError:
            continue
        d = fit.to_dict()
        d.update(band_per_mm=[float(lo_f * nyq), float(hi_f * nyq)])
        out.append(d)
    return out


def describe_quantum_range(ql: QuantumRange, kmin: float, kmax: float) -> str:
    """One plain sentence on where quantum noise dominates."""
    lo, hi = ql.get("low_ugy"), ql.get("high_ugy")
    if lo is None or hi is None:  # both None together (no positive quantum term)
        return ql.get("note") or "quantum-limited range not determined"
    lo_ci, hi_ci = ql.get("low_ci") or [np.nan, np.nan], ql.get("high_ci") or [np.nan, np.nan]
    if lo_ci[1] < kmin:
        low_txt = (
            f"from below the lowest kerma measured ({kmin:g} µGy; electronic noise equals quantum noise at "
            f"{lo:.2g} µGy, 95 % CI up to {lo_ci[1]:.2g} µGy)"
        )
    else:
        low_txt = f"from {lo:.3g} µGy (95 % CI {lo_ci[0]:.3g}–{lo_ci[1]:.3g})"
    if not np.isfinite(hi) or hi_ci[0] > kmax:
        hi_txt = f"to above the highest kerma measured ({kmax:g} µGy" + (
            f"; structure noise would equal it at {hi:.3g} µGy)"
            if np.isfinite(hi)
            else "; no structure noise resolved)"
        )
    else:
        hi_txt = f"to {hi:.3g} µGy (95 % CI {hi_ci[0]:.3g}–{hi_ci[1]:.3g})"
    return f"quantum noise dominates {low_txt} {hi_txt}"
