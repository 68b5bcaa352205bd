"""Pixel coverage of discs: the exact-to-1/S² fraction of each pixel a disc covers.

Shared by the simulator (rendering discs) and the model observers (templates),
so that a template has the same aperture-integrated profile as the signal.
"""

from __future__ import annotations

import numpy as np

SUPERSAMPLE = 10  # sub-pixels per pixel side


def disc_coverage_patch(center_rc, radius_px: float, shape: tuple[int, int], supersample: int = SUPERSAMPLE):
    """Fraction of each pixel covered by a disc, on the smallest patch that holds it.

    Parameters
    ----------
    center_rc : (float, float)
        Disc centre (row, col) in pixel coordinates (pixel centres at integers).
    radius_px : float
    shape : (rows, cols)
        The full image shape; the patch is clipped to it.

    Returns
    -------
    (row slice, col slice, coverage) or None when the disc lies outside the image.
    """
    cr, cc = float(center_rc[0]), float(center_rc[1])
    r0 = int(np.floor(cr - radius_px - 1))
    r1 = int(np.ceil(cr + radius_px + 2))
    c0 = int(np.floor(cc - radius_px - 1))
    c1 = int(np.ceil(cc + radius_px + 2))
    r0c, r1c = max(r0, 0), min(r1, shape[0])
    c0c, c1c = max(c0, 0), min(c1, shape[1])
    if r0c >= r1c or c0c >= c1c:
        return None
    s = int(supersample)
    sub = (np.arange(s) + 0.5) / s - 0.5
    rr = (np.arange(r0c, r1c)[:, None] + sub[None, :]).ravel()
    cc_ = (np.arange(c0c, c1c)[:, None] + sub[None, :]).ravel()
    inside = ((rr[:, None] - cr) ** 2 + (cc_[None, :] - cc) ** 2) <= radius_px**2
    cov = inside.reshape(r1c - r0c, s, c1c - c0c, s).mean(axis=(1, 3))
    return slice(r0c, r1c), slice(c0c, c1c), cov


def disc_coverage(center_rc, radius_px: float, shape: tuple[int, int], supersample: int = SUPERSAMPLE) -> np.ndarray:
    """Coverage map of a disc on an array of ``shape`` (zeros away from the disc)."""
    out = np.zeros(shape, dtype=np.float64)
    patch = disc_coverage_patch(center_rc, radius_px, shape, supersample)
    if patch is not None:
        rs, cs, cov = patch
        out[rs, cs] = cov
    return out
