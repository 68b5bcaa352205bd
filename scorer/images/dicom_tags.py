"""What a DICOM file's tags say about its image: where it came from, and which way its values run.

:func:`fill_dicom_metadata` copies the acquisition tags into :class:`~scorer.images.image.ImageMetadata`;
:func:`check_intensity_relation` refuses values that would be scored as rising in proportion to air kerma
when the file says they do not (see :func:`scorer.images.loading.load_image`, Notes).

References
----------
DICOM PS3.3 (Information Object Definitions): C.8.11 DX modules — Detector Type (0018,7004), Presentation
Intent Type (0008,0068), Pixel Intensity Relationship (0028,1040) and its Sign (0028,1041); C.7.6.3.1.2
(Photometric Interpretation); C.11.1 Modality LUT (Rescale Slope (0028,1053) / Intercept (0028,1052)).
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from scorer.errors import LimenError
from scorer.images.conversion import ConversionFunction
from scorer.images.dates import dicom_datetime_to_iso, normalise_tm
from scorer.images.image import ImageMetadata, LimenWarning

if TYPE_CHECKING:
    from pydicom.dataset import Dataset


FOR_PRESENTATION_WARNING = (
    "Presentation Intent Type (0008,0068) is FOR PRESENTATION: the image has been processed "
    "for display and its pixel values are not linear in air kerma; threshold contrasts from it "
    "are not comparable with those from a FOR PROCESSING image"
)


def fill_dicom_metadata(ds: Dataset, meta: ImageMetadata) -> None:
    """Copy what the data set ``ds`` says about the image's origin, acquisition and pixel values into ``meta``."""
    meta.modality = _text(ds, "Modality")  # (0008,0060)
    meta.detector_type = _text(ds, "DetectorType")  # (0018,7004)
    intent = _text(ds, "PresentationIntentType")  # (0008,0068)
    meta.presentation_intent = intent.upper() if intent else None
    meta.kvp = float_or_none(ds.get("KVP"))  # (0018,0060)
    uas = float_or_none(ds.get("ExposureInuAs"))  # (0018,1153)
    if uas is None:
        mas = float_or_none(ds.get("ExposureInmAs"))  # (0018,9332)
        if mas is None:
            mas = float_or_none(ds.get("Exposure"))  # (0018,1152), mAs
        uas = None if mas is None else mas * 1000.0
    meta.exposure_uas = uas
    meta.detector_id = _text(ds, "DetectorID")  # (0018,700A)
    meta.device_serial = _text(ds, "DeviceSerialNumber")  # (0018,1000)
    meta.station_name = _text(ds, "StationName")  # (0008,1010)
    meta.manufacturer = _text(ds, "Manufacturer")  # (0008,0070)
    meta.magnification_factor = float_or_none(ds.get("EstimatedRadiographicMagnificationFactor"))  # (0018,1114)
    _fill_intensity_relation(ds, meta)

    dt = _text(ds, "AcquisitionDateTime")  # (0008,002A)
    iso = None
    if dt:
        iso = dicom_datetime_to_iso(dt)
        if iso is None:
            meta.warnings.append(f"Acquisition DateTime (0008,002A) {dt!r} is not a valid DICOM DT value")
    else:
        date, time = _text(ds, "AcquisitionDate"), _text(ds, "AcquisitionTime")  # (0008,0022), (0008,0032)
        if date:
            iso = dicom_datetime_to_iso(date + (normalise_tm(time) if time else ""))
            if iso is None:
                meta.warnings.append(
                    f"Acquisition Date/Time (0008,0022)/(0008,0032) {date!r}/{time!r} are not valid DICOM DA/TM values"
                )
    meta.acquisition_datetime = iso

    if meta.presentation_intent == "FOR PRESENTATION":
        meta.warnings.append(FOR_PRESENTATION_WARNING)  # also warned by load_image once the file is read


def _text(ds: Dataset, keyword: str) -> str | None:
    """The element's value as stripped text (multiple values joined by ``\\``), None when absent or empty."""
    value = ds.get(keyword)
    if value is None:
        return None
    if not isinstance(value, str) and hasattr(value, "__iter__"):
        value = "\\".join(str(v) for v in value)
    text = str(value).strip()
    return text or None


def float_or_none(value: Any) -> float | None:
    """An element value (the first of several) as a finite float, None when absent, empty or not a number."""
    if value is None or value == "":
        return None
    try:
        if not isinstance(value, str) and hasattr(value, "__iter__"):
            value = list(value)[0]
        out = float(value)
    except (TypeError, ValueError, IndexError):
        return None
    return out if np.isfinite(out) else None


def int_or_none(value: Any) -> int | None:
    """An element value as an int (truncated), None as for :func:`float_or_none`."""
    f = float_or_none(value)
    return None if f is None else int(f)


def _modality_transform_falls(ds: Dataset) -> bool | None:
    """Whether the Modality LUT (PS3.3 C.11.1) turns rising stored values into falling ones: a negative
    Rescale Slope (0028,1053), or a LUT whose last entry is below its first; None when that cannot be told."""
    if "RescaleSlope" in ds or "RescaleIntercept" in ds:
        slope = float_or_none(ds.get("RescaleSlope"))
        return slope is not None and slope < 0
    if "ModalityLUTSequence" in ds:
        try:
            item = ds.ModalityLUTSequence[0]
            lut = item.LUTData
            if isinstance(lut, (bytes, bytearray)):
                lut = np.frombuffer(bytes(lut), dtype="<u2")
            lut = np.asarray(lut, dtype=np.float64).ravel()
            return bool(lut[-1] < lut[0]) if lut.size >= 2 and lut[-1] != lut[0] else None
        except Exception:  # a damaged LUT: the rescale step reports it
            return None
    return False


def _fill_intensity_relation(ds: Dataset, meta: ImageMetadata) -> None:
    """Photometric Interpretation, Pixel Intensity Relationship and its Sign, and the direction of the values
    Limen reads (after the Modality LUT) with X-ray intensity (PS3.3 C.8.11.3, C.7.6.3.1.2, C.11.1)."""
    photometric = _text(ds, "PhotometricInterpretation")  # (0028,0004)
    meta.photometric_interpretation = photometric.upper() if photometric else None
    relationship = _text(ds, "PixelIntensityRelationship")  # (0028,1040)
    meta.intensity_relationship = relationship.upper() if relationship else None
    raw_sign = ds.get("PixelIntensityRelationshipSign")  # (0028,1041)
    sign = float_or_none(raw_sign)
    meta.intensity_sign = int(sign) if sign is not None and sign == int(sign) else None
    if _text(ds, "PixelIntensityRelationshipSign") is not None:
        stored = {1: "rising", -1: "falling"}.get(meta.intensity_sign) if meta.intensity_sign is not None else None
    elif meta.photometric_interpretation == "MONOCHROME1":
        stored = None  # a display instruction only: it does not say how the values relate to the beam
    else:
        stored = "rising"  # a raw image's stored values, as Limen has always read them
    flips = _modality_transform_falls(ds)
    if stored is None or flips is None:
        meta.intensity_direction = None
    elif flips:
        meta.intensity_direction = "falling" if stored == "rising" else "rising"
    else:
        meta.intensity_direction = stored


def _intensity_basis(ds: Dataset, meta: ImageMetadata) -> str:
    """What in the file the direction of its values rests on, for messages."""
    text = _text(ds, "PixelIntensityRelationshipSign")
    if text is not None:
        if meta.intensity_sign in (1, -1):
            basis = f"Pixel Intensity Relationship Sign (0028,1041) is {meta.intensity_sign:+d}"
        else:
            basis = f"Pixel Intensity Relationship Sign (0028,1041) is {text!r}, neither +1 nor -1"
    elif meta.photometric_interpretation == "MONOCHROME1":
        basis = (
            "Photometric Interpretation (0028,0004) is MONOCHROME1 and Pixel Intensity Relationship Sign "
            "(0028,1041) is absent"
        )
    else:
        basis = "Pixel Intensity Relationship Sign (0028,1041) is absent"
    flips = _modality_transform_falls(ds)
    if flips and "RescaleSlope" in ds:
        basis += f" and Rescale Slope (0028,1053) is {float_or_none(ds.get('RescaleSlope')):g}"
    elif flips:
        basis += " and the Modality LUT (0028,3000) falls"
    elif flips is None and "ModalityLUTSequence" in ds:
        basis += " and the direction of the Modality LUT (0028,3000) cannot be told"
    return basis


def check_intensity_relation(
    ds: Dataset, meta: ImageMetadata, conversion: ConversionFunction | None, path: Path, for_conversion_fit: bool
) -> None:
    """Refuse values that would be scored as if rising in proportion to air kerma when the file says they do not
    (see :func:`scorer.images.loading.load_image`, Notes).  A conversion function measured on the detector decides
    instead, unless it runs the other way than the file says."""
    direction = meta.intensity_direction
    relationship = meta.intensity_relationship
    fix = (
        "give this detector's conversion function with --conversion (fitted on its own images, e.g. by "
        "limen detector --fit-conversion), which turns the stored values into air kerma"
    )
    if conversion is None:
        if for_conversion_fit:
            return
        if direction == "falling":
            raise LimenError(
                f"{_intensity_basis(ds, meta)}: pixel values fall as X-ray intensity rises, and scoring needs "
                "values rising in proportion to air kerma (inverting them needs the value at zero kerma, which "
                f"the file does not give); {fix}",
                path,
            )
        if direction is None:
            raise LimenError(
                f"{_intensity_basis(ds, meta)}: whether pixel values rise or fall with X-ray intensity is "
                f"unknown; {fix}",
                path,
            )
        if relationship not in (None, "LIN"):
            raise LimenError(
                f"Pixel Intensity Relationship (0028,1040) is {relationship}: pixel values are not proportional "
                f"to X-ray intensity, and scoring needs values proportional to air kerma; {fix}",
                path,
            )
        return
    rises = conversion.gain > 0  # kerma rises with the pixel value (linear and logarithmic kinds alike)
    if direction is not None and rises != (direction == "rising"):
        raise LimenError(
            f"the {conversion.kind} conversion function (gain {conversion.gain:g}) makes air kerma "
            f"{'rise' if rises else 'fall'} with the pixel value, but {_intensity_basis(ds, meta)}, i.e. the "
            f"values {'rise' if direction == 'rising' else 'fall'} with X-ray intensity; check that the "
            "conversion function belongs to this detector and these images",
            path,
        )
    expected = {"LIN": "linear", "LOG": "logarithmic"}.get(relationship or "")
    if expected and expected != conversion.kind:
        meta.warnings.append(
            f"Pixel Intensity Relationship (0028,1040) is {relationship} but the conversion function is "
            f"{conversion.kind}: one of them does not describe this detector; check the conversion function "
            "against flat fields of known air kerma"
        )
        warnings.warn(f"{path}: {meta.warnings[-1]}", LimenWarning, stacklevel=4)
