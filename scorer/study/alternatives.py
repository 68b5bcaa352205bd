"""The number of alternatives M of a study (one, or one per diameter) and the proportion correct at threshold."""

from __future__ import annotations

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from scorer.observer.mafc import criterion_for


def m_alternatives_of(df: pd.DataFrame, source="responses") -> int | dict[float, int]:
    """Number of alternatives M, one for the study or one per diameter (a plate may use different cells
    for different diameters): the ``n_alternatives`` column if present (one value per diameter),
    otherwise the number of distinct site labels in chosen_site ∪ true_site at each diameter."""
    per: dict[float, int] = {}
    for diam, g in df.groupby("diameter_mm", sort=True):
        if "n_alternatives" in df.columns:
            vals = pd.unique(g["n_alternatives"])
            if len(vals) != 1:
                raise LimenError(
                    f"n_alternatives must be the same on every row of one diameter (found "
                    f"{', '.join(str(int(v)) for v in sorted(vals))} at {float(diam):g} mm)",
                    source,
                )
            m = int(vals[0])
        else:
            m = len(set(g["chosen_site"]).union(set(g["true_site"])))
        if m < 2:
            raise LimenError(
                f"only {m} candidate site seen at {float(diam):g} mm; M-AFC needs at least 2 (add an "
                "n_alternatives column)",
                source,
            )
        per[float(diam)] = m
    ms = set(per.values())
    return ms.pop() if len(ms) == 1 else per


def m_at(m: int | dict[float, int], diameter_mm: float) -> int:
    """M at one diameter, from a study-wide M or a per-diameter mapping."""
    if isinstance(m, dict):
        for d, v in m.items():
            if np.isclose(float(d), float(diameter_mm)):
                return int(v)
        raise LimenError(f"no number of alternatives known for {float(diameter_mm):g} mm")
    return int(m)


def criterion_at(m: int | dict[float, int], diameter_mm: float, criterion_pc: float | None) -> float:
    """Proportion correct at threshold: Pc_M at the criterion's d′_T (default d′_T when None), or the Pc given."""
    return criterion_for(m_at(m, diameter_mm), criterion_pc)
