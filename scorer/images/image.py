"""The Image object that travels from :mod:`scorer.images.loading` to the analysis modules, and LimenWarning."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, cast

import numpy as np


@dataclass
class ImageMetadata:
    """What is known about where an image came from (DICOM tags where present)."""

    source_path: str = ""
    content_sha256: str = ""
    file_format: str = ""  # "dicom", "tiff", "png", "npy"
    modality: str | None = None
    detector_type: str | None = None  # DICOM (0018,7004): DIRECT, SCINTILLATOR, ...
    presentation_intent: str | None = None  # (0008,0068): FOR PROCESSING / FOR PRESENTATION
    kvp: float | None = None
    exposure_uas: float | None = None
    detector_id: str | None = None
    device_serial: str | None = None
    station_name: str | None = None
    acquisition_datetime: str | None = None  # ISO 8601 when known
    manufacturer: str | None = None
    magnification_factor: float | None = None  # (0018,1114) if present
    photometric_interpretation: str | None = None  # (0028,0004): MONOCHROME1 / MONOCHROME2 (display only)
    intensity_relationship: str | None = None  # (0028,1040): LIN, LOG or OTHER, as the file says
    intensity_sign: int | None = None  # (0028,1041): +1 / -1 as stored (None when absent or not a number)
    # how the values Limen reads (after Rescale Slope or the Modality LUT) move with X-ray intensity:
    # "rising", "falling", or None when the file does not say (see scorer.images.loading.load_image)
    intensity_direction: str | None = None
    linearised: bool = False
    conversion: dict[str, Any] | None = None  # the conversion function applied, if any
    warnings: list[str] = field(default_factory=list)
    spacing_source: str = ""  # where spacing_mm came from: tag name or "argument"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class Image:
    """A detector image in units proportional to air kerma.

    Attributes
    ----------
    pixels : ndarray, 2-D float
        Pixel values; linear in air kerma once a conversion function has been applied
        (``metadata.linearised``), else the raw stored values of a FOR PROCESSING image.
    spacing_mm : (float, float)
        Pixel spacing (row, column) in mm at the detector plane.
    metadata : ImageMetadata
    """

    pixels: np.ndarray
    spacing_mm: tuple[float, float]
    metadata: ImageMetadata = field(default_factory=ImageMetadata)

    @property
    def shape(self) -> tuple[int, int]:
        return cast("tuple[int, int]", self.pixels.shape)  # 2-D by construction (load_image checks)

    @property
    def pixel_mm(self) -> float:
        """Mean pixel pitch in mm (row and column pitch are almost always equal)."""
        return float(np.sqrt(self.spacing_mm[0] * self.spacing_mm[1]))


class LimenWarning(UserWarning):
    """Something about an input the user must know, though the work can go on."""
