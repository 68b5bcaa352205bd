"""Study logistics between the views and :mod:`scorer`: content store, study opening, schedules, regions,
export and analysis.

Nothing here computes physics or statistics: images are read by :func:`scorer.workflow.load_image`,
placed by :func:`scorer.phantom.register` (through :func:`scorer.workflow.score_files`, which also
gives the model observer's trials), and analysed by :func:`scorer.study.analyse_study`. What is
here is bookkeeping: which reader sees which region in which order, the pixel crops they see, and the
tidy table the statistics read.
"""

from __future__ import annotations

import hashlib
import io
import json
import re
import threading
import warnings
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from scorer.errors import LimenError

IMAGE_SUFFIXES = {".dcm", ".dicom", ".tif", ".tiff", ".png", ".npy"}
LAYOUT_SUFFIXES = {".toml"}
U16_MAX = 65535
EXTRA_EXPORT_COLUMNS = ["window", "level", "timestamp", "seq", "tile_order", "chosen_position", "true_position"]


def export_columns() -> list[str]:
    """The responses CSV: every column ``limen analyse`` reads, then window, level, timestamp and what the reader
    was shown: the trial's place in the reader's sequence, the tile order (the sites in screen order, separated
    by spaces), and the screen positions chosen and holding the disc (empty for trials of studies opened by an
    earlier release, which showed one region with every site)."""
    from scorer.study.trials import OPTIONAL_COLUMNS, TRIAL_COLUMNS

    return list(TRIAL_COLUMNS) + [c for c in OPTIONAL_COLUMNS if c not in TRIAL_COLUMNS] + EXTRA_EXPORT_COLUMNS


# =========================================================================== content store
def safe_label(name: str | None) -> str:
    """A display label for an uploaded file (coordinator pages only): base name, printable, ≤ 120 chars."""
    base = re.split(r"[\\/]", name or "")[-1]
    base = re.sub(r"[^\w.\- ]+", "_", base).strip(" .")
    return base[:120] or "upload"


STORE_CHUNK_BYTES = 1 << 20


@dataclass(frozen=True)
class Stored:
    """A file in the content store: its hash, path, whether this call put it there, and the check's result."""

    sha256: str
    path: Path
    new: bool
    checked: object = None


def store_bytes(stream, suffix: str, store_dir: Path, max_bytes: int, label: str) -> tuple[str, Path]:
    """:func:`store_file` without a check; return (sha256, path)."""
    out = store_file(stream, suffix, store_dir, max_bytes, label)
    return out.sha256, out.path


def store_file(stream, suffix: str, store_dir: Path, max_bytes: int, label: str, check=None) -> Stored:
    """Copy an upload into the content store as ``<sha256><suffix>``, placed only if ``check`` accepts it.

    The client's file name is never used for the stored path, only its (checked) extension.  The stream is
    read once to hash and size it, then (from the start again) written under a temporary name
    (:func:`scorer.files.write_staged`); ``check(temporary path)`` — reading it as an image, a layout… — runs
    on those bytes, and only then is the file renamed to its hash.  So a refused file (too large, empty, not
    an image) leaves nothing in the store, and a server killed mid-copy leaves no file under a hash it does not
    match.  A stream whose content changes between the two readings (a file being rewritten during a folder
    import) is refused.  A stream that cannot seek is held in memory (at most ``max_bytes``).  When the store
    already holds the hash, ``check`` runs on the stored file and nothing is written.

    Inside a request, files this call placed are listed in ``flask.g.limen_new_files``: the request's end
    removes them again if the request failed and no committed row refers to them (:func:`discard_unreferenced`).
    """
    import os

    from scorer.files import discard, write_staged

    store_dir.mkdir(parents=True, exist_ok=True)
    try:
        start = stream.tell() if stream.seekable() else None
    except (AttributeError, OSError):
        start = None
    h = hashlib.sha256()
    size = 0
    held = []  # only for a stream that cannot be read twice
    while chunk := stream.read(STORE_CHUNK_BYTES):
        size += len(chunk)
        if size > max_bytes:
            raise LimenError(f"file is larger than the limit of {max_bytes // (1024 * 1024)} MB", label)
        h.update(chunk)
        if start is None:
            held.append(chunk)
    if size == 0:
        raise LimenError("file is empty", label)
    digest = h.hexdigest()
    final = store_dir / f"{digest}{suffix}"
    if final.exists():
        return Stored(digest, final, False, check(final) if check else None)
    if start is not None:
        stream.seek(start)
        held = _reread(stream, size, digest, label)
    tmp = write_staged(store_dir, held, prefix=".upload.", suffix=suffix, mode=0o600, target=final)
    try:
        checked = check(tmp) if check else None
        os.replace(tmp, final)
    except BaseException:
        discard(tmp)
        raise
    _note_new_file(final)
    return Stored(digest, final, True, checked)


def _note_new_file(path: Path) -> None:
    from flask import g, has_request_context

    if has_request_context():
        g.setdefault("limen_new_files", []).append(path)


def discard_unreferenced(session, paths) -> list[Path]:
    """Remove store files that no study refers to (as image, layout or conversion function); return them.

    Called at the end of a failed request on the files it placed, after its transaction is rolled back, so an
    upload refused after some of its files were stored (a later file of the batch was bad) leaves nothing."""
    from sqlalchemy import or_, select

    from scorer.files import discard
    from webapp.models import Study, StudyImage

    gone = []
    for p in paths:
        used = (
            session.execute(
                select(StudyImage.id).where(or_(StudyImage.stored_name == p.name, StudyImage.conversion_file == str(p)))
            ).first()
            or session.execute(select(Study.id).where(Study.layout_file == str(p))).first()
        )
        if not used:
            discard(p)
            gone.append(p)
    return gone


def _reread(stream, size: int, digest: str, label: str):
    """The stream's bytes again, checked against the first reading's size and hash before the last piece is
    handed on (so a changed stream raises before the stored file is renamed into place)."""
    h = hashlib.sha256()
    n = 0
    while chunk := stream.read(STORE_CHUNK_BYTES):
        n += len(chunk)
        h.update(chunk)
        if n > size:
            break
        if n < size:
            yield chunk
        else:
            pending = chunk
    if n != size or h.hexdigest() != digest:
        raise LimenError("file changed while it was being stored; upload or import it again", label)
    yield pending


def check_suffix(name: str, allowed: set[str], what: str) -> str:
    suffix = Path(safe_label(name)).suffix.lower()
    if suffix not in allowed:
        raise LimenError(
            f"{what} must be one of {', '.join(sorted(allowed))} (got '{suffix or 'no extension'}')", safe_label(name)
        )
    return ".dcm" if suffix == ".dicom" else suffix


def _named(label: str, path: Path, read):
    """Run ``read()`` on a stored file; a LimenError names the uploaded file (label), not the store path."""
    try:
        return read()
    except LimenError as exc:
        msg = str(exc).replace(str(path), "").lstrip(": ").strip()
        raise LimenError(msg, label) from None


def validate_image_file(path: Path, label: str, pixel_spacing_mm=None, conversion=None):
    """Read the stored file as an image (the real type check); errors name the uploaded file."""
    from scorer.workflow import LimenWarning, load_image

    def read():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LimenWarning)
            return load_image(path, pixel_spacing_mm=pixel_spacing_mm, conversion=conversion)

    return _named(label, path, read)


def validate_layout_file(path: Path, label: str):
    from scorer.workflow import load_layout

    return _named(label, path, lambda: load_layout(path))


def validate_conversion_file(path: Path, label: str):
    from scorer.workflow import load_conversion

    return _named(label, path, lambda: load_conversion(path))


def stored_file(path_text: str, store_dir: Path) -> Path:
    """A layout or conversion file the database names by the absolute path it had when it was added.

    The file of that name in the same folder of *this* instance's store comes first (an instance restored from a
    backup, or moved: the old path may be gone or belong to another instance; stored files are named by their
    hash, so a same-named file is the same file), then the path itself, then a bundled layout of that name
    (Limen installed elsewhere).  A file found nowhere is returned as named, for the reader to report."""
    p = Path(path_text)
    here = Path(store_dir) / p.parent.name / p.name
    if here.is_file():
        return here
    if p.is_file():
        return p
    bundled = bundled_layouts().get(p.name)
    return Path(bundled) if bundled else p


def bundled_layouts() -> dict[str, str]:
    """Layouts shipped with Limen: {file name: path}."""
    from scorer.phantom.layout import PHANTOM_DIR

    return {p.name: str(p) for p in sorted(PHANTOM_DIR.glob("*.toml"))}


# =========================================================================== pixels for the viewer
class PixelCache:
    """Stored uint16 images, memory-mapped and kept open (LRU) so a region is a slice, not a file read."""

    def __init__(self, size: int = 64):
        self._size = size
        self._lock = threading.Lock()
        self._maps: OrderedDict[str, np.ndarray] = OrderedDict()

    def get(self, path: Path) -> np.ndarray:
        key = str(path)
        with self._lock:
            arr = self._maps.get(key)
            if arr is not None:
                self._maps.move_to_end(key)
                return arr
        arr = np.load(path, mmap_mode="r")
        with self._lock:
            self._maps[key] = arr
            while len(self._maps) > self._size:
                self._maps.popitem(last=False)
        return arr


PIXELS = PixelCache()


def display_path(store_dir: Path, sha256: str, study_id: int | None = None) -> Path:
    """The 16-bit display pixels of one image in one study.

    Per study, because the 16-bit scale (``Study.ugy_per_unit``) and the conversion function are the
    study's: the same image in two studies can have two different files.  ``study_id=None`` is the
    shared name earlier releases used (kept for studies they opened).
    """
    if study_id is None:
        return Path(store_dir) / "display" / f"{sha256}.u16.npy"
    return Path(store_dir) / "display" / f"study-{int(study_id)}" / f"{sha256}.u16.npy"


def region_bytes(store_dir: Path, sha256: str, study_id: int, row0: int, col0: int, rows: int, cols: int) -> bytes:
    """The region's linear 16-bit pixels, little-endian, row-major."""
    path = display_path(store_dir, sha256, study_id)
    if not path.exists():  # a study opened by an earlier release
        path = display_path(store_dir, sha256)
    arr = PIXELS.get(path)
    return np.ascontiguousarray(arr[row0 : row0 + rows, col0 : col0 + cols], dtype="<u2").tobytes()


# =========================================================================== opening a study
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
    model_frames, response_frames, sites_by_key, shape_by_image, by_code, placements = [], [], {}, {}, {}, {}
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
            placements[im.code] = score.placement
            im.registration_json = json.dumps(score.placement.to_dict())
            for t in targets:
                sites_by_key[(im.code, t.id)] = score.placement.transform.to_pixel(t.sites)
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
        shape_by_image[code] = px.shape
        im.rows, im.cols = px.shape
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


def tiles_bytes(store_dir: Path, sha256: str, study_id: int, tiles, order, size: int) -> bytes:
    """The tiles of one trial in screen order (``order``: screen position → site), each ``size`` × ``size``
    linear 16-bit pixels, little-endian, row-major, one after the other."""
    path = display_path(store_dir, sha256, study_id)
    arr = PIXELS.get(path)
    boxes = [tiles[k] for k in order]
    return b"".join(np.ascontiguousarray(arr[r : r + size, c : c + size], dtype="<u2").tobytes() for r, c in boxes)


# =========================================================================== display check
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


# =========================================================================== export and analysis
def responses_frame(session, study) -> pd.DataFrame:
    """The study's stored (non-practice) responses as the tidy table ``limen analyse`` reads."""
    from sqlalchemy import select

    from webapp.models import ReadingSession, Region, Response, StudyImage, Trial, User

    q = (
        select(
            User.username,
            StudyImage.detector,
            StudyImage.code,
            Region.target,
            Region.diameter_mm,
            Region.contrast,
            Response.chosen_site,
            Region.true_site,
            Response.correct,
            Response.response_ms,
            ReadingSession.number,
            Trial.repeat,
            Response.window,
            Response.level,
            Response.created_at,
            Region.sites_json,
            Trial.seq,
            Trial.tile_order,
        )
        .join(Trial, Response.trial_id == Trial.id)
        .join(User, Trial.reader_id == User.id)
        .join(Region, Trial.region_id == Region.id)
        .join(StudyImage, Region.image_id == StudyImage.id)
        .outerjoin(ReadingSession, Response.session_id == ReadingSession.id)
        .where(Trial.study_id == study.id, Trial.practice.is_(False))
        .order_by(User.username, Trial.seq)
    )
    rows = session.execute(q).all()
    scale = float(study.ugy_per_unit or 1.0)
    df = pd.DataFrame(
        rows,
        columns=[
            "reader",
            "detector",
            "image",
            "target",
            "diameter_mm",
            "contrast",
            "chosen_site",
            "true_site",
            "correct",
            "response_ms",
            "session",
            "repeat",
            "window",
            "level",
            "timestamp",
            "sites_json",
            "seq",
            "tile_json",
        ],
    )
    df["correct"] = df["correct"].astype(int)
    df["session"] = df["session"].fillna(1).astype(int)
    # each trial's own M (a plate may use 3-site cells for some diameters and 5-site cells for others)
    df["n_alternatives"] = [len(json.loads(x)) for x in df["sites_json"]] if len(df) else pd.Series(dtype=int)
    df["window"] = df["window"].astype(float) * scale
    df["level"] = df["level"].astype(float) * scale
    df["timestamp"] = [t.isoformat(timespec="milliseconds") + "Z" if t is not None else "" for t in df["timestamp"]]
    orders = [json.loads(x) if x else None for x in df["tile_json"]]
    df["tile_order"] = [" ".join(map(str, o)) if o else "" for o in orders]
    df["chosen_position"] = pd.array(
        [o.index(int(c)) if o else None for o, c in zip(orders, df["chosen_site"])], dtype="Int64"
    )
    df["true_position"] = pd.array(
        [o.index(int(c)) if o else None for o, c in zip(orders, df["true_site"])], dtype="Int64"
    )
    return df[export_columns()]


def responses_csv(session, study) -> str:
    return responses_frame(session, study).to_csv(index=False)


def model_frame(study) -> pd.DataFrame | None:
    if not study.model_trials_csv:
        return None
    from scorer.study.trials import LABEL_COLUMNS

    return pd.read_csv(io.StringIO(study.model_trials_csv), dtype=dict.fromkeys(LABEL_COLUMNS, str))


def run_analysis(session, study, n_boot: int, seed: int = 0, progress=None):
    """Analyse the stored responses with :func:`scorer.study.analyse_study` (model observer included);
    return the :class:`webapp.models.AnalysisRun` (cached by the responses' hash).

    ``progress``, if given, is called as ``progress(text, fraction)`` at each step (fraction None while the
    statistics run: their steps are named, not measured)."""
    from sqlalchemy import select

    from scorer.reports.html import dumps
    from scorer.reports.study import report_html
    from scorer.study import analyse_study, validate_trials
    from webapp.models import AnalysisRun

    say = progress or (lambda text, fraction=None: None)
    say("reading the stored responses", 0.02)
    df = responses_frame(session, study)
    if df.empty:
        raise LimenError("no responses stored yet: nothing to analyse")
    csv_text = df.to_csv(index=False)
    digest = hashlib.sha256(f"{n_boot}|{seed}|".encode() + csv_text.encode()).hexdigest()
    cached = (
        session.execute(
            select(AnalysisRun).where(AnalysisRun.study_id == study.id, AnalysisRun.responses_sha256 == digest)
        )
        .scalars()
        .first()
    )
    if cached is not None:
        return cached
    trials = validate_trials(df, source=f"study {study.id} responses")
    model_raw = model_frame(study)
    model = (
        validate_trials(model_raw, source=f"study {study.id} model-observer trials")
        if model_raw is not None and len(model_raw)
        else None
    )
    say(f"analysing {len(df)} responses ({n_boot} bootstrap resamples)", 0.05)
    a = analyse_study(trials, model, by="detector", n_boot=n_boot, seed=seed, progress=lambda text: say(text))
    say("writing the report", 0.95)
    meta = {
        "study": study.name,
        "layout": study.layout_name,
        "observer": study.observer,
        "responses_sha256": hashlib.sha256(csv_text.encode()).hexdigest(),
        "n_responses": int(len(df)),
        "seed": seed,
        "n_boot": n_boot,
    }
    run = AnalysisRun(
        study_id=study.id,
        responses_sha256=digest,
        n_responses=int(len(df)),
        report_html=report_html(a, meta),
        analysis_json=dumps({**a.to_json(), "meta": meta}),
    )
    session.add(run)
    return run
