"""Score sets of images from the independent generator (tests/cd_truth_generator.py) with Limen, and compare.

Each image goes through what ``limen score`` does with it, in memory: registration on the markers, the system
blur estimated from the markers, the observer's responses, M-AFC decisions, then the d′ and count thresholds of
the images taken together.  Nothing here knows the truth except :func:`compare`.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from cd_truth_generator import Plate

from scorer.images import Image
from scorer.observer import ObserverConfig, count_thresholds, decide, dprime_thresholds, estimate_blur, score_image
from scorer.phantom import load_layout, register


def plate_layout(plate: Plate):
    """Limen's reading of the plate's layout file (written to a temporary file and loaded as a user's would be)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"{plate.design.name}.toml"
        path.write_text(plate.layout_toml(), encoding="utf-8")
        return load_layout(path)


def score_set(plate: Plate, layout, rng: np.random.Generator, n_images: int, observers=("npw", "npwe")) -> dict:
    """Responses per observer for ``n_images`` fresh images: {observer: responses DataFrame}."""
    frames: dict[str, list] = {o: [] for o in observers}
    p = plate.design.pixel_mm
    for i in range(n_images):
        image = Image(plate.draw(rng), (p, p))
        placement = register(image, layout)
        blur = estimate_blur(image, layout, placement)
        for o in observers:
            cfg = ObserverConfig(o, viewing_distance_mm=plate.viewing_distance_mm, blur=blur)
            frames[o].append(score_image(image, layout, placement, cfg, image_id=f"i{i}"))
    return {o: pd.concat(f, ignore_index=True) for o, f in frames.items()}


def thresholds(responses: pd.DataFrame, images, n_boot: int = 400, seed: int = 0) -> pd.DataFrame:
    """d′ and count thresholds from the images numbered ``images``: rows diameter_mm, method, estimate, CI."""
    r = responses[responses["image"].isin([f"i{i}" for i in images])]
    rows = []
    curves = {
        "dprime": dprime_thresholds(r, n_boot=0),
        "count": count_thresholds(decide(r), n_boot=n_boot, seed=seed),
    }
    for method, curve in curves.items():
        for pt in curve.points:
            rows.append(
                {
                    "diameter_mm": pt.diameter_mm,
                    "method": method,
                    "estimate": pt.threshold_contrast,
                    "ci_low": pt.ci_low,
                    "ci_high": pt.ci_high,
                    "censored": pt.censored,
                }
            )
    return pd.DataFrame(rows)


def compare(th: pd.DataFrame, truth: dict[float, float]) -> pd.DataFrame:
    """Add the truth, log error and whether the CI holds it."""
    th = th.copy()
    th["truth"] = th["diameter_mm"].map(truth)
    th["log_error"] = np.log(th["estimate"] / th["truth"])
    th["covered"] = (th["ci_low"] <= th["truth"]) & (th["truth"] <= th["ci_high"])
    return th
