"""Detector physics: conversion function, MTF, NNPS and DQE in one place.

This module fits the conversion function from flat fields at several air kermas, computes
DQE(f) = MTF²(f) / (K · q · NNPS(f)), and gathers everything into
:class:`DetectorMetrics` (what ``limen detector`` writes as ``detector.json``).
The slanted-edge MTF lives in :mod:`scorer.detector.mtf`, the NNPS in :mod:`scorer.detector.nnps`.
It takes images and numbers and reads no file: :mod:`scorer.workflow` loads the flat and edge images and
the shipped beam-quality table of q (photons per mm² per µGy).

References
----------
.. [1] IEC 62220-1-1 (general radiography) and IEC 62220-1-2 (mammography),
       *Determination of the detective quantum efficiency*: conversion function,
       presampling MTF, NNPS, DQE(f) = MTF²(f) / (K · q · NNPS(f)).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from scorer.detector.mtf import MTFResult, mean_mtf, measure_mtf
from scorer.detector.nnps import NNPSResult, measure_nnps
from scorer.errors import LimenError
from scorer.images.conversion import ConversionFunction
from scorer.images.image import Image
from scorer.observer.defects import DefectMap, defect_map_from_flats, fill_defects

#: largest error of the fitted conversion function, as a fraction of the kerma, before
#: the response is flagged non-linear (common practice)
NONLINEARITY_TOLERANCE = 0.05
#: smallest R² of the fitted conversion function before it is flagged (common practice)
MIN_R_SQUARED = 0.99


# ---------------------------------------------------------------- conversion function


@dataclass
class LineFit:
    kind: str
    offset: float
    gain: float
    r_squared: float
    max_relative_kerma_error: float

    def to_dict(self) -> dict[str, Any]:
        return dict(
            kind=self.kind,
            offset=self.offset,
            gain=self.gain,
            r_squared=self.r_squared,
            max_relative_kerma_error=self.max_relative_kerma_error,
        )


@dataclass
class ConversionFit:
    """Both fitted responses, the chosen one, and the non-linearity flag."""

    kerma_ugy: np.ndarray
    mean_pixel_value: np.ndarray
    linear: LineFit
    logarithmic: LineFit | None
    kind: str
    nonlinear: bool
    note: str = ""

    @property
    def chosen(self) -> LineFit:
        return self.linear if self.kind == "linear" else self.logarithmic  # type: ignore[return-value]

    @property
    def conversion(self) -> ConversionFunction:
        """The chosen fit as the linearisation used everywhere else in Limen."""
        c = self.chosen
        return ConversionFunction(
            kind=c.kind,
            offset=c.offset,
            gain=c.gain,
            source=f"fitted by limen detector ({c.kind}, R² = {c.r_squared:.5f})",
        )

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "offset": self.chosen.offset,
            "gain": self.chosen.gain,
            "r_squared": self.chosen.r_squared,
            "nonlinear": self.nonlinear,
            "note": self.note,
            "kerma_ugy": self.kerma_ugy.tolist(),
            "mean_pixel_value": self.mean_pixel_value.tolist(),
            "linear": self.linear.to_dict(),
            "logarithmic": None if self.logarithmic is None else self.logarithmic.to_dict(),
        }


def _line_fit(kind: str, x: np.ndarray, pv: np.ndarray, kerma: np.ndarray) -> LineFit:
    gain, offset = np.polyfit(x, pv, 1)
    pred = offset + gain * x
    ss_res = float(np.sum((pv - pred) ** 2))
    ss_tot = float(np.sum((pv - pv.mean()) ** 2))
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan")
    conv = ConversionFunction(kind=kind, offset=float(offset), gain=float(gain))
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        back = conv.to_kerma_ugy(pv)
        err = float(np.max(np.abs(back - kerma) / kerma))
    return LineFit(kind, float(offset), float(gain), float(r2), err)


def fit_conversion(
    kerma_ugy: ArrayLike,
    mean_pixel_value: ArrayLike,
    *,
    kind: str | None = None,
    tolerance: float = NONLINEARITY_TOLERANCE,
    path: object | None = None,
) -> ConversionFit:
    """Fit linear (PV = o + g·K) and logarithmic (PV = o + g·ln K) responses.

    Parameters
    ----------
    kerma_ugy : air kerma at the detector of each flat field, µGy (> 0)
    mean_pixel_value : mean stored pixel value of each (central ROI)
    kind : force ``"linear"`` or ``"logarithmic"``; by default the one with the
        smaller largest kerma error is chosen
    tolerance : largest relative kerma error of the chosen fit before ``nonlinear``
        is set (R² below 0.99 sets it too)

    Returns
    -------
    ConversionFit
    """
    k = np.asarray(kerma_ugy, dtype=float).ravel()
    pv = np.asarray(mean_pixel_value, dtype=float).ravel()
    if k.size != pv.size:
        raise LimenError("kerma list and flat-field list differ in length", path)
    if np.unique(k).size < 2:
        raise LimenError("the conversion function needs flat fields at two or more different air kermas", path)
    if np.any(~np.isfinite(k)) or np.any(k <= 0):
        raise LimenError("air kermas must be positive numbers (µGy)", path)
    lin = _line_fit("linear", k, pv, k)
    log = _line_fit("logarithmic", np.log(k), pv, k)
    if kind is None:
        kind = "linear" if lin.max_relative_kerma_error <= log.max_relative_kerma_error else "logarithmic"
    elif kind not in ("linear", "logarithmic"):
        raise LimenError(f"conversion kind must be linear or logarithmic, got {kind!r}", path)
    chosen = lin if kind == "linear" else log
    nonlinear = bool(chosen.max_relative_kerma_error > tolerance or not (chosen.r_squared >= MIN_R_SQUARED))
    note = ""
    if k.size < 3:
        note = "only two air kermas: R² is 1 by construction and linearity is not tested"
    elif nonlinear:
        note = (
            f"response not {kind} within {tolerance:.0%} (largest kerma error "
            f"{chosen.max_relative_kerma_error:.1%}, R² = {chosen.r_squared:.4f})"
        )
    return ConversionFit(k, pv, lin, log, kind, nonlinear, note)


def central_mean(pixels: ArrayLike, spacing_mm: Sequence[float] | NDArray[np.float64], side_mm: float = 10.0) -> float:
    """Mean of a central square ROI of ``side_mm`` (at least 8 × 8 pixels)."""
    a = np.asarray(pixels)
    h = max(8, int(round(side_mm / spacing_mm[0])))
    w = max(8, int(round(side_mm / spacing_mm[1])))
    h, w = min(h, a.shape[0]), min(w, a.shape[1])
    r0, c0 = (a.shape[0] - h) // 2, (a.shape[1] - w) // 2
    return float(np.mean(a[r0 : r0 + h, c0 : c0 + w], dtype=np.float64))


# ---------------------------------------------------------------- DQE


@dataclass
class DQEResult:
    frequency_per_mm: np.ndarray
    value: np.ndarray
    by_direction: dict[str, np.ndarray]
    kerma_ugy: float
    q_per_mm2_ugy: float
    ci_low: np.ndarray | None = None  # 95 % CI from the NNPS's and the MTF's standard errors
    ci_high: np.ndarray | None = None
    warnings: list[str] = field(default_factory=list)

    def at(self, frequency_per_mm: NDArray[np.float64] | Sequence[float]) -> NDArray[np.float64]:
        value: NDArray[np.float64] = np.interp(
            frequency_per_mm, self.frequency_per_mm, self.value, left=np.nan, right=np.nan
        )
        return value

    def to_dict(self) -> dict[str, Any]:
        return {
            "frequency_per_mm": self.frequency_per_mm.tolist(),
            "value": self.value.tolist(),
            "ci_low": None if self.ci_low is None else self.ci_low.tolist(),
            "ci_high": None if self.ci_high is None else self.ci_high.tolist(),
            "ci_note": "95 % CI from the NNPS standard error (ROI spread) and the MTF's (spread between edge segments)",
            "by_direction": {k: v.tolist() for k, v in self.by_direction.items()},
            "kerma_ugy": self.kerma_ugy,
            "q_per_mm2_ugy": self.q_per_mm2_ugy,
            "warnings": list(self.warnings),
        }


def compute_dqe(
    mtf: MTFResult,
    nnps: NNPSResult,
    kerma_ugy: float | None,
    q_per_mm2_ugy: float | None,
    mtf_by_direction: dict[str, MTFResult] | None = None,
) -> DQEResult:
    """DQE(f) = MTF²(f) / (K · q · NNPS(f)) on the NNPS frequency grid (up to Nyquist).

    Refuses (LimenError) without a positive air kerma K (µGy) and q (per mm² per µGy):
    the DQE is never computed from a guessed beam.

    The headline DQE uses ``mtf`` (mean of the orientations measured) with the mean
    of the two NNPS axis cuts; per direction, the x (y) MTF goes with the x (y) cut.
    """
    if kerma_ugy is None or not np.isfinite(kerma_ugy) or kerma_ugy <= 0:
        raise LimenError("DQE needs the air kerma at the detector (--kerma-ugy, µGy > 0)", "--kerma-ugy")
    if q_per_mm2_ugy is None or not np.isfinite(q_per_mm2_ugy) or q_per_mm2_ugy <= 0:
        raise LimenError("DQE needs q, photons per mm² per µGy (--q, or --beam for an RQA quality)", "--q")
    f = nnps.frequency_per_mm
    kq = float(kerma_ugy) * float(q_per_mm2_ugy)
    value = mtf.at(f) ** 2 / (kq * nnps.value_mm2)
    by_dir = {}
    for d, m in (mtf_by_direction or {}).items():
        cut = nnps.x_mm2 if d == "x" else nnps.y_mm2
        by_dir[d] = m.at(f) ** 2 / (kq * cut)
    rel = float(nnps.relative_uncertainty)
    z = 1.959963984540054
    # DQE ∝ MTF²/NNPS: relative standard errors add in quadrature, the MTF's twice (first-order propagation);
    # the interval is taken log-normal, value·exp(±z·r), per frequency
    with np.errstate(divide="ignore", invalid="ignore"):
        r_nnps = nnps.se_mm2 / nnps.value_mm2
        r_mtf = (np.interp(f, mtf.frequency_ext_per_mm, mtf.se_ext) / mtf.at(f)) if mtf.se_ext is not None else 0.0
    r_all = np.sqrt(np.nan_to_num(r_nnps, nan=rel) ** 2 + (2 * np.nan_to_num(r_mtf, nan=0.0)) ** 2)
    lo = value * np.exp(-z * r_all)
    hi = value * np.exp(z * r_all)
    warnings = []
    # flag DQE > 1 only beyond a simultaneous bound over all frequencies (Bonferroni), so that an ideal
    # detector, whose DQE is 1 at low frequency, is not flagged by chance at one of many frequencies
    from scipy.stats import norm

    z_all = float(norm.ppf(1 - 0.025 / max(int(np.isfinite(value).sum()), 1)))
    lo_all = value / (1.0 + z_all * rel)
    above = np.isfinite(lo_all) & (lo_all > 1.0)
    if above.any():
        warnings.append(
            f"DQE exceeds 1 beyond its uncertainty at {int(above.sum())} frequencies (up to "
            f"{float(np.nanmax(value)):.2f}): impossible for a real detector; check the air kerma, q and "
            "the conversion function"
        )
    return DQEResult(f, value, by_dir, float(kerma_ugy), float(q_per_mm2_ugy), lo, hi, warnings)


# ---------------------------------------------------------------- everything together


@dataclass
class DetectorMetrics:
    """What one ``limen detector`` run measured."""

    mtf: MTFResult | None
    mtf_by_direction: dict[str, MTFResult]
    nnps: NNPSResult | None
    dqe: DQEResult | None
    conversion: dict[str, Any] | None
    kerma_ugy: float | None
    q_per_mm2_ugy: float | None
    beam: str | None
    pixel_spacing_mm: tuple[float, float] | None
    inputs: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    predicted: list[dict[str, Any]] | None = None
    noise_series: dict[str, Any] | None = None
    panel: dict[str, Any] | None = None  # what the images' DICOM headers say of the panel (panel_from_metadata)
    defect_map: DefectMap | None = None

    @property
    def edge_angle_deg(self) -> dict[str, float] | None:
        if not self.mtf_by_direction:
            return None
        return {d: m.edge_angle_deg for d, m in self.mtf_by_direction.items()}

    def to_dict(self) -> dict[str, Any]:
        mtf = None
        if self.mtf is not None:
            mtf = self.mtf.to_dict()
            mtf["by_direction"] = {
                d: {
                    "frequency_per_mm": m.frequency_per_mm.tolist(),
                    "value": m.value.tolist(),
                    "edge_angle_deg": m.edge_angle_deg,
                }
                for d, m in self.mtf_by_direction.items()
            }
        return {
            "mtf": mtf,
            "mtf_extended": None
            if self.mtf is None
            else {
                "frequency_per_mm": self.mtf.frequency_ext_per_mm.tolist(),
                "value": self.mtf.value_ext.tolist(),
                "note": "presampling MTF up to 2 × Nyquist, used for the aliasing terms of the prediction",
            },
            "nnps": None if self.nnps is None else self.nnps.to_dict(),
            "dqe": None if self.dqe is None else self.dqe.to_dict(),
            "conversion": self.conversion,
            "edge_angle_deg": self.edge_angle_deg,
            "kerma_ugy": self.kerma_ugy,
            "q_per_mm2_ugy": self.q_per_mm2_ugy,
            "beam": self.beam,
            "pixel_spacing_mm": None if self.pixel_spacing_mm is None else list(self.pixel_spacing_mm),
            "nyquist_per_mm": None
            if self.pixel_spacing_mm is None
            else 0.5 / float(np.sqrt(self.pixel_spacing_mm[0] * self.pixel_spacing_mm[1])),
            "predicted": self.predicted,
            "noise_series": self.noise_series,
            "panel": self.panel,
            "defect_map": None if self.defect_map is None else self.defect_map.to_dict(),
            "inputs": self.inputs,
            "warnings": list(self.warnings),
        }


#: DICOM Detector Type (0018,7004) → the conversion principle Limen names panels by
PANEL_TYPES = {"DIRECT": "direct", "SCINTILLATOR": "indirect", "STORAGE": "storage phosphor", "FILM": "film"}


def panel_from_metadata(images: list[Image]) -> dict[str, Any] | None:
    """The panel as the images' DICOM headers describe it: type (direct / indirect, from Detector Type),
    Detector ID, serial, station and manufacturer (the first image that has any of them); None without."""
    for im in images:
        md = im.metadata
        if md is None or not (md.detector_type or md.detector_id or md.device_serial or md.station_name):
            continue
        dtype = (md.detector_type or "").strip().upper() or None
        return {
            "type": PANEL_TYPES.get(dtype or "", None),
            "detector_type": dtype,
            "detector_id": md.detector_id,
            "device_serial": md.device_serial,
            "station_name": md.station_name,
            "manufacturer": md.manufacturer,
        }
    return None


def _spacing(images: list[Image]) -> tuple[float, float]:
    """The images' common pixel spacing (row, col); every caller passes at least one image."""
    if not images:
        raise ValueError("no images")  # never reached: measure_detector refuses no flats and no edges first
    s0 = (float(images[0].spacing_mm[0]), float(images[0].spacing_mm[1]))
    for im in images[1:]:
        if not np.allclose(im.spacing_mm, s0, rtol=1e-4):
            raise LimenError(
                f"pixel spacing {tuple(im.spacing_mm)} mm differs from {s0} mm of the other images",
                im.metadata.source_path or None,
            )
    return s0


def measure_detector(
    flats: Sequence[Image] = (),
    edges: Sequence[Image] = (),
    *,
    kerma_ugy: float | None = None,
    q_per_mm2_ugy: float | None = None,
    beam: str | None = None,
    conversion: dict[str, Any] | None = None,
    require_dqe: bool = False,
    roi_px: int = 256,
) -> DetectorMetrics:
    """MTF from the edge images, NNPS from the flat fields, and the DQE when K and q are known.

    Images must already be linear in air kerma (a conversion function applied when they were
    read, :func:`scorer.workflow.measure_detector_files`).  Edges of the same orientation are averaged; the
    headline MTF is the mean of the orientations measured.  The DQE is computed
    only when ``kerma_ugy`` and q are given (``beam`` only names the beam quality; its tabulated q is
    :func:`scorer.workflow.q_for_beam`); with ``require_dqe`` their absence is an error.
    """
    flats, edges = list(flats), list(edges)
    if not flats and not edges:
        raise LimenError("no images: give flat fields (--flat) and/or edge images (--edge)")
    if beam is not None and q_per_mm2_ugy is None:
        raise LimenError(
            f"beam quality {beam!r} given without its q: pass q_per_mm2_ugy (scorer.workflow.q_for_beam looks up "
            "the shipped table)",
            "--beam",
        )
    spacing = _spacing(flats + edges)
    warnings: list[str] = []
    groups: dict[str, list[MTFResult]] = {}
    for im in edges:
        r = measure_mtf(im.pixels, im.spacing_mm, path=im.metadata.source_path or None)
        groups.setdefault(r.direction, []).append(r)
        warnings += [f"{im.metadata.source_path or 'edge'}: {w}" for w in r.warnings]
    by_dir = {d: mean_mtf(rs) for d, rs in sorted(groups.items())}
    mtf = None
    if by_dir:
        mtf = mean_mtf(list(by_dir.values()), direction="mean" if len(by_dir) > 1 else None)
    nnps = None
    defect_map = None
    if flats:
        flat_pixels = [im.pixels for im in flats]
        try:
            defect_map = defect_map_from_flats(flat_pixels)
        except LimenError as exc:  # flats of mixed sizes: the NNPS below refuses them in its own words
            warnings.append(f"no defect map: {exc}")
        if defect_map is not None and (defect_map.lines or defect_map.pixels):
            # defective pixels are not the detector's noise: the NNPS is measured with them filled in
            bad = defect_map.labelled(defect_map.shape)[1] > 0
            flat_pixels = [fill_defects(f, bad) for f in flat_pixels]
            warnings.append(
                f"NNPS measured with the {int(bad.sum())} defective pixels of the defect map "
                f"({', '.join(d.name for d in defect_map.lines[:3]) or 'isolated pixels'}"
                f"{', …' if len(defect_map.lines) > 3 else ''}) replaced by their local background"
            )
        nnps = measure_nnps(
            flat_pixels, spacing, roi_px=roi_px, paths=[im.metadata.source_path or None for im in flats]
        )
        warnings += nnps.warnings
    dqe = None
    if mtf is not None and nnps is not None and (require_dqe or (kerma_ugy is not None and q_per_mm2_ugy is not None)):
        dqe = compute_dqe(mtf, nnps, kerma_ugy, q_per_mm2_ugy, by_dir)
        warnings += dqe.warnings
    elif require_dqe:
        raise LimenError("DQE needs both an edge image (--edge) and flat fields (--flat)")
    inputs = {
        "flat": [im.metadata.source_path for im in flats],
        "edge": [im.metadata.source_path for im in edges],
        "flat_sha256": [im.metadata.content_sha256 for im in flats],
        "edge_sha256": [im.metadata.content_sha256 for im in edges],
    }
    return DetectorMetrics(
        mtf=mtf,
        mtf_by_direction=by_dir,
        nnps=nnps,
        dqe=dqe,
        conversion=conversion,
        kerma_ugy=kerma_ugy,
        q_per_mm2_ugy=q_per_mm2_ugy,
        beam=beam,
        pixel_spacing_mm=spacing,
        inputs=inputs,
        warnings=warnings,
        defect_map=defect_map,
    )


# ---------------------------------------------------------------- flats at several kermas


def measure_noise_series(
    flats: list[Image],
    kerma_ugy: Sequence[float],
    *,
    mtf: MTFResult | None = None,
    mtf_by_direction: dict[str, MTFResult] | None = None,
    q_per_mm2_ugy: float | None = None,
    roi_px: int = 256,
    path: object | None = None,
) -> dict[str, Any]:
    """Noise components and, with an MTF and q, the DQE at each kerma, from flats at several air kermas.

    Returns the ``noise_series`` entry of ``detector.json``: per kerma group the pixel variance (with its
    standard error), the NNPS and the DQE (with its 95 % CI); the fit σ² = e + q·K + s·K² with CIs
    (:mod:`scorer.detector.noise`); the same fit per frequency band of the noise power spectrum; and the
    kerma range where quantum noise dominates.
    """
    from scorer.detector.noise import band_components, describe_quantum_range, fit_components, group_flats

    flats = list(flats)
    k = [float(v) for v in kerma_ugy]
    if len(flats) != len(k):
        raise LimenError("noise series: one air kerma per flat field is needed", path)
    if any(not (v > 0 and np.isfinite(v)) for v in k):
        raise LimenError("noise series: air kermas must be positive numbers (µGy)", path)
    distinct = sorted(set(k))
    if len(distinct) < 2:
        raise LimenError(
            f"noise series: all flat fields are at {distinct[0]:g} µGy; the noise components need "
            "flat fields at two or more different air kermas",
            path,
        )
    groups = group_flats(flats, k, roi_px=min(roi_px, 128))
    fit = fit_components(
        [g.kerma_ugy for g in groups], [g.variance for g in groups], [g.variance_se for g in groups], path=path
    )
    per_kerma, nnps_list = [], []
    for g in groups:
        ims = [im for im, kk in zip(flats, k) if kk == g.kerma_ugy]
        nn = measure_nnps(
            [im.pixels for im in ims],
            _spacing(ims),
            roi_px=roi_px,
            paths=[im.metadata.source_path or None for im in ims],
        )
        nnps_list.append(nn)
        row = g.to_dict()
        row["nnps"] = {
            "frequency_per_mm": nn.frequency_per_mm.tolist(),
            "value_mm2": nn.value_mm2.tolist(),
            "relative_uncertainty": nn.relative_uncertainty,
        }
        row["dqe"] = None
        if mtf is not None and q_per_mm2_ugy:
            dq = compute_dqe(mtf, nn, g.kerma_ugy, q_per_mm2_ugy, mtf_by_direction)
            row["dqe"] = {
                "frequency_per_mm": dq.frequency_per_mm.tolist(),
                "value": dq.value.tolist(),
                "ci_low": None if dq.ci_low is None else dq.ci_low.tolist(),  # compute_dqe always sets both
                "ci_high": None if dq.ci_high is None else dq.ci_high.tolist(),
            }
        per_kerma.append(row)
    comp = fit.to_dict()
    return {
        "groups": per_kerma,
        "components": comp,
        "bands": band_components([g.kerma_ugy for g in groups], nnps_list),
        "quantum_limited_text": describe_quantum_range(comp["quantum_limited"], min(distinct), max(distinct)),
        "model": "pixel variance σ²(K) = e + q·K + s·K² (electronic + quantum + structure; common practice), "
        "in the linearised image's units",
    }
