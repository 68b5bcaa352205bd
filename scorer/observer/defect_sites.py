"""Which sites the defects of one image touch: excluded (the defect reaches the disc's footprint or most of the
ring) or masked (a defect only in the background ring).  The rule and its reasons are in
:mod:`scorer.observer.defects` ("Sites").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage


@dataclass
class SiteEffects:
    """How the defects of one image touch its sites.

    ``excluded``: (target, site) → reason, sites left out with their M-AFC trial; ``masked``: (target, site) →
    (reason, pixels), sites kept with those defective pixels left out of their background ring;
    ``mask``: the defective pixels, dilated by one pixel, as the observer leaves them out.
    """

    excluded: dict[tuple[str, int], str]
    masked: dict[tuple[str, int], tuple[str, int]]
    mask: np.ndarray | None


def site_effects(defects: list, label: np.ndarray, regions, max_ring_fraction: float = 0.5) -> SiteEffects:
    """Which sites a labelled defect touches, and how (see module docstring).

    A site is excluded when a defect (dilated by one pixel) reaches its disc's footprint (the template's
    support: ``inner_px`` + 1 px) or covers more than ``max_ring_fraction`` of its background ring; a defect
    only in the ring is masked: its pixels leave the background fit and the site is kept.
    """
    if not np.any(label):
        return SiteEffects({}, {}, None)
    grown = ndimage.maximum_filter(label, size=3)
    H, W = label.shape
    excluded: dict[tuple[str, int], str] = {}
    masked: dict[tuple[str, int], tuple[str, int]] = {}
    for reg in regions:
        rad = reg.radius_px + 0.5
        r0, r1 = max(int(np.floor(reg.row_px - rad)), 0), min(int(np.ceil(reg.row_px + rad)) + 1, H)
        c0, c1 = max(int(np.floor(reg.col_px - rad)), 0), min(int(np.ceil(reg.col_px + rad)) + 1, W)
        if r0 >= r1 or c0 >= c1:
            continue
        sub = grown[r0:r1, c0:c1]
        if not sub.any():
            continue
        yy, xx = np.mgrid[r0:r1, c0:c1]
        d2 = (yy - reg.row_px) ** 2 + (xx - reg.col_px) ** 2
        inside = d2 <= rad * rad
        bad = inside & (sub > 0)
        hit = np.unique(sub[bad])
        if not hit.size:
            continue
        why = "; ".join(defects[k - 1].name for k in hit)
        ring = inside & (d2 > reg.inner_px**2)
        if np.any(bad & (d2 <= (reg.inner_px + 1.0) ** 2)):
            excluded[(reg.target, reg.site)] = why
        elif np.count_nonzero(bad & ring) > max_ring_fraction * max(np.count_nonzero(ring), 1):
            excluded[(reg.target, reg.site)] = f"defects cover most of its background ring ({why})"
        else:
            masked[(reg.target, reg.site)] = (why, int(np.count_nonzero(bad)))
    return SiteEffects(excluded, masked, grown > 0)


def site_exclusions(defects: list, label: np.ndarray, regions) -> dict[tuple[str, int], str]:
    """(target, site) → reason for every site a labelled defect (dilated by one pixel) touches at all."""
    eff = site_effects(defects, label, regions, max_ring_fraction=-1.0)
    return {**eff.excluded, **{k: why for k, (why, _n) in eff.masked.items()}}
