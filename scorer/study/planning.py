"""Study planning: how many readers and images a reader study needs to detect a given detector ratio.

Power by simulation (Burton et al. 2006): for each design (readers × images per detector) many reader
studies are simulated with :func:`scorer.study.reader_model.simulate_reader_study` — invented readers whose
thresholds spread between readers as in a pilot study (or as stated), reading images of a reference detector
and of one whose thresholds are ``ratio`` times higher — and each is analysed exactly as a real study is: a
per-reader M-AFC fit (:func:`scorer.study.reader_fits.reader_curves`) and the detector comparison
(:func:`scorer.study.group_comparison.compare_groups`, mixed model plus the image-sampling variance). Power is
the share of simulated studies whose comparison is significant at ``alpha``; its interval is Wilson's
(statsmodels ``proportion_confint``).

References
----------
.. [1] Burton, A., Altman, D. G., Royston, P. & Holder, R. L. "The design of simulation studies in medical
       statistics", Statistics in Medicine 25 (2006).
.. [2] Wilson, E. B. "Probable inference, the law of succession, and statistical inference",
       J. Am. Stat. Assoc. 22 (1927).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from scorer.study.reader_model import ReaderPopulation, simulate_reader_study


@dataclass
class PowerPlan:
    """Power of each design and the smallest design (fewest reads) reaching ``target_power``."""

    ratio: float
    diameter_mm: float
    alpha: float
    target_power: float
    population: dict
    cells: pd.DataFrame  # n_readers, n_images, power, ci_low, ci_high, n_sim, median_ratio
    recommended: dict | None
    n_sim: int
    seed: int
    notes: list = field(default_factory=list)

    def to_json(self) -> dict:
        return {
            "ratio": self.ratio,
            "diameter_mm": self.diameter_mm,
            "alpha": self.alpha,
            "target_power": self.target_power,
            "population": self.population,
            "cells": self.cells.to_dict("records"),
            "recommended": self.recommended,
            "n_sim": self.n_sim,
            "seed": self.seed,
            "notes": self.notes,
            "method": "power by simulation (Burton et al. 2006)",
        }


def population_from_analysis(analysis: dict) -> ReaderPopulation:
    """Reader population of a pilot study from its ``analysis.json`` (``Analysis.to_json``): the median
    human/model factor, and the between-reader CV (mean over groups and diameters, within-reader sampling
    variance removed)."""
    cv_rows = analysis.get("between_reader_cv") or []
    cvs = [r.get("cv_between") for r in cv_rows if r.get("cv_between") is not None]
    if not cvs:
        raise LimenError("the pilot analysis has no between-reader CV (it needs at least 2 readers)")
    hm = analysis.get("human_model_factor") or {}
    factor = hm.get("factor") or ReaderPopulation().median_factor
    return ReaderPopulation(median_factor=float(factor), cv_between=float(np.mean(cvs)))


def power_by_simulation(
    ratio: float,
    readers=(4, 6, 8),
    images=(8, 16),
    *,
    population: ReaderPopulation | None = None,
    diameter_mm: float = 0.25,
    m_alternatives: int = 4,
    n_contrasts: int = 10,
    alpha: float = 0.05,
    target_power: float = 0.8,
    n_sim: int = 100,
    n_boot: int = 100,
    seed: int = 0,
    progress=None,
) -> PowerPlan:
    """Power to detect a threshold ratio ``ratio`` (test / reference detector) at one diameter.

    Parameters
    ----------
    ratio : threshold ratio to detect (e.g. 1.3: the test detector needs 30 % more contrast).
    readers, images : reader counts and images per detector to try (every combination).
    population : spread of the invented readers (:class:`ReaderPopulation`; from a pilot study with
        :func:`population_from_analysis`, or stated).
    n_sim : simulated studies per design; n_boot : image resamples in each comparison.
    progress : optional callable(done, total).
    """
    if not (np.isfinite(ratio) and ratio > 0):
        raise LimenError(f"ratio must be a positive number, got {ratio}")
    if not 0 < alpha < 1 or not 0 < target_power < 1:
        raise LimenError("alpha and the target power must lie between 0 and 1")
    readers = sorted({int(r) for r in readers})
    images = sorted({int(i) for i in images})
    if not readers or min(readers) < 2:
        raise LimenError("each design needs at least 2 readers")
    if not images or min(images) < 2:
        raise LimenError("each design needs at least 2 images per detector")
    if n_sim < 1:
        raise LimenError("n_sim must be at least 1")
    from statsmodels.stats.proportion import proportion_confint

    from scorer.study.group_comparison import compare_groups
    from scorer.study.reader_fits import reader_curves

    pop = population or ReaderPopulation()
    root = np.random.SeedSequence(seed)
    total, done = len(readers) * len(images) * n_sim, 0
    rows, notes = [], []
    for n_r in readers:
        for n_i in images:
            hits, ratios, failed = 0, [], 0
            for child in root.spawn(n_sim):
                rng = np.random.default_rng(child)
                st = simulate_reader_study(
                    rng,
                    n_r,
                    detectors={"reference": 1.0, "test": float(ratio)},
                    diameters_mm=(float(diameter_mm),),
                    n_contrasts=n_contrasts,
                    n_images=n_i,
                    m_alternatives=m_alternatives,
                    population=pop,
                )
                rc = reader_curves(st.trials, m_alternatives, rng, n_boot=0)
                comp, _ = compare_groups(
                    rc, reference="reference", trials=st.trials, m=m_alternatives, n_boot=n_boot, rng=rng
                )
                if comp.empty or not np.isfinite(comp["p_value"].iloc[0]):
                    failed += 1  # too few converged readers to compare: counts as not detected
                else:
                    hits += int(comp["p_value"].iloc[0] < alpha)
                    ratios.append(float(comp["ratio"].iloc[0]))
                done += 1
                if progress is not None:
                    progress(done, total)
            lo, hi = proportion_confint(hits, n_sim, alpha=0.05, method="wilson")
            rows.append(
                {
                    "n_readers": n_r,
                    "n_images": n_i,
                    "reads_per_reader": 2 * n_i,
                    "power": hits / n_sim,
                    "ci_low": float(lo),
                    "ci_high": float(hi),
                    "n_sim": n_sim,
                    "median_ratio": float(np.median(ratios)) if ratios else float("nan"),
                    "not_comparable": failed,
                }
            )
            if failed:
                notes.append(
                    f"{n_r} readers × {n_i} images: {failed} of {n_sim} simulated studies could not be "
                    "compared (too few converged readers) and count as not detected"
                )
    cells = pd.DataFrame(rows)
    ok = cells[cells["power"] >= target_power]
    recommended = None
    if len(ok):
        best = ok.assign(reads=ok["n_readers"] * ok["n_images"]).sort_values(["reads", "n_readers"]).iloc[0]
        recommended = {
            "n_readers": int(best["n_readers"]),
            "n_images": int(best["n_images"]),
            "power": float(best["power"]),
            "ci_low": float(best["ci_low"]),
        }
    else:
        notes.append(f"no design tried reaches {target_power:.0%} power: add readers or images")
    return PowerPlan(
        ratio=float(ratio),
        diameter_mm=float(diameter_mm),
        alpha=float(alpha),
        target_power=float(target_power),
        population={
            "median_factor": pop.median_factor,
            "cv_between": pop.cv_between,
            "internal_share": pop.internal_share,
            "lapse_max": pop.lapse_max,
        },
        cells=cells,
        recommended=recommended,
        n_sim=int(n_sim),
        seed=int(seed),
        notes=notes,
    )
