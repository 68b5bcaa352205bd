"""Normalised noise power spectrum (NNPS) from flat-field images.

Method, on images linear in air kerma:

* **Region.**  A central region of each flat field, ``region_mm`` square (default
  125 mm, from memory of IEC 62220-1-1; clipped to the image).
* **ROIs.**  ``roi_px × roi_px`` (default 256) regions overlapping by half in both
  directions, tiling the region.
* **Detrending.**  A 2-D second-order polynomial (1, x, y, x², xy, y²) is fitted by
  least squares to each ROI and subtracted, removing the heel effect and any other
  slow trend.
* **Spectrum.**  ``NPS(u, v) = ⟨|FFT(ROI − fit)|²⟩ · Δx·Δy / (Nx·Ny)``; each ROI's
  periodogram is divided by the square of the mean signal of its image's region
  (so a trend with zero mean leaves the NNPS unchanged), and the average is the
  NNPS in mm² (relative units, 1/(q·K) for an ideal counter).
* **1-D cuts.**  Along u (frequencies across the columns, "x"): the mean of the rows
  ``v = ±1 … ±n_lines`` frequency bins off the axis (default 7 on each side, the
  axis itself excluded; from memory of IEC 62220-1-1), assigned the frequency u
  (common practice).  The same along v ("y").
* **Radial average.**  Mean over annuli of width Δu of all bins except the two
  axes, up to √2 × Nyquist.
* **Uncertainty.**  Standard error of each 1-D cut from the spread of the
  individual ROIs' cuts, divided by √(number of ROIs).  Half-overlapping ROIs are
  not independent, so this slightly understates the true uncertainty.

References
----------
.. [1] IEC 62220-1-1 / 62220-1-2, *Determination of the detective quantum efficiency*
       (NNPS from flat fields, 256 × 256 ROIs overlapping by half, polynomial
       detrending — from memory).
.. [2] Bendat, J. S. & Piersol, A. G. *Random Data* — averaged periodogram estimate of
       a power spectral density and its relative standard error 1/√n.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import fft as sfft

from scorer.errors import LimenError

DEFAULT_ROI_PX = 256
DEFAULT_REGION_MM = 125.0
DEFAULT_N_LINES = 7


@dataclass
class NNPSResult:
    """NNPS from one or more flat fields.

    Attributes
    ----------
    nnps_2d_mm2 : ndarray (roi_px, roi_px)
        Averaged 2-D NNPS, zero frequency at the centre (``fftshift``-ed).
    frequency_2d_per_mm : (fv, fu)
        Frequency axes of the 2-D array (rows v, columns u).
    frequency_per_mm : ndarray
        Frequencies of the 1-D cuts (from one bin above zero to Nyquist).
    x_mm2, y_mm2 : ndarray
        1-D cuts along u (x) and v (y), axis excluded.
    x_se_mm2, y_se_mm2 : ndarray
        Their standard errors from the ROI-to-ROI spread.
    radial_frequency_per_mm, radial_mm2 : ndarray
        Radial average, axes excluded.
    mean_signal : float
        Mean linearised signal over all ROIs.
    n_rois : int
    """

    nnps_2d_mm2: NDArray[np.float64]
    frequency_2d_per_mm: tuple[NDArray[np.float64], NDArray[np.float64]]
    frequency_per_mm: NDArray[np.float64]
    x_mm2: NDArray[np.float64]
    y_mm2: NDArray[np.float64]
    x_se_mm2: NDArray[np.float64]
    y_se_mm2: NDArray[np.float64]
    radial_frequency_per_mm: NDArray[np.float64]
    radial_mm2: NDArray[np.float64]
    mean_signal: float
    n_rois: int
    n_images: int
    roi_px: int
    n_lines: int
    spacing_mm: tuple[float, float]
    warnings: list[str] = field(default_factory=list)

    @property
    def value_mm2(self) -> NDArray[np.float64]:
        """Mean of the x and y cuts (the headline 1-D NNPS)."""
        return 0.5 * (self.x_mm2 + self.y_mm2)

    @property
    def se_mm2(self) -> NDArray[np.float64]:
        """Standard error of :attr:`value_mm2` (the two cuts' errors combined as independent)."""
        return 0.5 * np.sqrt(self.x_se_mm2**2 + self.y_se_mm2**2)

    @property
    def relative_uncertainty(self) -> float:
        """Median relative standard error of the two 1-D cuts."""
        rel = np.concatenate([self.x_se_mm2 / self.x_mm2, self.y_se_mm2 / self.y_mm2])
        return float(np.median(rel[np.isfinite(rel)]))

    def to_dict(self) -> dict[str, Any]:
        return {
            "frequency_per_mm": self.frequency_per_mm.tolist(),
            "value_mm2": self.value_mm2.tolist(),
            "x_mm2": self.x_mm2.tolist(),
            "y_mm2": self.y_mm2.tolist(),
            "x_se_mm2": self.x_se_mm2.tolist(),
            "y_se_mm2": self.y_se_mm2.tolist(),
            "radial_frequency_per_mm": self.radial_frequency_per_mm.tolist(),
            "radial_mm2": self.radial_mm2.tolist(),
            "mean_signal": self.mean_signal,
            "n_rois": self.n_rois,
            "n_images": self.n_images,
            "roi_px": self.roi_px,
            "n_lines": self.n_lines,
            "relative_uncertainty": self.relative_uncertainty,
            "ci_low": (self.value_mm2 - 1.959963984540054 * self.se_mm2).tolist(),
            "ci_high": (self.value_mm2 + 1.959963984540054 * self.se_mm2).tolist(),
            "ci_note": "95 % CI from the ROI-to-ROI spread (half-overlapping ROIs: slightly too narrow)",
            "spacing_mm": list(self.spacing_mm),
            "warnings": list(self.warnings),
        }


def _poly_basis(n: int) -> np.ndarray:
    """Orthonormal basis (n², 6) of 2-D polynomials up to second order on an n × n grid."""
    t = np.linspace(-1.0, 1.0, n)
    y, x = np.meshgrid(t, t, indexing="ij")
    a = np.stack([np.ones_like(x), x, y, x * x, x * y, y * y], axis=-1).reshape(n * n, 6)
    q, _ = np.linalg.qr(a)
    return q


def _full_from_half(p_half: np.ndarray, n: int) -> np.ndarray:
    """Full (…, n, n) power spectrum from the rfft2 half (…, n, n//2+1): P(−v, −u) = P(v, u)."""
    full = np.empty(p_half.shape[:-1] + (n,))
    h = n // 2
    full[..., : h + 1] = p_half
    rows = (-np.arange(n)) % n
    full[..., h + 1 :] = p_half[..., rows, :][..., h - 1 : 0 : -1]
    return full


def _roi_starts(length: int, roi: int) -> np.ndarray:
    step = roi // 2
    n = (length - roi) // step + 1
    used = (n - 1) * step + roi
    off = (length - used) // 2
    return off + step * np.arange(n)


#: a flat field's block means may stray from a smooth quadratic trend by this many robust SDs at most
FLAT_OUTLIER_SDS = 8.0
FLAT_BLOCK_PX = 16


def check_flat_field(pixels: NDArray[Any], path: object | None = None, block_px: int = FLAT_BLOCK_PX) -> None:
    """Refuse an image that is not a flat (open) field: an edge, a phantom, markers, a collimator border.

    The image is reduced to means of ``block_px``² blocks; a 2-D quadratic (the heel effect and other smooth
    trends, which the NNPS detrending removes anyway) is fitted; a block departing from it by more than
    ``FLAT_OUTLIER_SDS`` robust standard deviations of the block-to-block noise marks structure that would
    leak into the NNPS (common practice: IEC 62220-1 flat fields are free of objects).
    """
    a = np.asarray(pixels, dtype=float)
    nb_r, nb_c = a.shape[0] // block_px, a.shape[1] // block_px
    if nb_r < 4 or nb_c < 4:
        return
    m = a[: nb_r * block_px, : nb_c * block_px].reshape(nb_r, block_px, nb_c, block_px).mean(axis=(1, 3))
    yy, xx = np.mgrid[0:nb_r, 0:nb_c].astype(float)
    yy, xx = (yy - yy.mean()) / max(nb_r, 1), (xx - xx.mean()) / max(nb_c, 1)
    A = np.column_stack([np.ones(m.size), xx.ravel(), yy.ravel(), xx.ravel() ** 2, (xx * yy).ravel(), yy.ravel() ** 2])
    coef, *_ = np.linalg.lstsq(A, m.ravel(), rcond=None)
    r = m - (A @ coef).reshape(m.shape)
    # robust noise of one block mean, from differences of neighbouring blocks (insensitive to a few outliers)
    d = np.concatenate([np.diff(r, axis=0).ravel(), np.diff(r, axis=1).ravel()]) / np.sqrt(2.0)
    sd = 1.4826 * np.median(np.abs(d - np.median(d)))
    if not sd > 1e-9 * max(abs(float(m.mean())), 1e-300):
        return  # noiseless (synthetic) data: nothing to compare with
    z = np.abs(r) / sd
    worst = np.unravel_index(int(np.argmax(z)), z.shape)
    n_bad = int((z > FLAT_OUTLIER_SDS).sum())
    if n_bad:
        rc = (int((worst[0] + 0.5) * block_px), int((worst[1] + 0.5) * block_px))
        raise LimenError(
            f"not a flat field: {n_bad} region(s) depart from a smooth trend by more than "
            f"{FLAT_OUTLIER_SDS:g} noise SDs (largest {z.max():.0f} SDs near row {rc[0]}, column "
            f"{rc[1]}): an edge, a phantom or an object is in the field",
            path,
        )


def measure_nnps(
    images: Sequence[NDArray[Any]] | NDArray[Any],
    spacing_mm: Sequence[float] | NDArray[np.float64],
    *,
    roi_px: int = DEFAULT_ROI_PX,
    region_mm: float | None = DEFAULT_REGION_MM,
    n_lines: int = DEFAULT_N_LINES,
    paths: Sequence[object] | None = None,
    check_flat: bool = True,
) -> NNPSResult:
    """NNPS from one or more linearised flat fields (see the module docstring).

    Parameters
    ----------
    images : 2-D array or sequence of 2-D arrays, linear in air kerma, same spacing
    spacing_mm : (row, column) pixel spacing in mm
    roi_px : ROI side in pixels (even)
    region_mm : side of the central square region used, mm (None: the whole image)
    n_lines : frequency rows on each side of an axis averaged into a 1-D cut
    paths : file names for error messages, one per image
    check_flat : refuse images with structure (an edge, a phantom) — see :func:`check_flat_field`

    Raises
    ------
    LimenError
        Image too small for one ROI, non-positive mean signal, non-finite pixels.
    """
    if isinstance(images, np.ndarray) and images.ndim == 2:
        images = [images]
    images = list(images)
    if not images:
        raise LimenError("no flat-field images given for the NNPS")
    paths = list(paths) if paths is not None else [None] * len(images)
    roi_px = int(roi_px)
    if roi_px < 16 or roi_px % 2:
        raise ValueError("roi_px must be an even number ≥ 16")
    dy, dx = float(spacing_mm[0]), float(spacing_mm[1])
    basis = _poly_basis(roi_px)
    spec_sum = np.zeros((roi_px, roi_px))
    cuts_x, cuts_y, means = [], [], []
    warnings: list[str] = []
    n_rois = 0
    for img, path in zip(images, paths):
        a = np.asarray(img)
        if a.ndim != 2:
            raise LimenError("flat field is not a 2-D image", path)
        if region_mm is not None:
            h = min(a.shape[0], int(round(region_mm / dy)))
            w = min(a.shape[1], int(round(region_mm / dx)))
            r0, c0 = (a.shape[0] - h) // 2, (a.shape[1] - w) // 2
            a = a[r0 : r0 + h, c0 : c0 + w]
        a = np.asarray(a, dtype=np.float64)
        if min(a.shape) < roi_px:
            raise LimenError(
                f"flat field region {a.shape[0]}x{a.shape[1]} px is smaller than one {roi_px}x{roi_px} ROI", path
            )
        if not np.all(np.isfinite(a)):
            raise LimenError("flat field holds non-finite pixel values", path)
        if check_flat:
            check_flat_field(a, path)
        mean_region = float(a.mean())
        rs, cs = _roi_starts(a.shape[0], roi_px), _roi_starts(a.shape[1], roi_px)
        # process one row of ROIs at a time (memory stays at a few ROIs' worth)
        for r in rs:
            strip = np.stack([a[r : r + roi_px, c : c + roi_px] for c in cs])  # (k, n, n)
            flat = strip.reshape(len(cs), -1)
            if mean_region <= 0:
                raise LimenError(
                    "flat field has a non-positive mean signal: is it linearised (conversion function applied)?", path
                )
            resid = flat - (flat @ basis) @ basis.T
            f2 = sfft.rfft2(resid.reshape(strip.shape), workers=-1)
            p = _full_from_half(f2.real**2 + f2.imag**2, roi_px)
            p *= (dx * dy / (roi_px * roi_px)) / mean_region**2
            spec_sum += p.sum(axis=0)
            # per-ROI 1-D cuts (unshifted indices: v = ±1..±n_lines are rows 1..n and -n..-1)
            lines = np.r_[1 : n_lines + 1, -n_lines:0]
            cuts_x.append(p[:, lines, :].mean(axis=1))
            cuts_y.append(p[:, :, lines].mean(axis=2))
            means.extend([mean_region] * len(cs))
            n_rois += len(cs)
    nps = spec_sum / n_rois
    half = roi_px // 2
    cx = np.concatenate(cuts_x)[:, 1 : half + 1]
    cy = np.concatenate(cuts_y)[:, 1 : half + 1]
    fu = np.fft.fftfreq(roi_px, d=dx)
    fv = np.fft.fftfreq(roi_px, d=dy)
    freq_x = np.abs(fu[1 : half + 1])
    freq_y = np.abs(fv[1 : half + 1])
    if not np.allclose(freq_x, freq_y, rtol=1e-6):
        warnings.append("non-square pixels: the y cut is reported on the x frequency grid by interpolation")
    x_cut, y_cut = cx.mean(axis=0), cy.mean(axis=0)
    x_se = cx.std(axis=0, ddof=1) / np.sqrt(n_rois) if n_rois > 1 else np.full_like(x_cut, np.nan)
    y_se = cy.std(axis=0, ddof=1) / np.sqrt(n_rois) if n_rois > 1 else np.full_like(y_cut, np.nan)
    y_cut = np.interp(freq_x, freq_y, y_cut)
    y_se = np.interp(freq_x, freq_y, y_se)
    if n_rois < 16:
        warnings.append(
            f"only {n_rois} ROIs: the NNPS is noisy (relative error ≈ {1 / np.sqrt(n_rois * 2 * n_lines):.0%} "
            "per frequency)"
        )

    # radial average excluding both axes
    uu, vv = np.meshgrid(fu, fv)
    rad = np.hypot(uu, vv)
    mask = (uu != 0) & (vv != 0)
    du = 1.0 / (roi_px * dx)
    nb = int(np.floor(rad[mask].max() / du))
    idx = np.rint(rad[mask] / du).astype(int)
    ok = idx <= nb
    cnt = np.bincount(idx[ok], minlength=nb + 1)
    sm = np.bincount(idx[ok], weights=nps[mask][ok], minlength=nb + 1)
    have = cnt > 0
    have[0] = False
    rf = np.asarray(np.arange(nb + 1)[have] * du, dtype=np.float64)
    rv = sm[have] / cnt[have]

    return NNPSResult(
        nnps_2d_mm2=np.fft.fftshift(nps),
        frequency_2d_per_mm=(np.fft.fftshift(fv), np.fft.fftshift(fu)),
        frequency_per_mm=freq_x,
        x_mm2=x_cut,
        y_mm2=y_cut,
        x_se_mm2=x_se,
        y_se_mm2=y_se,
        radial_frequency_per_mm=rf,
        radial_mm2=rv,
        mean_signal=float(np.mean(means)),
        n_rois=n_rois,
        n_images=len(images),
        roi_px=roi_px,
        n_lines=int(n_lines),
        spacing_mm=(dy, dx),
        warnings=warnings,
    )
