"""Reading the pixels of a TIFF (tifffile), PNG (OpenCV) or NumPy ``.npy`` file, as stored."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.images.messages import exc_text, fmt_shape


def _read_tiff(data: bytes, path: Path) -> np.ndarray:
    import tifffile

    try:
        with tifffile.TiffFile(io.BytesIO(data)) as tif:
            n_pages = len(tif.pages)
            if n_pages > 1:
                page = tif.pages[0]
                raise LimenError(
                    f"multi-page TIFF ({n_pages} pages of shape {fmt_shape(page.shape)}); "
                    "Limen needs one 2-D grey image",
                    path,
                )
            return tif.asarray()
    except LimenError:
        raise
    except Exception as exc:  # any parser failure means a damaged or unsupported file
        raise LimenError(f"cannot decode TIFF ({exc_text(exc)})", path) from None


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
        raise LimenError(f"cannot read NumPy file ({exc_text(exc)})", path) from None
    except Exception as exc:  # truncated or damaged .npy
        raise LimenError(f"cannot read NumPy file ({exc_text(exc)})", path) from None
    if arr.dtype.names is not None:
        raise LimenError("NumPy file holds a structured array, not a numeric image", path)
    return np.asarray(arr)


#: format name (as :func:`scorer.images.formats.sniff_format` gives it) → reader of the file's bytes
READERS = {"tiff": _read_tiff, "png": _read_png, "npy": _read_npy}
