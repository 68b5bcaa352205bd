"""HTML report of ``limen dose-series``: threshold against kerma per diameter, β, figure of merit, kerma for a limit."""

from __future__ import annotations

from typing import Any

import numpy as np
from markupsafe import Markup

import scorer.observer.flags as flags
from scorer.reports.html import error_bars, figure_to_svg, plain_log_ticks, render_page, table_html


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def dose_response_svg(series: dict, title: str = "Threshold contrast against air kerma") -> str:
    """Log–log plot: each diameter's thresholds (with 95 % CIs) and its fitted C_T = a·K^(−β)."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6.6, 4.2))
    fits = {round(f["diameter_mm"], 6): f for f in series.get("fits", [])}
    diams = sorted({p["diameter_mm"] for g in series["groups"] for p in g["thresholds"]})
    flagged_any = False
    for _i, d in enumerate(diams):
        pts = [
            (g["kerma_ugy"], p)
            for g in series["groups"]
            for p in g["thresholds"]
            if np.isclose(p["diameter_mm"], d) and p["threshold_contrast"] is not None and not p.get("censored")
        ]
        if not pts:
            continue
        k = np.array([x for x, _ in pts])
        t = np.array([100 * p["threshold_contrast"] for _, p in pts])
        lo = np.array([100 * p["ci_low"] for _, p in pts])
        hi = np.minimum([100 * p["ci_high"] for _, p in pts], 100.0)  # drawn capped at 100 %, flagged
        fl = [point_flags(p) for _, p in pts]
        col = f"C{_i % 10}"
        ax.errorbar(k, t, yerr=error_bars(t, lo, hi), fmt="none", capsize=2, color=col)
        plain = np.array([not f for f in fl])
        ax.plot(k[plain], t[plain], "o", ms=4, color=col, label=f"{d:g} mm" if plain.any() else None)
        if (~plain).any():  # flagged values (extrapolated, above 100 %): open markers
            ax.plot(k[~plain], t[~plain], "o", ms=7, mfc="none", mec=col, label=None if plain.any() else f"{d:g} mm")
            flagged_any = True
        f = fits.get(round(d, 6))
        if f and f.get("beta") is not None:
            kk = np.geomspace(k.min(), k.max(), 30)
            c = 100 * f["threshold_at_reference"] * (kk / f["reference_kerma_ugy"]) ** (-f["beta"])
            ax.plot(kk, c, "-", color=col, lw=1)
    ax.set_xscale("log")
    ax.set_yscale("log")
    plain_log_ticks(ax)
    ax.set_xlabel("air kerma at the detector (µGy)")
    ax.set_ylabel("threshold contrast (%)")
    ax.set_title(title)
    ax.grid(True, which="both", alpha=0.3)
    from matplotlib.ticker import NullFormatter

    kermas = sorted({float(g["kerma_ugy"]) for g in series.get("groups", [])})
    if kermas:
        ax.set_xticks(kermas)  # label the kermas measured (plain numbers), not decades
        ax.xaxis.set_minor_formatter(NullFormatter())
    if flagged_any:
        ax.plot([], [], "o", ms=7, mfc="none", mec="0.3", label="open: flagged (extrapolated or above 100 %)")
    ax.legend(fontsize=7, ncol=3, loc="upper center", bbox_to_anchor=(0.5, -0.16), frameon=False)
    fig.subplots_adjust(bottom=0.3)
    return figure_to_svg(fig)


def point_flags(p: dict) -> list[str]:
    """A threshold record's flags: as written in the JSON, or decided now for a file written before them."""
    return list(p["flags"]) if isinstance(p.get("flags"), list) else flags.threshold_flags(p)


def _num(v) -> str:
    return "—" if v is None or not np.isfinite(v) else f"{v:.3g}"


def _pct(v) -> str:
    return "—" if v is None or not np.isfinite(v) else f"{100 * v:.3g}"


def fit_rows(series: dict) -> list[dict]:
    rows = []
    for f in series.get("fits", []):
        if f.get("beta") is None:
            rows.append(
                {
                    "diameter (mm)": f["diameter_mm"],
                    "β (95 % CI)": "—",
                    "flags": flags.NOT_ESTIMABLE,
                    "note": f.get("note", ""),
                }
            )
            continue
        row = {
            "diameter (mm)": f["diameter_mm"],
            "β (95 % CI)": f"{f['beta']:.3f} ({f['beta_ci_low']:.3f}–{f['beta_ci_high']:.3f})",
        }
        p_adj = f.get("p_beta_half_holm")
        row["β = 0.5? p (Holm)"] = "—" if p_adj is None else f"{p_adj:.2g}"
        for name in ("low", "high"):
            b = f.get(f"beta_{name}")
            row[f"β {name}-kerma groups"] = "—" if not b else f"{b['beta']:.3f} ({b['ci_low']:.3f}–{b['ci_high']:.3f})"
        k = f.get("kerma_for_limit_ugy")
        ci = f.get("kerma_for_limit_ci") or [None, None]
        row["kerma for the acceptable limit (µGy)"] = (
            "—" if k is None or not np.isfinite(k) else f"{k:.3g} ({_num(ci[0])}–{_num(ci[1])})"
        )
        kf = f.get("kerma_for_limit_flags")
        if kf is None and k is not None:  # a dose_series.json written before the flags
            kf = flags.kerma_flags(k, f.get("kermas_ugy") or [])
        row["flags"] = flags.text(
            [f"β: {x}" for x in f.get("flags") or []] + [f"kerma: {x}" for x in (kf or []) if k is not None]
        )
        row["note"] = f.get("note", "")
        rows.append(row)
    return rows


def group_rows(series: dict) -> list[dict]:
    rows = []
    for g in series["groups"]:
        for p, fom in zip(g["thresholds"], g["figure_of_merit"]):
            rows.append(
                {
                    "kerma (µGy)": f"{g['kerma_ugy']:.3g}",
                    "images": g["n_images"],
                    "diameter (mm)": p["diameter_mm"],
                    "threshold (%)": "—"
                    if p["threshold_contrast"] is None
                    else f"{_pct(p['threshold_contrast'])} "
                    f"({flags.capped_percent(p['ci_low'])}–{flags.capped_percent(p['ci_high'])})",
                    "flags": flags.text(point_flags(p)),
                    "FOM 1/(C²K) per µGy": "—"
                    if fom["fom_per_ugy"] is None
                    else f"{fom['fom_per_ugy']:.3g} ({_num(fom['ci_low'])}–{_num(fom['ci_high'])})",
                }
            )
    return rows


METHOD_TEXT = (
    "<p>Each kerma group is scored on its own, exactly as <code>limen score</code> would score its images. Per "
    "diameter, C_T(K) = a·K^(−β) is fitted by weighted least squares of log C_T on log K, each group weighted by "
    "the inverse square of the standard error read off its 95 % CI; over-dispersed residuals (χ² test, p &lt; 0.01) "
    "widen the CI. An ideal quantum-limited detector has β = 0.5 (Rose model); electronic noise steepens the curve "
    "(β &gt; 0.5) at low kerma, structure noise flattens it (β &lt; 0.5) at high kerma. The figure of merit "
    "1/(C_T²·K) is constant where the detector is quantum-limited. The kerma for a limit solves factor·C_T(K) = "
    "limit on the fitted curve (the human/model factor for limits written for human readers); its CI comes from "
    "seeded draws of the fitted parameters and of the factor.</p>"
)


def dose_series_csv(series: dict) -> str:
    """dose_series.csv: one row per kerma group × diameter, with the threshold's flags as one text column."""
    import pandas as pd

    keys = ("diameter_mm", "threshold_contrast", "ci_low", "ci_high", "method", "observer", "censored")
    rows = [
        {
            "kerma_ugy": g["kerma_ugy"],
            "n_images": g["n_images"],
            **{k: p.get(k) for k in keys},
            "fom_per_ugy": f["fom_per_ugy"],
            "flags": flags.text(point_flags(p)),
        }
        for g in series["groups"]
        for p, f in zip(g["thresholds"], g["figure_of_merit"])
    ]
    return pd.DataFrame(rows).to_csv(index=False)


def rose_text(series: dict) -> str:
    """What the β values say about the panel's noise, with the multiplicity of testing every diameter said."""
    fits = [f for f in series.get("fits", []) if f.get("beta") is not None]
    if not fits:
        return ""
    off = [f for f in fits if not f["beta_ci_low"] <= 0.5 <= f["beta_ci_high"]]
    holm = [f for f in fits if (f.get("p_beta_half_holm") or 1.0) < 0.05]
    n = len(fits)
    text = (
        f"<p>A quantum-limited panel (noise variance ∝ kerma, no electronic or structure noise) has β = 0.5 at every "
        f"diameter. Here {len(off)} of {n} β intervals exclude 0.5; testing {n} diameters at 5 % each, about "
        f"{0.05 * n:.1f} would by chance alone. After Holm's adjustment over the diameters (as the reader-study "
        f"page adjusts its comparisons) {len(holm)} depart from 0.5"
    )
    if holm:
        text += " (" + ", ".join(f"{f['diameter_mm']:g} mm: β {f['beta']:.2f}" for f in holm) + ")"
    text += ".</p>"
    if off:
        text += (
            "<p>If the flat-field analysis of the same panel (<code>limen detector --noise-series</code>) finds it "
            "quantum-limited over these kermas, a β that departs from 0.5 at one diameter and not at its neighbours "
            "does not come from the detector's noise: it comes from one kerma group's threshold (a few images per "
            "group; each threshold's 95 % CI misses its truth in about 1 series in 15–20), or from a contrast range "
            "that does not bracket the threshold at every kerma (flagged "
            "“extrapolated” below). Electronic noise would raise β at every diameter at the lowest kermas, structure "
            "noise lower it at every diameter at the highest: look for the pattern across diameters, not one value. "
            "Measured on images of known quantum-limited noise (bench/bench_dose_beta.py: 100 series each on two "
            "plates and two noise kinds, 4 groups of 4 images), β's CI covers 0.5 in 94–96 % of series overall and "
            "91–99 % at single diameters.</p>"
        )
    return text


def _legend(series: dict[str, Any]) -> str:
    """The legend of the flags shown on the page (empty when none is)."""
    seen = [f for g in series.get("groups", []) for p in g["thresholds"] for f in point_flags(p)]
    seen += [f for fit in series.get("fits", []) for f in fit.get("flags") or []]
    seen += [f for fit in series.get("fits", []) for f in fit.get("kerma_for_limit_flags") or []]
    return flags.legend(seen) if seen else ""


def dose_series_html(series: dict[str, Any], title: str = "Limen dose series") -> str:
    """The dose-series page (template ``dose.html``): threshold against kerma, β per diameter, kerma groups."""
    return render_page(
        "dose.html",
        title,
        {"settings": series.get("settings")},
        n_simulated=sum(int(g.get("n_simulated") or 0) for g in series.get("groups", [])),
        n_images=sum(int(g.get("n_images") or 0) for g in series.get("groups", [])),
        figure=Markup(dose_response_svg(series)),
        rose=Markup(rose_text(series)),
        fits_table=Markup(table_html(fit_rows(series), left=["flags", "note"])),
        groups_table=Markup(table_html(group_rows(series), left=["flags"])),
        legend=_legend(series),
        warnings=list(series.get("warnings") or []),
        method=Markup(METHOD_TEXT),
    )
