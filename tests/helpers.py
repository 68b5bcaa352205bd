"""Small builders shared by the tests (layouts on a grid, placements, simulated image sets)."""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import numpy as np

from scorer.phantom import PhantomTransform, parse_layout

DATA = Path(__file__).parent / "data"
MINI = DATA / "mini-plate.toml"


def grid_layout(diameters_mm, contrasts, n_repeat=1, spacing_mm=None, seed=0):
    """A layout with every (diameter, contrast) target repeated ``n_repeat`` times, 4-AFC, on a grid."""
    rng = np.random.default_rng(seed)
    dmax = max(diameters_mm)
    sp = spacing_mm or max(3.0, 3.0 * dmax)
    cell = 2 * sp
    targets = []
    if not isinstance(contrasts, dict):
        contrasts = {d: contrasts for d in diameters_mm}
    combos = [(d, c) for d in diameters_mm for c in contrasts[d] for _ in range(n_repeat)]
    ncols = int(np.ceil(np.sqrt(len(combos))))
    margin = 12.0
    for i, (d, c) in enumerate(combos):
        cx = margin + cell * (i % ncols) + cell / 2
        cy = margin + cell * (i // ncols) + cell / 2
        h = sp / 2
        targets.append(
            {
                "id": f"t{i}",
                "diameter_mm": d,
                "contrast": c,
                "sites_mm": [[cx - h, cy - h], [cx + h, cy - h], [cx - h, cy + h], [cx + h, cy + h]],
                "signal_site": int(rng.integers(4)),
            }
        )
    nrows = int(np.ceil(len(combos) / ncols))
    w = 2 * margin + cell * ncols
    h = 2 * margin + cell * nrows
    data = {
        "format": "limen-layout/1",
        "phantom": {"name": "test grid", "width_mm": w, "height_mm": h},
        "fiducials": [
            {"id": "A", "x_mm": 4.0, "y_mm": 4.0, "diameter_mm": 3.0, "contrast": 0.6},
            {"id": "B", "x_mm": w - 4, "y_mm": 4.0, "diameter_mm": 3.0, "contrast": 0.6},
            {"id": "C", "x_mm": w - 4, "y_mm": h - 4, "diameter_mm": 3.0, "contrast": 0.6},
            {"id": "D", "x_mm": 4.0, "y_mm": h - 4, "diameter_mm": 3.0, "contrast": 0.6},
        ],
        "orientation_key": {"id": "key", "x_mm": 12.0, "y_mm": h - 4, "diameter_mm": 5.0, "contrast": 0.6},
        "targets": targets,
    }
    return parse_layout(data, "test-grid")


def known_placement(layout, shape, pixel_mm, magnification=1.0):
    """A placement with the phantom centred on the image, as the simulator puts it (no registration)."""
    tf = PhantomTransform.from_params(
        rotation_deg=0.0,
        flipped=False,
        magnification=magnification,
        phantom_center_mm=layout.center_mm,
        center_px=((shape[0] - 1) / 2, (shape[1] - 1) / 2),
        pixel_mm=pixel_mm,
    )
    return SimpleNamespace(transform=tf, markers_px={})


def simulate_set(model, layout, dose_ugy, n_images, seed=0, pose=None):
    """Simulated images (linearised to µGy) of ``layout`` with the placement the simulator used."""
    from scorer.detector.simulator import Pose, phantom_transform, simulate
    from scorer.images import Image

    pose = pose or Pose()
    out = []
    for s in np.random.SeedSequence(seed).spawn(n_images):
        sim = simulate(model, "phantom", dose_ugy, np.random.default_rng(s), small=True, layout=layout, pose=pose)
        tf = phantom_transform(layout, pose, sim.pixels.shape, model.pixel_pitch_mm)
        markers = {k: tuple(v) for k, v in sim.truth["fiducials_px"].items()}
        out.append((Image(sim.kerma_ugy(), sim.spacing_mm), SimpleNamespace(transform=tf, markers_px=markers), sim))
    return out


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on now (the kernel's choice for port 0)."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]
