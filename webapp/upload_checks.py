"""Uploaded files read as what they claim to be (image, layout, conversion function), errors naming the upload."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from scorer.phantom.layout import Layout

import warnings
from pathlib import Path

from scorer.errors import LimenError


def _named(label: str, path: Path, read):
    """Run ``read()`` on a stored file; a LimenError names the uploaded file (label), not the store path."""
    try:
        return read()
    except LimenError as exc:
        msg = str(exc).replace(str(path), "").lstrip(": ").strip()
        raise LimenError(msg, label) from None


def validate_image_file(path: Path, label: str, pixel_spacing_mm=None, conversion=None):
    """Read the stored file as an image (the real type check); errors name the uploaded file."""
    from scorer.workflow import LimenWarning, load_image

    def read():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LimenWarning)
            return load_image(path, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion)

    return _named(label, path, read)


def validate_layout_file(path: Path, label: str) -> Layout:
    from scorer.workflow import load_layout

    return _named(label, path, lambda: load_layout(path))


def validate_conversion_file(path: Path, label: str):
    from scorer.workflow import load_conversion

    return _named(label, path, lambda: load_conversion(path))
