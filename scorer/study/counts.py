"""Trial counts arranged for the fits: correct answers and trials per reader × image × contrast level."""

from __future__ import annotations

import numpy as np
import pandas as pd


def counts_cube(g: pd.DataFrame, readers, images, levels) -> tuple[np.ndarray, np.ndarray]:
    """Counts (y correct, n trials) of the trials ``g``, shape (readers, images, levels), in the order given."""
    ri = pd.Index(readers).get_indexer(g["reader"])
    ii = pd.Index(images).get_indexer(g["image"])
    li = np.searchsorted(levels, g["contrast"].to_numpy())
    shape = (len(readers), len(images), len(levels))
    flat = np.ravel_multi_index((ri, ii, li), shape)
    size = int(np.prod(shape))
    y = np.bincount(flat, g["correct"].to_numpy(float), size).reshape(shape)
    n = np.bincount(flat, None, size).reshape(shape)
    return y, n
