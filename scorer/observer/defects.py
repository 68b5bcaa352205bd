"""Defective pixels and lines in a phantom image, found by robust statistics, named, and the sites they touch.

A real exposure has hot and dead pixels, dust, dead or saturated rows and columns.  One hot pixel in a site's
region moves its response by many noise SDs, so the site's M-AFC trial says nothing about the disc.  This module
finds such departures from the local noise and lists the sites they touch; :func:`scorer.observer.score_images`
then leaves those trials out and says so.

Method (one image)
------------------
* **Where.**  The plate (the layout's outline inset by 2 mm) and every site's region, without the markers'
  footprints.  The signal discs' footprints are kept, with an allowance for the disc (below).
* **Relative residual.**  e = g / b − 1, b a smooth background: a normalised Gaussian convolution
  (σ = 8 px, computed on a 4 × 4-binned grid) of the tested pixels, leaving out the discs, the markers and,
  in a second pass, the pixels the first pass flagged (normalised convolution, Knutsson & Westin 1993).
  A heel effect, scatter pedestal or smooth non-uniformity goes into b, not into e.
* **Noise scale.**  σ of e in 64 × 64-pixel blocks, from the median absolute deviation: σ = 1.4826·MAD
  (consistent for Gaussian noise; Rousseeuw & Croux 1993), so neither the defects nor the discs inflate it.
  Where values are quantised (8-bit images, noise of about a grey level) the MAD can collapse, so where it is
  below two grey steps the scale is the larger of it and the SD of the block's values winsorised at their 1st
  and 99th percentiles (÷ 0.982, the same scale for Gaussian data); the grey step's rounding variance q²/12 is
  added (Sheppard's correction): a one-level departure is never a defect.
* **Pixels.**  A pixel is flagged when |e| > z·σ, with z = Φ⁻¹(1 − α/(2N)) for N pixels tested (Šidák's
  bound for N tests): a clean image with Gaussian noise then holds α flagged pixels on average (α = 10⁻³ per
  image by default).  In a signal disc's footprint the bound is widened by twice the disc's nominal contrast,
  so a disc is never a defect.  Flagged pixels are grouped (8-connected) and named: hot pixel, hot cluster,
  dark pixel, dark spot (dust), saturated pixels.
* **Lines.**  Each row and each column is cut into 128-pixel segments; the 10 %-winsorised mean of e over a
  segment (robust like a median, but smooth on quantised values), times √(pixels in it), is compared with the
  robust SD of that statistic over all segments of the image (never below the pixels' σ, its value for white
  noise), with the same α-bound over the number of segments.  The empirical scale absorbs correlated noise and
  periodic patterns (grid lines move every column alike, so none stands out).  Flagged segments of a line merge
  into a line defect, named by what its pixels are: saturated (≥ half at the image's plateau maximum), dead
  (≤ 20 % of the background), else dark or bright by its median departure.  Adjacent lines of one kind merge
  ("dead columns 87–88").  Rows and columns are counted from 0.
* **Saturation.**  A plateau at the image maximum is clipping.  When the plateau pixels outside the line
  defects are widespread (≥ 0.1 % of the image, :func:`scorer.observer.npw.saturation_level`), it is an
  over-exposure, not a defect: those pixels are not flagged and the observer refuses the sites that touch them
  (advising a lower dose).  A saturated line or a few saturated pixels are defects.

Across the images of a set, :func:`fixed_spots` finds spots that sit at the same pixels in every image (dust
on the detector, a faint defect) in the mean residual, whose noise is σ/√n.

Sites
-----
A defect (dilated by one pixel) that reaches a site's disc footprint (the template's support, the region's
inner radius + 1 px; :func:`scorer.observer.npw.site_regions`) excludes the site, with the defect's name as
the reason, and the whole M-AFC trial of that image and target is left out: a decision among M − 1 sites is
not an M-AFC trial (the count method), and the d′ method pools one noise SD over the sites of a diameter, which
a template with pixels removed would no longer share (for discs of about a pixel, a masked pixel removes most
of the signal).  A defect only in the site's background ring is masked instead: its pixels leave the target's
shared background fit (and the template, whose weight there is nil), the response stays an unbiased contrast
estimate with almost the same noise, and the site is kept — unless the defects cover more than half of the ring.
A thin line crossing a row of sites thus costs the trials whose discs it crosses, not every trial it touches.

References
----------
.. [1] Rousseeuw, P. J. & Croux, C. "Alternatives to the median absolute deviation", J. Am. Stat. Assoc. 88
       (1993) — the MAD and its consistency factor 1.4826 for Gaussian data.
.. [2] Šidák, Z. "Rectangular confidence regions for the means of multivariate normal distributions",
       J. Am. Stat. Assoc. 62 (1967) — the per-test level for a family-wise error over N tests.
.. [3] Knutsson, H. & Westin, C.-F. "Normalized and differential convolution", Proc. IEEE CVPR (1993).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, stats

from scorer.errors import LimenError

#: expected number of pixels (and, separately, line segments) flagged in a clean image
DEFAULT_FALSE_FLAG_RATE = 1e-3
MAD_TO_SD = 1.4826
SMOOTH_SIGMA_PX = 8.0
BIN = 4
BLOCK_PX = 64
SEGMENT_PX = 128
PLATE_INSET_MM = 2.0
DISC_ALLOWANCE = 2.0  # × the disc's nominal contrast, in its footprint
DEAD_LEVEL = -0.8  # relative departure at or below which a line is "dead"
CLIPPING_FRACTION = 1e-3


# --------------------------------------------------------------------------- statistics
def robust_sd(x) -> float:
    """Gaussian-consistent scale of ``x``: 1.4826 × the median absolute deviation (Rousseeuw & Croux 1993)."""
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return float("nan")
    return float(MAD_TO_SD * np.median(np.abs(x - np.median(x))))


def outlier_z(n_tested: int, false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE) -> float:
    """Two-sided Gaussian bound z with n_tested · P(|Z| > z) = false_flag_rate (Šidák 1967, first order)."""
    if not (0 < false_flag_rate < 1):
        raise LimenError(f"false-flag rate must lie between 0 and 1, got {false_flag_rate:g}")
    return float(stats.norm.isf(false_flag_rate / (2.0 * max(int(n_tested), 1))))


def relative_residual(pixels: np.ndarray, weight: np.ndarray, sigma_px: float = SMOOTH_SIGMA_PX, bin_px: int = BIN):
    """e = g/b − 1 and b, b a local-linear normalised Gaussian convolution of the pixels where ``weight`` is true.

    At each point b is the intercept of a plane fitted by Gaussian-weighted least squares (σ = ``sigma_px``)
    to the weighted pixels about it (first-order normalised convolution, Knutsson & Westin 1993): a linear
    trend (heel effect) is followed without bias up to the edge of the weighted region, where a plain weighted
    mean would lag by the gradient × the weights' offset.  Computed on a ``bin_px``-binned grid and
    interpolated back (bilinear); points with too little weight nearby get the weighted mean, or the median
    level of the weighted pixels.
    """
    g = np.asarray(pixels, float)
    H, W = g.shape
    hp, wp = -(-H // bin_px) * bin_px, -(-W // bin_px) * bin_px
    w = np.zeros((hp, wp))
    gw = np.zeros((hp, wp))
    w[:H, :W] = weight
    gw[:H, :W] = np.where(weight, g, 0.0)
    wb = w.reshape(hp // bin_px, bin_px, wp // bin_px, bin_px).sum(axis=(1, 3))
    gb = gw.reshape(hp // bin_px, bin_px, wp // bin_px, bin_px).sum(axis=(1, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        gm = np.where(wb > 0, gb / np.maximum(wb, 1e-300), 0.0)  # mean of each bin's weighted pixels
    s = sigma_px / bin_px
    y, x = np.mgrid[0 : wb.shape[0], 0 : wb.shape[1]].astype(float)

    # Gaussian-weighted moments about each point: Σ G·w·(1, dx, dy, dx², dx·dy, dy²) and Σ G·w·g·(1, dx, dy)
    def filt(a):
        return ndimage.gaussian_filter(a, s, mode="constant")

    m0, mx, my = filt(wb), filt(wb * x), filt(wb * y)
    mxx, mxy, myy = filt(wb * x * x), filt(wb * x * y), filt(wb * y * y)
    g0, gx, gy = filt(wb * gm), filt(wb * gm * x), filt(wb * gm * y)
    sx, sy = mx - x * m0, my - y * m0
    sxx = mxx - 2 * x * mx + x * x * m0
    sxy = mxy - x * my - y * mx + x * y * m0
    syy = myy - 2 * y * my + y * y * m0
    tx, ty = gx - x * g0, gy - y * g0
    M = np.stack([np.stack([m0, sx, sy], -1), np.stack([sx, sxx, sxy], -1), np.stack([sy, sxy, syy], -1)], -2)
    rhs = np.stack([g0, tx, ty], -1)
    level = float(np.median(gm[wb > 0])) if np.any(wb > 0) else float(np.median(g))
    total = float(wb.max()) if wb.size else 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        det = np.linalg.det(M)
        scale3 = np.maximum(m0, 1e-300) * np.maximum(sxx * syy / np.maximum(m0, 1e-300), 0) + 1e-300
        ok = (m0 > 1e-2 * total) & (np.abs(det) > 1e-6 * scale3)
        sol = np.full(m0.shape, np.nan)
        if ok.any():
            sol[ok] = np.linalg.solve(M[ok], rhs[ok][..., None])[..., 0, 0]
        mean0 = np.where(m0 > 1e-6 * max(total, 1e-300), g0 / m0, level)
        small = np.where(ok & np.isfinite(sol), sol, mean0)
    # bilinear back to the pixel grid: the binned sample k sits at pixel (k + 0.5)·bin − 0.5
    b = _bilinear_up(small, (H, W), bin_px)
    if not np.all(b > 0):
        raise LimenError("the smooth background is not positive everywhere; is the image linearised?")
    return g / b - 1.0, b


def _bilinear_up(small: np.ndarray, shape, bin_px: int) -> np.ndarray:
    """Bilinear interpolation of a binned grid back to pixels (binned sample k at pixel (k + 0.5)·bin − 0.5,
    edges held), separably: rows, then columns."""
    out = small
    for axis, n in ((0, shape[0]), (1, shape[1])):
        x = np.clip((np.arange(n) + 0.5) / bin_px - 0.5, 0, out.shape[axis] - 1)
        i0 = np.minimum(np.floor(x).astype(int), out.shape[axis] - 1)
        i1 = np.minimum(i0 + 1, out.shape[axis] - 1)
        f = x - i0
        a, c = np.take(out, i0, axis=axis), np.take(out, i1, axis=axis)
        f = f[:, None] if axis == 0 else f[None, :]
        out = a + f * (c - a)
    return out


def _sorted_median(Xs: np.ndarray, cnt: np.ndarray) -> np.ndarray:
    """Median along the last axis of values sorted with their NaNs last, ``cnt`` finite values each."""
    c = np.maximum(cnt, 1)[..., None]
    lo = np.take_along_axis(Xs, (c - 1) // 2, axis=-1)[..., 0]
    hi = np.take_along_axis(Xs, c // 2, axis=-1)[..., 0]
    return np.where(cnt > 0, 0.5 * (lo + hi), np.nan)


def block_sd(
    e: np.ndarray, valid: np.ndarray, block_px: int = BLOCK_PX, min_pixels: int = 256, step: float = 0.0
) -> np.ndarray:
    """Robust SD of ``e`` (valid pixels) in ``block_px`` square blocks, as a full-size map.

    1.4826 × the MAD; where that is below two grey-level steps ``step`` (relative units; quantised values whose
    MAD can collapse to 0 or one step), the larger of it and the winsorised SD (see module docstring).  A block
    with fewer than ``min_pixels`` valid pixels takes the median of the blocks that have enough.
    """
    H, W = e.shape
    nb_r, nb_c = -(-H // block_px), -(-W // block_px)
    X = np.full((nb_r * block_px, nb_c * block_px), np.nan)
    X[:H, :W] = np.where(valid, e, np.nan)
    X = X.reshape(nb_r, block_px, nb_c, block_px).transpose(0, 2, 1, 3).reshape(nb_r, nb_c, -1)
    cnt = np.isfinite(X).sum(axis=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = _sorted_median(np.sort(X, axis=2), cnt)
        sd = MAD_TO_SD * _sorted_median(np.sort(np.abs(X - med[:, :, None]), axis=2), cnt)
        # quantised values (noise of a grey level or less) make the MAD collapse to 0 or one step; the SD of
        # the values winsorised at their own 1st and 99th percentiles (against hot pixels) ÷ 0.982, the same
        # scale for Gaussian data, keeps the rounding's variance: the larger of the two is used
        if step > 0 and np.nanmin(sd) < 2 * step:
            lo, hi = np.nanpercentile(X, [1, 99], axis=2)
            sd_w = np.nanstd(np.clip(X, lo[:, :, None], hi[:, :, None]), axis=2) / 0.982
            sd = np.where(sd < 2 * step, np.maximum(sd, sd_w), sd)
    sd[cnt < min_pixels] = np.nan
    ok = np.isfinite(sd) & (sd > 0)
    if not ok.any():
        fill = robust_sd(e[valid]) if np.any(valid) else 1.0
        sd[:] = fill if fill > 0 else 1.0
    else:
        sd[~ok] = np.median(sd[ok])
    return np.repeat(np.repeat(sd, block_px, axis=0), block_px, axis=1)[:H, :W]


def quantisation_step(pixels: np.ndarray, max_samples: int = 200_000) -> float:
    """The grey-level step of the pixel values: the median gap between neighbouring distinct values of a sample.

    1 for integer images whose noise spans several levels, a negligible fraction of the noise for continuous
    (linearised) values.
    """
    g = np.asarray(pixels, float).ravel()
    if g.size > max_samples:
        g = g[:: int(np.ceil(g.size / max_samples))]
    u = np.unique(g[np.isfinite(g)])
    return float(np.median(np.diff(u))) if u.size > 1 else 0.0


def plateau_level(pixels: np.ndarray, min_count: int = 3) -> float | None:
    """The image maximum when at least ``min_count`` pixels share it exactly (a clipping plateau), else None."""
    top = float(np.max(pixels))
    return top if np.count_nonzero(pixels == top) >= min_count else None


# --------------------------------------------------------------------------- results
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


# --------------------------------------------------------------------------- lines
def _segment_means(e: np.ndarray, valid: np.ndarray, seg: int):
    """10 %-winsorised mean of e over the valid pixels of each (line, segment), and their count; lines are the
    rows of e.  Clipping each segment to its own 10th and 90th percentiles ignores a few outlying pixels (hot
    pixels) like a median, yet the statistic keeps the plain mean's variance on quantised values, where a median
    or a trimmed mean jumps by whole grey levels."""
    H, W = e.shape
    nseg = -(-W // seg)
    X = np.full((H, nseg * seg), np.nan)
    X[:, :W] = np.where(valid, e, np.nan)
    X = np.sort(X.reshape(H, nseg, seg), axis=2)  # NaN last
    cnt = np.isfinite(X).sum(axis=2)
    k = (cnt // 10)[:, :, None]
    lo = np.take_along_axis(X, k, axis=2)
    hi = np.take_along_axis(X, np.maximum(cnt[:, :, None] - 1 - k, 0), axis=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(np.clip(X, lo, hi), axis=2)
    return np.where(cnt > 0, mean, np.nan), cnt


def _runs(flags: np.ndarray, max_gap: int = 1) -> list[tuple[int, int]]:
    """(first, last) index runs of True, bridging gaps of at most ``max_gap``."""
    idx = np.flatnonzero(flags)
    if idx.size == 0:
        return []
    out, a, b = [], idx[0], idx[0]
    for i in idx[1:]:
        if i - b <= max_gap + 1:
            b = i
        else:
            out.append((a, b))
            a = b = i
    out.append((a, b))
    return [(int(a), int(b)) for a, b in out]


def find_line_defects(
    e: np.ndarray,
    valid: np.ndarray,
    pixels: np.ndarray,
    top: float | None,
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE,
    segment_px: int = SEGMENT_PX,
    min_count: int = 32,
    pixel_sd: float = 0.0,
):
    """Defective rows and columns (see module docstring); returns (defects, z bound, segments tested).

    ``pixel_sd``: the pixels' noise SD (relative); the scale of the √W-scaled segment means is never taken
    below 1.05 × it (their SD for white noise), which matters where quantised values make segments alike.
    """
    stats_ = []
    for axis, E, V, G in (("row", e, valid, pixels), ("column", e.T, valid.T, pixels.T)):
        med, cnt = _segment_means(E, V, segment_px)
        ok = cnt >= min_count
        t = np.where(ok, med * np.sqrt(np.maximum(cnt, 1)), np.nan)
        stats_.append((axis, E, V, G, med, cnt, ok, t))
    n_tested = int(sum(np.count_nonzero(s[6]) for s in stats_))
    if n_tested < 10:
        return [], float("nan"), n_tested
    z = outlier_z(n_tested, false_flag_rate)
    found: list[LineDefect] = []
    for axis, E, V, G, med, _cnt, ok, t in stats_:
        scale = max(robust_sd(t[ok]), 1.05 * pixel_sd)
        if not scale > 0:
            continue
        centre = float(np.median(t[ok]))
        flagged = ok & (np.abs(t - centre) > z * scale)
        raw = []
        for line in np.flatnonzero(flagged.any(axis=1)):
            for s0, s1 in _runs(flagged[line]):
                start, stop = s0 * segment_px, min((s1 + 1) * segment_px, E.shape[1])
                v = V[line, start:stop]
                vals = E[line, start:stop][v]
                level = float(np.median(vals)) if vals.size else float(med[line, s0])
                if top is not None and np.mean(G[line, start:stop][v] >= top) >= 0.5:
                    kind = "saturated"
                elif level <= DEAD_LEVEL:
                    kind = "dead"
                else:
                    kind = "dark" if level < 0 else "bright"
                raw.append(LineDefect(axis, int(line), int(line), int(start), int(stop), kind, level))
        # adjacent lines of one kind with overlapping extents become one defect
        raw.sort(key=lambda d: (d.kind, d.first, d.start))
        merged: list[LineDefect] = []
        for d in raw:
            if merged:
                p = merged[-1]
                if p.kind == d.kind and d.first == p.last + 1 and d.start < p.stop and p.start < d.stop:
                    merged[-1] = LineDefect(
                        axis,
                        p.first,
                        d.last,
                        min(p.start, d.start),
                        max(p.stop, d.stop),
                        p.kind,
                        (p.level + d.level) / 2,
                    )
                    continue
            merged.append(d)
        found += merged
    return found, z, n_tested


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


# --------------------------------------------------------------------------- defect map (flat fields)
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
