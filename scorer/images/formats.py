"""Which image format a file holds, and the image size its header declares.

The format is recognised from the file's first bytes (DICOM ``DICM`` marker, TIFF, PNG and NumPy magic
numbers), else from its extension; the size is read from the header before any pixel is decoded, so that an
image too large for ``LIMEN_MAX_IMAGE_MEGAPIXELS`` is refused without decoding it.

References
----------
DICOM PS3.10 7.1 (128-byte preamble and ``DICM`` prefix); ISO/IEC 15948 (PNG signature and IHDR chunk);
TIFF 6.0 and BigTIFF headers; the NumPy ``.npy`` format (``numpy.lib.format``).
"""

from __future__ import annotations

import io
import struct
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.resources import check_limit

DICOM_SUFFIXES = {".dcm", ".dicom", ".dic"}
TIFF_SUFFIXES = {".tif", ".tiff"}
PNG_SUFFIXES = {".png"}
NPY_SUFFIXES = {".npy"}

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_TIFF_MAGICS = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_NPY_MAGIC = b"\x93NUMPY"


def sniff_format(data: bytes, path: Path) -> str:
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
    if suffix in DICOM_SUFFIXES:
        return "dicom"  # perhaps a DICOM file without the 128-byte preamble; tried with force
    for suffixes, name in ((TIFF_SUFFIXES, "TIFF"), (PNG_SUFFIXES, "PNG"), (NPY_SUFFIXES, "NumPy .npy")):
        if suffix in suffixes:
            raise LimenError(f"not a {name} file (its first bytes are not a {name} header)", path)
    shown = f"extension '{path.suffix}'" if path.suffix else "no extension"
    raise LimenError(
        f"not a recognised image file ({shown}, no DICOM, TIFF, PNG or NumPy header); "
        "Limen reads DICOM, 16-bit TIFF, PNG and .npy",
        path,
    )


def declared_shape(data: bytes, fmt: str) -> tuple[int, ...] | None:
    """Image shape as the file's header declares it, read without decoding the pixels (None if unknown)."""
    try:
        if fmt == "png" and len(data) >= 24 and data[12:16] == b"IHDR":
            # PNG (ISO/IEC 15948) IHDR: width and height, big-endian 32-bit, right after the chunk type
            width, height = struct.unpack(">II", data[16:24])
            return (height, width)
        if fmt == "npy":
            f = io.BytesIO(data)
            version = np.lib.format.read_magic(f)
            # the private reader serves every header version (1.0 to 3.0); the public ones serve one each
            shape, _, _ = np.lib.format._read_array_header(f, version)  # type: ignore[attr-defined]
            return tuple(int(v) for v in shape)
        if fmt == "tiff":
            import tifffile

            with tifffile.TiffFile(io.BytesIO(data)) as tif:
                return tuple(int(v) for v in tif.pages[0].shape) if len(tif.pages) else None
    except Exception:  # a damaged header: the reader itself reports it
        return None
    return None


def check_declared_size(shape: tuple[int, ...] | None, path: Path) -> None:
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
