"""Reading detector images: any supported file in, one :class:`~scorer.images.image.Image` out.

:func:`load_image` turns a file — DICOM (uncompressed, JPEG-LS, JPEG 2000 and the
other syntaxes pydicom can decode with the installed plugins), 16-bit TIFF,
8/16-bit grey PNG or a NumPy ``.npy`` array — into an :class:`scorer.images.image.Image`
with float64 pixels, the pixel spacing in mm (row, column) and what the file says
about where it came from.  With a :class:`~scorer.images.conversion.ConversionFunction`
the pixels become detector air kerma in µGy.  :func:`image_content_hash` is the
SHA-256 of a file's bytes, as recorded in the metadata.

Every expected problem with a file raises :class:`~scorer.errors.LimenError`, one
line naming the file and the problem.  A missing pixel spacing is an error, never
a silent default.

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
import warnings
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.files import PathArg
from scorer.images.conversion import ConversionFunction
from scorer.images.dicom_reader import read_dicom
from scorer.images.dicom_tags import FOR_PRESENTATION_WARNING
from scorer.images.formats import check_declared_size, declared_shape, sniff_format
from scorer.images.image import Image, ImageMetadata, LimenWarning
from scorer.images.messages import fmt_shape, fmt_spacing
from scorer.images.raster_readers import READERS
from scorer.images.spacing import check_spacing


def image_content_hash(path: PathArg) -> str:
    """SHA-256 (hex) of a file's bytes, as recorded in ``ImageMetadata.content_sha256``.

    Parameters
    ----------
    path : str or path-like
        The file.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    path = Path(path)
    digest = hashlib.sha256()
    try:
        with path.open("rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                digest.update(chunk)
    except OSError as exc:
        raise LimenError(f"cannot read file ({exc.strerror or exc})", path) from None
    return digest.hexdigest()


def load_image(
    path: PathArg,
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
    fmt = sniff_format(data, path)
    meta = ImageMetadata(source_path=str(path), content_sha256=hashlib.sha256(data).hexdigest(), file_format=fmt)

    if fmt == "dicom":
        pixels, file_spacing, spacing_source = read_dicom(
            data, path, meta, conversion=conversion, for_conversion_fit=for_conversion_fit
        )
    else:
        check_declared_size(declared_shape(data, fmt), path)
        pixels = READERS[fmt](data, path)
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
        spacing = check_spacing(pixel_spacing_mm, path, "given pixel spacing")
        if file_spacing is not None and not np.allclose(spacing, file_spacing, rtol=1e-9, atol=0):
            meta.warnings.append(
                f"pixel spacing {fmt_spacing(spacing)} mm given overrides "
                f"{fmt_spacing(file_spacing)} mm from {spacing_source}"
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
        warnings.warn(f"{path}: {FOR_PRESENTATION_WARNING}", LimenWarning, stacklevel=2)
    return Image(pixels=np.ascontiguousarray(pixels, dtype=np.float64), spacing_mm=spacing, metadata=meta)


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


def _as_2d(arr: np.ndarray, path: Path, fmt: str) -> np.ndarray:
    """A real 2-D float64 array, or a LimenError saying what shape was found."""
    arr = np.asarray(arr)
    if arr.dtype.kind not in "biuf":
        raise LimenError(f"pixel data of type {arr.dtype} are not real numbers", path)
    while arr.ndim > 2 and arr.shape[0] == 1:
        arr = arr[0]  # a (1, rows, cols) single frame
    if arr.ndim == 3 and arr.shape[-1] in (2, 3, 4) and fmt in ("png", "tiff"):
        raise LimenError(
            f"colour image with {arr.shape[-1]} channels (shape {fmt_shape(arr.shape)}); "
            "Limen needs a single grey channel",
            path,
        )
    if arr.ndim != 2:
        raise LimenError(
            f"{arr.ndim}-D data (shape {fmt_shape(arr.shape)}); Limen needs one 2-D "
            "grey image (no colour, no stack of frames)",
            path,
        )
    if arr.size == 0:
        raise LimenError(f"image has no pixels (shape {fmt_shape(arr.shape)})", path)
    return arr.astype(np.float64, copy=False)


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
