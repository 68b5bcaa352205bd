"""Builders for the nightly-scoring tests: simulated inboxes of the mini plate, configurations, DB checks."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
from helpers import MINI

from scorer.detector import detector_model
from scorer.images import save_conversion, write_dicom
from scorer.phantom import load_layout
from scorer.qc.simulated import Panel, simulate_night

D1, D2, D3 = dt.date(2026, 3, 2), dt.date(2026, 3, 3), dt.date(2026, 3, 4)
DIRECT, INDIRECT = "HSX-SE-0417", "HSX-CS-2291"
_LAYOUT = None


def layout():
    global _LAYOUT
    if _LAYOUT is None:
        _LAYOUT = load_layout(MINI)
    return _LAYOUT


def night(inbox, date, panels, n_images=4, seed=0):
    """Simulated DICOM images of the mini plate for ``panels`` (model names or Panel objects)."""
    panels = [p if isinstance(p, Panel) else Panel(p) for p in panels]
    return simulate_night(inbox, date, panels, n_images=n_images, seed=seed, layout=layout())


def write_config(
    root,
    min_images=4,
    baseline_sessions=3,
    n_boot=50,
    methods=("dprime", "count"),
    extra="",
    detector_extra="",
    accept_unlisted=False,
) -> Path:
    """A limen-nightly/1 file for the two simulated panels (conversion functions from the simulator)."""
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    lines = [
        'format = "limen-nightly/1"',
        'programme = "test programme (invented)"',
        "[defaults]",
        f'layout = "{MINI.as_posix()}"',
        f"min_images = {min_images}",
        f"baseline_sessions = {baseline_sessions}",
        f"n_boot = {n_boot}",
        "methods = [" + ", ".join(f'"{m}"' for m in methods) + "]",
        f"accept_unlisted = {'true' if accept_unlisted else 'false'}",
    ]
    lines.append(extra)
    for name in ("direct", "indirect"):
        m = detector_model(name)
        conv = root / f"{name}-conversion.toml"
        save_conversion(m.conversion_function(), conv)
        lines += [
            "[[detectors]]",
            f'name = "{m.detector_id}"',
            f'detector_id = "{m.detector_id}"',
            f'conversion = "{conv.name}"',
            detector_extra,
        ]
    p = root / "nightly.toml"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


def bad_files(inbox, good_file) -> dict:
    """A truncated copy, a DICOM without pixel data, a FOR PRESENTATION image, an unknown detector, a text file."""
    import pydicom
    from pydicom.dataset import FileDataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian, generate_uid

    inbox = Path(inbox) / "odd"
    inbox.mkdir(parents=True, exist_ok=True)
    data = Path(good_file).read_bytes()
    cut = inbox / "cut.dcm"
    cut.write_bytes(data[: len(data) // 2])
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.88.11"  # Basic Text SR: no pixels
    meta.MediaStorageSOPInstanceUID = generate_uid()
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds = FileDataset(str(inbox / "report.dcm"), {}, file_meta=meta, preamble=b"\0" * 128)
    ds.SOPClassUID, ds.SOPInstanceUID, ds.Modality = meta.MediaStorageSOPClassUID, meta.MediaStorageSOPInstanceUID, "SR"
    ds.DetectorID = DIRECT
    ds.save_as(inbox / "report.dcm", enforce_file_format=True)
    src = pydicom.dcmread(good_file)
    pixels = src.pixel_array
    tags = {"Modality": "MG", "DetectorID": DIRECT, "AcquisitionDateTime": "20260302080000", "KVP": 28}
    write_dicom(inbox / "processed.dcm", pixels, (0.085, 0.085), dict(tags, PresentationIntentType="FOR PRESENTATION"))
    write_dicom(inbox / "stranger.dcm", pixels, (0.085, 0.085), dict(tags, DetectorID="ZZ-9999"))
    (inbox / "notes.txt").write_text("not an image\n")
    return {
        "truncated": cut,
        "non_image": inbox / "report.dcm",
        "presentation": inbox / "processed.dcm",
        "unknown": inbox / "stranger.dcm",
        "text": inbox / "notes.txt",
    }


def flat_field(inbox, date, detector="direct", seed=5) -> Path:
    """A flat field tagged as a phantom image of ``detector``: the phantom cannot be found in it."""
    from scorer.detector import simulate
    from scorer.detector.simulator import dicom_tags

    m = detector_model(detector)
    sim = simulate(m, "flat", 100.0, seed, small=True, shape=(560, 660))
    when = dt.datetime.combine(date, dt.time(9, 0))
    from scorer.qc.simulated import ANODE, FILTER

    tags = dict(dicom_tags(m, when, 100.0), AnodeTargetMaterial=ANODE, FilterMaterial=FILTER)
    return write_dicom(Path(inbox) / f"{date}" / "flat.dcm", sim.pixels, sim.spacing_mm, tags)


def check_database(url, expected_sessions: int, images_per_session=None):
    """Every image in exactly one scored session, no claim left, complete thresholds and responses per session."""
    from sqlalchemy import func, select

    from scorer.qc import open_store
    from scorer.qc.tables import ImageRow, ResponseRow, SessionRow, ThresholdRow

    store = open_store(url)
    try:
        with store.transaction() as s:
            sessions = s.scalars(select(SessionRow)).all()
            assert [x.state for x in sessions].count("scored") == expected_sessions, [(x.id, x.state) for x in sessions]
            assert all(x.state == "scored" for x in sessions), "a claim was left behind"
            n_sites = sum(t.m_alternatives for t in layout().targets)
            n_diam = len(layout().diameters_mm)
            for x in sessions:
                imgs = s.scalars(select(ImageRow).where(ImageRow.session_id == x.id)).all()
                assert len(imgs) == x.n_images
                if images_per_session is not None:
                    assert len(imgs) == images_per_session
                assert all(i.registration for i in imgs)
                methods = json.loads(x.settings)["methods"]
                assert s.scalar(
                    select(func.count()).select_from(ThresholdRow).where(ThresholdRow.session_id == x.id)
                ) == n_diam * len(methods)
                assert s.scalar(
                    select(func.count()).select_from(ResponseRow).where(ResponseRow.session_id == x.id)
                ) == n_sites * len(imgs)
            free = s.scalar(select(func.count()).select_from(ImageRow).where(ImageRow.session_id.is_(None)))
            shas = s.scalars(select(ImageRow.sha256)).all()
            assert len(shas) == len(set(shas))
        return sessions, free
    finally:
        store.close()


def thresholds(url) -> list[tuple]:
    from scorer.qc import open_store

    store = open_store(url)
    try:
        df = store.thresholds_frame()
    finally:
        store.close()
    return [
        (r.detector, r.session_date, r.method, r.diameter_mm, r.threshold_contrast, r.ci_low, r.ci_high)
        for r in df.itertuples()
    ]


def assert_stored_like_direct(url, detector, session_date, direct) -> None:
    """The responses and per-image counts stored for one session equal a direct ``score_files`` result."""
    import pandas as pd
    from sqlalchemy import select

    from scorer.images.loading import image_content_hash
    from scorer.qc import open_store
    from scorer.qc.tables import ImageRow, ResponseRow, SessionRow

    cols = ["target", "site", "diameter_mm", "contrast", "is_signal", "response", "row_px", "col_px"]
    store = open_store(url)
    try:
        with store.transaction() as s:
            rows = s.execute(
                select(ImageRow.sha256, *(getattr(ResponseRow, c) for c in cols))
                .join(ImageRow, ImageRow.id == ResponseRow.image_id)
                .join(SessionRow, SessionRow.id == ResponseRow.session_id)
                .where(SessionRow.detector == detector, SessionRow.session_date == str(session_date))
            ).all()
            counts = dict(
                (sha, (nc, nt))
                for sha, nc, nt in s.execute(
                    select(ImageRow.sha256, ImageRow.n_correct, ImageRow.n_trials)
                    .join(SessionRow, SessionRow.id == ImageRow.session_id)
                    .where(SessionRow.detector == detector, SessionRow.session_date == str(session_date))
                ).all()
            )
    finally:
        store.close()
    got = pd.DataFrame(rows, columns=["image", *cols]).sort_values(["image", "target", "site"], ignore_index=True)
    sha = {im.image_id: image_content_hash(im.path) for im in direct.images}
    want = direct.responses[["image", *cols]].copy()
    want["image"] = want["image"].map(sha)
    want = want.sort_values(["image", "target", "site"], ignore_index=True)
    assert len(got) == len(want) > 0
    for c in cols:
        if c in ("target", "image"):
            assert got[c].astype(str).tolist() == want[c].astype(str).tolist()
        else:
            np.testing.assert_allclose(got[c].astype(float), want[c].astype(float), rtol=1e-12, err_msg=c)
    assert counts == {sha[im.image_id]: (im.n_correct, im.n_trials) for im in direct.images}
