"""Score image files: read each image when it is reached, and score them with
:func:`scorer.observer.score_images` (which takes Image objects and reads nothing)."""

from __future__ import annotations

import warnings
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any, overload

from scorer.errors import LimenError
from scorer.files import PathArg
from scorer.images.conversion import ConversionFunction
from scorer.images.image import Image, LimenWarning
from scorer.images.loading import load_image
from scorer.observer.scoring import ScoreResult, score_images
from scorer.phantom.layout import Layout

#: the result's first note when the images are scored without a conversion function
NO_CONVERSION_NOTE = "no conversion function given: stored pixel values are taken as proportional to air kerma"


class ImageFiles(Sequence[Image]):
    """Image files as a sequence of :class:`~scorer.images.image.Image`, each file read when its item is
    asked for, so a loop over them holds one image in memory at a time.

    A file given twice (the same resolved path) is refused at once.  The warnings that reading raises
    (:class:`~scorer.images.image.LimenWarning`: FOR PRESENTATION images, a conversion function of the other
    kind than the file says, …) are kept in ``notes``, in reading order.

    Parameters
    ----------
    paths : iterable of str or path-like
        The image files, in scoring order.
    pixel_spacing_mm : float or (float, float), optional
        Spacing for files that carry none, or to override DICOM's.
    conversion : ConversionFunction, optional
        Conversion function that linearises the pixels.

    Attributes
    ----------
    paths : list
        The files as given.
    notes : list of str
        The warnings reading raised so far, in reading order.
    """

    def __init__(
        self,
        paths: Iterable[PathArg],
        *,
        pixel_spacing_mm: float | tuple[float, float] | None = None,
        conversion: ConversionFunction | None = None,
    ) -> None:
        self.paths = list(paths)
        self.pixel_spacing_mm = pixel_spacing_mm
        self.conversion = conversion
        self.notes: list[str] = []
        seen: dict[Path, str] = {}
        for p in self.paths:
            key = Path(p).resolve()
            if key in seen:
                raise LimenError(f"given twice (as {seen[key]} and {p}); each image may be scored once", p)
            seen[key] = str(p)

    def __len__(self) -> int:
        return len(self.paths)

    @overload
    def __getitem__(self, index: int) -> Image: ...

    @overload
    def __getitem__(self, index: slice) -> Sequence[Image]: ...

    def __getitem__(self, index: int | slice) -> Image | Sequence[Image]:
        if isinstance(index, slice):
            raise TypeError("ImageFiles reads one image at a time; index it with an integer")
        path = self.paths[index]
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", LimenWarning)
            image = load_image(path, pixel_spacing_mm=self.pixel_spacing_mm, conversion=self.conversion)
        self.notes += [str(w.message) for w in caught]
        return image

    def __iter__(self) -> Iterator[Image]:
        for i in range(len(self.paths)):
            yield self[i]


def score_files(
    paths: Sequence[PathArg],
    layout: Layout,
    *,
    conversion: ConversionFunction | None = None,
    pixel_spacing_mm: float | tuple[float, float] | None = None,
    **kwargs: Any,
) -> ScoreResult:
    """Score image files (DICOM, TIFF, PNG, npy) of one phantom on one detector.

    Parameters
    ----------
    paths : the image files; each is read when it is scored (one image in memory at a time).
    layout : the phantom's :class:`~scorer.phantom.layout.Layout` (:func:`scorer.workflow.load_layout`).
    conversion : conversion function that linearises the pixels (none: the stored values are taken as
        proportional to air kerma, with a note in the result's warnings).
    pixel_spacing_mm : pixel spacing for files that carry none (TIFF, PNG, npy), or to override DICOM's.
    **kwargs : everything else :func:`scorer.observer.score_images` takes (observer, methods, blur,
        n_boot, seed, limits, human_factor, on_image, on_failure, …); the callbacks receive the path as
        given.

    The result's warnings are the missing-conversion note, then what reading each image warned about (in
    order), then the scoring's own.

    Returns
    -------
    ScoreResult
    """
    images = ImageFiles(paths, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion)
    result = score_images(images, layout, names=images.paths, conversion=conversion, **kwargs)
    notes = [NO_CONVERSION_NOTE] if conversion is None else []
    result.warnings[:0] = notes + images.notes
    return result
