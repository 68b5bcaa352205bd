"""Diagnostic overlay of a registration: the image, the blobs found, the fitted markers, sites and outline.

Drawn with matplotlib (Agg) into a PNG written atomically; :mod:`scorer.phantom.registration`
itself only computes (the blobs it found travel on :class:`~scorer.phantom.registration.Placement`
and :class:`~scorer.phantom.registration.RegistrationError`).
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.files import atomic_write_bytes
from scorer.images.image import Image
from scorer.phantom.layout import Layout
from scorer.phantom.registration import Placement, block_mean

OVERLAY_MAX_PX = 1400  # longest side of the plotted image


def draw_overlay(
    image: Image, layout: Layout, placement: Placement | None, out_png, candidates_px=None, title: str = ""
) -> Path:
    """Write a PNG showing the image, the blobs found and (if any) the fitted placement.

    Parameters
    ----------
    image : Image
    layout : Layout
    placement : Placement or None
        Fitted placement; None after a failure (then only the blobs are drawn).
    out_png : str or Path
    candidates_px : list of (row, col, diameter_px), optional
        Blobs to draw (default: ``placement.candidates_px``).
    title : str
        First title line; the residual (when placed) is added below it.

    Returns
    -------
    Path of the PNG.  The display uses a robust window/level (0.5–99.5 percentiles);
    large images are block-averaged for plotting speed.  Legend: dashed yellow circles
    are blobs found, green circles the fitted markers (red + the measured centres),
    thin blue circles the candidate sites of every target, orange the signal site,
    cyan the phantom outline.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.collections import PatchCollection
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle, Polygon

    out = Path(out_png)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the overlay folder ({exc.strerror or exc})", out.parent) from None
    pix = np.asarray(image.pixels)
    rows, cols = pix.shape
    f = max(1, int(np.ceil(max(rows, cols) / OVERLAY_MAX_PX)))
    disp = block_mean(pix, f)
    lo, hi = np.percentile(disp, [0.5, 99.5])
    if not hi > lo:
        hi = lo + 1.0
    if candidates_px is None:
        candidates_px = placement.candidates_px if placement is not None else []

    h_in = 9.0
    w_in = float(np.clip(h_in * cols / rows, 4.0, 16.0))
    fig = Figure(figsize=(w_in, h_in + 0.6), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.02, 0.02, 0.96, 0.88))
    ext = (-0.5, disp.shape[1] * f - 0.5, disp.shape[0] * f - 0.5, -0.5)
    ax.imshow(disp, cmap="gray", vmin=lo, vmax=hi, extent=ext, interpolation="nearest")
    ax.set_xlim(-0.5, cols - 0.5)
    ax.set_ylim(rows - 0.5, -0.5)
    ax.set_axis_off()

    if candidates_px:
        circ = [Circle((c, r), max(d / 2, 2.0)) for r, c, d in candidates_px]
        ax.add_collection(PatchCollection(circ, facecolor="none", edgecolor="yellow", linestyle="--", linewidth=0.8))
    lines = [title] if title else []
    if placement is not None:
        tf = placement.transform
        scale = tf.scale_px_per_mm()
        w, h = layout.width_mm, layout.height_mm
        corners = tf.to_pixel([[0, 0], [w, 0], [w, h], [0, h]])
        ax.add_patch(Polygon(corners[:, ::-1], closed=True, fill=False, edgecolor="cyan", linewidth=1.0))
        sites, sig = [], []
        for tg in layout.targets:
            rc = tf.to_pixel(tg.sites)
            rad = max(0.5 * tg.diameter_mm * scale, 1.0)
            for k, x in enumerate(rc):
                (sig if k == tg.signal_site else sites).append(Circle((x[1], x[0]), rad))
        ax.add_collection(PatchCollection(sites, facecolor="none", edgecolor="deepskyblue", linewidth=0.5))
        ax.add_collection(PatchCollection(sig, facecolor="none", edgecolor="orange", linewidth=0.9, linestyle="--"))
        mk = tf.to_pixel([m.xy_mm for m in layout.markers])
        ax.add_collection(
            PatchCollection(
                [Circle((x[1], x[0]), 0.5 * m.diameter_mm * scale) for m, x in zip(layout.markers, mk)],
                facecolor="none",
                edgecolor="lime",
                linewidth=1.2,
            )
        )
        for m, x in zip(layout.markers, mk):
            ax.annotate(
                m.id,
                (x[1], x[0]),
                xytext=(8, -8),
                textcoords="offset points",
                color="lime",
                fontsize=11,
                fontweight="bold",
                bbox={"boxstyle": "round,pad=0.15", "fc": "black", "ec": "none", "alpha": 0.6},
            )
        meas = np.array(list(placement.markers_px.values()))
        if len(meas):
            ax.plot(meas[:, 1], meas[:, 0], "+", color="red", markersize=10, mew=1.2)
        lines.append(
            f"residual {placement.residual_px:.3f} px RMS (max {placement.max_residual_px:.3f} px); "
            f"rotation {placement.rotation_deg:.2f}°{', flipped' if placement.flipped else ''}; "
            f"magnification {placement.magnification:.4f}"
        )
    else:
        lines.append(f"not registered: {len(candidates_px)} blob(s) found")
    fig.suptitle("\n".join(_wrap(x) for x in lines), fontsize=10)
    from matplotlib.lines import Line2D

    key = [
        Line2D([], [], color="yellow", ls="--", label="blob found"),
        Line2D([], [], color="lime", label="marker (fitted)"),
        Line2D([], [], color="red", marker="+", ls="", label="marker centre measured"),
        Line2D([], [], color="deepskyblue", label="candidate site"),
        Line2D([], [], color="orange", ls="--", label="site holding the disc"),
        Line2D([], [], color="cyan", label="phantom outline"),
    ]
    ax.legend(
        handles=key,
        loc="lower right",
        fontsize=9,
        framealpha=0.85,
        facecolor="black",
        labelcolor="white",
        edgecolor="0.5",
    )
    buf = io.BytesIO()
    with warnings.catch_warnings():  # a file name in a script the font lacks is drawn as boxes, not warned about
        warnings.filterwarnings("ignore", message=r"Glyph .* missing from")
        fig.savefig(buf, format="png")
    atomic_write_bytes(out, buf.getvalue())
    return out


def _wrap(text: str, width: int = 110) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width)) or text
