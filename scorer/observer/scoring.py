"""The main job in one call: images of a contrast-detail phantom → thresholds → verdicts.

:func:`score_images` chains the modules of the one-direction flow (DESIGN.md):
``register.register`` → ``observer.score_image`` → ``threshold`` (d′ and count methods) →
``limits.evaluate``.  It takes :class:`~scorer.images.image.Image` objects and reads and writes no
file: :func:`scorer.workflow.score_files` reads the image files (one at a time) and calls it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import PurePath
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from scorer.images.conversion import ConversionFunction
from scorer.images.image import Image
from scorer.observer.checks import CONTRAST_SCALE, ImageChecks, SetChecks, check_image
from scorer.observer.defects import DEFAULT_FALSE_FLAG_RATE, DefectMap
from scorer.observer.limits import HumanFactor, Limits, Verdict, evaluate, overall
from scorer.observer.mafc import Detectability, criterion_for, criterion_json
from scorer.observer.npw import ObserverConfig, SystemBlur, decide, estimate_blur, score_image, site_regions
from scorer.observer.threshold import ThresholdCurve, ThresholdPoint, count_thresholds, dprime_thresholds
from scorer.phantom.layout import Layout
from scorer.phantom.registration import register
from scorer.resources import check_limit

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
    checks: ImageChecks | None = None


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
    set_checks: SetChecks | None = None

    @property
    def overall_verdict(self) -> str:
        return "no limits" if self.verdicts is None else overall(self.verdicts)

    def registration_frame(self) -> pd.DataFrame:
        """One row per image: the registration's residual, the markers used and not used (with why), the target
        sites outside the image and the defective lines found before registration."""
        rows = []
        for s in self.images:
            p = s.placement
            rows.append(
                {
                    "image": s.image_id,
                    "residual_px": p.residual_px,
                    "markers_used": " ".join(sorted(p.markers_px)),
                    "markers_not_used": "; ".join(f"{k}: {v}" for k, v in p.markers_not_used.items()),
                    "sites_outside": " ".join(f"{t}/{k}" for t, k in p.sites_outside),
                    "defective_lines": "; ".join(ln.name for ln in p.lines),
                }
            )
        return pd.DataFrame(rows)

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
                    **({} if s.checks is None else {"checks": s.checks.to_dict()}),
                }
                for s in self.images
            ],
            "contrast_scale": CONTRAST_SCALE,
            "excluded_sites": [] if self.set_checks is None else self.set_checks.exclusions_json(),
            "patterns": None if self.set_checks is None else self.set_checks.patterns_json(),
            "thresholds": [p.to_dict() for c in self.curves.values() for p in c.points],
            "smooth_curves": {m: (c.smooth.to_dict() if c.smooth else None) for m, c in self.curves.items()},
            "verdicts": [v.to_dict() for v in self.verdicts] if self.verdicts is not None else [],
            "overall_verdict": self.overall_verdict,
            "verdict_method": self.verdict_method if self.verdicts is not None else None,
            "limits": None if self.limits is None else self.limits.to_dict(),
            "human_factor": self.human_factor,
            "human_factor_ci": None if self.human_factor_ci is None else list(self.human_factor_ci),
            "settings": self.settings,
            "warnings": self.warnings,
        }


def _image_ids(paths: Sequence[str]) -> list[str]:
    names = [PurePath(p).name for p in paths]
    if len(set(names)) == len(names):
        return names
    return [str(p) for p in paths]


def _checked(image) -> Image:
    if not isinstance(image, Image):
        raise TypeError(
            f"score_images takes Image objects, got {type(image).__name__}; "
            "to score image files call scorer.workflow.score_files"
        )
    return image


def score_images(
    images: Sequence[Image],
    layout: Layout,
    *,
    names: Sequence | None = None,
    observer: str = "npw",
    methods: Sequence[str] = METHODS,
    conversion: ConversionFunction | None = None,
    blur: SystemBlur | None = None,
    viewing_distance_mm: float | None = None,
    n_boot: int = 1000,
    seed: int = 0,
    criterion_pc: float | Detectability | None = None,
    limits: Limits | None = None,
    human_factor: float | HumanFactor | None = None,
    verdict_method: str | None = None,
    max_residual_px: float = 1.0,
    count_form: str = "mafc",
    dprime_ci: str = "analytic",
    on_image: Callable | None = None,
    on_failure: Callable | None = None,
    check_defects: bool = True,
    defect_map: DefectMap | None = None,
    notch: bool = False,
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE,
    on_checked: Callable | None = None,
) -> ScoreResult:
    """Score a set of images of one phantom on one detector.

    Parameters
    ----------
    images : the images (:class:`~scorer.images.image.Image`), each taken once, in order; a lazy sequence
        that reads each file when it is reached (:class:`scorer.workflow.ImageFiles`) keeps one image in
        memory at a time.
    layout : the phantom's layout.
    names : one label per image (its file), used in messages, as ``ImageScore.path`` and, by base name,
        as the image id; default: each image's ``metadata.source_path``.
    observer : "npw" or "npwe".
    methods : any of "dprime", "count".
    conversion : the conversion function the images were linearised with, recorded in the settings
        (none: the stored values were taken as proportional to air kerma).
    blur : system spread for the templates (none: estimated from the markers of each image).
    on_image : called as ``on_image(index, name, image, placement)`` after each image.
    on_failure : called as ``on_failure(name, image, exception)`` when registration fails,
        before the error is raised.
    check_defects : look for defective pixels and lines, and for periodic and fixed patterns
        (:mod:`scorer.observer.checks`); sites touching a defect are excluded (their whole M-AFC trial),
        and said so in the warnings, the responses' ``excluded`` column and the JSON.
    defect_map : defective pixels and lines measured from flat fields (``limen detector``); sites touching
        them are excluded too.
    criterion_pc : the threshold definition (:func:`scorer.observer.mafc.criterion_for`): None, the observer
        reaches the default detectability d′_T (the same for every M, so curves are continuous across cells of
        different M); a :class:`~scorer.observer.mafc.Detectability` (another d′_T); or a number, one Pc for
        every M.
    notch : remove each periodic pattern found in an image by a narrow notch filter before scoring it.
    false_flag_rate : expected number of pixels (and of line segments) flagged in a clean image.
    on_checked : called as ``on_checked(index, name, image, placement, checks)`` after each image's checks
        (the :class:`~scorer.observer.checks.ImageChecks`), e.g. to draw its defects.

    To score image files, call :func:`scorer.workflow.score_files`.
    """
    if not len(images):
        raise LimenError("no images given")
    if names is None:
        names = [_checked(images[i]).metadata.source_path or f"image {i + 1}" for i in range(len(images))]
    elif len(names) != len(images):
        raise ValueError(f"{len(names)} names for {len(images)} images")
    methods = [m for m in methods]
    for m in methods:
        if m not in METHODS:
            raise LimenError(f"unknown method {m!r}; choose dprime, count or both")
    if criterion_pc is not None and not isinstance(criterion_pc, Detectability):
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
        n_boot * len(images),
        f"--n-boot {n_boot} × {len(images)} images = {n_boot * len(images)}",
        "--n-boot",
    )
    seen_hashes: dict[str, str] = {}
    outside_sites: dict[str, dict] = {}  # image id → (target, site) → reason: sites outside the image
    notes: list[str] = []
    ids = _image_ids([str(p) for p in names])
    scores, frames = [], []
    detectors = set()
    set_checks = SetChecks(len(images), false_flag_rate=false_flag_rate, notch=notch) if check_defects else None
    for i, (image, path, image_id) in enumerate(zip(images, names, ids)):
        _checked(image)
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
        notes += [f"{path}: {n}" for n in placement.notes()]
        edge = _sites_at_edge(layout, placement, img_blur, np.shape(image.pixels))
        if edge:
            outside_sites[image_id] = edge
            notes.append(f"{path}: {_edge_text(edge)}")
        skip: dict = dict(edge)
        masked = None
        checks = None
        if set_checks is not None:
            try:
                checks, image = check_image(
                    image,
                    layout,
                    placement,
                    img_blur,
                    observer,
                    image_id=image_id,
                    defect_map=defect_map,
                    apply_notch=notch,
                    false_flag_rate=false_flag_rate,
                )
            except LimenError as exc:
                raise LimenError(str(exc), getattr(exc, "path", None) or path) from None
            skip, masked = {**edge, **checks.excluded}, checks.mask
            checks.mask = None  # the observer below is its last user
            set_checks.add(checks)
            if on_checked is not None:
                on_checked(i, path, image, placement, checks)
        try:
            resp = score_image(image, layout, placement, cfg, image_id=image_id, skip=skip, masked=masked)
        except LimenError as exc:
            raise LimenError(str(exc), path) from None
        md = image.metadata
        resp.insert(1, "detector", md.detector_id or md.device_serial or md.station_name or "unknown")
        frames.append(resp)
        scores.append(
            ImageScore(str(path), image_id, image.metadata.to_dict(), placement, img_blur.sigma_px, 0, 0, checks)
        )
        if on_image is not None:
            on_image(i, path, image, placement)
    if len(detectors) > 1:
        notes.append(f"images come from {len(detectors)} different detectors/stations: {sorted(map(str, detectors))}")
    responses = pd.concat(frames, ignore_index=True)
    used = responses
    if set_checks is not None:
        set_checks.finish()
        responses = set_checks.mark(responses)
        notes += set_checks.warnings({s.image_id: s.path for s in scores})
    if outside_sites:
        responses = _mark_outside(responses, outside_sites)
    if set_checks is not None or outside_sites:
        used = responses[responses["excluded"] == ""]
    trials = decide(used)
    per_image = trials.groupby("image")["correct"].agg(["sum", "count"])
    for sc in scores:
        if sc.image_id in per_image.index:
            sc.n_correct, sc.n_trials = (int(v) for v in per_image.loc[sc.image_id])
    curves: dict[str, ThresholdCurve] = {}
    if "dprime" in methods:
        curves["dprime"] = dprime_thresholds(
            used, criterion_pc=criterion_pc, n_boot=n_boot, seed=seed, ci_method=dprime_ci
        )
    if "count" in methods:
        curves["count"] = count_thresholds(trials, criterion_pc=criterion_pc, n_boot=n_boot, seed=seed, form=count_form)
    if used is not responses:
        _note_exclusions(curves, responses, trials, criterion_pc)
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
        "criterion_pc": None if isinstance(criterion_pc, Detectability) else criterion_pc,
        "threshold_definition": criterion_json(criterion_pc, {t.m_alternatives for t in layout.targets}),
        "viewing_distance_mm": config.viewing_distance_mm,
        "conversion": None if conversion is None else conversion.to_dict(),
        "blur": "per-image estimate from markers"
        if blur is None
        else {"sigma_px": blur.sigma_px, "source": blur.source},
        "max_residual_px": max_residual_px,
        "defect_check": None
        if not check_defects
        else {
            "false_flag_rate": false_flag_rate,
            "defect_map": None if defect_map is None else (defect_map.source or "given"),
            "notch": notch,
        },
    }
    hf = (
        human_factor
        if isinstance(human_factor, HumanFactor) or human_factor is None
        else HumanFactor(float(human_factor))
    )
    hf = hf.for_method(vm) if hf is not None and limits is not None else hf  # the factor of the verdict's method
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
        set_checks,
    )


def _note_exclusions(
    curves: dict[str, ThresholdCurve], responses: pd.DataFrame, trials: pd.DataFrame, criterion_pc
) -> None:
    """Say on each threshold how many M-AFC trials it rests on when some were excluded for defects; a diameter
    whose every trial was excluded gets a point without a threshold that says so."""
    all_trials = responses.drop_duplicates(["image", "target"])
    total = all_trials.groupby("diameter_mm").size()
    used = trials.groupby("diameter_mm").size()
    m_of = all_trials.groupby("diameter_mm")["m_alternatives"].first()
    why_of = {}  # diameter → why its trials were excluded: defects, sites outside the image, or both
    if "excluded" in responses.columns:
        for d, g in responses[responses["excluded"] != ""].groupby("diameter_mm"):
            out = g["excluded"].str.contains(OUTSIDE_REASON, regex=False)
            why_of[round(float(d), 9)] = (
                "for defects"
                if not out.any()
                else "as outside the image"
                if out.all()
                else "for defects or as outside the image"
            )
    for curve in curves.values():
        have = {round(p.diameter_mm, 9) for p in curve.points}
        for d in total.index:
            if round(float(d), 9) not in have:
                m = int(m_of[d])
                pc = criterion_for(m, criterion_pc)
                nan = float("nan")
                curve.points.append(ThresholdPoint(float(d), nan, nan, nan, curve.method, curve.observer, 0, m, pc))
        curve.points.sort(key=lambda p: p.diameter_mm)
        for p in curve.points:
            n_all = int(total.get(p.diameter_mm, 0))
            n_used = int(used.get(p.diameter_mm, 0))
            if n_used < n_all:
                p.n_trials, p.n_excluded = n_used, n_all - n_used
                why = why_of.get(round(float(p.diameter_mm), 9), "for defects")
                p.note = (p.note + "; " if p.note else "") + (
                    f"rests on {n_used} of {n_all} trials ({n_all - n_used} excluded {why}; the CI uses the rest)"
                    if n_used
                    else f"no threshold: all {n_all} trials were excluded {why}"
                )


OUTSIDE_REASON = "outside the image"


def _sites_at_edge(layout: Layout, placement, blur, shape) -> dict[tuple[str, int], str]:
    """The sites (all of each target that has one) whose disc lies outside the image, or whose region reaches
    past its edge: (target, site) → reason.  An M-AFC trial needs every site of its target, so the whole
    target goes."""
    H, W = int(shape[0]), int(shape[1])
    out_disc = set(map(tuple, getattr(placement, "sites_outside", []) or []))
    bad: dict[str, dict[int, str]] = {}
    for r in site_regions(layout, placement, blur):
        h = int(np.ceil(r.radius_px))
        ri, ci = int(round(r.row_px)), int(round(r.col_px))
        if (r.target, r.site) in out_disc:
            bad.setdefault(r.target, {})[r.site] = f"{OUTSIDE_REASON} (plate cut off by the image edge)"
        elif ri - h < 0 or ci - h < 0 or ri + h + 1 > H or ci + h + 1 > W:
            bad.setdefault(r.target, {})[r.site] = f"{OUTSIDE_REASON}: its region reaches past the image edge"
    out = {}
    for t in layout.targets:
        if t.id in bad:
            first = min(bad[t.id])
            for k in range(t.m_alternatives):
                out[(t.id, k)] = bad[t.id].get(k, f"trial left out: site {first} {OUTSIDE_REASON}")
    return out


def _edge_text(edge: dict) -> str:
    """One line naming the sites outside the image (target/site ids) and their trials left out."""
    named = [f"{t}/{s}" for (t, s), why in sorted(edge.items()) if not why.startswith("trial left out")]
    targets = sorted({t for t, _ in edge})
    listed = ", ".join(named[:12]) + (f" and {len(named) - 12} more" if len(named) > 12 else "")
    return (
        f"plate partly outside the image: {len(named)} target site(s) outside or at the edge ({listed}); the "
        f"{len(targets)} M-AFC trial(s) they belong to are left out and the sites inside are scored"
    )


def _mark_outside(responses: pd.DataFrame, outside: dict[str, dict]) -> pd.DataFrame:
    """The responses with the sites outside the image (and their trials) marked in the ``excluded`` column (as
    :meth:`SetChecks.mark` marks defects; a site both defective and outside keeps the defect's reason)."""
    out = responses.copy()
    before = out["excluded"] if "excluded" in out.columns else pd.Series("", index=out.index)
    edge = [outside.get(img, {}).get((t, int(s)), "") for img, t, s in zip(out["image"], out["target"], out["site"])]
    out["excluded"] = [b if b else e for b, e in zip(before, edge)]
    if "masked_px" not in out.columns:
        out["masked_px"] = 0
    return out
