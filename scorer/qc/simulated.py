"""Simulated nights of phantom images for the demo and the tests (invented scenario, physics simulator).

:func:`simulate_night` writes one night's DICOM images of one or more simulated panels into an
inbox; :func:`demo_nights` writes a nightly configuration and a plan of nights in which one
panel's dose falls (an exposure-control fault) while the other stays as it was.
"""

from __future__ import annotations

import datetime as _dt
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from scorer.detector.presets import detector_model
from scorer.detector.simulator import dicom_tags, simulate
from scorer.files import atomic_write_text
from scorer.images.conversion import save_conversion
from scorer.images.writers import write_dicom

if TYPE_CHECKING:
    from scorer.phantom.layout import Layout


# Beam of the simulated panels: the simulator's 28 kV; anode/filter as DICOM writes them (invented setting).
ANODE, FILTER = "TUNGSTEN", "RHODIUM"
UAS_PER_UGY = 800.0  # invented tube output: exposure in µAs per µGy at the detector


@dataclass
class Panel:
    """One simulated panel of a night: preset model ("direct"/"indirect"), dose and optional tag changes."""

    model: str
    dose_ugy: float = 100.0
    tags: dict[str, Any] = field(default_factory=dict)


def simulate_night(
    inbox: str | os.PathLike[str],
    date: _dt.date,
    panels: list[Panel],
    n_images: int = 4,
    seed: int = 0,
    layout: Layout | None = None,
    small: bool = True,
    shape: tuple[int, int] | None = None,
) -> list[Path]:
    """Write ``n_images`` DICOM phantom images per panel, acquired on ``date``, under ``inbox/<date>/``.

    Tags: Detector ID and Station Name from the preset model, Acquisition DateTime 07:00 + 2 min per
    image, KVP, Exposure in µAs (∝ dose), Anode Target Material, Filter Material; ``Panel.tags``
    overrides any of them.  Returns the files written.
    """
    out = []
    if layout is None:
        from scorer.workflow.inputs import load_layout

        layout = load_layout()  # the bundled demo plate
    folder = Path(inbox) / date.isoformat()
    seeds = np.random.SeedSequence([seed, date.toordinal()]).spawn(len(panels) * n_images)
    for p_i, panel in enumerate(panels):
        model = detector_model(panel.model)
        for i in range(n_images):
            rng = np.random.default_rng(seeds[p_i * n_images + i])
            sim = simulate(model, "phantom", panel.dose_ugy, rng, small=small, layout=layout, shape=shape)
            when = _dt.datetime.combine(date, _dt.time(7, 0)) + _dt.timedelta(minutes=2 * i)
            tags = dicom_tags(model, when, panel.dose_ugy)
            tags.update(
                {
                    "ExposureInuAs": int(round(UAS_PER_UGY * panel.dose_ugy)),
                    "AnodeTargetMaterial": ANODE,
                    "FilterMaterial": FILTER,
                }
            )
            tags.update(panel.tags)
            out.append(
                write_dicom(
                    folder / f"{model.detector_id}-{date:%Y%m%d}-{i + 1:02d}.dcm", sim.pixels, sim.spacing_mm, tags
                )
            )
    return out


@dataclass
class DemoPlan:
    config: Path
    inbox: Path
    nights: list[tuple[_dt.date, list[Panel]]]


def demo_nights(
    root: str | os.PathLike[str],
    n_nights: int = 8,
    baseline_sessions: int = 4,
    drift_start: int = 5,
    drift_factor: float = 0.6,
    first_night: _dt.date = _dt.date(2026, 3, 2),
    layout_path: str | os.PathLike[str] | None = None,
    n_images: int = 5,
    n_boot: int = 300,
) -> DemoPlan:
    """Configuration and plan of simulated nights: the direct panel's dose falls from ``drift_start`` on.

    Scenario (invented): the Harbourside Women's Health Centre's two panels, HSX-SE-0417 (direct,
    room MAM2) and HSX-CS-2291 (indirect, room MAM3), image the phantom each morning at 100 µGy.
    From night ``drift_start`` (counted from 1) a fault in the direct panel's exposure control
    multiplies its dose by ``drift_factor`` each night; on night 3 the indirect panel's images are taken at
    29 kV instead of 28 kV (a settings flag, no alert).  Call :func:`simulate_night` for each
    night of ``plan.nights`` and run ``limen nightly --config plan.config --inbox plan.inbox``.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    inbox = root / "inbox"
    inbox.mkdir(exist_ok=True)
    lines = [
        'format = "limen-nightly/1"',
        'programme = "Harbourside Women\'s Health Centre (invented): nightly phantom QC"',
        "",
        "[defaults]",
        'methods = ["dprime"]',
        f"n_boot = {n_boot}",
        f"min_images = {n_images}",
        f"baseline_sessions = {baseline_sessions}",
        "accept_unlisted = false",
    ]
    if layout_path is not None:
        lines.append(f'layout = "{Path(layout_path).resolve().as_posix()}"')
    lines += ["", "[alerts]", "worse_fraction = 0.25", "control_sigma = 3.0", "ewma_lambda = 0.2", "ewma_width = 3.0"]
    for name, room in (("direct", "MAM2"), ("indirect", "MAM3")):
        model = detector_model(name)
        conv = root / f"{name}-conversion.toml"
        save_conversion(model.conversion_function(), conv)
        lines += [
            "",
            "[[detectors]]",
            f'name = "{model.detector_id} ({room}, {name})"',
            f'detector_id = "{model.detector_id}"',
            f'conversion = "{conv.name}"',
            "[detectors.expected]",
            f"kvp = {model.kvp:g}",
            "kvp_tolerance = 0.5",
            f'anode = "{ANODE}"',
            f'filter = "{FILTER}"',
            f"exposure_uas = [{int(UAS_PER_UGY * 70)}, {int(UAS_PER_UGY * 140)}]",
        ]
    config = root / "nightly.toml"
    atomic_write_text(config, "\n".join(lines) + "\n")
    nights = []
    for k in range(1, n_nights + 1):
        dose = 100.0 * (drift_factor ** (k - drift_start + 1) if k >= drift_start else 1.0)
        indirect = Panel("indirect", 100.0, {"KVP": 29.0} if k == 3 else {})
        nights.append((first_night + _dt.timedelta(days=k - 1), [Panel("direct", dose), indirect]))
    return DemoPlan(config, inbox, nights)
