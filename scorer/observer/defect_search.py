"""The defect search on phantom images: the pixels tested, the defects of one image, spots fixed across a set.

:func:`find_defects` flags pixels beyond the Šidák bound of the local robust noise scale, groups and names them,
and calls the line search; :func:`fixed_spots` finds spots at the same pixels in every image of a set.  The
method is described in :mod:`scorer.observer.defects`.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from scorer.errors import LimenError
from scorer.observer.defect_lines import find_line_defects
from scorer.observer.defect_records import ImageDefects, PixelDefect
from scorer.observer.robust_residual import (
    DEFAULT_FALSE_FLAG_RATE,
    block_sd,
    outlier_z,
    plateau_level,
    quantisation_step,
    relative_residual,
)

PLATE_INSET_MM = 2.0
DISC_ALLOWANCE = 2.0  # × the disc's nominal contrast, in its footprint
CLIPPING_FRACTION = 1e-3


# --------------------------------------------------------------------------- geometry
def _disc_mask(mask: np.ndarray, row: float, col: float, radius: float, value=True) -> None:
    H, W = mask.shape
    r0, r1 = max(int(np.floor(row - radius)), 0), min(int(np.ceil(row + radius)) + 1, H)
    c0, c1 = max(int(np.floor(col - radius)), 0), min(int(np.ceil(col + radius)) + 1, W)
    if r0 >= r1 or c0 >= c1:
        return
    yy, xx = np.mgrid[r0:r1, c0:c1]
    inside = (yy - row) ** 2 + (xx - col) ** 2 <= radius * radius
    sub = mask[r0:r1, c0:c1]
    if mask.dtype == bool:
        sub[inside] = value
    else:
        sub[inside] = np.maximum(sub[inside], value)


def plate_masks(shape, layout, placement, regions, margin_px: float = 3.0):
    """The pixels tested, the markers' footprints and the signal discs' allowance map.

    Returns
    -------
    tested : bool array — the plate inset by 2 mm, plus every site region, minus the markers.
    features : bool array — markers and signal discs (left out of the smooth background).
    allowance : float array — 2 × nominal contrast in the signal discs' footprints, else 0.
    """
    tf = placement.transform
    scale = tf.scale_px_per_mm()
    inset = min(PLATE_INSET_MM, 0.25 * min(layout.width_mm, layout.height_mm))
    # phantom coordinates of every pixel (the transform is affine): inside the inset outline?
    Ainv = np.linalg.inv(tf.A)
    cols = np.arange(shape[1], dtype=float) - tf.t[0]
    rows = np.arange(shape[0], dtype=float) - tf.t[1]
    x = Ainv[0, 0] * cols[None, :] + Ainv[0, 1] * rows[:, None]
    y = Ainv[1, 0] * cols[None, :] + Ainv[1, 1] * rows[:, None]
    tested = (x >= inset) & (x <= layout.width_mm - inset) & (y >= inset) & (y <= layout.height_mm - inset)
    for reg in regions:
        _disc_mask(tested, reg.row_px, reg.col_px, reg.radius_px + 0.5)
    features = np.zeros(shape, bool)
    for m in layout.markers:
        r, c = tf.to_pixel(m.xy_mm)[0]
        _disc_mask(features, r, c, m.diameter_mm / 2 * scale + margin_px + 2.0)
    tested &= ~features
    allowance = np.zeros(shape, float)
    for reg in regions:
        if reg.is_signal:
            _disc_mask(allowance, reg.row_px, reg.col_px, reg.inner_px + 1.0, DISC_ALLOWANCE * abs(reg.contrast))
    features |= allowance > 0
    return tested, features, allowance


# --------------------------------------------------------------------------- one image
def find_defects(
    pixels: np.ndarray,
    tested: np.ndarray,
    features: np.ndarray,
    allowance: np.ndarray | None = None,
    *,
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE,
    keep_residual: bool = False,
) -> ImageDefects:
    """Pixel and line defects in one image (see module docstring).

    Parameters
    ----------
    pixels : 2-D array, linear in air kerma.
    tested : pixels to test (:func:`plate_masks`).
    features : pixels of known structure (markers, discs), left out of the smooth background.
    allowance : per-pixel widening of the bound, in relative units (the discs' footprints).
    false_flag_rate : expected number of pixels, and of line segments, flagged in a clean image.
    keep_residual : keep e and the valid mask in the result (for :mod:`scorer.observer.patterns`).
    """
    g = np.asarray(pixels, float)
    if g.ndim != 2:
        raise LimenError("defect search needs a 2-D image")
    allowance = np.zeros(g.shape) if allowance is None else allowance
    n = int(np.count_nonzero(tested))
    z = outlier_z(max(n, 1), false_flag_rate)
    top = plateau_level(g)
    weight = tested & ~features
    e, b = relative_residual(g, weight)
    q = quantisation_step(g[tested] if np.any(tested) else g)
    step = q / float(np.median(b[tested])) if np.any(tested) else 0.0
    sd = block_sd(e, weight, step=step)
    # second pass: the background without the first pass's outliers
    rough = tested & (np.abs(e) > max(5.0, 0.5 * z) * sd + allowance)
    if rough.any():
        weight2 = weight & ~ndimage.binary_dilation(rough, iterations=1)
        e, b = relative_residual(g, weight2)
        sd = block_sd(e, weight2, step=step)
    else:
        weight2 = weight
    # quantised values (an 8-bit image): a departure of one grey level is never a defect — the step's
    # rounding noise q²/12 joins the noise scale (Sheppard's correction), and z·q/√12 > q for z > 3.5
    q_rel = q / b
    sd = np.sqrt(sd * sd + q_rel * q_rel / 12.0)
    pixel_sd = float(np.median(sd[tested])) if np.any(tested) else 0.0
    lines, z_line, n_seg = find_line_defects(e, tested & ~features, g, top, false_flag_rate, pixel_sd=pixel_sd)
    line_mask = np.zeros(g.shape, bool)
    for d in lines:
        line_mask[d.pixels(g.shape)] = True
    flagged = tested & (np.abs(e) > z * sd + allowance) & ~line_mask
    clipped = 0.0
    if top is not None:
        at_top = (g >= top) & ~line_mask
        clipped = float(np.count_nonzero(at_top)) / g.size
        if clipped >= CLIPPING_FRACTION:  # an over-exposure, not a defect: the observer refuses these sites
            flagged &= ~at_top
    label = np.zeros(g.shape, np.int32)
    for k, d in enumerate(lines, start=1):
        label[d.pixels(g.shape)] = k
    groups, n_groups = ndimage.label(flagged, structure=np.ones((3, 3), bool))
    found: list[PixelDefect] = []
    if n_groups:
        objs = ndimage.find_objects(groups)
        for j, sl in enumerate(objs, start=1):
            m = groups[sl] == j
            vals = e[sl][m]
            rr, cc = np.nonzero(m)
            npx = int(m.sum())
            peak = float(vals[np.argmax(np.abs(vals))])
            if top is not None and np.any(g[sl][m] >= top):
                kind = "saturated pixels"
            elif peak > 0:
                kind = "hot pixel" if npx == 1 else "hot cluster"
            else:
                kind = "dark pixel" if npx == 1 else "dark spot"
            found.append(PixelDefect(kind, npx, float(rr.mean() + sl[0].start), float(cc.mean() + sl[1].start), peak))
            label[sl][m] = len(lines) + len(found)
    valid = weight2 & ~line_mask & ~flagged
    return ImageDefects(
        lines,
        found,
        label,
        z,
        z_line,
        n,
        n_seg,
        false_flag_rate,
        clipped,
        e if keep_residual else None,
        valid if keep_residual else None,
        b if keep_residual else None,
        int(np.count_nonzero(label)),
    )


# --------------------------------------------------------------------------- across the images of a set
def fixed_spots(
    sum_e: np.ndarray,
    count: np.ndarray,
    n_images: int,
    *,
    sigma_px: float = 1.5,
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE,
) -> list[PixelDefect]:
    """Spots at the same pixels in every image: the mean residual, smoothed by a Gaussian of ``sigma_px``
    (a matched filter for spots a few pixels wide), tested like single pixels against its own robust scale.

    ``sum_e`` is the sum of the images' relative residuals where ``count`` images were valid; only pixels
    valid in every image are tested.  A dust speck of contrast a, invisible in one image of noise σ, stands
    out at a·√n/σ in the mean of n.
    """
    if n_images < 2:
        return []
    full = count >= n_images
    if np.count_nonzero(full) < 1000:
        return []
    mean = np.where(full, sum_e / np.maximum(count, 1), 0.0)
    w = ndimage.gaussian_filter(full.astype(float), sigma_px)
    with np.errstate(invalid="ignore", divide="ignore"):
        sm = np.where(w > 0.5, ndimage.gaussian_filter(mean, sigma_px) / w, 0.0)
    inner = full & (w > 0.95)
    n = int(np.count_nonzero(inner))
    z = outlier_z(n, false_flag_rate)
    sd = block_sd(sm, inner)
    flagged = inner & (np.abs(sm) > z * sd)
    groups, k = ndimage.label(flagged, structure=np.ones((3, 3), bool))
    out = []
    for j, sl in enumerate(ndimage.find_objects(groups), start=1):
        m = groups[sl] == j
        rr, cc = np.nonzero(m)
        vals = mean[sl][m]
        peak = float(vals[np.argmax(np.abs(vals))])
        out.append(
            PixelDefect(
                "fixed spot in every image (dust or a detector defect)",
                int(m.sum()),
                float(rr.mean() + sl[0].start),
                float(cc.mean() + sl[1].start),
                peak,
            )
        )
    return out


def spot_label(spots: list[PixelDefect], shape, radius_px: float = 3.0) -> np.ndarray:
    """A label image of the spots (discs of the spot's extent + ``radius_px`` about each centroid)."""
    label = np.zeros(shape, np.int32)
    for k, s in enumerate(spots, start=1):
        _disc_mask(label, s.row, s.col, np.sqrt(s.n_pixels / np.pi) + radius_px, k)
    return label
