"""What the defect search reports: line and pixel defects, one image's findings, a site left out.

The names (``LineDefect.name``, ``PixelDefect.name``) are the reasons shown for excluded sites; rows and columns
are counted from 0 (see :mod:`scorer.observer.defects`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class LineDefect:
    """A defective row or column segment: lines ``first``…``last`` (inclusive), pixels ``start``…``stop`` − 1
    along them."""

    axis: str  # "row" or "column"
    first: int
    last: int
    start: int
    stop: int
    kind: str  # "saturated", "dead", "dark", "bright"
    level: float  # median relative departure of its pixels from the background
    source: str = "image"  # or "defect map"

    @property
    def name(self) -> str:
        lines = f"{self.axis}s {self.first}–{self.last}" if self.last > self.first else f"{self.axis} {self.first}"
        text = f"{self.kind} {lines}"
        if self.kind in ("dark", "bright"):
            text += f" ({100 * self.level:+.3g} % of the background)"
        return text + (" (defect map)" if self.source != "image" else "")

    def pixels(self, shape) -> tuple[slice, slice]:
        a, b = (
            slice(self.first, self.last + 1),
            slice(self.start, min(self.stop, shape[1 if self.axis == "row" else 0])),
        )
        return (a, b) if self.axis == "row" else (b, a)

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "axis": self.axis,
            "first": self.first,
            "last": self.last,
            "start_px": self.start,
            "stop_px": self.stop,
            "kind": self.kind,
            "level": self.level,
            "source": self.source,
        }


@dataclass(frozen=True)
class PixelDefect:
    """A group of flagged pixels (8-connected) outside the line defects."""

    kind: str  # "hot pixel", "hot cluster", "dark pixel", "dark spot", "saturated pixels"
    n_pixels: int
    row: float  # centroid
    col: float
    peak: float  # largest |relative departure| (signed)
    source: str = "image"

    @property
    def name(self) -> str:
        size = f" ({self.n_pixels} px)" if self.n_pixels > 1 else ""
        where = f" at row {self.row:.0f}, column {self.col:.0f}"
        return f"{self.kind}{size}{where}" + (" (defect map)" if self.source != "image" else "")

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "kind": self.kind,
            "n_pixels": self.n_pixels,
            "row": self.row,
            "col": self.col,
            "peak": self.peak,
            "source": self.source,
        }


@dataclass
class ImageDefects:
    """What :func:`find_defects` found in one image.

    ``label`` numbers each defect's pixels (0: none; ``k`` ≥ 1: ``defects[k − 1]``); the set's checks drop it
    (and the residual arrays) once the image is done, keeping one image's arrays in memory at a time.
    """

    lines: list[LineDefect]
    pixels: list[PixelDefect]
    label: np.ndarray | None
    z_pixel: float
    z_line: float
    n_pixels_tested: int
    n_segments_tested: int
    false_flag_rate: float
    clipped_fraction: float = 0.0
    residual: np.ndarray | None = None  # e (relative residual), for the pattern checks
    valid: np.ndarray | None = None  # pixels free of features and defects, for the pattern checks
    background: np.ndarray | None = None  # b, the smooth background
    n_defective_pixels: int = 0

    @property
    def defects(self) -> list:
        return [*self.lines, *self.pixels]

    def to_dict(self, max_listed: int = 200) -> dict:
        return {
            "lines": [d.to_dict() for d in self.lines],
            "pixel_defects": [d.to_dict() for d in self.pixels[:max_listed]],
            "n_pixel_defects": len(self.pixels),
            "n_defective_pixels": self.n_defective_pixels,
            "z_pixel": self.z_pixel,
            "z_line": self.z_line,
            "n_pixels_tested": self.n_pixels_tested,
            "n_segments_tested": self.n_segments_tested,
            "false_flag_rate": self.false_flag_rate,
            "clipped_fraction": self.clipped_fraction,
        }


@dataclass(frozen=True)
class SiteExclusion:
    """One site left out, and why (the names of the defects its region touches)."""

    image: str
    target: str
    site: int
    reason: str

    def to_dict(self) -> dict:
        return {"image": self.image, "target": self.target, "site": self.site, "reason": self.reason}
