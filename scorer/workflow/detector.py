"""Measure a detector from image files: conversion function (given, or fitted to flat fields at several
kermas), flat and edge images, a noise series — read here, measured by :mod:`scorer.detector.measure`.

Also the shipped beam-quality table of q (photons per mm² per µGy).
"""

from __future__ import annotations

import csv
import io
import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, TypedDict

import numpy as np

from scorer.detector.measure import (
    DetectorMetrics,
    central_mean,
    fit_conversion,
    measure_detector,
    measure_noise_series,
    panel_from_metadata,
)
from scorer.errors import LimenError
from scorer.files import PathArg
from scorer.images.conversion import ConversionFunction, load_conversion
from scorer.images.image import Image
from scorer.images.loading import load_image
from scorer.workflow.inputs import read_kerma_csv

#: plausible air kerma at the detector for a DQE measurement, µGy (common practice: IEC 62220-1 uses a few
#: to a few hundred µGy; a factor of 100 either side is allowed)
KERMA_RANGE_UGY = (0.01, 1.0e5)


# ---------------------------------------------------------------- beam qualities


class BeamQuality(TypedDict):
    """One row of the shipped beam-quality table."""

    q_per_mm2_ugy: float
    standard: str
    note: str


def beam_qualities() -> dict[str, BeamQuality]:
    """The shipped beam-quality table: name → {"q_per_mm2_ugy", "standard", "note"}.

    General-radiography RQA qualities only (values from memory of IEC 62220-1-1);
    mammography q values must be supplied by the user.

    Returns
    -------
    dict of str to BeamQuality
        Upper-case beam name (``"RQA5"``) → its q (photons per mm² per µGy), the standard and a note.
    """
    text = resources.files("scorer").joinpath("data/beam_qualities.csv").read_text(encoding="utf-8")
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    out: dict[str, BeamQuality] = {}
    for row in csv.DictReader(io.StringIO("\n".join(lines))):
        out[row["beam"].strip().upper()] = {
            "q_per_mm2_ugy": float(row["q_per_mm2_ugy"]),
            "standard": row["standard"],
            "note": row["note"],
        }
    return out


def q_for_beam(beam: str) -> float:
    """q (photons per mm² per µGy) of a named beam quality, e.g. ``"RQA5"``.

    Parameters
    ----------
    beam : str
        Beam quality name, any case (``"rqa5"``).

    Returns
    -------
    float
        q in photons per mm² per µGy.

    Raises
    ------
    LimenError
        For a beam quality not in the table (naming the known ones).
    """
    table = beam_qualities()
    key = str(beam).strip().upper()
    if key not in table:
        raise LimenError(
            f"unknown beam quality {beam!r}; known: {', '.join(sorted(table))} (for mammography give q directly)",
            "--beam",
        )
    return table[key]["q_per_mm2_ugy"]


# ---------------------------------------------------------------- images


def _no_warn(text: str) -> None:
    pass


def load_images(
    paths: Iterable[PathArg],
    *,
    spacing: float | tuple[float, float] | None = None,
    conversion: ConversionFunction | None = None,
    role: str,
    for_conversion_fit: bool = False,
    warn: Callable[[str], None] = _no_warn,
) -> list[Image]:
    """Read flat-field (``role="flat"``) or edge (``role="edge"``) images, passing each warning to ``warn``
    once: what reading warned about, the image's own metadata warnings, and for a FOR PRESENTATION image
    why it cannot serve its role (also added to its ``metadata.warnings``).  ``for_conversion_fit`` reads the
    stored values whatever their relation to the beam (see :func:`scorer.images.loading.load_image`).

    Parameters
    ----------
    paths : iterable of str or path-like
        The image files.
    spacing : float or (float, float), optional
        Pixel spacing (mm) for files that carry none, or to override DICOM's.
    conversion : ConversionFunction, optional
        Conversion function that linearises the pixels.
    role : {"flat", "edge"}
        What the images are for (named in the FOR PRESENTATION warning).
    for_conversion_fit : bool
        Read the stored values for a conversion-function fit.
    warn : callable
        Called with the text of each warning.

    Returns
    -------
    list of Image
    """
    images: list[Image] = []
    for p in paths:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            im = load_image(p, pixel_spacing_mm=spacing, conversion=conversion, for_conversion_fit=for_conversion_fit)
        shown: set[str] = set()
        for w in caught:
            text = str(w.message)
            if text not in shown:
                shown.add(text)
                warn(text)
        for text in im.metadata.warnings:
            if text not in shown and not any(text in s for s in shown):
                shown.add(text)
                warn(f"{p}: {text}")
        if (im.metadata.presentation_intent or "").upper() == "FOR PRESENTATION":
            if role == "flat":
                msg = (
                    f"{p}: flat field is FOR PRESENTATION (processed for display): the NNPS of a processed "
                    "image is meaningless; use FOR PROCESSING images"
                )
            else:
                msg = (
                    f"{p}: edge image is FOR PRESENTATION (processed for display): its MTF includes the "
                    "processing and is not the detector's presampling MTF"
                )
            warn(msg)
            im.metadata.warnings.append(msg)
        images.append(im)
    return images


def check_distinct_and_kerma(
    paths: Sequence[PathArg], images: Sequence[Image], kerma_ugy: float | None, *, linearised: bool, n_flats: int
) -> None:
    """Refuse the same image given twice (it would count as independent noise) and an air kerma that cannot be
    the flats' (outside a plausible range, or, with a conversion function, far from the flats' own kerma)."""
    seen: dict[str, str] = {}
    for p, im in zip(paths, images):
        twin = seen.get(im.metadata.content_sha256)
        if twin is not None:
            what = "given twice" if twin == str(p) else f"holds the same image as {twin}"
            raise LimenError(f"{what}: it would be counted as two independent images", p)
        seen[im.metadata.content_sha256] = str(p)
    if kerma_ugy is None:
        return
    lo, hi = KERMA_RANGE_UGY
    if not lo <= kerma_ugy <= hi:
        raise LimenError(
            f"{kerma_ugy:g} µGy is outside the plausible range {lo:g}–{hi:g} µGy of air kerma at the detector",
            "--kerma-ugy",
        )
    if linearised and n_flats:
        measured = float(np.median([central_mean(im.pixels, im.spacing_mm) for im in images[:n_flats]]))
        if not 0.5 <= kerma_ugy / measured <= 2.0:
            raise LimenError(
                f"{kerma_ugy:g} µGy disagrees with the flat fields' air kerma from the conversion "
                f"function ({measured:.4g} µGy)",
                "--kerma-ugy",
            )


# ---------------------------------------------------------------- the measurement


@dataclass
class DetectorMeasurement:
    """What :func:`measure_detector_files` found: the metrics (None when no image was given), the conversion
    function used (as recorded in detector.json) and the notes on how the images were read.

    Attributes
    ----------
    metrics : DetectorMetrics or None
        MTF, NNPS, DQE and the rest; None when no image was given.
    conversion : dict or None
        The conversion function used, as recorded in detector.json.
    notes : list of str
        How the images were read (also passed to ``warn``).
    """

    metrics: DetectorMetrics | None
    conversion: dict[str, Any] | None
    notes: list[str] = field(default_factory=list)


def measure_detector_files(
    flat_files: Sequence[PathArg] = (),
    edge_files: Sequence[PathArg] = (),
    *,
    kerma_ugy: float | None = None,
    q_per_mm2_ugy: float | None = None,
    beam: str | None = None,
    pixel_spacing_mm: float | tuple[float, float] | None = None,
    conversion_file: PathArg | None = None,
    kerma_csv: PathArg | None = None,
    noise_csv: PathArg | None = None,
    warn: Callable[[str], None] = _no_warn,
) -> DetectorMeasurement:
    """MTF, NNPS and DQE (and, with ``noise_csv``, the noise components) from flat-field and edge files.

    Parameters
    ----------
    flat_files, edge_files : flat fields at one air kerma (NNPS) and slanted edges (MTF).
    kerma_ugy, q_per_mm2_ugy, beam : air kerma of the flats and the beam's q (both needed for the DQE);
        ``beam`` is recorded (:func:`q_for_beam` looks its q up).
    pixel_spacing_mm : for files that carry none, or to override DICOM's.
    conversion_file : conversion function (TOML/JSON) that linearises the images; or
    kerma_csv : CSV ``path,kerma_ugy`` of flat fields at several kermas to fit the conversion function to.
    noise_csv : CSV ``path,kerma_ugy`` of flat fields at several kermas for the noise components.
    warn : called with each warning's text as it arises (the CLI prints them on stderr).

    Returns
    -------
    DetectorMeasurement
        The metrics (None when no image was given), the conversion function used and the notes.
    """
    if beam is not None and q_per_mm2_ugy is None:
        q_per_mm2_ugy = q_for_beam(beam)
    conv_fn = None
    conv_dict = None
    if conversion_file:
        conv_fn = load_conversion(conversion_file)
        conv_dict = conv_fn.to_dict()
    elif kerma_csv:
        entries = read_kerma_csv(kerma_csv)
        raw = load_images(
            [p for p, _ in entries], spacing=pixel_spacing_mm, role="flat", for_conversion_fit=True, warn=warn
        )
        fit = fit_conversion(
            [k for _, k in entries], [central_mean(im.pixels, im.spacing_mm) for im in raw], path=kerma_csv
        )
        conv_fn = fit.conversion
        conv_dict = fit.to_dict()
        if fit.nonlinear:
            warn(f"{kerma_csv}: {fit.note}")

    spacing = pixel_spacing_mm
    flats = load_images(flat_files, spacing=spacing, conversion=conv_fn, role="flat", warn=warn)
    edges = load_images(edge_files, spacing=spacing, conversion=conv_fn, role="edge", warn=warn)
    check_distinct_and_kerma(
        list(flat_files) + list(edge_files),
        flats + edges,
        kerma_ugy,
        linearised=conv_fn is not None,
        n_flats=len(flats),
    )
    notes: list[str] = []
    if conv_fn is None and (flats or edges):
        notes.append(
            "no conversion function given: pixel values are taken as proportional to air kerma "
            "(zero offset); give --conversion or --fit-conversion for raw images"
        )
        warn(notes[-1])
    if not flats and not edges and not noise_csv:
        return DetectorMeasurement(None, conv_dict, notes)
    series_images: list[Image] = []
    series: list[tuple[Path, float]] = []
    if noise_csv:
        series = read_kerma_csv(noise_csv)
        series_images = load_images([p for p, _ in series], spacing=spacing, conversion=conv_fn, role="flat", warn=warn)
    if flats or edges:
        metrics = measure_detector(
            flats, edges, kerma_ugy=kerma_ugy, q_per_mm2_ugy=q_per_mm2_ugy, beam=beam, conversion=conv_dict
        )
    else:
        metrics = measure_detector(series_images, [], conversion=conv_dict, q_per_mm2_ugy=q_per_mm2_ugy)
    if not flats and not edges:
        metrics.nnps = None  # a noise series alone gives no headline NNPS
    if noise_csv:
        metrics.noise_series = measure_noise_series(
            series_images,
            [k for _, k in series],
            mtf=metrics.mtf,
            mtf_by_direction=metrics.mtf_by_direction,
            q_per_mm2_ugy=q_per_mm2_ugy,
            path=noise_csv,
        )
    metrics.panel = panel_from_metadata(flats + edges + series_images)
    for w in metrics.warnings:  # the measurement's own (edge angle, NNPS, DQE): reported, not only in JSON
        warn(" ".join(str(w).split()))
    metrics.warnings = notes + [w for im in flats + edges for w in im.metadata.warnings] + metrics.warnings
    return DetectorMeasurement(metrics, conv_dict, notes)
