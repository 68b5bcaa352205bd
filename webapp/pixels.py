"""The viewer's pixels: per-study 16-bit display files, memory-mapped (LRU), sliced into regions and tiles."""

from __future__ import annotations

import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np

U16_MAX = 65535


class PixelCache:
    """Stored uint16 images, memory-mapped and kept open (LRU) so a region is a slice, not a file read."""

    def __init__(self, size: int = 64):
        self._size = size
        self._lock = threading.Lock()
        self._maps: OrderedDict[str, np.ndarray] = OrderedDict()

    def get(self, path: Path) -> np.ndarray:
        key = str(path)
        with self._lock:
            arr = self._maps.get(key)
            if arr is not None:
                self._maps.move_to_end(key)
                return arr
        arr = np.load(path, mmap_mode="r")
        with self._lock:
            self._maps[key] = arr
            while len(self._maps) > self._size:
                self._maps.popitem(last=False)
        return arr


PIXELS = PixelCache()


def display_path(store_dir: Path, sha256: str, study_id: int | None = None) -> Path:
    """The 16-bit display pixels of one image in one study.

    Per study, because the 16-bit scale (``Study.ugy_per_unit``) and the conversion function are the
    study's: the same image in two studies can have two different files.  ``study_id=None`` is the
    shared name earlier releases used (kept for studies they opened).
    """
    if study_id is None:
        return Path(store_dir) / "display" / f"{sha256}.u16.npy"
    return Path(store_dir) / "display" / f"study-{int(study_id)}" / f"{sha256}.u16.npy"


def region_bytes(store_dir: Path, sha256: str, study_id: int, row0: int, col0: int, rows: int, cols: int) -> bytes:
    """The region's linear 16-bit pixels, little-endian, row-major."""
    path = display_path(store_dir, sha256, study_id)
    if not path.exists():  # a study opened by an earlier release
        path = display_path(store_dir, sha256)
    arr = PIXELS.get(path)
    return np.ascontiguousarray(arr[row0 : row0 + rows, col0 : col0 + cols], dtype="<u2").tobytes()


def tiles_bytes(store_dir: Path, sha256: str, study_id: int, tiles, order, size: int) -> bytes:
    """The tiles of one trial in screen order (``order``: screen position → site), each ``size`` × ``size``
    linear 16-bit pixels, little-endian, row-major, one after the other."""
    path = display_path(store_dir, sha256, study_id)
    arr = PIXELS.get(path)
    boxes = [tiles[k] for k in order]
    return b"".join(np.ascontiguousarray(arr[r : r + size, c : c + size], dtype="<u2").tobytes() for r, c in boxes)
