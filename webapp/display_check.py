"""The display check shown before reading: a faint disc on a dark field at fixed window/level."""

from __future__ import annotations

import numpy as np

CHECK_SIZE = 192
CHECK_SITES = [(48, 48), (48, 144), (144, 48), (144, 144)]  # (row, col)


def display_check_pattern(site: int, seed: int) -> bytes:
    """A low-contrast pattern shown at fixed window/level: four candidate sites on a dark-grey field, one of
    which holds a faint disc 3 grey levels (of 255) above it. Finding it shows that the display and the
    room let dark, low-contrast detail through (common practice for a pre-reading display check)."""
    rng = np.random.default_rng(seed)
    base = 28 + int(rng.integers(0, 6))
    img = np.full((CHECK_SIZE, CHECK_SIZE), base, dtype=float)
    yy, xx = np.mgrid[:CHECK_SIZE, :CHECK_SIZE]
    r, c = CHECK_SITES[site]
    img[(yy - r) ** 2 + (xx - c) ** 2 <= 14**2] = base + 3
    img[:, :8] = 0
    img[:, -8:] = 255  # black and white bars at the edges frame the grey scale
    return (img * 257).astype("<u2").tobytes()
