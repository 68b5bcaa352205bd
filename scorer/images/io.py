"""Reading and writing detector images.

:func:`load_image` turns a file — DICOM (uncompressed, JPEG-LS, JPEG 2000 and the
other syntaxes pydicom can decode with the installed plugins), 16-bit TIFF,
8/16-bit grey PNG or a NumPy ``.npy`` array — into an :class:`scorer.images.image.Image`
with float64 pixels, the pixel spacing in mm (row, column) and what the file says
about where it came from.  With a :class:`~scorer.images.conversion.ConversionFunction`
the pixels become detector air kerma in µGy.

Every expected problem with a file raises :class:`~scorer.errors.LimenError`, one
line naming the file and the problem.  A missing pixel spacing is an error, never
a silent default.

:func:`write_dicom` and :func:`write_image` write the same formats back (used by
the tests, the simulator and anyone who wants test images).

References
----------
DICOM PS3.3 (Information Object Definitions): C.8.11 DX modules — Imager Pixel
Spacing (0018,1164), Detector Type (0018,7004), Presentation Intent Type
(0008,0068); C.7.6.3 Image Pixel module; C.11.1 Modality LUT (Rescale Slope
(0028,1053) / Intercept (0028,1052)).  DICOM PS3.5 (data encoding: DT/DA/TM value
representations, transfer syntaxes) and PS3.10 (file meta information).
"""

from __future__ import annotations

import hashlib
import io
import re
import struct
import warnings
from pathlib import Path

import numpy as np

from scorer.images.conversion import ConversionFunction
from scorer.errors import LimenError
from scorer.files import atomic_write_bytes
from scorer.resources import check_limit
from scorer.images.image import Image, ImageMetadata

__all__ = [
    "LimenWarning",
    "load_image",
    "write_dicom",
    "write_image",
    "image_content_hash",
    "TRANSFER_SYNTAXES",
    "SOP_CLASS_MG_FOR_PROCESSING",
    "SOP_CLASS_DX_FOR_PROCESSING",
]


class LimenWarning(UserWarning):
    """Something about an input the user must know, though the work can go on."""


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

_DICOM_SUFFIXES = {".dcm", ".dicom", ".dic"}
_TIFF_SUFFIXES = {".tif", ".tiff"}
_PNG_SUFFIXES = {".png"}
_NPY_SUFFIXES = {".npy"}

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_TIFF_MAGICS = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_NPY_MAGIC = b"\x93NUMPY"

_FOR_PRESENTATION_WARNING = (
    "Presentation Intent Type (0008,0068) is FOR PRESENTATION: the image has been processed "
    "for display and its pixel values are not linear in air kerma; threshold contrasts from it "
    "are not comparable with those from a FOR PROCESSING image"
)

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


# --------------------------------------------------------------------------- hashing


def image_content_hash(path) -> str:
    """SHA-256 (hex) of a file's bytes, as recorded in ``ImageMetadata.content_sha256``."""
    path = Path(path)
    digest = hashlib.sha256()
    try:
        with path.open("rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                digest.update(chunk)
    except OSError as exc:
        raise LimenError(f"cannot read file ({exc.strerror or exc})", path) from None
    return digest.hexdigest()


# --------------------------------------------------------------------------- reading


def load_image(
    path,
    pixel_spacing_mm: float | tuple[float, float] | None = None,
    conversion: ConversionFunction | None = None,
    min_shape: tuple[int, int] | None = None,
    for_conversion_fit: bool = False,
) -> Image:
    """Read a detector image from a DICOM, TIFF, PNG or ``.npy`` file.

    Parameters
    ----------
    path : str or Path
        The file.  Its format is recognised from its first bytes (DICOM ``DICM``
        marker, TIFF, PNG and NumPy magic numbers), else from its extension.
    pixel_spacing_mm : float or (float, float), optional
        Pixel spacing (row, column) in mm.  Required for TIFF, PNG and ``.npy``.  For
        DICOM it overrides the file's spacing (recorded in ``metadata.spacing_source``
        and, when it differs, in ``metadata.warnings``); otherwise the spacing comes
        from Imager Pixel Spacing (0018,1164), else Pixel Spacing (0028,0030).
    conversion : ConversionFunction, optional
        When given, pixels become detector air kerma in µGy
        (``conversion.to_kerma_ugy``), ``metadata.linearised`` is True and
        ``metadata.conversion`` records the function.
    min_shape : (int, int), optional
        Smallest acceptable (rows, columns).
    for_conversion_fit : bool
        Read the stored values (after Rescale Slope/Intercept) whatever their relation to the X-ray
        beam, for fitting a conversion function to them; never for scoring.

    Returns
    -------
    Image
        float64 pixels (after Rescale Slope/Intercept for DICOM), spacing in mm and
        metadata.

    Raises
    ------
    LimenError
        For a missing or unreadable file, an unknown format, a truncated or damaged
        file, a DICOM without pixel data or whose compressed transfer syntax has no
        installed decoder, colour or multi-frame data, an image smaller than
        ``min_shape``, NaN or infinite pixels, a missing or invalid pixel spacing, or
        a conversion that gives non-finite air kerma.  Without a conversion function, a DICOM
        image whose values do not rise in proportion to the X-ray intensity: Pixel Intensity
        Relationship Sign (0028,1041) −1 (a negative Rescale Slope flips it), no sign with
        MONOCHROME1, or Pixel Intensity Relationship (0028,1040) LOG or OTHER.  With one, a
        conversion function that rises where the file says the values fall, or falls where
        they rise.

    Notes
    -----
    Scoring takes the contrast of a disc as the fractional drop of the pixel value behind it,
    which holds only for values rising in proportion to air kerma.  Photometric
    Interpretation (0028,0004) only says how to display the values (MONOCHROME1: the lowest
    value is shown white); how they relate to the beam is what Pixel Intensity Relationship
    (0028,1040) and its Sign (0028,1041) say, for the stored values.  Falling values are never
    inverted by guesswork: ``c − PV`` is proportional to kerma only with ``c`` the value at
    zero kerma, which no tag gives, and any other ``c`` scales every contrast.  A conversion
    function measured on the detector (gain < 0 for a falling response) does it exactly.  A
    DICOM image with neither sign nor MONOCHROME1 is taken as rising (the stored values of a
    raw image, as before).  The tags and the direction found are kept in the metadata.

    Warns
    -----
    LimenWarning
        For a FOR PRESENTATION image (processed, not linear in air kerma); the same
        text is added to ``metadata.warnings``.  Also when the conversion function's kind
        (linear, logarithmic) differs from the file's Pixel Intensity Relationship (LIN, LOG).

    References
    ----------
    DICOM PS3.3 C.8.11.4 (DX Detector module: Imager Pixel Spacing), C.7.6.2 (Image
    Plane: Pixel Spacing), C.8.11.1 (DX Series: Presentation Intent Type), C.11.1
    (Modality LUT: Rescale Slope and Intercept), C.8.11.3 (DX Image module: Pixel
    Intensity Relationship and Pixel Intensity Relationship Sign), C.7.6.3.1.2
    (Photometric Interpretation).
    """
    path = Path(path)
    data = _read_bytes(path)
    fmt = _sniff_format(data, path)
    meta = ImageMetadata(source_path=str(path), content_sha256=hashlib.sha256(data).hexdigest(), file_format=fmt)

    if fmt == "dicom":
        pixels, file_spacing, spacing_source = _read_dicom(
            data, path, meta, conversion=conversion, for_conversion_fit=for_conversion_fit
        )
    else:
        _check_declared_size(_declared_shape(data, fmt), path)
        pixels = _READERS[fmt](data, path)
        file_spacing, spacing_source = None, ""

    eight_bit = fmt != "dicom" and np.asarray(pixels).dtype.kind in "iub" and np.asarray(pixels).dtype.itemsize == 1
    pixels = _as_2d(pixels, path, fmt)
    if eight_bit:
        meta.warnings.append(
            "8-bit pixel data: 256 grey levels are too few for threshold contrasts of a few "
            "per cent (a detector's raw image has 12–16 bits); thresholds may be too high"
        )
        warnings.warn(f"{path}: {meta.warnings[-1]}", LimenWarning, stacklevel=2)

    if pixel_spacing_mm is not None:
        spacing = _check_spacing(pixel_spacing_mm, path, "given pixel spacing")
        if file_spacing is not None and not np.allclose(spacing, file_spacing, rtol=1e-9, atol=0):
            meta.warnings.append(
                f"pixel spacing {_fmt_spacing(spacing)} mm given overrides "
                f"{_fmt_spacing(file_spacing)} mm from {spacing_source}"
            )
        spacing_source = "argument"
    elif file_spacing is not None:
        spacing = file_spacing
    elif fmt == "dicom":
        raise LimenError(
            "no pixel spacing: the DICOM file has neither Imager Pixel Spacing (0018,1164) "
            "nor Pixel Spacing (0028,0030); give it in mm with --pixel-spacing",
            path,
        )
    else:
        raise LimenError(
            f"no pixel spacing: a {fmt.upper()} file does not carry a reliable pixel "
            f"spacing; give it in mm with --pixel-spacing",
            path,
        )
    meta.spacing_source = spacing_source

    if min_shape is not None:
        need_r, need_c = (int(v) for v in min_shape)
        if pixels.shape[0] < need_r or pixels.shape[1] < need_c:
            raise LimenError(
                f"image is {pixels.shape[0]}×{pixels.shape[1]} pixels, smaller than the "
                f"{need_r}×{need_c} pixels needed",
                path,
            )

    bad = ~np.isfinite(pixels)
    if bad.any():
        n_nan = int(np.isnan(pixels).sum())
        raise LimenError(
            f"image has {int(bad.sum())} non-finite pixel value(s) ({n_nan} NaN, {int(bad.sum()) - n_nan} infinite)",
            path,
        )

    if conversion is not None:
        pixels = _linearise(pixels, conversion, path)
        meta.linearised = True
        meta.conversion = conversion.to_dict()

    if meta.presentation_intent == "FOR PRESENTATION":
        warnings.warn(f"{path}: {_FOR_PRESENTATION_WARNING}", LimenWarning, stacklevel=2)
    return Image(pixels=np.ascontiguousarray(pixels, dtype=np.float64), spacing_mm=spacing, metadata=meta)


def _declared_shape(data: bytes, fmt: str) -> tuple[int, ...] | None:
    """Image shape as the file's header declares it, read without decoding the pixels (None if unknown)."""
    try:
        if fmt == "png" and len(data) >= 24 and data[12:16] == b"IHDR":
            # PNG (ISO/IEC 15948) IHDR: width and height, big-endian 32-bit, right after the chunk type
            width, height = struct.unpack(">II", data[16:24])
            return (height, width)
        if fmt == "npy":
            f = io.BytesIO(data)
            version = np.lib.format.read_magic(f)
            shape, _, _ = np.lib.format._read_array_header(f, version)
            return tuple(int(v) for v in shape)
        if fmt == "tiff":
            import tifffile

            with tifffile.TiffFile(io.BytesIO(data)) as tif:
                return tuple(int(v) for v in tif.pages[0].shape) if len(tif.pages) else None
    except Exception:  # a damaged header: the reader itself reports it
        return None
    return None


def _check_declared_size(shape, path: Path) -> None:
    """Refuse an image whose declared size exceeds LIMEN_MAX_IMAGE_MEGAPIXELS before it is decoded."""
    if not shape:
        return
    n = float(np.prod([float(v) for v in shape]))
    check_limit(
        "LIMEN_MAX_IMAGE_MEGAPIXELS",
        n / 1e6,
        f"image declares {'×'.join(str(int(v)) for v in shape)} pixels ({n / 1e6:.4g} megapixels), which",
        path,
    )


def _read_bytes(path: Path) -> bytes:
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise LimenError("file not found", path) from None
    except IsADirectoryError:
        raise LimenError("is a directory, not an image file", path) from None
    except OSError as exc:
        raise LimenError(f"cannot read file ({exc.strerror or exc})", path) from None
    if not data:
        raise LimenError("file is empty", path)
    return data


def _sniff_format(data: bytes, path: Path) -> str:
    """Format from the file's magic number, else from its extension."""
    if len(data) >= 132 and data[128:132] == b"DICM":
        return "dicom"
    if data[:8] == _PNG_MAGIC:
        return "png"
    if data[:4] in _TIFF_MAGICS:
        return "tiff"
    if data[:6] == _NPY_MAGIC:
        return "npy"
    suffix = path.suffix.lower()
    if suffix in _DICOM_SUFFIXES:
        return "dicom"  # perhaps a DICOM file without the 128-byte preamble; tried with force
    for suffixes, name in ((_TIFF_SUFFIXES, "TIFF"), (_PNG_SUFFIXES, "PNG"), (_NPY_SUFFIXES, "NumPy .npy")):
        if suffix in suffixes:
            raise LimenError(f"not a {name} file (its first bytes are not a {name} header)", path)
    shown = f"extension '{path.suffix}'" if path.suffix else "no extension"
    raise LimenError(
        f"not a recognised image file ({shown}, no DICOM, TIFF, PNG or NumPy header); "
        "Limen reads DICOM, 16-bit TIFF, PNG and .npy",
        path,
    )


def _as_2d(arr: np.ndarray, path: Path, fmt: str) -> np.ndarray:
    """A real 2-D float64 array, or a LimenError saying what shape was found."""
    arr = np.asarray(arr)
    if arr.dtype.kind not in "biuf":
        raise LimenError(f"pixel data of type {arr.dtype} are not real numbers", path)
    while arr.ndim > 2 and arr.shape[0] == 1:
        arr = arr[0]  # a (1, rows, cols) single frame
    if arr.ndim == 3 and arr.shape[-1] in (2, 3, 4) and fmt in ("png", "tiff"):
        raise LimenError(
            f"colour image with {arr.shape[-1]} channels (shape {_fmt_shape(arr.shape)}); "
            "Limen needs a single grey channel",
            path,
        )
    if arr.ndim != 2:
        raise LimenError(
            f"{arr.ndim}-D data (shape {_fmt_shape(arr.shape)}); Limen needs one 2-D "
            "grey image (no colour, no stack of frames)",
            path,
        )
    if arr.size == 0:
        raise LimenError(f"image has no pixels (shape {_fmt_shape(arr.shape)})", path)
    return arr.astype(np.float64, copy=False)


def _read_tiff(data: bytes, path: Path) -> np.ndarray:
    import tifffile

    try:
        with tifffile.TiffFile(io.BytesIO(data)) as tif:
            n_pages = len(tif.pages)
            if n_pages > 1:
                page = tif.pages[0]
                raise LimenError(
                    f"multi-page TIFF ({n_pages} pages of shape {_fmt_shape(page.shape)}); "
                    "Limen needs one 2-D grey image",
                    path,
                )
            return tif.asarray()
    except LimenError:
        raise
    except Exception as exc:  # any parser failure means a damaged or unsupported file
        raise LimenError(f"cannot decode TIFF ({_exc_text(exc)})", path) from None


def _read_png(data: bytes, path: Path) -> np.ndarray:
    import cv2

    arr = cv2.imdecode(np.frombuffer(data, dtype=np.uint8), cv2.IMREAD_UNCHANGED)
    if arr is None:
        raise LimenError("cannot decode PNG (truncated or damaged file)", path)
    return arr


def _read_npy(data: bytes, path: Path) -> np.ndarray:
    try:
        arr = np.load(io.BytesIO(data), allow_pickle=False)
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise LimenError("NumPy file holds Python objects, not a numeric image", path) from None
        raise LimenError(f"cannot read NumPy file ({_exc_text(exc)})", path) from None
    except Exception as exc:  # truncated or damaged .npy
        raise LimenError(f"cannot read NumPy file ({_exc_text(exc)})", path) from None
    if arr.dtype.names is not None:
        raise LimenError("NumPy file holds a structured array, not a numeric image", path)
    return arr


_READERS = {"tiff": _read_tiff, "png": _read_png, "npy": _read_npy}


# ---- DICOM

#: DICOM Modality (0008,0060) values of projection X-ray images (PS3.3 C.7.3.1.1.1); "OT" (other) is
#: accepted for secondary captures; anything else (CT, MR, US, NM, PT …) is refused
_PROJECTION_MODALITIES = frozenset({"MG", "DX", "CR", "RG", "PX", "IO", "XA", "RF", "DR", "OT"})


def _read_dicom(
    data: bytes,
    path: Path,
    meta: ImageMetadata,
    conversion: ConversionFunction | None = None,
    for_conversion_fit: bool = False,
):
    """Pixels (rescaled), the file's spacing and where it came from; fills ``meta``."""
    import pydicom

    has_preamble = len(data) >= 132 and data[128:132] == b"DICM"
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")  # pydicom's reading warnings are examined, not shown
            ds = pydicom.dcmread(io.BytesIO(data), force=not has_preamble)
    except Exception as exc:  # any parser failure: truncated header, garbage, not DICOM
        raise LimenError(f"not a readable DICOM file ({_exc_text(exc)})", path) from None
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

    samples = _int_or_none(ds.get("SamplesPerPixel")) or 1
    frames = _int_or_none(ds.get("NumberOfFrames")) or 1
    rows, cols = _int_or_none(ds.get("Rows")), _int_or_none(ds.get("Columns"))
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
    _check_intensity_relation(ds, meta, conversion, path, for_conversion_fit)

    _check_declared_size(tuple(v for v in (frames, rows, cols, samples) if v) if rows and cols else None, path)
    _check_decoder(ds, path)
    bits = _int_or_none(ds.get("BitsStored"))
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
            f"cannot decode pixel data in transfer syntax {_ts_text(ts)}: no usable decoder ({_exc_text(exc)})", path
        ) from None
    except Exception as exc:  # short or damaged pixel data
        raise LimenError(f"truncated or damaged DICOM pixel data ({_exc_text(exc)})", path) from None

    pixels = _apply_rescale(ds, np.asarray(arr), path)
    spacing, source = _dicom_spacing(ds, path, meta)
    return pixels, spacing, source


def _truncation(ds, n_bytes: int, messages: list[str]) -> str | None:
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


def _transfer_syntax(ds):
    fm = getattr(ds, "file_meta", None)
    return None if fm is None else fm.get("TransferSyntaxUID")


def _ts_text(ts) -> str:
    if ts is None:
        return "(unknown)"
    name = getattr(ts, "name", "") or ""
    return f"{name} ({ts})" if name and name != str(ts) else str(ts)


def _check_decoder(ds, path: Path) -> None:
    """LimenError naming the transfer syntax when no decoder for it is installed."""
    from pydicom.pixels import get_decoder

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


def _apply_rescale(ds, arr: np.ndarray, path: Path) -> np.ndarray:
    """Rescale Slope (0028,1053) and Intercept (0028,1052), PS3.3 C.11.1; else a Modality LUT."""
    pixels = arr.astype(np.float64)
    if "RescaleSlope" in ds or "RescaleIntercept" in ds:
        slope = _float_or_none(ds.get("RescaleSlope"))
        intercept = _float_or_none(ds.get("RescaleIntercept"))
        slope = 1.0 if slope is None else slope
        intercept = 0.0 if intercept is None else intercept
        if not np.isfinite(slope) or slope == 0 or not np.isfinite(intercept):
            raise LimenError(
                f"unusable Rescale Slope (0028,1053) {slope} / Rescale Intercept (0028,1052) {intercept}", path
            )
        return pixels * slope + intercept
    if "ModalityLUTSequence" in ds:
        from pydicom.pixels import apply_modality_lut

        try:
            return np.asarray(apply_modality_lut(arr, ds), dtype=np.float64)
        except Exception as exc:
            raise LimenError(f"cannot apply the Modality LUT Sequence (0028,3000) ({_exc_text(exc)})", path) from None
    return pixels


def _modality_transform_falls(ds) -> bool | None:
    """Whether the Modality LUT (PS3.3 C.11.1) turns rising stored values into falling ones: a negative
    Rescale Slope (0028,1053), or a LUT whose last entry is below its first; None when that cannot be told."""
    if "RescaleSlope" in ds or "RescaleIntercept" in ds:
        slope = _float_or_none(ds.get("RescaleSlope"))
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


def _fill_intensity_relation(ds, meta: ImageMetadata) -> None:
    """Photometric Interpretation, Pixel Intensity Relationship and its Sign, and the direction of the values
    Limen reads (after the Modality LUT) with X-ray intensity (PS3.3 C.8.11.3, C.7.6.3.1.2, C.11.1)."""
    photometric = _text(ds, "PhotometricInterpretation")  # (0028,0004)
    meta.photometric_interpretation = photometric.upper() if photometric else None
    relationship = _text(ds, "PixelIntensityRelationship")  # (0028,1040)
    meta.intensity_relationship = relationship.upper() if relationship else None
    raw_sign = ds.get("PixelIntensityRelationshipSign")  # (0028,1041)
    sign = _float_or_none(raw_sign)
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


def _intensity_basis(ds, meta: ImageMetadata) -> str:
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
        basis += f" and Rescale Slope (0028,1053) is {_float_or_none(ds.get('RescaleSlope')):g}"
    elif flips:
        basis += " and the Modality LUT (0028,3000) falls"
    elif flips is None and "ModalityLUTSequence" in ds:
        basis += " and the direction of the Modality LUT (0028,3000) cannot be told"
    return basis


def _check_intensity_relation(
    ds, meta: ImageMetadata, conversion: ConversionFunction | None, path: Path, for_conversion_fit: bool
) -> None:
    """Refuse values that would be scored as if rising in proportion to air kerma when the file says they do not
    (see :func:`load_image`, Notes).  A conversion function measured on the detector decides instead, unless it
    runs the other way than the file says."""
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


def _dicom_spacing(ds, path: Path, meta: ImageMetadata):
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
        spacing = _check_spacing(tuple(values), path, label)
        if keyword == "PixelSpacing":
            meta.warnings.append(
                "no Imager Pixel Spacing (0018,1164); spacing taken from Pixel Spacing "
                "(0028,0030), which may be calibrated to the object rather than the "
                "detector plane"
            )
        return spacing, label
    return None, ""


def fill_dicom_metadata(ds, meta: ImageMetadata) -> None:
    meta.modality = _text(ds, "Modality")  # (0008,0060)
    meta.detector_type = _text(ds, "DetectorType")  # (0018,7004)
    intent = _text(ds, "PresentationIntentType")  # (0008,0068)
    meta.presentation_intent = intent.upper() if intent else None
    meta.kvp = _float_or_none(ds.get("KVP"))  # (0018,0060)
    uas = _float_or_none(ds.get("ExposureInuAs"))  # (0018,1153)
    if uas is None:
        mas = _float_or_none(ds.get("ExposureInmAs"))  # (0018,9332)
        if mas is None:
            mas = _float_or_none(ds.get("Exposure"))  # (0018,1152), mAs
        uas = None if mas is None else mas * 1000.0
    meta.exposure_uas = uas
    meta.detector_id = _text(ds, "DetectorID")  # (0018,700A)
    meta.device_serial = _text(ds, "DeviceSerialNumber")  # (0018,1000)
    meta.station_name = _text(ds, "StationName")  # (0008,1010)
    meta.manufacturer = _text(ds, "Manufacturer")  # (0008,0070)
    meta.magnification_factor = _float_or_none(ds.get("EstimatedRadiographicMagnificationFactor"))  # (0018,1114)
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
            iso = dicom_datetime_to_iso(date + (_normalise_tm(time) if time else ""))
            if iso is None:
                meta.warnings.append(
                    f"Acquisition Date/Time (0008,0022)/(0008,0032) {date!r}/{time!r} are not valid DICOM DA/TM values"
                )
    meta.acquisition_datetime = iso

    if meta.presentation_intent == "FOR PRESENTATION":
        meta.warnings.append(_FOR_PRESENTATION_WARNING)  # also warned by load_image once the file is read


_DT_RE = re.compile(r"^(\d{4})(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\.\d{1,6})?([+-]\d{4})?$")


def _normalise_tm(tm: str) -> str:
    """A TM value (HHMMSS.FFFFFF, or the old HH:MM:SS form) in the compact form."""
    return tm.strip().replace(":", "")


def dicom_datetime_to_iso(value: str) -> str | None:
    """DICOM DT (PS3.5 6.2: ``YYYYMMDDHHMMSS.FFFFFF&ZZXX``, trailing parts optional) as ISO 8601.

    Returns None when ``value`` is not a valid DT.  ``"20261130083000"`` →
    ``"2026-11-30T08:30:00"``; ``"20261130"`` → ``"2026-11-30"``.
    """
    m = _DT_RE.match(value.strip())
    if not m:
        return None
    year, month, day, hour, minute, second, frac, tz = m.groups()
    if month is None and day is not None:
        return None
    try:
        if month and not 1 <= int(month) <= 12 or day and not 1 <= int(day) <= 31:
            return None
        if hour and int(hour) > 23 or minute and int(minute) > 59 or second and int(second) > 60:
            return None
    except ValueError:
        return None
    out = year
    if month:
        out += f"-{month}"
    if day:
        out += f"-{day}"
    if hour:
        if not day:
            return None
        out += f"T{hour}"
        out += f":{minute or '00'}"
        if second:
            out += f":{second}"
            if frac:
                out += frac
    if tz:
        out += f"{tz[:3]}:{tz[3:]}"
    return out


# ---- small helpers


def _text(ds, keyword: str) -> str | None:
    value = ds.get(keyword)
    if value is None:
        return None
    if not isinstance(value, str) and hasattr(value, "__iter__"):
        value = "\\".join(str(v) for v in value)
    text = str(value).strip()
    return text or None


def _float_or_none(value) -> float | None:
    if value is None or value == "":
        return None
    try:
        if not isinstance(value, str) and hasattr(value, "__iter__"):
            value = list(value)[0]
        out = float(value)
    except (TypeError, ValueError, IndexError):
        return None
    return out if np.isfinite(out) else None


def _int_or_none(value) -> int | None:
    f = _float_or_none(value)
    return None if f is None else int(f)


def _check_spacing(spacing, path: Path, label: str) -> tuple[float, float]:
    try:
        if np.ndim(spacing) == 0:
            values = (float(spacing), float(spacing))
        else:
            values = tuple(float(v) for v in spacing)
    except (TypeError, ValueError):
        raise LimenError(f"{label} must be a number or two numbers in mm, got {spacing!r}", path) from None
    if len(values) != 2:
        raise LimenError(f"{label} must be one or two numbers (row, column) in mm, got {len(values)}", path)
    if not all(np.isfinite(v) and v > 0 for v in values):
        raise LimenError(f"{label} must be positive and finite, got {_fmt_spacing(values)} mm", path)
    return values


def _linearise(pixels: np.ndarray, conversion: ConversionFunction, path: Path) -> np.ndarray:
    with np.errstate(over="ignore", invalid="ignore"):
        kerma = conversion.to_kerma_ugy(pixels)
    bad = ~np.isfinite(kerma)
    if bad.any():
        raise LimenError(
            f"{conversion.kind} conversion function (offset {conversion.offset:g}, gain {conversion.gain:g}) "
            f"gives non-finite air kerma for {int(bad.sum())} pixel(s) (pixel values "
            f"{float(pixels[bad].min()):g} to {float(pixels[bad].max()):g}); check that it belongs to this "
            "detector",
            path,
        )
    return kerma


def _fmt_shape(shape) -> str:
    return "×".join(str(int(n)) for n in shape)


def _fmt_spacing(spacing) -> str:
    return "×".join(f"{float(v):g}" for v in spacing)


def _exc_text(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    if len(text) > 200:
        text = text[:197] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


# --------------------------------------------------------------------------- writing


def write_dicom(
    path,
    pixels: np.ndarray,
    spacing_mm: tuple[float, float],
    tags: dict | None = None,
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
    spacing = _check_spacing(spacing_mm, path, "pixel spacing")

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
            raise LimenError(f"bad value {value!r} for DICOM keyword {key} ({_exc_text(exc)})", path) from None
    if "BitsStored" in tags:
        ds.HighBit = bits_stored - 1

    ds.PixelData = arr.astype("<u2", copy=False).tobytes()
    if transfer_syntax == "implicit-little":
        ds.file_meta.TransferSyntaxUID = ts_uid
    elif transfer_syntax != "explicit-little":
        from pydicom.pixels import get_encoder

        encoder = get_encoder(ts_uid)
        if not encoder.is_available:
            missing = "; ".join(encoder.missing_dependencies) or "an encoding plugin"
            raise LimenError(f"cannot write {ts_uid.name}: no encoder installed (pydicom needs {missing})", path)
        try:
            ds.compress(ts_uid, arr, generate_instance_uid=False)
        except Exception as exc:
            raise LimenError(f"cannot encode pixel data as {ts_uid.name} ({_exc_text(exc)})", path) from None

    buf = io.BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot write DICOM file ({exc.strerror or exc})", path) from None
    return atomic_write_bytes(path, buf.getvalue())  # complete or absent, never a truncated file that parses


def _check_uint16(pixels, path: Path) -> np.ndarray:
    arr = np.asarray(pixels)
    if arr.ndim != 2:
        raise LimenError(f"pixels must be a 2-D array, got shape {_fmt_shape(arr.shape)}", path)
    if arr.dtype == np.uint16:
        return arr
    if arr.dtype.kind not in "iub":
        raise LimenError(f"pixels must be unsigned 16-bit integers, got {arr.dtype}", path)
    if arr.size and (int(arr.min()) < 0 or int(arr.max()) > 65535):
        raise LimenError(f"pixel values {int(arr.min())} … {int(arr.max())} do not fit in 16 bits", path)
    return arr.astype(np.uint16)


def write_image(
    path,
    pixels: np.ndarray,
    spacing_mm: tuple[float, float] | float | None = None,
    tags: dict | None = None,
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
    if suffix in _DICOM_SUFFIXES:
        if spacing_mm is None:
            raise LimenError("writing DICOM needs the pixel spacing in mm", path)
        return write_dicom(path, pixels, spacing_mm, tags=tags, transfer_syntax=transfer_syntax)
    if suffix in _NPY_SUFFIXES:
        arr = np.asarray(pixels)
        if arr.ndim != 2 or arr.dtype.kind not in "biuf":
            raise LimenError(f"pixels must be a real 2-D array, got {arr.dtype} of shape {_fmt_shape(arr.shape)}", path)
        out = _write_bytes(path, lambda fh: np.save(fh, arr, allow_pickle=False))
        return out
    if suffix in _TIFF_SUFFIXES:
        import tifffile

        arr = _check_uint16(pixels, path)
        return _write_bytes(path, lambda fh: tifffile.imwrite(fh, arr, photometric="minisblack"))
    if suffix in _PNG_SUFFIXES:
        import cv2

        arr = np.asarray(pixels)
        if arr.dtype != np.uint8:
            arr = _check_uint16(arr, path)
        elif arr.ndim != 2:
            raise LimenError(f"pixels must be a 2-D array, got shape {_fmt_shape(arr.shape)}", path)
        ok, buf = cv2.imencode(".png", arr)
        if not ok:
            raise LimenError("OpenCV could not encode the PNG", path)
        return _write_bytes(path, lambda fh: fh.write(buf.tobytes()))
    raise LimenError(f"cannot write extension '{path.suffix}'; use .dcm, .tif, .tiff, .png or .npy", path)


def _write_bytes(path: Path, write) -> Path:
    """Encode in memory with ``write(file_object)``, then write the file atomically (complete or absent)."""
    buf = io.BytesIO()
    write(buf)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot write file ({exc.strerror or exc})", path) from None
    return atomic_write_bytes(path, buf.getvalue())
