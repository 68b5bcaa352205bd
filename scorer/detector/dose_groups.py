"""Grouping a dose series' images by air kerma, and the checks that the images form one series of one panel.

Used by :func:`scorer.detector.dose.dose_series` through :mod:`scorer.workflow.dose` (which reads the files);
pure functions on paths and numbers.
"""

from __future__ import annotations

from collections import OrderedDict
from os import PathLike
from pathlib import Path
from typing import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from scorer.errors import LimenError

#: two groups whose kermas differ by less than this fraction are "the same kerma"
SAME_KERMA_RTOL = 0.05
#: kermas measured from the conversion function fall into one group when within this fraction of each other
CLUSTER_RTOL = 0.15


def background_kerma_ugy(pixels: ArrayLike) -> float:
    """Air kerma of the plate's own background: the median of the linearised central half of the image."""
    a = np.asarray(pixels)
    h, w = a.shape
    return float(np.median(a[h // 4 : h - h // 4, w // 4 : w - w // 4]))


def group_by_kerma(
    paths: Sequence[object], kerma_ugy: Sequence[float | None], *, source: str = "kerma"
) -> OrderedDict[float, list[str]]:
    """Group images by air kerma: by folder when the images lie in two or more folders, else by value.

    Returns ``{kerma_ugy: [paths]}`` in increasing kerma.  Raises LimenError for a kerma missing for
    some images, a single group, or two groups at the same kerma (within 5 %).
    """
    names = [str(p) for p in paths]
    missing = [p for p, k in zip(names, kerma_ugy) if k is None or not np.isfinite(k)]
    if missing:
        raise LimenError(
            f"no air kerma for {len(missing)} image(s) (first: {missing[0]}); every image of a dose "
            f"series needs one ({source})",
            missing[0],
        )
    kerma = [float(k) for k in kerma_ugy if k is not None]  # none is missing now
    bad = [p for p, k in zip(names, kerma) if not k > 0]
    if bad:
        raise LimenError(f"air kerma must be positive ({source})", bad[0])
    folders = [str(Path(p).parent) for p in names]
    groups: dict[str, list[int]] = {}
    if len(set(folders)) >= 2:
        for i, f in enumerate(folders):
            groups.setdefault(f, []).append(i)
    else:
        for n, idx in enumerate(_clusters(kerma)):
            groups[f"{n}"] = idx
    out: list[tuple[float, list[str]]] = []
    for _name, idx in groups.items():
        ks = np.array([kerma[i] for i in idx])
        if len(set(folders)) >= 2 and len(_clusters(ks)) > 1:
            lo, hi = int(np.argmin(ks)), int(np.argmax(ks))
            raise LimenError(
                f"folder {_name} holds images at different air kermas ({ks[lo]:.3g} µGy: "
                f"{Path(names[idx[lo]]).name}; {ks[hi]:.3g} µGy: {Path(names[idx[hi]]).name}): with images in "
                "several folders each folder is one kerma group; put each kerma in its own folder",
                names[idx[hi]],
            )
        out.append((float(ks.mean()), [names[i] for i in idx]))
    out.sort(key=lambda t: t[0])
    if len(out) < 2:
        raise LimenError(
            f"all {len(names)} image(s) are at one air kerma ({out[0][0]:.3g} µGy): a dose series needs "
            "images at two or more kermas",
            names[0],
        )
    for (k1, p1), (k2, p2) in zip(out, out[1:]):
        if k2 < k1 * (1 + SAME_KERMA_RTOL):
            raise LimenError(
                f"two groups at the same air kerma ({k1:.3g} and {k2:.3g} µGy: {Path(p1[0]).parent} and "
                f"{Path(p2[0]).parent}); merge them or correct the kerma",
                p2[0],
            )
    return OrderedDict(out)


def _clusters(kerma_ugy: Sequence[float] | NDArray[np.float64]) -> list[list[int]]:
    """Indices of the kermas in increasing order, split wherever one is more than ``CLUSTER_RTOL`` above the
    first of its cluster."""
    out: list[list[int]] = []
    ref = None
    for i in np.argsort(np.asarray(kerma_ugy, dtype=float), kind="stable"):
        k = float(kerma_ugy[i])
        if ref is None or k > ref * (1 + CLUSTER_RTOL):
            ref = k
            out.append([])
        out[-1].append(int(i))
    return out


def check_one_panel(paths: Sequence[object], panels: Sequence[tuple[str | None, str | None]]) -> None:
    """Refuse a series whose images come from different panels: ``panels`` holds each image's DICOM Detector
    Type (0018,7004) and Detector ID (0018,700A), None where the file does not say.  A dose series describes one
    panel; direct and indirect images (or two detectors) mixed would fit one β to two detectors."""
    first: dict[str, tuple[str, str]] = {}
    for p, (dtype, det_id) in zip(paths, panels):
        for what, value in (("Detector Type (0018,7004)", dtype), ("Detector ID (0018,700A)", det_id)):
            if not value:
                continue
            value = str(value).strip()
            if what not in first:
                first[what] = (value, str(p))
            elif first[what][0] != value:
                v0, p0 = first[what]
                raise LimenError(
                    f"{what} is {value}, but {v0} in {Path(p0).name}: a dose series is of one panel; "
                    "score each panel's images in a series of its own",
                    p,
                )


#: a kerma CSV and the conversion function disagree when their ratio differs by more than this factor
#: between two images (refused) or, the same for all images, from 1 (warned): common practice tolerance
KERMA_AGREEMENT_FACTOR = 1.5


def check_kerma_agreement(
    paths: Sequence[str | PathLike[str]], listed_ugy: Sequence[float], measured_ugy: Sequence[float], csv_name: str
) -> list[str]:
    """Compare the kermas a CSV lists with those measured from each image's plate background through the
    conversion function.  A constant ratio (the CSV measured without the plate, or at another point) is allowed
    with a warning when it lies beyond ``KERMA_AGREEMENT_FACTOR``; ratios that differ between images by more
    than that factor contradict each other (an image listed with another's kerma) and are refused."""
    listed, measured = np.asarray(listed_ugy, dtype=float), np.asarray(measured_ugy, dtype=float)
    bad = [str(p) for p, m in zip(paths, measured) if not (np.isfinite(m) and m > 0)]
    if bad:
        raise LimenError("the plate background through --conversion is not a positive air kerma", bad[0])
    ratio = listed / measured
    lo, hi = int(np.argmin(ratio)), int(np.argmax(ratio))
    if ratio[hi] > ratio[lo] * KERMA_AGREEMENT_FACTOR:
        raise LimenError(
            f"contradicts --conversion: {Path(paths[lo]).name} is listed at {listed[lo]:.3g} µGy and measures "
            f"{measured[lo]:.3g} µGy through the conversion function, {Path(paths[hi]).name} is listed at "
            f"{listed[hi]:.3g} µGy and measures {measured[hi]:.3g} µGy; correct the CSV or the conversion function",
            csv_name,
        )
    mid = float(np.exp(np.mean(np.log(ratio))))
    if not 1 / KERMA_AGREEMENT_FACTOR <= mid <= KERMA_AGREEMENT_FACTOR:
        return [
            f"{csv_name}: the listed kermas are {mid:.3g}× those the plate background gives through the conversion "
            "function (--conversion); the series uses the listed kermas — check that both belong to this panel"
        ]
    return []
