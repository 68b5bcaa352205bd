"""What the real-image checks found, for the score report: defect overlays, the background spectrum, tables.

The checks themselves are :mod:`scorer.observer.checks`; this module only draws and words them.
"""

from __future__ import annotations

import html
import io
import warnings
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.files import atomic_write_bytes
from scorer.reports.html import figure_to_svg, table_html

OVERLAY_MAX_PX = 1400

CHECKS_TEXT = (
    "<p><b>How defects are found.</b> Each image's plate (outline inset by 2 mm, plus every site's region, "
    "markers left out) is divided by a smooth background (local-linear normalised Gaussian convolution, σ 8 px), "
    "so heel effect, scatter and smooth non-uniformity are not defects. The noise scale is 1.4826 × the median "
    "absolute deviation in 64-pixel blocks (Rousseeuw &amp; Croux 1993). A pixel is flagged when its departure "
    "passes z·σ with z set from the number of pixels tested so that a clean image holds 0.001 flagged pixels on "
    "average (Šidák's bound; widened by twice the nominal contrast inside a disc); rows and columns are tested in "
    "128-pixel segments the same way. Spots at the same pixels in every image are found in the images' mean. A "
    "site whose region touches a defect is excluded together with the rest of its M-AFC trial (a decision among "
    "fewer sites is not an M-AFC trial); the thresholds and their CIs rest on the remaining trials. Rows and "
    "columns are counted from 0.</p>"
)


def _block_mean(pix: np.ndarray, f: int) -> np.ndarray:
    if f == 1:
        return np.asarray(pix, np.float64)
    h, w = pix.shape[0] // f, pix.shape[1] // f
    return np.asarray(pix[: h * f, : w * f], np.float64).reshape(h, f, w, f).mean(axis=(1, 3))


def draw_defect_overlay(image, placement, checks, out_png, title: str = "") -> Path:
    """A PNG of the image with its defects (magenta), the excluded sites' regions (red) and the kept sites whose
    background ring lost defective pixels (orange).

    ``placement`` is the image's registration (kept for the signature of the scoring callback; the regions
    come from ``checks``)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.collections import PatchCollection
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Circle, Rectangle

    out = Path(out_png)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the overlay folder ({exc.strerror or exc})", out.parent) from None
    pix = np.asarray(image.pixels)
    rows, cols = pix.shape
    f = max(1, int(np.ceil(max(rows, cols) / OVERLAY_MAX_PX)))
    disp = _block_mean(pix, f)
    lo, hi = np.percentile(disp, [0.5, 99.5])
    if not hi > lo:
        hi = lo + 1.0
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
    regions = {(r.target, r.site): r for r in checks.regions}  # kept until the set's checks are finished
    excl = []
    for (t, s), _why in sorted(checks.excluded.items()):
        reg = regions.get((t, s))
        if reg is not None:
            excl.append(Circle((reg.col_px, reg.row_px), reg.radius_px))
    if excl:
        ax.add_collection(PatchCollection(excl, facecolor="none", edgecolor="red", linewidth=1.2))
    kept = [regions[k] for k in sorted(checks.masked) if k in regions]
    kept = [Circle((r.col_px, r.row_px), r.radius_px) for r in kept]
    if kept:
        ax.add_collection(PatchCollection(kept, facecolor="none", edgecolor="orange", linewidth=1.0, linestyle="--"))
    for d in checks.defects:
        if hasattr(d, "axis"):
            sl = d.pixels((rows, cols))
            r0, r1 = sl[0].start, sl[0].stop
            c0, c1 = sl[1].start, sl[1].stop
            ax.add_patch(
                Rectangle((c0 - 0.5, r0 - 0.5), c1 - c0, r1 - r0, fill=False, edgecolor="magenta", linewidth=1.0)
            )
        else:
            rad = max(np.sqrt(d.n_pixels / np.pi) + 2.0, 4.0 * f)
            ax.add_patch(Circle((d.col, d.row), rad, fill=False, edgecolor="magenta", linewidth=1.0))
    n_ex = len(checks.excluded)
    lines = [title] if title else []
    lines.append(
        f"{len(checks.defects)} defect(s) found; {n_ex} site(s) excluded (red: their regions), {len(checks.masked)} "
        "kept with defective pixels left out of their background ring (orange)"
    )
    fig.suptitle("\n".join(lines), fontsize=10)
    key = [
        Line2D([], [], color="magenta", label="defect (pixel group, row or column)"),
        Line2D([], [], color="red", label="region of an excluded site"),
        Line2D([], [], color="orange", ls="--", label="site kept, defect pixels left out"),
    ]
    ax.legend(handles=key, loc="lower right", fontsize=9, framealpha=0.85, facecolor="black", labelcolor="white")
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Glyph .* missing from")
        fig.savefig(buf, format="png")
    atomic_write_bytes(out, buf.getvalue())
    return out


def spectrum_plot(set_checks):
    """The set's background spectrum: 2-D (log) and the median and maximum over annuli, peaks marked."""
    import matplotlib.pyplot as plt

    sp = set_checks.spectrum
    fig, (ax2, ax1) = plt.subplots(1, 2, figsize=(10.5, 4.2), gridspec_kw={"width_ratios": [1, 1.4]})
    P = np.fft.fftshift(sp.nnps_mm2)
    fr = np.fft.fftshift(np.fft.fftfreq(sp.roi_px, d=sp.pixel_mm))
    ext = (fr[0], fr[-1], fr[-1], fr[0])
    ax2.imshow(np.log10(np.maximum(P, P[P > 0].min() if np.any(P > 0) else 1e-12)), cmap="magma", extent=ext)
    ax2.set_xlabel("fx (cycles/mm)")
    ax2.set_ylabel("fy (cycles/mm)")
    ax2.set_title("log₁₀ NNPS of the background", fontsize=9)
    f, med, mx = sp.radial_profile()
    ax1.semilogy(f, med, "-", color="#1f5fa8", label="median over the annulus")
    ax1.semilogy(f, mx, "-", color="#c2571a", lw=0.8, label="maximum over the annulus")
    for p in set_checks.peaks:
        ax1.axvline(p.frequency_per_mm, color="#a4161a", ls=":", lw=1)
        ax1.annotate(
            f"{p.frequency_per_mm:.3g}/mm, {100 * p.amplitude:.2g} %",
            (p.frequency_per_mm, float(np.max(mx))),
            fontsize=8,
            color="#a4161a",
            rotation=90,
            va="top",
            ha="right",
        )
        for sgn in (1, -1):
            ax2.plot(sgn * p.fx_per_mm, sgn * p.fy_per_mm, "o", mfc="none", mec="cyan", ms=10)
    ax1.set_xlabel("spatial frequency (cycles/mm)")
    ax1.set_ylabel("NNPS (mm², relative)")
    ax1.grid(True, which="both", alpha=0.3)
    ax1.legend(fontsize=8)
    fig.tight_layout()
    return fig


def checks_sections(result, defect_overlays: list[Path] | None = None, thumb=None) -> list[tuple[str, str]]:
    """Report sections: defects and excluded sites; background spectrum and patterns; the contrast scale."""
    sc = getattr(result, "set_checks", None)
    if sc is None:
        return []
    names = {s.image_id: s.image_id for s in result.images}
    rows = []
    for ch in sc.images:
        for (t, s), why in sorted(ch.excluded.items()):
            rows.append({"image": names.get(ch.image, ch.image), "target": t, "site": s, "reason": why})
    n_px = [ch.found.n_pixels_tested for ch in sc.images]
    ffr = sc.false_flag_rate
    head = (
        f"<p>{len(rows)} site(s) excluded in {sum(1 for ch in sc.images if ch.excluded)} of {len(sc.images)} "
        f"image(s). Pixels tested per image: {min(n_px) if n_px else 0}–{max(n_px) if n_px else 0}; expected "
        f"false flags on a clean image: {ffr:g} pixels and {ffr:g} line segments.</p>"
    )
    defects_rows = []
    for ch in sc.images:
        for d in ch.defects:
            defects_rows.append({"image": ch.image, "defect": d.name})
    body = head
    if rows:
        body += table_html(rows[:300], left=["image", "target", "reason"])
        if len(rows) > 300:
            body += f"<p class='meta'>… and {len(rows) - 300} more in results.json and responses.csv.</p>"
    if defects_rows:
        body += "<p><b>Defects found</b> (touching a site or not):</p>" + table_html(
            defects_rows[:200], left=["image", "defect"]
        )
    if defect_overlays and thumb is not None:
        body += "<div>" + "".join(thumb(p) for p in defect_overlays[:12]) + "</div>"
    body += CHECKS_TEXT
    out = [("Defects and excluded sites", body)]

    pat = ""
    if sc.peaks:
        prow = [
            {
                "frequency (cycles/mm)": p.frequency_per_mm,
                "fx, fy (cycles/mm)": f"{p.fx_per_mm:.3g}, {p.fy_per_mm:.3g}",
                "pattern": p.lines,
                "amplitude (%)": 100 * p.amplitude,
                "images": f"{sc.image_count(p, sc._tol())} of {len(sc.images)}",
            }
            for p in sc.peaks
        ]
        pat += table_html(prow, left=["pattern", "images"])
        pat += (
            "<p>Removed from each image where it was found by a notch filter before scoring (--notch).</p>"
            if sc.notch
            else "<p>Not removed: `limen score --notch` removes it with a narrow notch filter before scoring.</p>"
        )
    else:
        pat += "<p>No narrow peak in the background spectrum.</p>"
    if sc.spectrum is not None:
        pat += (
            f"<figure>{figure_to_svg(spectrum_plot(sc))}<figcaption>Background noise power spectrum of the set "
            f"({sc.spectrum.n_rois} ROIs of {sc.spectrum.roi_px} px, Hann window, averaged periodograms as for the "
            "NNPS of IEC 62220-1), relative to the smooth background. A narrow peak above the local level "
            "(Gamma bound for the number of bins tested, false-alarm rate 0.001) is a periodic pattern.</figcaption>"
            "</figure>"
        )
    fp = sc.fixed
    if fp is not None:
        verdict = "found" if fp.significant else "not found"
        pat += (
            f"<p><b>Pattern shared by the images</b> (mean of the {fp.n_images} images' residuals against what "
            f"their noise allows, σ²/n): {verdict}. Variance ratio {fp.ratio:.3g} (1 without one), z = {fp.z:.2g}; "
            f"shared relative SD {100 * fp.relative_sd:.2g} % against a per-image noise of {100 * fp.noise_sd:.2g} %."
            "</p>"
        )
    for s in sc.spots:
        pat += f"<p>{html.escape(s.name)}: the sites it touches are excluded in every image.</p>"
    out.append(("Periodic and fixed patterns", pat))
    return out
