"""``limen simulate``: physics-based direct/indirect panel images for demos and tests.

Every file (image, JSON sidecar, conversion function) is written complete or not at all
(:func:`scorer.files.atomic_write_bytes`): a run killed midway leaves whole files and, at most, a hidden
``.NAME.*.part`` temporary, which a re-run writing the same names removes.
"""

from __future__ import annotations

import datetime as _dt
import glob
import math
import sys
from pathlib import Path

import click
import numpy as np
from tqdm import tqdm

from scorer.commands import options
from scorer.detector import PRESETS, Pose, detector_model
from scorer.detector import simulate as run_simulation
from scorer.errors import LimenError
from scorer.images import save_conversion
from scorer.workflow import load_detector_model, load_layout, write_simulated

DEFAULT_START = _dt.datetime(2026, 11, 30, 7, 30, 0)


def image_stem(panel: str, kind: str, dose_ugy: float, index: int, edge_angle_deg: float | None = None) -> str:
    """File name (without extension) of one simulated image; edges carry their angle so two orientations
    written to one folder never share a name."""
    angle = "" if edge_angle_deg is None else f"-{edge_angle_deg:g}deg".replace(".", "p")
    return f"{panel}-{kind}{angle}-{dose_ugy:g}ugy-{index + 1:03d}"


@click.command("simulate")
@click.option(
    "--detector",
    "detector",
    type=click.Choice(list(PRESETS)),
    default="direct",
    show_default=True,
    help="Preset panel model: direct (a-Se) or indirect (CsI) mammography, direct-rad or indirect-rad general "
    "radiography at RQA5 (published typical values: scorer/detector/presets.py).",
)
@click.option(
    "--model",
    "model_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Detector-model TOML (base = direct|indirect plus overrides); replaces --detector.",
)
@click.option(
    "--kind",
    type=click.Choice(["phantom", "flat", "edge"]),
    default="phantom",
    show_default=True,
    help="What is imaged: the phantom plate, an open (flat) field, or a slanted edge.",
)
@click.option("--dose-ugy", type=float, default=100.0, show_default=True, help="Air kerma at the detector (µGy).")
@click.option(
    "--count",
    type=click.IntRange(1, 1000),
    default=1,
    show_default=True,
    help="Number of images (independent noise, same pose).",
)
@options.seed("Seed of the noise (non-negative integer); the same seed gives the same images.")
@options.out_folder(
    "Folder for the images, their JSON truth sidecars and the panel's conversion function.", required=True
)
@click.option("--small", is_flag=True, help="Crop the field to what the phantom needs (512² for flat/edge).")
@click.option(
    "--rotate",
    "rotate_deg",
    type=float,
    default=0.0,
    show_default=True,
    help="Phantom rotation (degrees, counter-clockwise on the displayed image).",
)
@click.option("--flip", is_flag=True, help="Phantom lies mirrored (upside down).")
@click.option(
    "--shift-mm",
    nargs=2,
    type=float,
    default=(0.0, 0.0),
    show_default=True,
    help="Phantom centre offset from the field centre, DX DY in mm.",
)
@click.option(
    "--magnification",
    type=float,
    default=1.0,
    show_default=True,
    help="Geometric magnification of the phantom at the detector.",
)
@options.layout()
@click.option(
    "--edge-angle-deg",
    type=float,
    default=2.5,
    show_default=True,
    help="Edge angle from the column axis; add 90 for a near-horizontal edge.",
)
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["dicom", "tiff", "png", "npy"]),
    default="dicom",
    show_default=True,
    help="Image file format.",
)
@click.option("--overwrite", is_flag=True, help="Replace images of the same name already in --out (default: refuse).")
def simulate(
    detector: str,
    model_file: str | None,
    kind: str,
    dose_ugy: float,
    count: int,
    seed: int,
    out_dir: str,
    small: bool,
    rotate_deg: float,
    flip: bool,
    shift_mm: tuple[float, float],
    magnification: float,
    layout_file: str | None,
    edge_angle_deg: float,
    fmt: str,
    overwrite: bool,
) -> None:
    """Simulate raw (FOR PROCESSING) detector images with a JSON ground-truth sidecar each."""
    model = load_detector_model(model_file) if model_file else detector_model(detector)
    layout = load_layout(layout_file) if kind == "phantom" else None
    for opt, val in (
        ("--dose-ugy", dose_ugy),
        ("--rotate", rotate_deg),
        ("--shift-mm", shift_mm[0]),
        ("--shift-mm", shift_mm[1]),
        ("--magnification", magnification),
        ("--edge-angle-deg", edge_angle_deg),
    ):
        if not math.isfinite(val):
            raise LimenError(f"{opt} must be a finite number, got {val}", opt)
    if not dose_ugy > 0:
        raise LimenError(f"--dose-ugy must be positive, got {dose_ugy}")
    pose = Pose(rotation_deg=rotate_deg, flipped=flip, magnification=magnification, shift_mm=(shift_mm[0], shift_mm[1]))
    rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(count)]
    out = Path(out_dir)
    try:  # before anything is simulated: an unusable --out is one line, never a traceback
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the output folder given to --out ({exc.strerror or exc})", out) from None
    stems = [
        image_stem(model.name, kind, dose_ugy, i, edge_angle_deg if kind == "edge" else None) for i in range(count)
    ]
    if not overwrite and out.is_dir():
        clash = sorted(p.name for st in stems for p in out.glob(f"{st}.*"))
        if clash:
            raise LimenError(
                f"{out / clash[0]} already exists ({len(clash)} file(s) of this run would be replaced); "
                "choose another --out or add --overwrite",
                out,
            )
    _remove_own_temporaries(
        out,
        [f"{st}.{'dcm' if fmt == 'dicom' else fmt}" for st in stems]
        + [f"{st}.json" for st in stems]
        + [f"{model.name}-conversion.toml"],
    )
    written = []
    for i, rng in enumerate(
        tqdm(rngs, desc=f"simulating {model.name} {kind}", unit="image", disable=count < 2, file=sys.stderr)
    ):
        sim = run_simulation(
            model, kind, dose_ugy, rng, small=small, layout=layout, pose=pose, edge_angle_deg=edge_angle_deg
        )
        sim.truth["seed"] = seed
        sim.truth["index"] = i
        stem = stems[i]
        acquired = DEFAULT_START + _dt.timedelta(minutes=2 * i)
        written.append(write_simulated(sim, out, stem, acquired, fmt))
    # the panel's conversion function, as a physicist would hold it from commissioning
    save_conversion(model.conversion_function(), out / f"{model.name}-conversion.toml")
    click.echo(
        f"wrote {len(written)} {kind} image(s) of the {model.name} panel to {out}/ "
        f"(conversion function: {model.name}-conversion.toml)"
    )


def _remove_own_temporaries(out: Path, names: list[str]) -> None:
    """Remove the temporaries (``.NAME.*.part``, see :func:`scorer.files.atomic_write_bytes`) that a killed run
    left for the files this run is about to write; nobody else's files are touched."""
    if not out.is_dir():
        return
    for name in names:
        for tmp in out.glob(f".{glob.escape(name)}.*.part"):
            try:
                tmp.unlink()
            except OSError:
                pass  # gone already, or not ours to remove: it never has a result name
