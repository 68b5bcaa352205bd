"""Reading the pixels of a DICOM file: parse, refuse what Limen cannot score, decode, rescale.

References
----------
DICOM PS3.3 C.7.3.1.1.1 (Modality), C.7.6.3 (Image Pixel module), C.11.1 (Modality LUT: Rescale Slope
(0028,1053) / Intercept (0028,1052)); PS3.5 (transfer syntaxes) and PS3.10 (file meta information).
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from scorer.errors import LimenError
from scorer.images.conversion import ConversionFunction
from scorer.images.dicom_tags import check_intensity_relation, fill_dicom_metadata, float_or_none, int_or_none
from scorer.images.formats import check_declared_size
from scorer.images.image import ImageMetadata, LimenWarning
from scorer.images.messages import exc_text
from scorer.images.spacing import dicom_spacing

if TYPE_CHECKING:
    from pydicom.dataset import Dataset
    from pydicom.uid import UID


#: DICOM Modality (0008,0060) values of projection X-ray images (PS3.3 C.7.3.1.1.1); "OT" (other) is
#: accepted for secondary captures; anything else (CT, MR, US, NM, PT …) is refused
_PROJECTION_MODALITIES = frozenset({"MG", "DX", "CR", "RG", "PX", "IO", "XA", "RF", "DR", "OT"})


def read_dicom(
    data: bytes,
    path: Path,
    meta: ImageMetadata,
    conversion: ConversionFunction | None = None,
    for_conversion_fit: bool = False,
) -> tuple[np.ndarray, tuple[float, float] | None, str]:
    """Pixels (rescaled), the file's spacing and where it came from; fills ``meta``."""
    import pydicom

    has_preamble = len(data) >= 132 and data[128:132] == b"DICM"
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")  # pydicom's reading warnings are examined, not shown
            ds = pydicom.dcmread(io.BytesIO(data), force=not has_preamble)
    except Exception as exc:  # any parser failure: truncated header, garbage, not DICOM
        raise LimenError(f"not a readable DICOM file ({exc_text(exc)})", path) from None
    if not has_preamble and not any(k in ds for k in ("SOPClassUID", "Rows", "PixelData", "Modality")):
        raise LimenError("not a DICOM file (no DICM marker and no DICOM elements found)", path)
    truncated = _truncation(ds, len(data), [str(w.message) for w in caught])
    if truncated:
        raise LimenError(f"truncated DICOM file ({truncated})", path)

    fill_dicom_metadata(ds, meta)

    pixel_keywords = ("PixelData", "FloatPixelData", "DoubleFloatPixelData")
    if not any(k in ds for k in pixel_keywords):
        sop = ds.get("SOPClassUID")
        what = f" (SOP class {getattr(sop, 'name', sop)})" if sop else ""
        hint = "; if this should be an image, the file may be truncated" if "Rows" in ds else ""
        raise LimenError(f"DICOM file has no pixel data{what}{hint}", path)

    samples = int_or_none(ds.get("SamplesPerPixel")) or 1
    frames = int_or_none(ds.get("NumberOfFrames")) or 1
    rows, cols = int_or_none(ds.get("Rows")), int_or_none(ds.get("Columns"))
    modality = (meta.modality or "").upper()
    if modality and modality not in _PROJECTION_MODALITIES:
        raise LimenError(
            f"Modality (0008,0060) is {modality}, not a projection X-ray image; Limen scores "
            f"detector images ({', '.join(sorted(m for m in _PROJECTION_MODALITIES if m))})",
            path,
        )
    photometric = str(ds.get("PhotometricInterpretation", "MONOCHROME2")).strip().upper()
    if samples == 1 and photometric not in ("MONOCHROME1", "MONOCHROME2", ""):
        raise LimenError(
            f"Photometric Interpretation (0028,0004) is {photometric}, not a grey (MONOCHROME) "
            "image; Limen needs a single grey channel",
            path,
        )
    if samples > 1:
        raise LimenError(
            f"colour DICOM image ({samples} samples per pixel, Photometric Interpretation "
            f"{ds.get('PhotometricInterpretation', '?')}, shape {rows}×{cols}×{samples}); "
            "Limen needs a single grey channel",
            path,
        )
    if frames > 1:
        raise LimenError(
            f"multi-frame DICOM image ({frames} frames of {rows}×{cols}, shape "
            f"{frames}×{rows}×{cols}); Limen needs one 2-D image",
            path,
        )
    check_intensity_relation(ds, meta, conversion, path, for_conversion_fit)

    check_declared_size(tuple(v for v in (frames, rows, cols, samples) if v) if rows and cols else None, path)
    _check_decoder(ds, path)
    bits = int_or_none(ds.get("BitsStored"))
    if bits is not None and bits <= 8:
        meta.warnings.append(
            f"{bits}-bit pixel data (Bits Stored): too few grey levels for threshold contrasts "
            "of a few per cent (a detector's raw image has 12–16 bits); thresholds may be too high"
        )
        warnings.warn(f"{path}: {meta.warnings[-1]}", LimenWarning, stacklevel=2)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            arr = ds.pixel_array
    except (NotImplementedError, RuntimeError) as exc:
        ts = _transfer_syntax(ds)
        raise LimenError(
            f"cannot decode pixel data in transfer syntax {_ts_text(ts)}: no usable decoder ({exc_text(exc)})", path
        ) from None
    except Exception as exc:  # short or damaged pixel data
        raise LimenError(f"truncated or damaged DICOM pixel data ({exc_text(exc)})", path) from None

    pixels = _apply_rescale(ds, np.asarray(arr), path)
    spacing, source = dicom_spacing(ds, path, meta)
    return pixels, spacing, source


def _truncation(ds: Dataset, n_bytes: int, messages: list[str]) -> str | None:
    """How the file looks cut short, or None.

    pydicom stops quietly at the end of the file: a value shorter than its length
    field, a partial element header or a missing sequence delimiter leave a data set
    that merely lacks its last elements.  The byte positions it records tell.
    """
    if any("end of file" in m.lower() for m in messages):
        return "the file ends before the end of an undefined-length element such as encapsulated pixel data"
    if len(ds) == 0:
        return "the file ends before the data set"
    last = ds.get_item(list(ds.keys())[-1])
    length = getattr(last, "length", None)
    tell = getattr(last, "value_tell", None)
    value = getattr(last, "value", None)
    if length is None or tell is None or length == 0xFFFFFFFF:
        return None
    name = f"element {last.tag}"
    if isinstance(value, (bytes, bytearray)) and len(value) < length:
        return f"{name} has {len(value)} of its {length} bytes"
    if str(_transfer_syntax(ds)) == "1.2.840.10008.1.2.1.99":
        return None  # deflated: positions refer to the inflated stream, not the file
    if tell + length > n_bytes:
        return f"{name} needs {tell + length} bytes, the file has {n_bytes}"
    if 0 < n_bytes - (tell + length) < 12:
        return f"{n_bytes - (tell + length)} stray byte(s) after {name}, part of an element header"
    return None


def _transfer_syntax(ds: Dataset) -> UID | None:
    fm = getattr(ds, "file_meta", None)
    return None if fm is None else fm.get("TransferSyntaxUID")


def _ts_text(ts: UID | None) -> str:
    if ts is None:
        return "(unknown)"
    name = getattr(ts, "name", "") or ""
    return f"{name} ({ts})" if name and name != str(ts) else str(ts)


def _check_decoder(ds: Dataset, path: Path) -> None:
    """LimenError naming the transfer syntax when no decoder for it is installed."""
    from pydicom.pixels import get_decoder  # type: ignore[attr-defined]  # public name, re-exported without __all__

    ts = _transfer_syntax(ds)
    if ts is None:
        return  # pydicom guesses implicit/explicit little endian for files without meta
    try:
        decoder = get_decoder(ts)
    except NotImplementedError:
        raise LimenError(
            f"pixel data use the transfer syntax {_ts_text(ts)}, for which pydicom has no decoder", path
        ) from None
    if not decoder.is_available:
        missing = "; ".join(decoder.missing_dependencies) or "a decoding plugin"
        raise LimenError(
            f"pixel data use the compressed transfer syntax {_ts_text(ts)}, and no decoder "
            f"for it is installed (install one of: {missing})",
            path,
        )


def _apply_rescale(ds: Dataset, arr: np.ndarray, path: Path) -> np.ndarray:
    """Rescale Slope (0028,1053) and Intercept (0028,1052), PS3.3 C.11.1; else a Modality LUT."""
    pixels = arr.astype(np.float64)
    if "RescaleSlope" in ds or "RescaleIntercept" in ds:
        slope = float_or_none(ds.get("RescaleSlope"))
        intercept = float_or_none(ds.get("RescaleIntercept"))
        slope = 1.0 if slope is None else slope
        intercept = 0.0 if intercept is None else intercept
        if not np.isfinite(slope) or slope == 0 or not np.isfinite(intercept):
            raise LimenError(
                f"unusable Rescale Slope (0028,1053) {slope} / Rescale Intercept (0028,1052) {intercept}", path
            )
        return pixels * slope + intercept
    if "ModalityLUTSequence" in ds:
        from pydicom.pixels import apply_modality_lut  # type: ignore[attr-defined]  # public, no __all__

        try:
            return np.asarray(apply_modality_lut(arr, ds), dtype=np.float64)
        except Exception as exc:
            raise LimenError(f"cannot apply the Modality LUT Sequence (0028,3000) ({exc_text(exc)})", path) from None
    return pixels
