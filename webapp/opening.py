"""Opening a study: the design gate, model-observer scoring, reading regions and tiles, display pixels and the
study's window/level (nothing computed here: :func:`scorer.workflow.score_files` scores, :mod:`webapp.design`
sizes and plans)."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from scorer.phantom.registration import Placement

import io
import json
import warnings
from pathlib import Path
from typing import cast

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from webapp.content_store import stored_file
from webapp.pixels import U16_MAX, display_path


def _region_boxes(sites_by_key: dict, shape_by_image: dict) -> tuple[int, dict]:
    """One square region size for the whole study (so its size tells nothing about the target) and each
    region's top-left corner and site positions (row, col) inside it."""
    half = 0.0
    for rc in sites_by_key.values():
        c = rc.mean(axis=0)
        d = np.sqrt(((rc[:, None, :] - rc[None, :, :]) ** 2).sum(-1))
        pad = 0.5 * d[d > 0].min() if np.any(d > 0) else 16.0
        half = max(half, float(np.abs(rc - c).max() + pad))
    size = 2 * int(np.ceil(half)) + 1
    out = {}
    for (img, t), rc in sites_by_key.items():
        rows, cols = shape_by_image[img]
        if size > rows or size > cols:
            raise LimenError(f"image is smaller ({rows} × {cols} px) than one reading region ({size} px)", img)
        c = rc.mean(axis=0)
        r0 = int(np.clip(round(c[0]) - size // 2, 0, rows - size))
        c0 = int(np.clip(round(c[1]) - size // 2, 0, cols - size))
        out[(img, t)] = (r0, c0, (rc - [r0, c0]).round(2).tolist())
    return size, out


def open_study(session, study, store_dir: Path, progress=None) -> list[str]:
    """Check the design (:func:`webapp.design.check_design`: refuses, saying what to change), score the study's
    images with the model observer, cut the reading regions and their tiles, write the display pixels and the
    study's window/level.  Returns notes for the coordinator.  No schedule is built: each reader's trials are
    placed as they read (:mod:`webapp.placement`).

    ``progress``, if given, is called as ``progress(text, fraction)`` (fraction of the work done, 0–1) before each
    step; the last call comes before the first database write, so a progress writer never waits for this
    session's write lock."""
    from scorer.files import atomic_write_bytes
    from scorer.workflow import LimenWarning, load_conversion, load_image, load_layout, score_files
    from webapp import design
    from webapp.models import Region

    say = progress or (lambda text, fraction=None: None)
    if not study.images:
        raise LimenError("the study has no images yet; add images before opening it")
    if not study.enrolments:
        raise LimenError("no readers are enrolled; choose at least one reader")
    store_dir = Path(store_dir)
    layout = load_layout(stored_file(study.layout_file, store_dir))
    study.placement = study.placement or "psi"
    study.half_width_ln = study.half_width_ln or design.DEFAULT_HALF_WIDTH_LN
    say("planning the trials per reader", 0.01)
    plan = design.check_design(study, layout)
    diameters = design.study_diameters(study, layout)
    groups: dict[tuple, list] = {}
    for im in study.images:
        groups.setdefault((im.conversion_file, im.pixel_spacing_mm), []).append(im)
    notes: list[str] = []
    model_frames: list[pd.DataFrame] = []
    response_frames: list[pd.DataFrame] = []
    sites_by_key: dict[tuple[str, str], np.ndarray] = {}
    shape_by_image: dict[str, tuple[int, int]] = {}
    by_code: dict[str, tuple] = {}
    placements: dict[str, Placement] = {}
    n_images, n_scored = len(study.images), 0
    targets = [t for t in layout.targets if float(t.diameter_mm) in diameters]
    for (conv_file, spacing), images in groups.items():
        conversion = load_conversion(stored_file(conv_file, store_dir)) if conv_file else None
        paths = [str(store_dir / im.stored_name) for im in images]
        say(
            f"scoring {len(paths)} image(s) with the {study.observer.upper()} model observer "
            f"({n_scored} of {n_images} done)",
            0.05 + 0.75 * n_scored / n_images,
        )
        n_scored += len(paths)
        res = score_files(
            paths,
            layout,
            observer=study.observer,
            methods=["count"],
            conversion=conversion,
            pixel_spacing_mm=spacing,
            viewing_distance_mm=study.viewing_distance_mm,
            n_boot=0,
            seed=study.seed,
        )
        notes += [n for n in res.warnings if n not in notes]
        name_to_image = {Path(p).name: im for p, im in zip(paths, images)}
        for frame, out in ((res.trials, model_frames), (res.responses, response_frames)):
            fr = frame[frame["diameter_mm"].isin(diameters)].copy()
            ims = [name_to_image[n] for n in fr["image"]]
            fr["image"] = [im.code for im in ims]
            fr["detector"] = [im.detector for im in ims]
            if out is model_frames:  # the model's trials are scored like the readers': practice images left out
                fr = fr[[not im.practice for im in ims]]
                fr = fr.rename(columns={"m_alternatives": "n_alternatives"})
            out.append(fr)
        for score in res.images:
            im = name_to_image[Path(score.path).name]
            # ImageScore.placement is typed `object` in scorer (to keep observer below phantom's types); it is the
            # Placement that score_files registered
            pl = cast("Placement", score.placement)
            placements[im.code] = pl
            im.registration_json = json.dumps(pl.to_dict())
            for t in targets:
                sites_by_key[(im.code, t.id)] = pl.transform.to_pixel(t.sites)
            by_code[im.code] = (im, conversion, spacing)
    half = design.tile_half_px(layout, [pl.transform for pl in placements.values()], diameters)
    # the display pixels: linear in air kerma (µGy with a conversion function), one 16-bit scale for the study
    say("writing display pixels", 0.8)
    arrays = {}
    top = 0.0
    for code, (im, conversion, spacing) in by_code.items():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LimenWarning)
            img = load_image(store_dir / im.stored_name, conversion=conversion, pixel_spacing_mm=spacing)
        px = np.asarray(img.pixels, dtype=np.float64)
        arrays[code] = px
        im.rows, im.cols = px.shape
        shape_by_image[code] = (im.rows, im.cols)
        top = max(top, float(np.percentile(px, 99.99)))
    scale = 1.25 * top / U16_MAX if top > 0 else 1.0
    study.ugy_per_unit = scale
    for code, px in arrays.items():
        im = by_code[code][0]
        u16 = np.clip(np.round(np.maximum(px, 0.0) / scale), 0, U16_MAX).astype("<u2")
        arrays[code] = u16
        path = display_path(store_dir, im.sha256, study.id)
        path.parent.mkdir(parents=True, exist_ok=True)
        buf = io.BytesIO()
        np.save(buf, u16)
        atomic_write_bytes(path, buf.getvalue())
    size, boxes = _region_boxes(sites_by_key, shape_by_image)
    study.region_rows = study.region_cols = size
    study.m_alternatives = int(max(t.m_alternatives for t in targets))
    by_id = {t.id: t for t in targets}
    say("cutting the tiles", 0.9)
    regions, scored_tiles = [], []
    for (code, tid), (r0, c0, sites) in boxes.items():
        t = by_id[tid]
        h = half[float(t.diameter_mm)]
        tiles = design.tile_boxes(sites_by_key[(code, tid)], h, shape_by_image[code], by_code[code][0].label)
        if not by_code[code][0].practice:
            scored_tiles += [arrays[code][a : a + 2 * h + 1, b : b + 2 * h + 1] for a, b in tiles]
        regions.append(
            Region(
                study_id=study.id,
                image_id=by_code[code][0].id,
                target=tid,
                diameter_mm=float(t.diameter_mm),
                contrast=float(t.contrast),
                true_site=int(t.signal_site),
                row0=r0,
                col0=c0,
                sites_json=json.dumps(sites),
                tile_px=2 * h + 1,
                tiles_json=json.dumps(tiles),
            )
        )
    study.default_window, study.default_level = design.default_window_level(scored_tiles)
    del arrays, scored_tiles
    session.add_all(regions)
    session.flush()
    study.model_trials_csv = pd.concat(model_frames, ignore_index=True).to_csv(index=False)
    keep = ["image", "detector", "target", "diameter_mm", "contrast", "m_alternatives", "site", "is_signal", "response"]
    study.model_responses_csv = pd.concat(response_frames, ignore_index=True)[keep].to_csv(index=False)
    study.plan_json = json.dumps(plan)
    notes.append(
        f"plan: {plan['n_scored']} scored trials per reader ({', '.join(_cell_text(r) for r in plan['diameters'])} "
        f"per detector), {plan['n_repeats']} repeats, {plan['n_practice']} practice, placed by "
        f"{design.PLACEMENT_LABELS[plan['method']]}"
    )
    return notes


def _cell_text(row: dict) -> str:
    return f"{row['n_trials']} at {row['diameter_mm']:g} mm"
