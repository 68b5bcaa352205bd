"""Defective rows and columns found before registration, and the image repaired across them for the marker search.

A dead, dark, bright or saturated row or column crossing a registration marker splits its blob or joins it to a
line as long as the image, and a bright line raises the grey-closing background the blob search uses over a
band round it.  Registration therefore looks for such lines first, on the pixels alone (the observer's own defect
search, :mod:`scorer.observer.defects`, needs the plate's placement and runs after it):

* each pixel of line i is compared with the mean of the two lines above (i − 2, i − 1) and of the two below
  (i + 1, i + 2): e_up = g/ḡ_up − 1, e_down = g/ḡ_down − 1.  A defective line departs from *both* sides in the same
  direction; an edge (of the field, of the plate, of a marker) departs from one side only.  The line statistic
  is s = sign·min(|e_up|, |e_down|) where the signs agree, else 0;
* the mean of s (clipped to ±1.5) along segments of ``SEGMENT_PX`` pixels is robust to the markers' discs
  (inside a disc both sides are in it too, so s ≈ 0) and to isolated hot pixels; a segment is defective when its
  mean departs from the typical one by more than ``Z`` robust SDs of all segment means and by more than
  ``MIN_DEPARTURE`` of the weakest marker's contrast (a fainter line cannot make or break a marker blob);
* runs of defective segments of one line become one :class:`RegistrationLine`, named by what its pixels are:
  saturated (at least half at the image's maximum), dead (≤ 5 % of the neighbours), dark or bright.

The repaired image replaces each line's pixels by the mean of the nearest good lines on either side; it is used
to find and centre the markers only, never scored.  A marker crossed by a line is then left out of the fit when
the other markers still determine it (:func:`scorer.phantom.registration.register`).

References
----------
.. [1] Rousseeuw, P. J. & Croux, C. "Alternatives to the median absolute deviation", J. Am. Stat. Assoc. 88
       (1993) 1273–1283 — MAD × 1.4826 as a robust SD.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, TypedDict

import numpy as np
from numpy.typing import NDArray

SEGMENT_PX = 64
Z = 8.0  # robust SDs: far beyond chance over ~10⁵ segments of a large image (Φ(−8) ≈ 6·10⁻¹⁶)
MIN_DEPARTURE = 0.25  # × the weakest marker's contrast
DEAD_FRACTION = 0.05
CLIP = 1.5  # |s| beyond this (a hot pixel) counts as this much in a segment's mean


LineAxis = Literal["row", "column"]


class RegistrationLineRecord(TypedDict):
    """``RegistrationLine.to_dict()``: one defective line in results.json."""

    axis: LineAxis
    index: int
    start: int
    stop: int
    kind: str
    departure: float


@dataclass(frozen=True)
class RegistrationLine:
    """A defective row or column segment found before registration (pixel indices, stop exclusive)."""

    axis: LineAxis
    index: int
    start: int
    stop: int
    kind: str  # "saturated", "dead", "dark", "bright"
    departure: float  # median relative departure from the neighbouring lines

    @property
    def name(self) -> str:
        return f"{self.kind} {self.axis} {self.index}"

    def describe(self) -> str:
        """The line and what it is: a saturated or dead line is a detector defect, not an exposure fault."""
        return f"{self.name} (a detector defect)"

    def distance_px(self, row: float, col: float) -> float:
        """Distance from (row, col) to the line segment, in pixels."""
        along, across = (col, row) if self.axis == "row" else (row, col)
        d_across = abs(across - self.index)
        d_along = max(self.start - 0.5 - along, 0.0, along - (self.stop - 0.5))
        return float(np.hypot(d_across, d_along))

    def to_dict(self) -> RegistrationLineRecord:
        return {
            "axis": self.axis,
            "index": self.index,
            "start": self.start,
            "stop": self.stop,
            "kind": self.kind,
            "departure": float(self.departure),
        }


def _line_statistic(g: NDArray[np.float32]) -> NDArray[np.float32]:
    """s per pixel for rows (apply to g.T for columns); 0 on the first and last two lines."""
    s = np.zeros_like(g)
    up = 0.5 * (g[:-4] + g[1:-3])
    down = 0.5 * (g[3:-1] + g[4:])
    mid = g[2:-2]
    with np.errstate(divide="ignore", invalid="ignore"):
        eu = np.where(up > 0, mid / up - 1.0, 0.0)
        ed = np.where(down > 0, mid / down - 1.0, 0.0)
    same = np.sign(eu) == np.sign(ed)
    s[2:-2] = np.where(same, np.sign(eu) * np.minimum(np.abs(eu), np.abs(ed)), 0.0)
    return s


def find_registration_lines(pixels: NDArray[np.generic], min_marker_contrast: float) -> list[RegistrationLine]:
    """Defective rows and columns of an image (see module docstring)."""
    g = np.asarray(pixels, dtype=np.float32)
    if g.ndim != 2 or min(g.shape) < 2 * SEGMENT_PX or min(g.shape) < 8:
        return []
    top = float(g.max())
    at_top = g >= top
    found: list[RegistrationLine] = []
    views: tuple[tuple[LineAxis, NDArray[np.float32], NDArray[np.bool_]], ...] = (
        ("row", g, at_top),
        ("column", g.T, at_top.T),
    )
    for axis, G, T in views:
        s = _line_statistic(G)
        n_seg = G.shape[1] // SEGMENT_PX
        # mean of s clipped to ±CLIP per segment: as robust as a median here (a disc crossing the segment gives
        # s ≈ 0, both sides being inside it too; a hot pixel adds at most CLIP/SEGMENT_PX) and far faster
        seg = np.clip(s[:, : n_seg * SEGMENT_PX], -CLIP, CLIP).reshape(G.shape[0], n_seg, SEGMENT_PX)
        med = seg.mean(axis=2)
        inner = med[2:-2]
        centre = float(np.median(inner))
        sd = 1.4826 * float(np.median(np.abs(inner - centre)))
        bound = max(Z * sd, MIN_DEPARTURE * float(min_marker_contrast))
        flagged = np.abs(med - centre) > bound
        flagged[:2] = flagged[-2:] = False
        for line in np.flatnonzero(flagged.any(axis=1)):
            segs = np.flatnonzero(flagged[line])
            # runs of consecutive defective segments (a gap of one segment is bridged)
            runs: list[tuple[int, int]] = []
            a, b = int(segs[0]), int(segs[0])
            for k in segs[1:]:
                if k - b <= 2:
                    b = int(k)
                else:
                    runs.append((a, b))
                    a = b = int(k)
            runs.append((a, b))
            for a, b in runs:
                start, stop = int(a * SEGMENT_PX), int(G.shape[1] if b == n_seg - 1 else (b + 1) * SEGMENT_PX)
                dep = float(np.median(s[line, start:stop]))  # one line: the median is cheap
                near = (max(int(line) - 2, 0), min(int(line) + 2, G.shape[0] - 1))
                neighbours = np.concatenate([G[k, start:stop] for k in near])
                level = float(np.median(G[line, start:stop]))
                if np.mean(T[line, start:stop]) >= 0.5:
                    kind = "saturated"
                elif level <= DEAD_FRACTION * float(np.median(neighbours)):
                    kind = "dead"
                else:
                    kind = "dark" if dep < 0 else "bright"
                found.append(RegistrationLine(axis, int(line), start, stop, kind, dep))
    return found


def repair_lines(pixels: NDArray[np.generic], lines: list[RegistrationLine]) -> NDArray[np.float64]:
    """A copy of the image with each line's pixels replaced by the mean of the nearest good lines either side."""
    g = np.array(pixels, dtype=np.float64, copy=True)
    if not lines:
        return g
    bad: dict[LineAxis, set[int]] = {"row": set(), "column": set()}
    for ln in lines:
        bad[ln.axis].add(ln.index)
    for ln in lines:
        G = g if ln.axis == "row" else g.T  # a view: writes go to g
        n = G.shape[0]
        lo = ln.index - 1
        while lo >= 0 and lo in bad[ln.axis]:
            lo -= 1
        hi = ln.index + 1
        while hi < n and hi in bad[ln.axis]:
            hi += 1
        sides = [G[i, ln.start : ln.stop] for i in (lo, hi) if 0 <= i < n]
        if sides:
            G[ln.index, ln.start : ln.stop] = np.mean(sides, axis=0)
    return g
