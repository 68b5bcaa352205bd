"""The design of a reader study: what one trial shows, the window/level every trial starts from, and the plan
of trials per reader per cell — the gate that refuses to open a study whose design cannot reach the
precision asked for, saying what to change.

Blinding by construction
------------------------
* **Tiles, not the plate.**  A trial shows its target's M candidate sites as M square tiles, each centred on one
  site, in a random order drawn for that trial (:func:`webapp.placement`); the reader answers with a screen
  position.  On a physical plate a target's disc sits at the same site in every image, so a reader shown the
  plate around the target could learn where it is; a tile shows no neighbour: its side is chosen per diameter
  (:func:`tile_half_px`) so that no other site or marker disc (its radius plus a blur margin) reaches into it
  and the tiles of one target never share a pixel.  The true site's screen position is then uniform over the
  M places, whatever the plate.
* **One window/level for the study** (:func:`default_window_level`), from the tiles of every scored image
  pooled over the detectors, and shown to the reader relative to itself: no number on the reading screen
  depends on which panel made the image.
* **Practice has its own pool**: images marked as practice are shown only in practice trials and never scored;
  the gate refuses practice trials without such images.

The plan
--------
For each diameter asked for, :func:`scorer.study.trials_for_precision` simulates readers (between-reader CV
:data:`CV_BETWEEN`) placed by the study's own rule on the plate's contrast levels, each level offering as many
regions as the images of the detector that has fewest, and gives the trials per reader per cell at which the
pooled threshold of the enrolled readers reaches the wanted 95 % CI half-width (ln).  Burton et al. (2006),
Kontsevich & Tyler (1999), Watson & Pelli (1983): see :mod:`scorer.study.precision`.  A cell also gets at least
the trials the analysis asks of an estimable threshold (:class:`scorer.study.estimability.EstimabilityRule`,
10 per reader): the planner's posterior carries a prior, which a broad enough interval could let stand in for
data, while the analysis fits the answers alone.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from scorer.study.estimability import EstimabilityRule

PLACEMENTS = ("psi", "quest", "constant")
PLACEMENT_LABELS = {
    "psi": "Psi (adaptive, least expected entropy)",
    "quest": "QUEST (adaptive, posterior mode)",
    "constant": "constant stimuli (every level equally often)",
}
DEFAULT_HALF_WIDTH_LN = 0.5  # wanted 95 % CI half-width of a pooled threshold when none is given (×/÷ 1.65)
MIN_READERS = 3  # the pooled curve needs at least 3 readers (scorer.study.pooled_gee)
CV_BETWEEN = 0.15  # between-reader CV of thresholds assumed by the plan (common practice for a first study)
PLAN_SIMULATED_READERS = 200
MAX_TRIALS_PER_CELL = 400
MARGIN_PX = 2.0  # blur margin around a disc's edge when keeping neighbours out of a tile (common practice)
WINDOW_SPAN = 1.6  # default window = 1.6 × the 2nd–98th percentile span of a tile (as the viewer's old auto W/L)
#: expected human/model threshold factor and the SD of its ln, for the model-observer check of the gate: human
#: thresholds lie about 1.2–2.2 × a model observer's (95 % range; from memory: human efficiencies of 25–70 % of a
#: matched observer, Burgess et al. 1981, give 1/√efficiency; the demo's simulated readers use 1.6)
HUMAN_MODEL_FACTOR = 1.6
HUMAN_MODEL_FACTOR_SD_LN = 0.16


# =========================================================================== diameters
def study_diameters(study, layout) -> list[float]:
    """The diameters the study asks for (all of the layout's when none were chosen), checked against it."""
    have = [float(d) for d in layout.diameters_mm]
    if not study.diameters_json:
        return have
    out = []
    for d in json.loads(study.diameters_json):
        hit = [h for h in have if math.isclose(h, float(d), rel_tol=1e-6)]
        if not hit:
            raise LimenError(
                f"diameter {float(d):g} mm is not on the layout (it has {', '.join(f'{h:g}' for h in have)})"
            )
        out.append(hit[0])
    return sorted(set(out))


def parse_diameters(raw: str, layout) -> list[float] | None:
    """The diameters a coordinator typed ("0.1, 0.25, 1"), each on the layout; None for an empty field (all)."""
    raw = (raw or "").replace(";", ",").strip()
    if not raw:
        return None
    have = [float(d) for d in layout.diameters_mm]
    out = []
    for part in raw.split(","):
        part = part.strip().removesuffix("mm").strip()
        if not part:
            continue
        try:
            d = float(part)
        except ValueError:
            raise LimenError(f"diameters: {part!r} is not a number (give mm, separated by commas)") from None
        hit = [h for h in have if math.isclose(h, d, rel_tol=1e-6)]
        if not hit:
            raise LimenError(f"diameters: {d:g} mm is not on the layout (it has {', '.join(f'{h:g}' for h in have)})")
        out.append(hit[0])
    return sorted(set(out)) or None


# =========================================================================== tiles
def _discs_px(layout, transform) -> tuple[np.ndarray, np.ndarray, list]:
    """Every place a disc may sit, in image pixels: each candidate site of each target (radius of its target's
    disc) and each marker; with the (target id, site) of each site (None for markers)."""
    scale = float(transform.scale_px_per_mm())
    pts: list[np.ndarray] = []
    radii: list[float] = []
    owner: list[tuple[Any, int] | None] = []
    for t in layout.targets:
        rc = transform.to_pixel(t.sites)
        for j in range(t.m_alternatives):
            pts.append(rc[j])
            radii.append(0.5 * t.diameter_mm * scale)
            owner.append((t.id, j))
    for mk in layout.markers:
        pts.append(transform.to_pixel(np.asarray([mk.xy_mm]))[0])
        radii.append(0.5 * mk.diameter_mm * scale)
        owner.append(None)
    return np.asarray(pts, float), np.asarray(radii, float), owner


def _largest_half(centre: np.ndarray, others: np.ndarray, reach: np.ndarray, h_cap: int) -> int:
    """The largest h ≤ h_cap for which the square of pixels centre ± h keeps every other disc (centre, reach =
    radius + margin) out: the distance from each disc's centre to the square's outer edge is at least its
    reach.  Found by bisection (the distance falls as h grows)."""

    def clear(h: int) -> bool:
        edge = h + 0.5
        dr = np.maximum(np.abs(others[:, 0] - centre[0]) - edge, 0.0)
        dc = np.maximum(np.abs(others[:, 1] - centre[1]) - edge, 0.0)
        return bool(np.all(np.hypot(dr, dc) >= reach))

    if h_cap < 0 or not clear(0):
        return -1
    lo, hi = 0, h_cap
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if clear(mid):
            lo = mid
        else:
            hi = mid - 1
    return lo


def tile_half_px(layout, transforms, diameters) -> dict[float, int]:
    """Half-side h (pixels) of the square tile shown for each site of the given diameters: the largest h for which,
    on every image (``transforms``: one PhantomTransform per image), no other site's or marker's disc reaches into
    a tile and the tiles of one target share no pixel.  A tile is 2h + 1 pixels wide, its centre pixel the one
    holding the site.  Raises when a diameter's sites are too close to show the disc whole in its own tile."""
    out: dict[float, int] = {}
    wanted = {float(d) for d in diameters}
    for transform in transforms:
        pts, radii, owner = _discs_px(layout, transform)
        centres = np.round(pts)
        index = {o: i for i, o in enumerate(owner) if o is not None}
        for t in layout.targets:
            d = float(t.diameter_mm)
            if d not in wanted:
                continue
            own = [index[(t.id, j)] for j in range(t.m_alternatives)]
            for i in own:
                # tiles of one target never overlap: Chebyshev distance of their centre pixels ≥ 2h + 1
                cheb = [int(np.max(np.abs(centres[i] - centres[k]))) for k in own if k != i]
                h_cap = min((c - 1) // 2 for c in cheb) if cheb else 256
                mask = np.ones(len(pts), bool)
                mask[i] = False
                h = _largest_half(centres[i], pts[mask], radii[mask] + MARGIN_PX, h_cap)
                need = int(math.ceil(radii[i] + MARGIN_PX))
                if h < need:
                    raise LimenError(
                        f"the sites of the {d:g} mm targets lie too close to neighbouring discs to show each site "
                        f"alone: a tile of {max(2 * h + 1, 0)} px cannot hold a disc of {2 * radii[i]:.1f} px and its "
                        "margin; leave this diameter out"
                    )
                out[d] = min(out.get(d, h), h)
    return out


def tile_boxes(sites_px: np.ndarray, half: int, shape: tuple[int, int], label: str) -> list[list[int]]:
    """Top-left corners (row, col) in image pixels of the tile of each site (side 2·half + 1)."""
    rows, cols = shape
    out = []
    for r, c in np.round(np.asarray(sites_px, float)).astype(int):
        r0, c0 = int(r - half), int(c - half)
        if r0 < 0 or c0 < 0 or r0 + 2 * half + 1 > rows or c0 + 2 * half + 1 > cols:
            raise LimenError("a site's tile reaches beyond the image: the phantom is too close to its edge", label)
        out.append([r0, c0])
    return out


def default_window_level(tiles: list[np.ndarray]) -> tuple[float, float]:
    """One window/level (stored units) for every trial of a study: the level the median of the tiles' medians,
    the window :data:`WINDOW_SPAN` × the median of their 2nd–98th percentile spans.  Computed over the tiles of
    every scored image of every detector together, so it is the same for all."""
    if not tiles:
        return 1000.0, 500.0
    med = [float(np.median(t)) for t in tiles]
    span = [float(np.subtract(*np.percentile(t, [98, 2]))) for t in tiles]
    return max(2.0, round(WINDOW_SPAN * float(np.median(span)))), round(float(np.median(med)))


# =========================================================================== the plan (the gate)
def regions_per_level(layout, diameters, scored_images_by_detector: dict[str, int]) -> dict[float, int]:
    """Regions one reader can be shown at each contrast level of a diameter, in the detector with fewest: its
    images × the targets at the level (the smallest over the levels)."""
    fewest = min(scored_images_by_detector.values()) if scored_images_by_detector else 0
    out = {}
    for d in diameters:
        per_level: dict[float, int] = {}
        for t in layout.targets_with_diameter(d):
            per_level[float(t.contrast)] = per_level.get(float(t.contrast), 0) + 1
        out[float(d)] = fewest * min(per_level.values()) if per_level else 0
    return out


def plan_design(
    study, layout, n_readers: int, scored_images_by_detector: dict[str, int], n_practice_images: int, progress=None
) -> dict:
    """The plan of a study's design, or a one-line LimenError saying what to change.

    Checks, in order: the placement rule; at least :data:`MIN_READERS` readers; images to score; a practice pool
    when practice trials are asked for; then per diameter the trials per reader per cell for the wanted pooled
    CI (simulated readers with the study's rule, :func:`scorer.study.trials_for_precision`); then the total
    against the study's most trials per reader.
    """
    from scorer.study.adaptive import plate_levels
    from scorer.study.precision import trials_for_precision

    method = study.placement or "psi"
    if method not in PLACEMENTS:
        raise LimenError(f"placement rule must be one of {', '.join(PLACEMENTS)}, got {method!r}")
    hw = float(study.half_width_ln or 0.0)
    if not (hw > 0 and math.isfinite(hw)):
        raise LimenError("the study has no wanted CI half-width: set one")
    if n_readers < MIN_READERS:
        raise LimenError(
            f"a pooled threshold needs at least {MIN_READERS} readers and {n_readers} are enrolled: enrol more readers"
        )
    if not scored_images_by_detector:
        raise LimenError("every image is marked as practice: add images to be scored")
    if int(study.n_practice or 0) > 0 and n_practice_images < 1:
        raise LimenError(
            f"{study.n_practice} practice trials need a practice pool that is never scored: add image(s) marked "
            "'practice', or set practice trials to 0"
        )
    diameters = study_diameters(study, layout)
    levels = plate_levels(layout)
    caps = regions_per_level(layout, diameters, scored_images_by_detector)
    budget = int(study.trials_per_reader)
    floor = EstimabilityRule().min_trials  # fewer trials per reader and the analysis calls the cell not estimable
    target = f"a 95 % CI of ±{hw:g} (ln, ×/÷ {math.exp(hw):.2f}) on each pooled threshold with {n_readers} readers"
    rows, short, advice = [], [], []
    for k, d in enumerate(diameters):
        lv, m = levels[d]
        capacity = max(caps[d], 1) * len(lv)
        plan = trials_for_precision(
            lv,
            m,
            hw,
            method=method,
            cv_between=CV_BETWEEN,
            n_readers=n_readers,
            n_max=min(MAX_TRIALS_PER_CELL, budget),
            n_sim=PLAN_SIMULATED_READERS,
            seed=int(study.seed),
            max_per_level=max(caps[d], 1),
        )
        if progress is not None:
            progress(f"planning {d:g} mm ({k + 1} of {len(diameters)})", (k + 1) / len(diameters))
        n = None if plan.n_trials is None else max(int(plan.n_trials), floor)
        rows.append(
            {
                "diameter_mm": d,
                "m_alternatives": int(m),
                "levels": list(lv),
                "regions_per_level": int(caps[d]),
                "n_trials": n,
                "n_for_interval": plan.n_trials,
                "notes": plan.notes,
            }
        )
        if n is None or n > capacity:
            short.append(f"{d:g} mm (at most {capacity} trials per reader: {caps[d]} region(s) per contrast level)")
            advice += [a for a in plan.notes[1:] if a not in advice]
    if short:
        why = "; ".join(advice) if advice else "add images (each reader sees each region once)"
        raise LimenError(
            f"this design cannot give {target} and at least {floor} trials per reader in each cell at "
            f"{', '.join(short)}: {why}. Change: add readers or images, widen the interval, leave out the "
            "diameters named, or allow more trials per reader"
        )
    detectors = sorted(scored_images_by_detector)
    cells: list[dict[str, Any]] = [
        {"detector": det, "diameter_mm": r["diameter_mm"], "n_trials": int(cast(int, r["n_trials"]))}
        for det in detectors
        for r in rows
    ]
    n_scored = sum(c["n_trials"] for c in cells)
    n_repeats = int(round(float(study.repeat_fraction or 0.0) * n_scored))
    if n_scored > budget:
        per = ", ".join(f"{r['n_trials']} at {r['diameter_mm']:g} mm" for r in rows)
        raise LimenError(
            f"{target} needs {n_scored} scored trials per reader ({per}, for each of {len(detectors)} detector(s)), "
            f"more than the {budget} allowed. Change: allow more trials per reader, ask for fewer diameters or "
            "detectors, widen the interval, or add readers"
        )
    return {
        "method": method,
        "half_width_ln": hw,
        "ci": 0.95,
        "n_readers": int(n_readers),
        "cv_between": CV_BETWEEN,
        "n_simulated_readers": PLAN_SIMULATED_READERS,
        "seed": int(study.seed),
        "diameters": rows,
        "detectors": detectors,
        "cells": cells,
        "n_scored": n_scored,
        "n_repeats": n_repeats,
        "n_practice": int(study.n_practice or 0),
        "total": n_scored + n_repeats,
        "generator": "simulated linear-observer readers (scorer/study/precision.py), the study's own rule",
    }


def check_design(study: Any, layout: Any, store_dir: Path | None = None) -> dict:
    """:func:`plan_design` for a draft study as it stands (its images and enrolled readers), then the model
    observer's check (:func:`model_gate`) on the study's own scored images: refused, in one line, when a panel's
    expected human threshold lies above the plate's highest contrast at a diameter; the diameters whose interval
    reaches above it are named in the plan's ``warnings``.  ``store_dir`` defaults to the running app's store
    (``STORE_DIR``); without one (no app) the model check is skipped."""
    scored: dict[str, int] = {}
    practice = 0
    for im in study.images:
        if im.practice:
            practice += 1
        else:
            scored[im.detector] = scored.get(im.detector, 0) + 1
    plan = plan_design(study, layout, len(study.enrolments), scored, practice)
    if store_dir is None:
        try:
            from flask import current_app

            store_dir = Path(current_app.config["STORE_DIR"])
        except (RuntimeError, KeyError):  # outside an app: no images to score
            return plan
    try:
        thresholds = study_model_thresholds(study, layout, Path(store_dir))
    except LimenError:  # an image that cannot be scored: the opening's own scoring names it, in its job
        plan["warnings"], plan["model_check"] = [], None
        return plan
    top = {float(d): float(max(lv)) for d, (lv, _) in _levels(layout).items()}
    refusals, warnings = model_gate(thresholds, top)
    if refusals:
        raise LimenError(
            "; ".join(refusals) + ". Change: leave out the diameters named, or use a plate with higher contrasts "
            "there (or a higher dose)"
        )
    plan["warnings"] = warnings
    plan["model_check"] = {
        "human_model_factor": HUMAN_MODEL_FACTOR,
        "factor_sd_ln": HUMAN_MODEL_FACTOR_SD_LN,
        "cells": [
            {"detector": det, "diameter_mm": d, "model_threshold": t, "se_ln": se, "highest_contrast": top[d]}
            for (det, d), (t, se) in sorted(thresholds.items())
        ],
    }
    return plan


def _levels(layout: Any) -> dict[float, tuple[tuple[float, ...], int]]:
    from scorer.study.adaptive import plate_levels

    return plate_levels(layout)


# =========================================================================== the model observer's check
def model_thresholds_from_responses(responses: pd.DataFrame) -> dict[tuple[str, float], tuple[float, float]]:
    """{(detector, diameter): (threshold contrast, SE of its ln)} of the model observer from its per-site
    responses (columns detector, image, target, diameter_mm, contrast, m_alternatives, site, is_signal,
    response).

    d′ per unit contrast of a linear observer in M-AFC is the mean signal-site minus non-signal response per unit
    contrast, g (least squares through the origin over the targets), over the SD σ of the non-signal sites about
    their target's mean (Green & Swets 1966); the threshold is d′_T/(g/σ) at the study's d′_T for that M.  SE of
    ln: var(ĝ) = σ²·M/(M − 1)/ΣC² and SE(ln σ̂) = 1/√(2·df), added in quadrature (delta method; Taylor 1997).
    """
    from scorer.observer.mafc import criterion_for, dprime_for_pc

    out: dict[tuple[str, float], tuple[float, float]] = {}
    for key, g in responses.groupby(["detector", "diameter_mm"]):
        det, d = cast(tuple[str, float], key)
        m = int(g["m_alternatives"].iloc[0])
        g = g.sort_values(["image", "target", "site"])
        r = g["response"].to_numpy(float).reshape(-1, m)
        sig = g["is_signal"].to_numpy(bool).reshape(-1, m)
        c = g["contrast"].to_numpy(float)[::m]
        ok = np.isfinite(r).all(axis=1) & (sig.sum(axis=1) == 1)
        r, sig, c = r[ok], sig[ok], c[ok]
        df = r.shape[0] * (m - 2) if m > 2 else 0
        if df < 2 or float(c @ c) <= 0:
            out[(str(det), float(d))] = (float("nan"), float("nan"))
            continue
        noise = r[~sig].reshape(-1, m - 1)
        diff = r[sig] - noise.mean(axis=1)
        sigma = float(np.sqrt(((noise - noise.mean(axis=1, keepdims=True)) ** 2).sum() / df))
        gain = float(diff @ c / (c @ c))
        if not gain > 0:
            out[(str(det), float(d))] = (float("inf"), float("nan"))
            continue
        se_gain = sigma * math.sqrt(m / (m - 1)) / math.sqrt(float(c @ c))
        se_ln = math.hypot(se_gain / gain, 1.0 / math.sqrt(2.0 * df))
        out[(str(det), float(d))] = (dprime_for_pc(criterion_for(m), m) * sigma / gain, se_ln)
    return out


def model_gate(
    thresholds: Mapping[tuple[str, float], tuple[float, float]],
    highest_contrast: Mapping[float, float],
    factor: float = HUMAN_MODEL_FACTOR,
    factor_sd_ln: float = HUMAN_MODEL_FACTOR_SD_LN,
    z: float = 1.959964,
) -> tuple[list[str], list[str]]:
    """(refusals, warnings) of the model observer's check.

    Each panel × diameter's expected human threshold is ``factor`` × the model observer's threshold on the study's
    own images, with a 95 % interval exp(ln H ± z·√(se_model² + factor_sd_ln²)) (independent errors of a product
    add in quadrature on the log scale; Taylor 1997).  The whole interval above the plate's highest contrast at
    that diameter: the readers cannot reach threshold on any region and the cell cannot give an estimable
    threshold, refused.  The estimate, or only the interval's upper end, above it: a warning (the cell may not be
    estimable); a refusal on the estimate alone would turn on the noise of a few images (two mini-plate images
    per panel put the NPWE model's 0.1 mm threshold anywhere from 19 % to 200 %)."""
    refusals: list[str] = []
    warnings: list[str] = []
    for (det, d), (t, se) in sorted(thresholds.items(), key=lambda kv: (kv[0][1], kv[0][0])):
        top = highest_contrast.get(float(d))
        if top is None:
            continue
        if not (np.isfinite(t) and t > 0):
            warnings.append(  # a few images' noise can hide a threshold the plate holds: not a refusal
                f"{d:g} mm, {det}: the model observer finds no threshold on the study's images (no signal above "
                "their noise): the cell may not be estimable; leave it out or add images"
            )
            continue
        h = factor * t
        half = z * math.hypot(se if np.isfinite(se) else 0.0, factor_sd_ln)
        lo, hi = h * math.exp(-half), h * math.exp(half)
        text = (
            f"{d:g} mm, {det}: expected human threshold {100 * h:.3g} % ({100 * lo:.3g}–{100 * hi:.3g} %: "
            f"{factor:g} × the model observer's {100 * t:.3g} %)"
        )
        if lo > top:
            refusals.append(f"{text} lies above the plate's highest contrast there, {100 * top:.3g} %")
        elif h > top:
            warnings.append(
                f"{text} is above the plate's highest contrast there, {100 * top:.3g} % (not certainly: the "
                "interval reaches below it): the cell may not be estimable; leave it out or add images"
            )
        elif hi > top:
            warnings.append(
                f"{text} may lie above the plate's highest contrast there, {100 * top:.3g} %: the cell may not be "
                "estimable"
            )
    return refusals, warnings


_MODEL_CACHE: dict[tuple, dict] = {}


def study_model_thresholds(study: Any, layout: Any, store_dir: Path) -> dict[tuple[str, float], tuple[float, float]]:
    """The model observer's thresholds (:func:`model_thresholds_from_responses`) of each panel × diameter the
    study asks for, from scoring its scored (non-practice) images as the study will (its observer and viewing
    distance).  Remembered per set of images and settings in this process, so the open button's check and the
    opening job's score them once."""
    from webapp.content_store import stored_file

    diameters = set(study_diameters(study, layout))
    images = [im for im in study.images if not im.practice]
    key = (
        str(study.layout_file),
        str(study.observer or "npwe"),
        float(study.viewing_distance_mm or 500.0),
        tuple(sorted((im.sha256, im.detector, im.conversion_file or "", im.pixel_spacing_mm or 0.0) for im in images)),
    )
    if key in _MODEL_CACHE:
        return {k: v for k, v in _MODEL_CACHE[key].items() if k[1] in diameters}
    from scorer.workflow import load_conversion, score_files

    groups: dict[tuple, list] = {}
    for im in images:
        groups.setdefault((im.conversion_file, im.pixel_spacing_mm), []).append(im)
    frames = []
    for (conv_file, spacing), ims in groups.items():
        conversion = load_conversion(stored_file(conv_file, store_dir)) if conv_file else None
        paths = [str(store_dir / im.stored_name) for im in ims]
        res = score_files(
            paths,
            layout,
            observer=study.observer or "npwe",
            methods=["dprime"],
            conversion=conversion,
            pixel_spacing_mm=spacing,
            viewing_distance_mm=study.viewing_distance_mm,
            n_boot=0,
            check_defects=False,
        )
        by_name = {Path(p).name: im.detector for p, im in zip(paths, ims)}
        fr = res.responses
        frames.append(fr.assign(detector=[by_name[n] for n in fr["image"]]))
    found = model_thresholds_from_responses(pd.concat(frames, ignore_index=True)) if frames else {}
    if len(_MODEL_CACHE) > 16:
        _MODEL_CACHE.clear()
    _MODEL_CACHE[key] = found
    return {k: v for k, v in found.items() if k[1] in diameters}


def plan_of(study) -> dict | None:
    return json.loads(study.plan_json) if study.plan_json else None
