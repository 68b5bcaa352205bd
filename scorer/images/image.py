"""The Image object that travels from :mod:`scorer.images.loading` to the analysis modules, and LimenWarning."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, cast

import numpy as np


@dataclass
class ImageMetadata:
    """What is known about where an image came from (DICOM tags where present).

    Attributes
    ----------
    source_path, content_sha256, file_format : str
        The file read, the SHA-256 of its bytes and its format (``"dicom"``, ``"tiff"``, ``"png"``, ``"npy"``).
    modality, detector_type, presentation_intent, detector_id, device_serial, station_name, manufacturer : str or None
        The DICOM attributes of those names, None when absent.
    kvp, exposure_uas, magnification_factor : float or None
        Tube voltage, exposure (µAs) and magnification factor (0018,1114), None when absent.
    acquisition_datetime : str or None
        ISO 8601 date and time of the acquisition.
    photometric_interpretation, intensity_relationship : str or None
        (0028,0004) and (0028,1040) as the file says.
    intensity_sign : int or None
        (0028,1041): +1 or −1 as stored.
    intensity_direction : str or None
        ``"rising"`` or ``"falling"``: how the values Limen reads move with X-ray intensity; None when not said.
    linearised : bool
        Whether a conversion function was applied.
    conversion : dict or None
        The conversion function applied (:meth:`ConversionFunction.to_dict`).
    warnings : list of str
        What the user must know about this image.
    spacing_source : str
        Where the pixel spacing came from: a tag name or ``"argument"``.
    """

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
    """Something about an input the user must know, though the work can go on.

    Parameters
    ----------
    message : str
        What the user must know, naming the input.
    """
