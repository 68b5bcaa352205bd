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
        _check_sites(g, float(diam), source)
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


def _site_numbers(labels) -> list[int] | None:
    """The site labels as whole numbers, or None when any is not one (labels that are names)."""
    out = []
    for v in labels:
        try:
            f = float(v)
        except (TypeError, ValueError):
            return None
        if not f.is_integer():
            return None
        out.append(int(f))
    return out


def _where(g: pd.DataFrame, label) -> str:
    """The first row (and column) of a diameter's trials carrying a site label."""
    for c in ("chosen_site", "true_site"):
        hit = np.flatnonzero((g[c].astype(str) == str(label)).to_numpy())
        if len(hit):
            i = g.index[hit[0]]
            if not isinstance(i, (int, np.integer)):
                return f"{c} {label}"
            return f"row {int(i) + 1} (line {int(i) + 2}): {c} {label}"
    return f"site {label}"


def _check_sites(g: pd.DataFrame, diam: float, source) -> None:
    """The site labels of one diameter's trials must be the cell's sites: with ``n_alternatives`` at most M of
    them (numbered 0…M−1 or 1…M when they are numbers); without it, numbered sites without a gap (a stray 7
    among 0–3 would make a 5-AFC cell of a 4-AFC one) and the same number of sites for every detector."""
    labels = sorted(set(g["chosen_site"].astype(str)) | set(g["true_site"].astype(str)))
    nums = _site_numbers(labels)
    if "n_alternatives" in g.columns and len(pd.unique(g["n_alternatives"])) == 1:
        m = int(g["n_alternatives"].iloc[0])
        if len(labels) > m:
            raise LimenError(
                f"n_alternatives is {m} at {diam:g} mm but {len(labels)} different sites are chosen or true there "
                f"({', '.join(labels[:8])}{', …' if len(labels) > 8 else ''}); n_alternatives must count every site",
                source,
            )
        if nums is not None:
            first = 0 if min(nums) == 0 else 1
            stray = [n for n in nums if not first <= n < first + m]
            if stray:
                raise LimenError(
                    f"{_where(g, stray[-1])} lies outside the {m} sites ({first}–{first + m - 1}) of the "
                    f"{m}-AFC cells at {diam:g} mm (n_alternatives {m})",
                    source,
                )
        return
    if nums is not None:
        ordered = sorted(nums)
        for a, b in zip(ordered, ordered[1:]):
            if b > a + 1:
                raise LimenError(
                    f"{_where(g, ordered[-1])} lies outside the sites {ordered[0]}–{a} of the other trials at "
                    f"{diam:g} mm (no site {a + 1}); a site must be one of the cell's sites — add an "
                    "n_alternatives column if some sites were never chosen",
                    source,
                )
    if "detector" in g.columns and g["detector"].nunique() > 1:
        counts = {
            str(det): len(set(h["chosen_site"].astype(str)) | set(h["true_site"].astype(str)))
            for det, h in g.groupby("detector", sort=True)
        }
        if len(set(counts.values())) > 1:
            text = ", ".join(f"{d}: {n}" for d, n in counts.items())
            raise LimenError(
                f"the detectors' trials at {diam:g} mm use different numbers of sites ({text}); every cell of one "
                "diameter has the same M — check the site labels or add an n_alternatives column",
                source,
            )


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
