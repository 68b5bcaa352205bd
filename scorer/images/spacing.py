"""Pixel spacing in mm (row, column): a given spacing checked, or the one a DICOM file states.

References
----------
DICOM PS3.3 C.8.11.4 (DX Detector module: Imager Pixel Spacing (0018,1164)) and C.7.6.2 (Image Plane:
Pixel Spacing (0028,0030)).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from scorer.errors import LimenError
from scorer.images.image import ImageMetadata
from scorer.images.messages import fmt_spacing

if TYPE_CHECKING:
    from pydicom.dataset import Dataset


def check_spacing(spacing: Any, path: Path, label: str) -> tuple[float, float]:
    """One or two positive finite spacings in mm as (row, column); a LimenError naming ``label`` otherwise."""
    try:
        values: tuple[float, ...]
        if np.ndim(spacing) == 0:
            values = (float(spacing), float(spacing))

        else:
            values = tuple(float(v) for v in spacing)
    except (TypeError, ValueError):
        raise LimenError(f"{label} must be a number or two numbers in mm, got {spacing!r}", path) from None
    if len(values) != 2:
        raise LimenError(f"{label} must be one or two numbers (row, column) in mm, got {len(values)}", path)
    if not all(np.isfinite(v) and v > 0 for v in values):
        raise LimenError(f"{label} must be positive and finite, got {fmt_spacing(values)} mm", path)
    return values  # two values: mypy narrows the tuple by the length check


def dicom_spacing(ds: Dataset, path: Path, meta: ImageMetadata) -> tuple[tuple[float, float] | None, str]:
    """Imager Pixel Spacing (0018,1164) at the detector plane, else Pixel Spacing (0028,0030)."""
    from pydicom.multival import MultiValue

    for keyword, label in (
        ("ImagerPixelSpacing", "Imager Pixel Spacing (0018,1164)"),
        ("PixelSpacing", "Pixel Spacing (0028,0030)"),
    ):
        value = ds.get(keyword)
        if value is None or value == "" or (hasattr(value, "__len__") and len(value) == 0):
            continue
        try:
            values = [float(v) for v in (value if isinstance(value, (list, tuple, MultiValue)) else [value])]
        except (TypeError, ValueError):
            raise LimenError(f"{label} is not numeric: {value!r}", path) from None
        if len(values) == 1:
            values = values * 2
        if len(values) != 2:
            raise LimenError(f"{label} has {len(values)} values, expected 2 (row, column)", path)
        spacing = check_spacing(tuple(values), path, label)
        if keyword == "PixelSpacing":
            meta.warnings.append(
                "no Imager Pixel Spacing (0018,1164); spacing taken from Pixel Spacing "
                "(0028,0030), which may be calibrated to the object rather than the "
                "detector plane"
            )
        return spacing, label
    return None, ""
