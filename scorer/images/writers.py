"""Writing detector images: DICOM Part 10 (pydicom), TIFF, PNG and ``.npy``, each file complete or absent.

:func:`write_dicom` and :func:`write_image` write the formats :func:`scorer.images.loading.load_image`
reads (used by the tests, the simulator and anyone who wants test images).

References
----------
DICOM PS3.3 C.8.11 (DX modules), PS3.4 Annex B (storage SOP classes), PS3.5 / PS3.6 (transfer syntax
UIDs) and PS3.10 7.1 (file meta information).
"""

from __future__ import annotations

import io
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from scorer.errors import LimenError
from scorer.files import PathArg, atomic_write_bytes
from scorer.images.formats import DICOM_SUFFIXES, NPY_SUFFIXES, PNG_SUFFIXES, TIFF_SUFFIXES
from scorer.images.messages import exc_text, fmt_shape
from scorer.images.spacing import check_spacing

# PS3.4 Annex B storage SOP classes (For Processing variants).
SOP_CLASS_MG_FOR_PROCESSING = "1.2.840.10008.5.1.4.1.1.1.2.1"
SOP_CLASS_DX_FOR_PROCESSING = "1.2.840.10008.5.1.4.1.1.1.1.1"

# Names accepted by write_dicom(transfer_syntax=...) -> transfer syntax UID (PS3.5 / PS3.6).
TRANSFER_SYNTAXES = {
    "explicit-little": "1.2.840.10008.1.2.1",
    "implicit-little": "1.2.840.10008.1.2",
    "jpeg-ls-lossless": "1.2.840.10008.1.2.4.80",
    "jpeg2000-lossless": "1.2.840.10008.1.2.4.90",
    "rle-lossless": "1.2.840.10008.1.2.5",
}

# Elements that write_dicom derives from the pixel array itself.
_DERIVED_KEYWORDS = {
    "Rows",
    "Columns",
    "BitsAllocated",
    "SamplesPerPixel",
    "PixelData",
    "NumberOfFrames",
    "TransferSyntaxUID",
}


def write_dicom(
    path: PathArg,
    pixels: np.ndarray,
    spacing_mm: tuple[float, float] | float,
    tags: dict[str, Any] | None = None,
    transfer_syntax: str = "explicit-little",
) -> Path:
    """Write a 2-D uint16 image as a DICOM Part 10 file.

    Parameters
    ----------
    path : str or Path
        Output file.
    pixels : ndarray, 2-D, uint16 (or any integer array within 0 … 2**BitsStored − 1)
    spacing_mm : (float, float) or float
        Written as Imager Pixel Spacing (0018,1164), row then column.
    tags : dict, optional
        pydicom keyword → value, set after the defaults, e.g. ``{"Modality": "MG",
        "DetectorType": "DIRECT", "KVP": 28, "ExposureInuAs": 80000,
        "AcquisitionDateTime": "20261130083000"}``.  A value of None removes the
        element (e.g. ``{"ImagerPixelSpacing": None, "PixelSpacing": [0.1, 0.1]}``).
        Elements derived from the array (Rows, Columns, BitsAllocated,
        SamplesPerPixel, PixelData, NumberOfFrames) cannot be set.
    transfer_syntax : str
        One of ``TRANSFER_SYNTAXES``: "explicit-little" (default), "implicit-little",
        "jpeg-ls-lossless", "jpeg2000-lossless", "rle-lossless".

    Returns
    -------
    Path

    Notes
    -----
    SOP Class is Digital Mammography X-Ray Image Storage – For Processing when
    Modality is MG, else Digital X-Ray Image Storage – For Processing (PS3.4 B.5);
    Photometric Interpretation MONOCHROME2, Bits Allocated 16, Bits Stored 14
    unless ``tags`` say otherwise, Pixel Representation 0, Presentation Intent Type
    FOR PROCESSING unless ``tags`` say otherwise; new UIDs.  The file carries the
    elements Limen reads and the mandatory file meta (PS3.10 7.1), not every Type 1
    element of the full DX/MG IODs (no patient or view coding).

    Raises
    ------
    LimenError
        Unknown transfer syntax or tag keyword, pixels that are not 2-D or do not
        fit in Bits Stored, invalid spacing, or no encoder installed for the
        compressed transfer syntax.
    """
    import datetime as _dt

    from pydicom.datadict import dictionary_VR, tag_for_keyword
    from pydicom.dataset import FileDataset, FileMetaDataset
    from pydicom.uid import PYDICOM_IMPLEMENTATION_UID, UID, generate_uid
    from pydicom.valuerep import DSfloat

    path = Path(path)
    tags = dict(tags or {})
    if transfer_syntax not in TRANSFER_SYNTAXES:
        raise LimenError(
            f"unknown transfer syntax {transfer_syntax!r}; choose one of {', '.join(TRANSFER_SYNTAXES)}", path
        )
    ts_uid = UID(TRANSFER_SYNTAXES[transfer_syntax])
    arr = _check_uint16(pixels, path)
    spacing = check_spacing(spacing_mm, path, "pixel spacing")

    for key in tags:
        if key in _DERIVED_KEYWORDS:
            raise LimenError(f"tag {key} is set from the pixel array and cannot be given", path)
        if tag_for_keyword(key) is None:
            raise LimenError(f"unknown DICOM keyword {key!r} in tags", path)

    bits_stored = int(tags.get("BitsStored", 14))
    if not 1 <= bits_stored <= 16:
        raise LimenError(f"BitsStored must be 1 … 16, got {bits_stored}", path)
    if arr.size and int(arr.max()) > (1 << bits_stored) - 1:
        raise LimenError(
            f"pixel values up to {int(arr.max())} do not fit in BitsStored = {bits_stored} "
            f"(maximum {(1 << bits_stored) - 1})",
            path,
        )

    modality = str(tags.get("Modality") or "DX").upper()
    sop_class = UID(SOP_CLASS_MG_FOR_PROCESSING if modality == "MG" else SOP_CLASS_DX_FOR_PROCESSING)
    sop_instance = generate_uid()

    file_meta = FileMetaDataset()
    file_meta.MediaStorageSOPClassUID = sop_class
    file_meta.MediaStorageSOPInstanceUID = sop_instance
    file_meta.TransferSyntaxUID = UID(TRANSFER_SYNTAXES["explicit-little"])
    file_meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
    file_meta.ImplementationVersionName = "LIMEN"

    ds = FileDataset(str(path), {}, file_meta=file_meta, preamble=b"\0" * 128)
    now = _dt.datetime.now()
    # SOP Common, Patient, General Study/Series (Type 2 elements present, empty unless given)
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = sop_instance
    ds.StudyInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.PatientName = ""
    ds.PatientID = ""
    ds.PatientBirthDate = ""
    ds.PatientSex = ""
    ds.StudyDate = ""
    ds.StudyTime = ""
    ds.ReferringPhysicianName = ""
    ds.StudyID = ""
    ds.AccessionNumber = ""
    ds.SeriesNumber = 1
    ds.InstanceNumber = 1
    ds.ContentDate = now.strftime("%Y%m%d")
    ds.ContentTime = now.strftime("%H%M%S")
    ds.Modality = modality
    # DX Series / DX Image / DX Detector (PS3.3 C.8.11)
    ds.PresentationIntentType = "FOR PROCESSING"
    ds.ImageType = ["ORIGINAL", "PRIMARY"]
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows, ds.Columns = int(arr.shape[0]), int(arr.shape[1])
    ds.BitsAllocated = 16
    ds.BitsStored = bits_stored
    ds.HighBit = bits_stored - 1
    ds.PixelRepresentation = 0
    ds.RescaleIntercept = 0
    ds.RescaleSlope = 1
    ds.RescaleType = "US"
    ds.PixelIntensityRelationship = "LIN"
    ds.PixelIntensityRelationshipSign = 1
    ds.BurnedInAnnotation = "NO"
    ds.LossyImageCompression = "00"
    ds.ImagerPixelSpacing = [DSfloat(v, auto_format=True) for v in spacing]

    for key, value in tags.items():
        if value is None:
            if key in ds:
                delattr(ds, key)
            continue
        if dictionary_VR(key) == "DS":
            if isinstance(value, (list, tuple, np.ndarray)):
                value = [DSfloat(float(v), auto_format=True) for v in value]
            elif isinstance(value, (int, float, np.number)):
                value = DSfloat(float(value), auto_format=True)
        elif isinstance(value, np.generic):
            value = value.item()
        try:
            setattr(ds, key, value)
        except Exception as exc:  # pydicom rejects a value for this VR
            raise LimenError(f"bad value {value!r} for DICOM keyword {key} ({exc_text(exc)})", path) from None
    if "BitsStored" in tags:
        ds.HighBit = bits_stored - 1

    ds.PixelData = arr.astype("<u2", copy=False).tobytes()
    if transfer_syntax == "implicit-little":
        ds.file_meta.TransferSyntaxUID = ts_uid
    elif transfer_syntax != "explicit-little":
        from pydicom.pixels import get_encoder  # type: ignore[attr-defined]  # public name, re-exported without __all__

        encoder = get_encoder(ts_uid)
        if not encoder.is_available:
            missing = "; ".join(encoder.missing_dependencies) or "an encoding plugin"
            raise LimenError(f"cannot write {ts_uid.name}: no encoder installed (pydicom needs {missing})", path)
        try:
            ds.compress(ts_uid, arr, generate_instance_uid=False)
        except Exception as exc:
            raise LimenError(f"cannot encode pixel data as {ts_uid.name} ({exc_text(exc)})", path) from None

    buf = io.BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot write DICOM file ({exc.strerror or exc})", path) from None
    return atomic_write_bytes(path, buf.getvalue())  # complete or absent, never a truncated file that parses


def _check_uint16(pixels: ArrayLike, path: Path) -> np.ndarray:
    arr = np.asarray(pixels)
    if arr.ndim != 2:
        raise LimenError(f"pixels must be a 2-D array, got shape {fmt_shape(arr.shape)}", path)
    if arr.dtype == np.uint16:
        return arr
    if arr.dtype.kind not in "iub":
        raise LimenError(f"pixels must be unsigned 16-bit integers, got {arr.dtype}", path)
    if arr.size and (int(arr.min()) < 0 or int(arr.max()) > 65535):
        raise LimenError(f"pixel values {int(arr.min())} … {int(arr.max())} do not fit in 16 bits", path)
    return arr.astype(np.uint16)


def write_image(
    path: PathArg,
    pixels: np.ndarray,
    spacing_mm: tuple[float, float] | float | None = None,
    tags: dict[str, Any] | None = None,
    transfer_syntax: str = "explicit-little",
) -> Path:
    """Write a 2-D image as TIFF, PNG, ``.npy`` or DICOM, chosen by the extension.

    Parameters
    ----------
    path : str or Path
        ``.tif``/``.tiff`` (tifffile, uint16 grey), ``.png`` (16-bit grey, or 8-bit for
        uint8 pixels; OpenCV), ``.npy`` (any real 2-D array, kept as is), or
        ``.dcm``/``.dicom`` (:func:`write_dicom`, needs ``spacing_mm``).
    pixels : ndarray, 2-D
        uint16 (integers within 0 … 65535 are accepted) for TIFF, PNG and DICOM.
    spacing_mm, tags, transfer_syntax
        For DICOM only (see :func:`write_dicom`).  TIFF, PNG and ``.npy`` carry no
        spacing: give it to :func:`load_image` when reading them back.

    Returns
    -------
    Path
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in DICOM_SUFFIXES:
        if spacing_mm is None:
            raise LimenError("writing DICOM needs the pixel spacing in mm", path)
        return write_dicom(path, pixels, spacing_mm, tags=tags, transfer_syntax=transfer_syntax)
    if suffix in NPY_SUFFIXES:
        arr = np.asarray(pixels)
        if arr.ndim != 2 or arr.dtype.kind not in "biuf":
            raise LimenError(f"pixels must be a real 2-D array, got {arr.dtype} of shape {fmt_shape(arr.shape)}", path)
        out = _write_bytes(path, lambda fh: np.save(fh, arr, allow_pickle=False))
        return out
    if suffix in TIFF_SUFFIXES:
        import tifffile

        arr = _check_uint16(pixels, path)
        return _write_bytes(path, lambda fh: tifffile.imwrite(fh, arr, photometric="minisblack"))
    if suffix in PNG_SUFFIXES:
        import cv2

        arr = np.asarray(pixels)
        if arr.dtype != np.uint8:
            arr = _check_uint16(arr, path)
        elif arr.ndim != 2:
            raise LimenError(f"pixels must be a 2-D array, got shape {fmt_shape(arr.shape)}", path)
        ok, buf = cv2.imencode(".png", arr)
        if not ok:
            raise LimenError("OpenCV could not encode the PNG", path)
        return _write_bytes(path, lambda fh: fh.write(buf.tobytes()))
    raise LimenError(f"cannot write extension '{path.suffix}'; use .dcm, .tif, .tiff, .png or .npy", path)


def _write_bytes(path: Path, write: Callable[[io.BytesIO], object]) -> Path:
    """Encode in memory with ``write(file_object)``, then write the file atomically (complete or absent)."""
    buf = io.BytesIO()
    write(buf)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot write file ({exc.strerror or exc})", path) from None
    return atomic_write_bytes(path, buf.getvalue())
