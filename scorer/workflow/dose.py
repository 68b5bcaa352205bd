"""A dose series from image files: each image's kerma from its plate background, each kerma group scored
from its files (:func:`~scorer.workflow.scoring.score_files`), the fits by :func:`scorer.detector.dose_series`."""

from __future__ import annotations

from typing import Callable

from scorer.detector.dose import DoseSeriesResult, background_kerma_ugy, dose_series
from scorer.images.conversion import ConversionFunction
from scorer.images.loading import load_image
from scorer.observer.limits import Limits
from scorer.workflow.scoring import score_files


def file_background_kerma_ugy(path, *, conversion: ConversionFunction, pixel_spacing_mm=None) -> float:
    """Air kerma (µGy) of an image file's plate background through the conversion function
    (:func:`scorer.detector.dose.background_kerma_ugy`)."""
    return background_kerma_ugy(load_image(path, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion).pixels)


def score_dose_series(
    groups,
    layout,
    *,
    observer: str = "npw",
    method: str = "dprime",
    limits: Limits | None = None,
    human_factor=None,
    seed: int = 0,
    on_group: Callable | None = None,
    **score_kwargs,
) -> DoseSeriesResult:
    """Score each kerma group's image files (``{kerma_ugy: [paths]}``, :func:`scorer.detector.group_by_kerma`)
    as ``limen score`` would and fit the dose response per diameter (:func:`scorer.detector.dose_series`).

    ``score_kwargs`` go to :func:`~scorer.workflow.scoring.score_files` (conversion, pixel_spacing_mm, blur,
    n_boot, …); ``on_group(kerma, paths, result)`` is called after each group.
    """

    def score_group(paths, methods):
        return score_files(paths, layout, observer=observer, methods=methods, seed=seed, **score_kwargs)

    return dose_series(
        groups,
        score_group,
        observer=observer,
        method=method,
        limits=limits,
        human_factor=human_factor,
        seed=seed,
        on_group=on_group,
    )
