"""The main job in one call: images of a contrast-detail phantom → thresholds → verdicts.

:func:`score_images` chains the modules of the one-direction flow (DESIGN.md):
``io.load_image`` → ``register.register`` → ``observer.score_image`` →
``threshold`` (d′ and count methods) → ``limits.evaluate``.  It reads files but
writes none; the CLI and the web app decide what to write.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import pandas as pd

from scorer.images.conversion import ConversionFunction
from scorer.errors import LimenError
import numpy as np

from scorer.resources import check_limit
from scorer.images.image import LimenWarning
from scorer.images.loading import load_image
from scorer.phantom.layout import Layout
from scorer.observer.limits import HumanFactor, Limits, Verdict, evaluate, overall
from scorer.observer.npw import ObserverConfig, SystemBlur, decide, estimate_blur, score_image
from scorer.phantom.registration import register
from scorer.observer.threshold import ThresholdCurve, count_thresholds, dprime_thresholds

METHODS = ("dprime", "count")


@dataclass
class ImageScore:
    path: str
    image_id: str
    metadata: dict
    placement: object
    blur_sigma_px: float
    n_correct: int
    n_trials: int


@dataclass
class ScoreResult:
    observer: str
    layout: Layout
    images: list[ImageScore]
    responses: pd.DataFrame
    trials: pd.DataFrame
    curves: dict[str, ThresholdCurve]
    verdicts: list[Verdict] | None
    limits: Limits | None
    human_factor: float | None
    verdict_method: str
    settings: dict
    warnings: list[str] = field(default_factory=list)
    human_factor_ci: tuple[float, float] | None = None

    @property
    def overall_verdict(self) -> str:
        return "no limits" if self.verdicts is None else overall(self.verdicts)

    def thresholds_frame(self) -> pd.DataFrame:
        return pd.concat([c.to_frame() for c in self.curves.values()], ignore_index=True)

    def to_json(self) -> dict:
        """The machine-readable result (contrasts as fractions)."""
        return {
            "observer": self.observer,
            "layout": {"name": self.layout.name, "path": self.layout.source_path},
            "images": [
                {
                    "path": s.path,
                    "image_id": s.image_id,
                    "registration": s.placement.to_dict(),
                    "blur_sigma_px": s.blur_sigma_px,
                    "proportion_correct": s.n_correct / max(s.n_trials, 1),
                    "metadata": s.metadata,
                }
                for s in self.images
            ],
            "thresholds": [p.to_dict() for c in self.curves.values() for p in c.points],
            "smooth_curves": {m: (c.smooth.to_dict() if c.smooth else None) for m, c in self.curves.items()},
            "verdicts": [v.to_dict() for v in self.verdicts] if self.verdicts is not None else [],
            "overall_verdict": self.overall_verdict,
            "verdict_method": self.verdict_method if self.verdicts is not None else None,
            "limits": None
            if self.limits is None
            else {
                "name": self.limits.name,
                "observer": self.limits.observer,
                "source": self.limits.source,
                "path": self.limits.path,
            },
            "human_factor": self.human_factor,
            "human_factor_ci": None if self.human_factor_ci is None else list(self.human_factor_ci),
            "settings": self.settings,
            "warnings": self.warnings,
        }


def _image_ids(paths: Sequence[str]) -> list[str]:
    names = [Path(p).name for p in paths]
    if len(set(names)) == len(names):
        return names
    return [str(p) for p in paths]


def score_images(
    paths: Sequence,
    layout: Layout,
    *,
    observer: str = "npw",
    methods: Sequence[str] = METHODS,
    conversion: ConversionFunction | None = None,
    pixel_spacing_mm=None,
    blur: SystemBlur | None = None,
    viewing_distance_mm: float | None = None,
    n_boot: int = 1000,
    seed: int = 0,
    criterion_pc: float | None = None,
    limits: Limits | None = None,
    human_factor: float | HumanFactor | None = None,
    verdict_method: str | None = None,
    max_residual_px: float = 1.0,
    count_form: str = "mafc",
    dprime_ci: str = "analytic",
    on_image: Callable | None = None,
    on_failure: Callable | None = None,
) -> ScoreResult:
    """Score a set of images of one phantom on one detector.

    Parameters
    ----------
    paths : image files (DICOM, TIFF, PNG, npy).
    layout : the phantom's layout.
    observer : "npw" or "npwe".
    methods : any of "dprime", "count".
    conversion : conversion function to linearise the pixels (none: the stored values are
        taken as proportional to air kerma, with a warning).
    blur : system spread for the templates (none: estimated from the markers of each image).
    on_image : called as ``on_image(index, path, image, placement)`` after each image.
    on_failure : called as ``on_failure(path, image, exception)`` when registration fails,
        before the error is raised.
    """
    if not paths:
        raise LimenError("no images given")
    methods = [m for m in methods]
    for m in methods:
        if m not in METHODS:
            raise LimenError(f"unknown method {m!r}; choose dprime, count or both")
    if criterion_pc is not None:
        m_max = max(t.m_alternatives for t in layout.targets)
        m_min = min(t.m_alternatives for t in layout.targets)
        if not (np.isfinite(criterion_pc) and 1.0 / m_min < criterion_pc < 1.0):
            raise LimenError(
                f"{criterion_pc:g} must lie between chance and 1 for every target (chance is "
                f"1/{m_min} for the layout's {m_min}-AFC targets"
                + (f", 1/{m_max} for its {m_max}-AFC ones" if m_max != m_min else "")
                + ")",
                "--criterion",
            )
    if viewing_distance_mm is not None and not (np.isfinite(viewing_distance_mm) and viewing_distance_mm > 0):
        raise LimenError(f"must be a positive distance in mm, got {viewing_distance_mm:g}", "--viewing-distance-mm")
    cfg_kw = {"observer": observer, "blur": blur}
    if viewing_distance_mm is not None:
        cfg_kw["viewing_distance_mm"] = viewing_distance_mm
    config = ObserverConfig(**cfg_kw)
    check_limit(
        "LIMEN_MAX_BOOTSTRAP_CELLS",
        n_boot * len(paths),
        f"--n-boot {n_boot} × {len(paths)} images = {n_boot * len(paths)}",
        "--n-boot",
    )
    seen_paths: dict[Path, str] = {}
    for p in paths:
        key = Path(p).resolve()
        if key in seen_paths:
            raise LimenError(f"given twice (as {seen_paths[key]} and {p}); each image may be scored once", p)
        seen_paths[key] = str(p)
    seen_hashes: dict[str, str] = {}
    notes: list[str] = []
    if conversion is None:
        notes.append("no conversion function given: stored pixel values are taken as proportional to air kerma")
    ids = _image_ids([str(p) for p in paths])
    scores, frames = [], []
    detectors = set()
    min_shape = None
    for i, (path, image_id) in enumerate(zip(paths, ids)):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", LimenWarning)
            image = load_image(path, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion, min_shape=min_shape)
        for w in caught:
            notes.append(str(w.message))
        twin = seen_hashes.setdefault(image.metadata.content_sha256, str(path))
        if twin != str(path):
            raise LimenError(
                f"holds the same bytes as {twin}: the same image given twice would be counted as two "
                "independent images",
                path,
            )
        detectors.add((image.metadata.detector_id or image.metadata.device_serial, image.metadata.station_name))
        try:
            placement = register(image, layout, max_residual_px=max_residual_px, path=path)
        except LimenError as exc:
            if on_failure is not None:
                on_failure(path, image, exc)
            raise
        img_blur = config.blur or estimate_blur(image, layout, placement)
        cfg = ObserverConfig(observer=config.observer, viewing_distance_mm=config.viewing_distance_mm, blur=img_blur)
        try:
            resp = score_image(image, layout, placement, cfg, image_id=image_id)
        except LimenError as exc:
            raise LimenError(str(exc), path) from None
        md = image.metadata
        resp.insert(1, "detector", md.detector_id or md.device_serial or md.station_name or "unknown")
        frames.append(resp)
        tr = decide(resp)
        scores.append(
            ImageScore(
                str(path),
                image_id,
                image.metadata.to_dict(),
                placement,
                img_blur.sigma_px,
                int(tr["correct"].sum()),
                int(len(tr)),
            )
        )
        if on_image is not None:
            on_image(i, path, image, placement)
    if len(detectors) > 1:
        notes.append(f"images come from {len(detectors)} different detectors/stations: {sorted(map(str, detectors))}")
    responses = pd.concat(frames, ignore_index=True)
    trials = decide(responses)
    curves: dict[str, ThresholdCurve] = {}
    if "dprime" in methods:
        curves["dprime"] = dprime_thresholds(
            responses, criterion_pc=criterion_pc, n_boot=n_boot, seed=seed, ci_method=dprime_ci
        )
    if "count" in methods:
        curves["count"] = count_thresholds(trials, criterion_pc=criterion_pc, n_boot=n_boot, seed=seed, form=count_form)
    vm = verdict_method or ("dprime" if "dprime" in curves else "count")
    if vm not in curves:
        raise LimenError(f"verdict method {vm!r} was not computed")
    verdicts = evaluate(curves[vm], limits, human_factor) if limits is not None else None
    settings = {
        "observer": observer,
        "methods": list(methods),
        "n_boot": n_boot,
        "seed": seed,
        "count_form": count_form,
        "dprime_ci": dprime_ci,
        "criterion_pc": criterion_pc,
        "viewing_distance_mm": config.viewing_distance_mm,
        "conversion": None if conversion is None else conversion.to_dict(),
        "blur": "per-image estimate from markers"
        if blur is None
        else {"sigma_px": blur.sigma_px, "source": blur.source},
        "max_residual_px": max_residual_px,
    }
    hf = (
        human_factor
        if isinstance(human_factor, HumanFactor) or human_factor is None
        else HumanFactor(float(human_factor))
    )
    return ScoreResult(
        observer,
        layout,
        scores,
        responses,
        trials,
        curves,
        verdicts,
        limits,
        None if hf is None else hf.value,
        vm,
        settings,
        notes,
        (hf.ci_low, hf.ci_high) if hf is not None and hf.has_ci else None,
    )
