"""Files written by ``limen score --out``: JSON, CSV tables, overlays and the HTML report."""

from __future__ import annotations

import base64
import html
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

import scorer.observer.flags as flags  # noqa: E402
from scorer.errors import LimenError  # noqa: E402
from scorer.files import atomic_write_text  # noqa: E402
from scorer.observer.checks import CONTRAST_SCALE  # noqa: E402
from scorer.observer.npw import METHOD_TEXT  # noqa: E402
from scorer.observer.psychometric import fit_psychometric  # noqa: E402
from scorer.reports.checks import checks_sections  # noqa: E402
from scorer.reports.html import (  # noqa: E402
    error_bars,
    figure_to_svg,
    html_page,
    plain_log_ticks,
    provenance,
    sparse_log_ticks,
    table_html,
    write_json,
)

#: DICOM Manufacturer written by `limen simulate`
SIMULATED_MANUFACTURER = "Limen simulation"

METHOD_LABEL = {"dprime": "d′ method", "count": "count method", "predicted": "predicted"}
COLOURS = {"dprime": "#1f5fa8", "count": "#c2571a", "predicted": "#3a8a3a"}


def cd_plot(result, extra_curves=None, title=None):
    """Log-log contrast-detail plot: thresholds with CIs per method, smooth curves, limits."""
    fig, ax = plt.subplots(figsize=(7.2, 5.0))
    factor = result.human_factor or 1.0
    curves = dict(result.curves)
    for name, c in (extra_curves or {}).items():
        curves[name] = c
    offsets = {"dprime": 0.985, "count": 1.015}
    for method, curve in curves.items():
        pts = [p for p in curve.points if np.isfinite(p.threshold_contrast)]
        if not pts:
            continue
        d = np.array([p.diameter_mm for p in pts]) * offsets.get(method, 1.0)
        t = np.array([p.threshold_contrast for p in pts]) * 100
        lo = np.array([p.ci_low for p in pts]) * 100
        hi = np.array([p.ci_high for p in pts]) * 100
        col = COLOURS.get(method, None)
        plain = np.array([not getattr(p, "censored", "") for p in pts])
        over = np.array([flags.ABOVE_100 in p.flags for p in pts])
        hi = np.minimum(hi, 100.0)  # no contrast exceeds 100 %: the CI is drawn capped, the point flagged
        ax.errorbar(
            d[plain],
            t[plain],
            yerr=[e[plain] for e in error_bars(t, lo, hi)],
            fmt="o",
            ms=5,
            capsize=3,
            color=col,
            label=f"{curve.observer.upper()} {METHOD_LABEL.get(method, method)} (95 % CI)",
        )
        extra = np.array([bool(getattr(p, "extrapolated", False)) for p in pts])
        if extra.any():
            ax.plot(
                d[extra], t[extra], "o", ms=9, mfc="none", mec=col, label="extrapolated (outside the contrasts offered)"
            )
        if over.any():
            ax.plot(
                d[over], t[over], "s", ms=10, mfc="none", mec="#a4161a", label="above 100 % (value or CI end; capped)"
            )
        for mark, side in (("^", "above"), ("v", "below")):
            sel = np.array([getattr(p, "censored", "") == side for p in pts])
            if sel.any():
                ax.plot(
                    d[sel],
                    t[sel],
                    mark,
                    ms=8,
                    color=col,
                    label=f"{METHOD_LABEL.get(method, method)}: threshold {side} the contrasts offered (censored)",
                )
        if curve.smooth is not None:
            x = np.geomspace(*curve.smooth.diameter_range_mm, 100)
            ax.plot(x, curve.smooth(x) * 100, "-", color=col, alpha=0.6, lw=1.2)
    if result.limits is not None:
        lim = result.limits
        scale = 1.0 / factor if result.human_factor else 1.0
        ax.plot(
            lim.diameters_mm,
            np.array(lim.acceptable) * 100 * scale,
            "k--",
            lw=1.3,
            marker="x",
            label="acceptable limit (× listed; dashed between: interpolated)"
            + (f" ÷ human factor {factor:.3g}" if result.human_factor else ""),
        )
        ach = [(d, a) for d, a in zip(lim.diameters_mm, lim.achievable) if a is not None]
        if ach:
            ax.plot(
                [a[0] for a in ach],
                np.array([a[1] for a in ach]) * 100 * scale,
                "k:",
                lw=1.3,
                label="achievable level" + (" (same scale)" if result.human_factor else ""),
            )
    ax.set_xscale("log")
    ax.set_yscale("log")
    plain_log_ticks(ax)
    ax.set_xlabel("disc diameter (mm)")
    ax.set_ylabel("threshold contrast (%)")
    ax.grid(True, which="both", alpha=0.3)
    ax.set_title(title or f"Contrast-detail curve — {result.observer.upper()} model observer")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=2, frameon=False)
    fig.subplots_adjust(bottom=0.3)
    return fig


def psychometric_plot(result):
    """Proportion correct against contrast per diameter, with the fitted M-AFC function."""
    tr = result.trials
    diams = sorted(tr["diameter_mm"].unique())
    n = len(diams)
    cols = 4
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(3.0 * cols, 2.4 * rows), squeeze=False)
    for ax, d in zip(axes.ravel(), diams):
        g = tr[tr["diameter_mm"] == d].groupby("contrast")["correct"].agg(["sum", "count"]).reset_index()
        m = int(tr.loc[tr["diameter_mm"] == d, "m_alternatives"].iloc[0])
        ax.plot(g["contrast"] * 100, g["sum"] / g["count"], "o", color="#444", ms=4)
        try:
            fit = fit_psychometric(g["contrast"], g["sum"], g["count"], m)
            x = np.geomspace(g["contrast"].min(), g["contrast"].max(), 100)
            ax.plot(x * 100, fit.pc(x), "-", color=COLOURS["count"])
        except Exception:  # a plot must never stop the report
            pass
        ax.axhline(1.0 / m, color="#999", lw=0.8, ls=":")
        ax.set_xscale("log")
        sparse_log_ticks(ax, "x", max_ticks=4)  # few round contrasts: labels never run into each other
        ax.set_ylim(0, 1.05)
        ax.set_yticks([0, 0.5, 1])
        ax.set_title(f"{d:g} mm", fontsize=9)
        ax.tick_params(labelsize=7)
    for ax in axes.ravel()[n:]:
        ax.axis("off")
    fig.supxlabel("contrast (%)", fontsize=9)
    fig.supylabel("proportion correct", fontsize=9)
    fig.tight_layout()
    return fig


def _thumb(png: Path, max_px: int = 560) -> str:
    """A small JPEG of an overlay, embedded in the page (the full-size PNG stays beside the report)."""
    import cv2

    img = cv2.imread(str(png), cv2.IMREAD_COLOR)
    if img is None:
        return ""
    scale = max_px / max(img.shape[:2])
    if scale < 1:
        img = cv2.resize(img, None, fx=scale, fy=scale, interpolation=cv2.INTER_AREA)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 82])
    data = base64.b64encode(buf.tobytes()).decode("ascii")
    return (
        f"<a href='overlays/{Path(png).name}'><img alt='registration overlay {Path(png).name}' "
        f"src='data:image/jpeg;base64,{data}' style='max-width:32%;margin:2px'></a>"
    )


def write_score_outputs(
    result, out_dir, overlays: list[Path] | None = None, command: str = "", defect_overlays: list[Path] | None = None
) -> dict:
    """Write results.json, responses.csv, trials.csv, thresholds.csv, registration.csv, verdicts.csv and
    report.html."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the output folder ({exc.strerror or exc})", out) from None
    js = result.to_json()
    if command:
        js["command"] = command
    js["provenance"] = {**provenance(), "image_processing": _image_processing(result)}
    write_json(out / "results.json", js)
    atomic_write_text(out / "responses.csv", result.responses.to_csv(index=False))
    atomic_write_text(out / "trials.csv", result.trials.to_csv(index=False))
    atomic_write_text(out / "thresholds.csv", result.thresholds_frame().to_csv(index=False))
    atomic_write_text(out / "registration.csv", result.registration_frame().to_csv(index=False))
    if result.verdicts is not None:
        import pandas as pd

        atomic_write_text(
            out / "verdicts.csv",
            pd.DataFrame([{**v.to_dict(), "flags": flags.text(v.flags)} for v in result.verdicts]).to_csv(index=False),
        )
    atomic_write_text(out / "report.html", render_html(result, overlays or [], command, defect_overlays or []))
    return {"json": out / "results.json", "report": out / "report.html"}


def _image_processing(result) -> dict:
    """What was done to the pixels before scoring (the notch filter), for the provenance."""
    sc = getattr(result, "set_checks", None)
    if sc is None or not sc.notch:
        return {"notch": None}
    return {
        "notch": {
            "method": "Gaussian notch (SD half a bin of the 128-px ROI spectrum) about each periodic peak found in "
            "an image and its mirror, applied in the Fourier domain after registration and before scoring",
            "images": {ch.image: [p.to_dict() for p in ch.peaks] for ch in sc.images if ch.notched},
        }
    }


def _ci_caption(result) -> str:
    """What the intervals on the page are, as computed (never a claim the code did not make)."""
    parts = []
    st = result.settings
    if "dprime" in result.curves:
        parts.append(
            "d′ method: analytic interval from the sampling variance of the linear observer's d′, widened "
            "for over-dispersion"
            if st.get("dprime_ci", "analytic") == "analytic"
            else f"d′ method: expanded percentile bootstrap over images ({st.get('n_boot')} resamples)"
        )
    if "count" in result.curves:
        parts.append(f"count method: expanded percentile bootstrap over images ({st.get('n_boot')} resamples)")
    return "; ".join(parts)


def render_html(result, overlays: list[Path], command: str = "", defect_overlays: list[Path] | None = None) -> str:
    meta0 = result.images[0].metadata if result.images else {}
    intro = (
        f"<p>{len(result.images)} image(s) of <b>{result.layout.name}</b> scored by the "
        f"<b>{result.observer.upper()}</b> model observer. Detector "
        f"{meta0.get('detector_id') or meta0.get('device_serial') or 'unknown'}, station "
        f"{meta0.get('station_name') or 'unknown'}, detector type {meta0.get('detector_type') or 'unknown'}, "
        f"{meta0.get('kvp') or '—'} kV.</p>"
    )
    n_sim = sum(1 for sc in result.images if (sc.metadata or {}).get("manufacturer") == SIMULATED_MANUFACTURER)
    if n_sim:
        intro = (
            f"<p class='fail'><b>Simulated data:</b> {n_sim} of {len(result.images)} image(s) were made by "
            "Limen's physics simulator, not by a real detector (invented demo scenario).</p>"
        ) + intro
    if result.verdicts is not None:
        ov = result.overall_verdict
        intro += (
            f"<p>Overall verdict against <b>{result.limits.name}</b>: "
            f"<span class='{ov}'>{ov.upper()}</span> (method: {METHOD_LABEL[result.verdict_method]}"
            + (f"; human/model factor {result.human_factor:.3g}" if result.human_factor else "")
            + (
                f" (95 % CI {result.human_factor_ci[0]:.3g}–{result.human_factor_ci[1]:.3g}, included in the "
                "human-equivalent CIs)"
                if result.human_factor_ci
                else ""
            )
            + ").</p>"
        )
        intro += f"<p class='meta'>Limits source: {result.limits.source}</p>"
    if result.warnings:
        intro += "<ul>" + "".join(f"<li>{html.escape(w)}</li>" for w in result.warnings) + "</ul>"
    intro += f"<p class='meta'><b>Contrast scale.</b> Thresholds are on the {html.escape(CONTRAST_SCALE)}.</p>"
    td = result.settings.get("threshold_definition")
    if td:
        pcs = ", ".join(f"Pc = {v['pc']:.3f} at {m}-AFC" for m, v in td["pc_by_m"].items())
        what = (
            f"where the observer reaches d′ = {td['dprime_threshold']:.4g}"
            + (" (default: the d′ at which 3-AFC reaches Pc = 2/3)" if td.get("default") else "")
            if td.get("dprime_threshold") is not None
            else "at a fixed proportion correct"
        )
        intro += f"<p class='meta'><b>Threshold definition.</b> The threshold is the contrast {what}: {pcs}.</p>"
    sections = [
        ("Summary", intro),
        (
            "Contrast-detail curve",
            f"<figure>{figure_to_svg(cd_plot(result))}<figcaption>Threshold "
            f"contrast per disc diameter (log-log) with 95 % confidence intervals ({_ci_caption(result)}); "
            "lines: smooth curve log C = a + b·log d + c·(log d)². Triangles: censored thresholds (only "
            "known to lie above ▲ or below ▼ the contrasts the plate offers); open circles: d′-method values "
            "extrapolated beyond them; open red squares: a value or CI end above 100 % contrast (drawn capped "
            "at 100 %).</figcaption></figure>",
        ),
    ]
    rows = []
    for method, c in result.curves.items():
        for p in c.points:
            one_sided = bool(p.censored)
            rows.append(
                {
                    "diameter (mm)": p.diameter_mm,
                    "method": METHOD_LABEL[method],
                    "threshold (%)": p.display(unit=""),
                    "95 % CI (%)": "—"
                    if one_sided or not np.isfinite(p.ci_low)
                    else f"{flags.capped_percent(p.ci_low)}–{flags.capped_percent(p.ci_high)}",
                    "flags": flags.text(p.flags),
                    "contrasts offered (%)": "—"
                    if p.offered_min is None
                    else f"{100 * p.offered_min:.3g}–{100 * p.offered_max:.3g}",
                    "images": p.n_images,
                    "note": p.note,
                }
            )
    seen = [f for method, c in result.curves.items() for p in c.points for f in p.flags]
    seen += [f for v in result.verdicts or [] for f in v.flags]
    caption = f"<p class='meta'>Flags: {html.escape(flags.legend(seen))}</p>" if seen else ""
    sections.append(("Threshold contrast", table_html(rows, left=["method", "flags", "note"]) + caption + METHOD_TEXT))
    if result.verdicts is not None:

        def lim(x, v):
            return "—" if x is None else f"{100 * x:.3g}" + (" (interpolated)" if v.limit_interpolated else "")

        def comp(v):
            sign = {"above": "> ", "below": "< "}.get(v.censored, "")
            return f"{sign}{100 * v.threshold_contrast:.3g}" if np.isfinite(v.threshold_contrast) else "—"

        vrows = [
            {
                "diameter (mm)": v.diameter_mm,
                "compared threshold (%)": comp(v),
                "95 % CI (%)": (
                    f"{flags.capped_percent(v.ci_low)}–{flags.capped_percent(v.ci_high)}"
                    if np.isfinite(v.ci_low) and np.isfinite(v.ci_high)
                    else "—"
                ),
                "flags": flags.text(v.flags),
                "acceptable (%)": lim(v.acceptable, v),
                "achievable (%)": lim(v.achievable, v),
                "verdict": v.verdict,
                "achievable met": "—" if v.achievable_met is None else ("yes" if v.achievable_met else "no"),
                "note": v.note,
            }
            for v in result.verdicts
        ]
        sections.append(
            (
                "Verdict per diameter",
                table_html(vrows, left=["verdict", "95 % CI (%)", "achievable met", "flags", "note"]) + caption,
            )
        )
    sections.append(
        (
            "Proportion correct per diameter",
            f"<figure>{figure_to_svg(psychometric_plot(result))}<figcaption>Observed proportion of correct "
            "M-AFC decisions per target over the images (M as in the layout: 3 or 5 on the demo plate), with the "
            "maximum-likelihood M-AFC psychometric "
            "function (dotted: chance).</figcaption></figure>",
        )
    )
    measured = isinstance(result.settings.get("blur"), dict) and "MTF" in str(result.settings["blur"].get("source"))
    reg_rows = [
        {
            "image": s.image_id,
            "residual (px)": s.placement.residual_px,
            "max residual (px)": s.placement.max_residual_px,
            "rotation (°)": s.placement.rotation_deg,
            "flipped": "yes" if s.placement.flipped else "no",
            "magnification": s.placement.magnification,
            "template blur": "measured MTF" if measured else f"Gaussian σ {s.blur_sigma_px:.2f} px (markers)",
            "proportion correct": s.n_correct / max(s.n_trials, 1),
        }
        for s in result.images
    ]
    reg_html = table_html(reg_rows, left=["image", "flipped", "template blur"])
    if overlays:
        reg_html += "<div>" + "".join(_thumb(p) for p in overlays[:12]) + "</div>"
    sections.append(("Images and registration", reg_html))
    sections += checks_sections(result, defect_overlays, _thumb)
    meta = {
        "settings": result.settings,
        "command": command,
        "inputs": [{"path": s.path, "sha256": s.metadata.get("content_sha256")} for s in result.images],
    }
    return html_page(f"Limen contrast-detail report — {result.layout.name}", sections, meta)
