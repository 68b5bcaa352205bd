"""Resource budgets: inputs whose declared size would need more memory than a stated budget are refused
before anything is allocated, with a one-line error naming the limit and how to raise it.

Each limit has a default and an environment variable that raises (or lowers) it:

=============================  =========  ==========================================================
variable                       default    what it bounds
=============================  =========  ==========================================================
LIMEN_MAX_IMAGE_MEGAPIXELS     80         rows × columns of one image, read from the file's header
                                          before decoding (a 24 × 30 cm field at 50 µm is 29 Mpx;
                                          80 Mpx of float64 pixels is 640 MB)
LIMEN_MAX_LAYOUT_SITES         5000       candidate sites (discs and their alternatives) of a layout;
                                          the bundled demo plate has 350
LIMEN_MAX_BOOTSTRAP_CELLS      20000000   bootstrap cells held at once: resamples × images for
                                          ``limen score`` (the resampling weights: 160 MB of 64-bit
                                          counts); resamples × the largest per-resample block for
                                          ``limen analyse`` (draw counts per image and reader,
                                          resampled counts per reader × contrast level, stored
                                          estimates; about 20 bytes per cell measured, 400 MB at the
                                          limit; see scorer.study.analysis.bootstrap_block).  The fits'
                                          likelihood grid is evaluated in chunks of bounded size
                                          (about 30 MB, scorer.observer.mafc_fast.GRID_CHUNK_CELLS)
                                          and is not counted
=============================  =========  ==========================================================
"""

from __future__ import annotations

import os

from scorer.errors import LimenError

#: variable -> (default, unit shown in messages)
LIMITS: dict[str, tuple[float, str]] = {
    "LIMEN_MAX_IMAGE_MEGAPIXELS": (80.0, "megapixels"),
    "LIMEN_MAX_LAYOUT_SITES": (5000.0, "sites"),
    "LIMEN_MAX_BOOTSTRAP_CELLS": (2.0e7, "bootstrap cells"),
}


def limit(name: str) -> float:
    """The current value of a limit: its environment variable if set to a positive number, else the default."""
    default, _ = LIMITS[name]
    text = os.environ.get(name, "").strip()
    if not text:
        return default
    try:
        value = float(text)
    except ValueError:
        raise LimenError(f"environment variable {name}={text!r} is not a number") from None
    if not value > 0:
        raise LimenError(f"environment variable {name}={text!r} must be positive")
    return value


def check_limit(name: str, value: float, what: str, path: object | None = None) -> None:
    """Refuse ``value`` (in the limit's unit) above the limit ``name``: a one-line LimenError saying what was
    asked for, the limit, and the environment variable that raises it."""
    cap = limit(name)
    if value > cap:
        unit = LIMITS[name][1]
        raise LimenError(
            f"{what} exceeds the limit of {cap:g} {unit} (memory budget); "
            f"raise it with the environment variable {name} if this is intended",
            path,
        )
