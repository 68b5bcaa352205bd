"""A detector's defect map from flat fields (``limen detector``), its JSON form, and filling defective pixels.

The averaged flats are searched like a phantom image (:func:`scorer.observer.defect_search.find_defects`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from scorer.errors import LimenError
from scorer.observer.defect_records import LineDefect, PixelDefect
from scorer.observer.defect_search import find_defects
from scorer.observer.robust_residual import DEFAULT_FALSE_FLAG_RATE, relative_residual


@dataclass
class DefectMap:
    """Defective pixels and lines of a detector, measured from flat fields (``limen detector``).

    ``pixels``: (row, col) of each defective pixel outside the lines.
    """

    shape: tuple[int, int]
    lines: list[LineDefect] = field(default_factory=list)
    pixels: list[tuple[int, int]] = field(default_factory=list)
    n_flats: int = 0
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE
    source: str = ""

    def to_dict(self) -> dict:
        return {
            "shape": list(self.shape),
            "lines": [d.to_dict() for d in self.lines],
            "pixels": [list(p) for p in self.pixels],
            "n_flats": self.n_flats,
            "false_flag_rate": self.false_flag_rate,
            "note": "rows and columns counted from 0; pixels: (row, column) outside the lines",
        }

    @classmethod
    def from_dict(cls, data: dict, source: str = "") -> "DefectMap":
        """The map stored in a ``limen detector`` JSON (its ``defect_map`` entry); a bad entry is a LimenError."""
        try:
            shape = tuple(int(v) for v in data["shape"])
            lines = [
                LineDefect(
                    str(d["axis"]),
                    int(d["first"]),
                    int(d["last"]),
                    int(d["start_px"]),
                    int(d["stop_px"]),
                    str(d["kind"]),
                    float(d["level"]),
                    "defect map",
                )
                for d in data.get("lines", [])
            ]
            pixels = [(int(p[0]), int(p[1])) for p in data.get("pixels", [])]
        except (KeyError, TypeError, ValueError, IndexError):
            raise LimenError("defect_map entry is malformed (shape, lines, pixels)", source or None) from None
        if len(shape) != 2 or min(shape) < 1 or any(d.axis not in ("row", "column") for d in lines):
            raise LimenError("defect_map entry is malformed (shape, lines, pixels)", source or None)
        return cls(shape, lines, pixels, int(data.get("n_flats", 0)), float(data.get("false_flag_rate", 0)), source)

    def labelled(self, shape) -> tuple[list, np.ndarray]:
        """(defects, label image) on an image of ``shape``, which must be the map's."""
        if tuple(shape) != tuple(self.shape):
            raise LimenError(
                f"the defect map is {self.shape[0]} × {self.shape[1]} pixels but the image is {shape[0]} × {shape[1]}: "
                "it was measured on another detector or readout",
                self.source or None,
            )
        label = np.zeros(shape, np.int32)
        defects: list = []
        for d in self.lines:
            defects.append(d)
            label[d.pixels(shape)] = len(defects)
        if self.pixels:
            px = np.asarray(self.pixels, int)
            groups = np.zeros(shape, bool)
            ok = (px[:, 0] >= 0) & (px[:, 0] < shape[0]) & (px[:, 1] >= 0) & (px[:, 1] < shape[1])
            groups[px[ok, 0], px[ok, 1]] = True
            lab, _ = ndimage.label(groups, structure=np.ones((3, 3), bool))
            for j, sl in enumerate(ndimage.find_objects(lab), start=1):
                m = lab[sl] == j
                rr, cc = np.nonzero(m)
                npx = int(m.sum())
                defects.append(
                    PixelDefect(
                        "defective pixel" if npx == 1 else "defective cluster",
                        npx,
                        float(rr.mean() + sl[0].start),
                        float(cc.mean() + sl[1].start),
                        float("nan"),
                        "defect map",
                    )
                )
                label[sl][m] = len(defects)
        return defects, label


def fill_defects(pixels: np.ndarray, bad: np.ndarray) -> np.ndarray:
    """The image with the ``bad`` pixels replaced by the smooth background of the others (no noise there)."""
    g = np.asarray(pixels, float)
    if not np.any(bad):
        return g
    _, b = relative_residual(g, ~bad)
    return np.where(bad, b, g)


def defect_map_from_flats(
    flats: list[np.ndarray], *, false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE, max_pixels: int = 100_000
) -> DefectMap:
    """Defective pixels and lines of a detector from flat fields (linear in air kerma, one shape).

    The flats are averaged (each divided by its own median, so flats at several kermas can be mixed) and the
    average is searched like a phantom image with the whole field tested (:func:`find_defects`); averaging
    n flats lowers the noise by √n, so fainter defects are found than in one phantom image.
    """
    if not flats:
        raise LimenError("a defect map needs at least one flat field")
    shape = np.shape(flats[0])
    if any(np.shape(f) != shape for f in flats):
        raise LimenError("flat fields of different sizes cannot be combined into one defect map")
    acc = np.zeros(shape)
    for f in flats:
        f = np.asarray(f, float)
        acc += f / float(np.median(f))
    mean = acc / len(flats)
    tested = np.ones(shape, bool)
    found = find_defects(mean, tested, np.zeros(shape, bool), false_flag_rate=false_flag_rate)
    mask = found.label > len(found.lines)
    rr, cc = np.nonzero(mask)
    if rr.size > max_pixels:
        raise LimenError(
            f"{rr.size} defective pixels found in the flat fields (more than {max_pixels}): are the flats uniform "
            "and linearised?"
        )
    lines = [LineDefect(d.axis, d.first, d.last, d.start, d.stop, d.kind, d.level, "defect map") for d in found.lines]
    return DefectMap(
        tuple(int(v) for v in shape), lines, list(zip(rr.tolist(), cc.tolist())), len(flats), false_flag_rate
    )
