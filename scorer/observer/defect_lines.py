"""Defective rows and columns: winsorised segment means of the relative residual, tested against their own
robust scale with the Šidák bound over the segments (method in :mod:`scorer.observer.defects`).
"""

from __future__ import annotations

import warnings

import numpy as np

from scorer.observer.defect_records import LineDefect
from scorer.observer.robust_residual import DEFAULT_FALSE_FLAG_RATE, outlier_z, robust_sd

SEGMENT_PX = 128
DEAD_LEVEL = -0.8  # relative departure at or below which a line is "dead"


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
