"""Threshold contrast predicted from the detector's MTF and NNPS (NPW and NPWE observers).

Contrast C is relative to the background signal in linear (air-kerma) units, so a
disc of contrast C has the signal C·s₁(x), s₁ the unit-amplitude disc, whose
Fourier transform is (ICRU Report 54; Bessel J₁ form)::

    S₁(f) = R · J₁(2πRf) / f,     S₁(0) = πR²

With the NNPS (relative units, mm²) the detectability of the digital image is, in
the Fourier form of ICRU Report 54::

    NPW :  d′ = C · ∬|S₁|²MTF² df  /  √( ∬|S₁|²MTF²·NNPS df )
    NPWE:  d′ = C · ∬|S₁|²MTF²E² df  /  √( ∬|S₁|²MTF²E⁴·NNPS df )

**Integration.**  The integrals run over a 2-D frequency grid (midpoint rule on the
quadrant u, v > 0, times four, all integrands being even) out to three times the
Nyquist frequency f_N, so the signal power that the pixel sampling folds back
(aliases) into the digital image is kept.  Averaged over the disc's sub-pixel
position, the aliased signal power at a displayed frequency f is Σₖ|S₁MTF|²(f − k/p),
so the integrals over the whole plane use the NNPS and the eye filter E at the
folded frequency fold(g) = ((g + f_N) mod 2f_N) − f_N, where the digital image
shows it.  The MTF is taken as radially symmetric (the mean of the measured
orientations) and as zero beyond its measured range; the NNPS as radially
symmetric (its radial average).  The grid step is min(f_N/64, 0.04/R).

**Threshold.**  C_T = d′_T / (d′ per unit contrast), with d′_T the M-AFC d′ at the
scorer's criterion (:func:`scorer.observer.mafc.dprime_for_pc`; by default Pc_M at the fixed
detectability d′_T, :func:`scorer.observer.mafc.criterion_for`, so d′_T itself).

References
----------
.. [1] ICRU Report 54, *Medical Imaging — The Assessment of Image Quality* (1996).
.. [2] Barrett, H. H. & Myers, K. J. *Foundations of Image Science* (2004), ch. 13:
       NPW d′ = a√A/σ for a flat disc of amplitude a over A pixels in white noise σ.
.. [3] Burgess, A. E., J. Opt. Soc. Am. A 11 (1994) — NPWE with an eye filter.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from scorer.observer.eye import DEFAULT_VIEWING_DISTANCE_MM, eye_filter
from scorer.observer.mafc import criterion_for, dprime_for_pc

OBSERVERS = ("npw", "npwe")


@dataclass
class PredictedThreshold:
    """One predicted point of a contrast-detail curve (comparable to the scorer's thresholds)."""

    diameter_mm: float
    threshold_contrast: float
    observer: str
    dprime_per_unit_contrast: float
    dprime_threshold: float
    criterion_pc: float
    m_alternatives: int
    method: str = "predicted"
    ci_low: float | None = None
    ci_high: float | None = None
    n_images: int = 0

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


#: a radial curve: a function of frequency (cycles/mm), or (frequency, value) samples
Curve = Callable[[NDArray[np.float64]], ArrayLike] | tuple[ArrayLike, ArrayLike]


def disc_ft(frequency_per_mm: ArrayLike, radius_mm: float, amplitude: float = 1.0) -> NDArray[np.float64]:
    """Fourier transform a·R·J₁(2πRf)/f of a disc of radius R (mm), amplitude a; aπR² at f = 0."""
    f = np.asarray(frequency_per_mm, dtype=float)
    out = np.empty_like(f)
    small = np.abs(f) < 1e-12
    fs = f[~small]
    out[~small] = amplitude * radius_mm * special.j1(2 * np.pi * radius_mm * fs) / fs
    out[small] = amplitude * np.pi * radius_mm**2
    return out


def _as_function(curve: Curve, *, beyond: str) -> Callable[[np.ndarray], np.ndarray]:
    """A radial function from a callable or a (frequency, value) pair.

    ``beyond="zero"``: 0 past the last frequency (MTF); ``"hold"``: the end values (NNPS).
    """
    if callable(curve):
        return lambda f: np.broadcast_to(np.asarray(curve(f), dtype=float), np.shape(f))
    freq, val = (np.asarray(c, dtype=float) for c in curve)
    ok = np.isfinite(freq) & np.isfinite(val)
    freq, val = freq[ok], val[ok]
    order = np.argsort(freq)
    freq, val = freq[order], val[order]
    if beyond == "zero":
        return lambda f: np.interp(f, freq, val, left=val[0], right=0.0)
    return lambda f: np.interp(f, freq, val, left=val[0], right=val[-1])


def _fold(g: np.ndarray, nyquist: float) -> np.ndarray:
    return np.mod(g + nyquist, 2 * nyquist) - nyquist


def dprime_per_contrast(
    diameter_mm: float,
    mtf: Curve,
    nnps: Curve,
    pixel_pitch_mm: float,
    *,
    observer: str = "npw",
    viewing_distance_mm: float = DEFAULT_VIEWING_DISTANCE_MM,
    extent_nyquist: float = 3.0,
) -> float:
    """d′ of a disc of unit contrast (see the module docstring for the integrals).

    Parameters
    ----------
    diameter_mm : disc diameter
    mtf : callable f → MTF(f), or (frequency_per_mm, value) — radial presampling MTF
    nnps : callable f → NNPS(f) in mm², or (frequency_per_mm, value_mm2) — radial NNPS
    pixel_pitch_mm : pixel pitch (sets the Nyquist frequency and the folding)
    observer : ``"npw"`` or ``"npwe"``
    viewing_distance_mm : for the NPWE eye filter
    extent_nyquist : the grid reaches ``extent_nyquist × f_N`` in u and v
    """
    if observer not in OBSERVERS:
        raise ValueError(f"observer must be one of {OBSERVERS}, got {observer!r}")
    r = 0.5 * float(diameter_mm)
    if r <= 0:
        raise ValueError("diameter must be positive")
    fn = 0.5 / float(pixel_pitch_mm)
    mtf_f = _as_function(mtf, beyond="zero")
    nnps_f = _as_function(nnps, beyond="hold")
    big_f = extent_nyquist * fn
    df = min(fn / 64.0, 0.04 / r)
    n = int(np.ceil(big_f / df))
    df = big_f / n
    g = (np.arange(n) + 0.5) * df
    uu, vv = np.meshgrid(g, g, indexing="ij")
    rho = np.hypot(uu, vv)
    s2m2 = disc_ft(rho, r) ** 2 * mtf_f(rho) ** 2
    rho_fold = np.hypot(_fold(uu, fn), _fold(vv, fn))
    w = nnps_f(rho_fold)
    area = 4.0 * df * df  # quadrant × 4
    if observer == "npw":
        num = s2m2.sum() * area
        den = (s2m2 * w).sum() * area
    else:
        e2 = eye_filter(rho_fold, viewing_distance_mm) ** 2
        num = (s2m2 * e2).sum() * area
        den = (s2m2 * e2 * e2 * w).sum() * area
    if den <= 0 or num <= 0:
        return float("nan")
    return float(num / np.sqrt(den))


def predict_thresholds(
    diameters_mm: Sequence[float],
    mtf: Curve,
    nnps: Curve,
    pixel_pitch_mm: float,
    *,
    observers: Sequence[str] = OBSERVERS,
    m_alternatives: int | Mapping[float, int] = 4,
    criterion_pc: float | None = None,
    measured_kerma_ugy: float | None = None,
    target_kerma_ugy: float | None = None,
    viewing_distance_mm: float = DEFAULT_VIEWING_DISTANCE_MM,
) -> list[PredictedThreshold]:
    """Predicted threshold contrast per diameter and observer.

    ``m_alternatives`` is one M for every diameter, or a mapping diameter (mm) → M when
    the phantom's cells differ between diameters (a diameter missing from it gets 4).
    ``criterion_pc`` defaults to Pc_M at the default d′_T for each diameter's M
    (the scorer's default).  Given ``measured_kerma_ugy`` (the flat fields' kerma)
    and ``target_kerma_ugy``, the NNPS is scaled by measured/target — valid only
    where quantum noise dominates (no electronic-noise term).
    """

    def criterion(d: float) -> tuple[int, float, float]:
        if isinstance(m_alternatives, Mapping):
            m = next((int(v) for k, v in m_alternatives.items() if np.isclose(float(k), d)), 4)
        else:
            m = int(m_alternatives)
        pc = criterion_for(m, criterion_pc)
        return m, pc, dprime_for_pc(pc, m)

    nnps_f = _as_function(nnps, beyond="hold")
    if measured_kerma_ugy is not None and target_kerma_ugy is not None:
        if measured_kerma_ugy <= 0 or target_kerma_ugy <= 0:
            raise ValueError("kermas must be positive")
        scale = float(measured_kerma_ugy) / float(target_kerma_ugy)
        base = nnps_f
        nnps_f = lambda f: base(f) * scale  # noqa: E731
    out = []
    for obs in observers:
        for d in diameters_mm:
            m, pc, d_t = criterion(float(d))
            dp = dprime_per_contrast(
                float(d), mtf, nnps_f, pixel_pitch_mm, observer=obs, viewing_distance_mm=viewing_distance_mm
            )
            ct = d_t / dp if np.isfinite(dp) and dp > 0 else float("nan")
            out.append(
                PredictedThreshold(
                    diameter_mm=float(d),
                    threshold_contrast=float(ct),
                    observer=obs,
                    dprime_per_unit_contrast=dp,
                    dprime_threshold=d_t,
                    criterion_pc=pc,
                    m_alternatives=m,
                )
            )
    return out


def predict_from_detector(
    detector: dict[str, Any], diameters_mm: Sequence[float], **kwargs: Any
) -> list[PredictedThreshold]:
    """Predicted thresholds from a ``detector.json`` dictionary (needs its MTF and NNPS)."""
    from scorer.errors import LimenError

    mtf = detector.get("mtf_extended") or detector.get("mtf")
    nnps = detector.get("nnps")
    if not mtf or not nnps:
        raise LimenError("the prediction needs both an MTF (edge image) and an NNPS (flat fields) in the detector JSON")
    if nnps.get("radial_frequency_per_mm"):
        nn = (nnps["radial_frequency_per_mm"], nnps["radial_mm2"])
    else:
        nn = (nnps["frequency_per_mm"], nnps["value_mm2"])
    spacing = detector.get("pixel_spacing_mm")
    if not spacing:
        raise LimenError("the detector JSON lacks pixel_spacing_mm")
    pitch = float(np.sqrt(spacing[0] * spacing[1]))
    if kwargs.get("target_kerma_ugy") is not None and kwargs.get("measured_kerma_ugy") is None:
        if not detector.get("kerma_ugy"):
            raise LimenError("a target kerma needs the flat fields' kerma (kerma_ugy) in the detector JSON")
        kwargs["measured_kerma_ugy"] = detector["kerma_ugy"]
    return predict_thresholds(diameters_mm, (mtf["frequency_per_mm"], mtf["value"]), nn, pitch, **kwargs)
