"""The relative residual of an image against its smooth background, and its robust noise scale.

e = g / b − 1 with b a first-order normalised Gaussian convolution of the tested pixels (Knutsson & Westin
1993); the noise scale of e from the median absolute deviation in blocks (Rousseeuw & Croux 1993), with the
grey step's rounding where values are quantised; the two-sided outlier bound over N tests (Šidák 1967).  The
defect search (:mod:`scorer.observer.defects`, which describes the method) and the pattern checks build on these.

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

import numpy as np
from scipy import ndimage, stats

from scorer.errors import LimenError

#: expected number of pixels (and, separately, line segments) flagged in a clean image
DEFAULT_FALSE_FLAG_RATE = 1e-3
MAD_TO_SD = 1.4826
SMOOTH_SIGMA_PX = 8.0
BIN = 4
BLOCK_PX = 64


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
