"""Simulated images on disk: detector-model files in, raw images (DICOM, TIFF, PNG, npy) with their JSON
ground-truth sidecars out.  The physics is :mod:`scorer.detector.simulator`'s."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from pathlib import Path

from scorer.detector.panel_model import DetectorModel
from scorer.detector.presets import detector_model_from_dict
from scorer.detector.simulator import SimulatedImage, dicom_tags
from scorer.files import PathArg, atomic_write_text, read_toml
from scorer.images.writers import write_dicom, write_image


def load_detector_model(path: PathArg) -> DetectorModel:
    """A model file: ``base = "direct"|"indirect"`` plus any DetectorModel field to override.

    Parameters
    ----------
    path : str or path-like
        The model TOML file.

    Returns
    -------
    DetectorModel
    """
    path = Path(path)
    return detector_model_from_dict(read_toml(path, "detector model"), path)


def write_simulated(sim: SimulatedImage, out_dir: Path, stem: str, acquired: _dt.datetime, fmt: str = "dicom") -> Path:
    """Write the image (DICOM by default) and its JSON ground-truth sidecar (with the written file's SHA-256).

    Parameters
    ----------
    sim : SimulatedImage
        The simulated image and its truth.
    out_dir : Path
        Folder written to (made when missing).
    stem : str
        File name without suffix.
    acquired : datetime.datetime
        Acquisition time recorded in the file and the sidecar.
    fmt : {"dicom", "tiff", "png", "npy"}
        Image format.

    Returns
    -------
    Path
        The image file written (its sidecar is beside it, with suffix ``.json``).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    if fmt == "dicom":
        path = write_dicom(
            out_dir / f"{stem}.dcm", sim.pixels, sim.spacing_mm, dicom_tags(sim.model, acquired, sim.dose_ugy)
        )
    else:
        path = write_image(out_dir / f"{stem}.{fmt}", sim.pixels)
    side = dict(sim.truth)
    side.update(
        image=path.name,
        acquired=acquired.isoformat(),
        spacing_mm=list(sim.spacing_mm),
        sha256=hashlib.sha256(path.read_bytes()).hexdigest(),
    )
    atomic_write_text(path.with_suffix(".json"), json.dumps(side, indent=2, default=str) + "\n")
    return path
