"""A dose series from image files: each image's kerma from its plate background, each kerma group scored
from its files (:func:`~scorer.workflow.scoring.score_files`), the fits by :func:`scorer.detector.dose_series`."""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any, cast

from scorer.detector.dose import DoseSeriesResult, dose_series
from scorer.detector.dose_groups import background_kerma_ugy, check_kerma_agreement, check_one_panel, group_by_kerma
from scorer.errors import LimenError
from scorer.files import PathArg
from scorer.images.conversion import ConversionFunction
from scorer.images.loading import load_image
from scorer.observer.limits import HumanFactor, Limits
from scorer.observer.scoring import ScoreResult
from scorer.phantom.layout import Layout
from scorer.workflow.inputs import read_kerma_csv
from scorer.workflow.scoring import score_files


def file_background_kerma_ugy(
    path: PathArg, *, conversion: ConversionFunction, pixel_spacing_mm: float | tuple[float, float] | None = None
) -> float:
    """Air kerma (µGy) of an image file's plate background through the conversion function
    (:func:`scorer.detector.dose.background_kerma_ugy`).

    Parameters
    ----------
    path : str or path-like
        The image file.
    conversion : ConversionFunction
        Conversion function of the panel.
    pixel_spacing_mm : float or (float, float), optional
        For files that carry no spacing.

    Returns
    -------
    float
        Air kerma in µGy.
    """
    return background_kerma_ugy(load_image(path, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion).pixels)


def file_panel(path: PathArg) -> tuple[str | None, str | None]:
    """An image file's DICOM Detector Type (0018,7004) and Detector ID (0018,700A) from its header, (None, None)
    for a file that is not DICOM or does not say (its own read, later, explains what is wrong with it).

    Parameters
    ----------
    path : str or path-like
        The image file.

    Returns
    -------
    (str or None, str or None)
        Detector Type and Detector ID.
    """
    import warnings

    import pydicom

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = pydicom.dcmread(path, stop_before_pixels=True, specific_tags=["DetectorType", "DetectorID"])
        return (str(ds.get("DetectorType") or "") or None, str(ds.get("DetectorID") or "") or None)
    except Exception:  # not DICOM, unreadable, cut short: load_image judges it when the image is scored
        return None, None


def series_groups(
    images: Iterable[PathArg],
    *,
    kerma_csv: PathArg | None = None,
    conversion: ConversionFunction | None = None,
    pixel_spacing_mm: float | tuple[float, float] | None = None,
    progress: Callable[[list[str]], Iterable[str]] | None = None,
) -> tuple[OrderedDict[float, list[str]], list[str]]:
    """The kerma groups of a dose series' image files (``{kerma_ugy: [paths]}``) and warnings.

    Every image must come from one panel (:func:`~scorer.detector.dose_groups.check_one_panel`, DICOM header).
    Each image's kerma is the kerma CSV's (``path,kerma_ugy``), else its plate background through the conversion
    function; with both, the two are compared (:func:`~scorer.detector.dose_groups.check_kerma_agreement`).
    ``progress(iterable)`` wraps the loop that reads each image for its background kerma.

    Parameters
    ----------
    images : iterable of str or path-like
        The image files of the series.
    kerma_csv : str or path-like, optional
        CSV ``path,kerma_ugy`` giving each image's kerma.
    conversion : ConversionFunction, optional
        Conversion function, for the kerma of each image's plate background.
    pixel_spacing_mm : float or (float, float), optional
        For files that carry no spacing.
    progress : callable, optional
        Wraps the list of paths read for their background kerma (a progress bar).

    Returns
    -------
    groups : OrderedDict of float to list of str
        Kerma (µGy) → the images taken at it, in increasing kerma.
    warnings : list of str
        Disagreements between the listed and the measured kermas.
    """
    paths = [str(p) for p in images]
    check_one_panel(paths, [file_panel(p) for p in paths])
    wrap: Callable[[list[str]], Iterable[str]] = progress or (lambda it: it)

    def measured(conversion: ConversionFunction) -> list[float]:
        return [
            file_background_kerma_ugy(p, conversion=conversion, pixel_spacing_mm=pixel_spacing_mm) for p in wrap(paths)
        ]

    warnings: list[str] = []
    if kerma_csv:
        table = {str(p.resolve()): k for p, k in read_kerma_csv(kerma_csv)}
        kermas = [table.get(str(Path(p).resolve())) for p in paths]
        groups = group_by_kerma(paths, kermas, source=f"not listed in {kerma_csv}")
        if conversion is not None:  # every kerma is listed, or group_by_kerma has refused the series
            warnings += check_kerma_agreement(paths, cast("list[float]", kermas), measured(conversion), str(kerma_csv))
    elif conversion is not None:
        groups = group_by_kerma(paths, measured(conversion), source="plate background through the conversion function")
    else:
        raise LimenError("the air kerma of each image is unknown: give --kerma-csv or --conversion", "--kerma-csv")
    return groups, warnings


def score_dose_series(
    groups: OrderedDict[float, list[str]],
    layout: Layout,
    *,
    observer: str = "npw",
    method: str = "dprime",
    limits: Limits | None = None,
    human_factor: HumanFactor | float | None = None,
    seed: int = 0,
    on_group: Callable[[float, list[str], ScoreResult], object] | None = None,
    **score_kwargs: Any,
) -> DoseSeriesResult:
    """Score each kerma group's image files (``{kerma_ugy: [paths]}``, :func:`scorer.detector.group_by_kerma`)
    as ``limen score`` would and fit the dose response per diameter (:func:`scorer.detector.dose_series`).

    ``score_kwargs`` go to :func:`~scorer.workflow.scoring.score_files` (conversion, pixel_spacing_mm, blur,
    n_boot, …); ``on_group(kerma, paths, result)`` is called after each group.

    Parameters
    ----------
    groups : OrderedDict of float to list of str
        Kerma (µGy) → the image files taken at it (:func:`series_groups`).
    layout : Layout
        The phantom's layout.
    observer : {"npw", "npwe"}
        Model observer.
    method : {"dprime", "count", "both"}
        Threshold method(s); the dose response is fitted to the d′ method's unless ``"count"``.
    limits : Limits, optional
        Limits: the kerma at which each diameter meets its limit is reported.
    human_factor : HumanFactor or float, optional
        Human/model threshold factor, for limits written for human readers.
    seed : int
        Seed of the bootstrap and of the kerma CIs' draws.
    on_group : callable, optional
        Called as ``on_group(kerma, paths, result)`` after each group.
    **score_kwargs
        Passed to :func:`~scorer.workflow.scoring.score_files`.

    Returns
    -------
    DoseSeriesResult
    """

    def score_group(paths: Sequence[str], methods: Sequence[str]) -> ScoreResult:

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
