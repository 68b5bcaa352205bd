"""The headline of a two-panel comparison as HTML, figures and CSV (comparison page and demo index).

:func:`headline_html` renders the ``headline`` block of ``comparison.json``
(:func:`scorer.detector.headline.headline`): one sentence per detail class, a forest plot of the per-diameter
ratios with the pooled estimate of each class, and a small figure of what drives it (MTF, DQE at a low and a
high frequency, electronic-noise kerma).  Panel A is always drawn in blue and panel B in orange, in every
figure of the comparison page.
"""

from __future__ import annotations

import html
import io

import numpy as np
import pandas as pd

from scorer.reports.html import figure_to_svg, table_html

#: paired colours: panel A, panel B (colour-blind-safe pair)
PANEL_COLOURS = ("#1f5fa8", "#d9730d")
CLASS_COLOURS = ("#6a3d9a", "#2b7a3d", "#8c564b", "#555555")


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def round_log_ticks(ax, lo: float, hi: float, axis: str = "x") -> None:
    """Round ticks (1, 2, 5 × 10ⁿ; only 1 × 10ⁿ over more than two decades) with plain labels on a log axis."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter, NullLocator

    subs = (1.0, 2.0, 5.0) if hi / lo <= 150 else (1.0,)
    ticks = [m * 10.0**e for e in range(int(np.floor(np.log10(lo))) - 1, int(np.ceil(np.log10(hi))) + 1) for m in subs]
    ticks = [t for t in ticks if lo <= t <= hi]
    target = ax.xaxis if axis == "x" else ax.yaxis
    target.set_major_locator(FixedLocator(ticks))
    target.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    target.set_minor_locator(NullLocator())
    target.set_minor_formatter(NullFormatter())


def _ratio_axis(ax, values) -> None:
    """A log ratio axis with round ticks (0.5, 1, 2 …) spanning ``values`` and 1."""
    v = np.asarray([x for x in values if x is not None and np.isfinite(x) and x > 0] + [1.0])
    lo, hi = float(v.min()) / 1.15, float(v.max()) * 1.15
    ax.set_xscale("log")
    ax.set_xlim(lo, hi)
    round_log_ticks(ax, lo, hi)
    ax.axvline(1.0, color="#333", lw=0.8)


def forest_svg(head: dict) -> str:
    """Per-diameter ratios (95 % CIs; hollow = extrapolated) and each class's pooled ratio (diamond)."""
    plt = _plt()
    la, lb = head.get("short_labels") or head["labels"]
    rows = [r for r in head["per_diameter"] if r.get("ratio") is not None]
    classes = head.get("classes") or []
    n = len(rows) + len(classes)
    fig, ax = plt.subplots(figsize=(3.9, 0.2 * n + 1.2))
    y = 0
    ticks, names, values = [], [], []
    colour = {c["name"]: CLASS_COLOURS[i % len(CLASS_COLOURS)] for i, c in enumerate(classes)}
    for r in rows:
        col = colour.get(r.get("detail_class"), "#777")
        ax.plot([r["ci_low"], r["ci_high"]], [y, y], color=col, lw=1.4)
        ax.plot(r["ratio"], y, "o", color=col, mfc="white" if r.get("extrapolated") else col, ms=5, zorder=3, mew=1.4)
        ticks.append(y)
        names.append(f"{r['diameter_mm']:g} mm" + (" (extrap.)" if r.get("extrapolated") else ""))
        values += [r["ci_low"], r["ci_high"]]
        y -= 1
    for c in classes:
        col = colour[c["name"]]
        x = [c["ci_low"], c["ratio"], c["ci_high"], c["ratio"]]
        ax.fill(x, [y, y + 0.3, y, y - 0.3], color=col, alpha=0.85)
        ticks.append(y)
        names.append(f"pooled {c['name']}")
        values += [c["ci_low"], c["ci_high"]]
        y -= 1
    _ratio_axis(ax, values)
    ax.set_yticks(ticks, names, fontsize=7)
    ax.set_xlabel(
        f"air kerma {lb} needs ÷ {la} needs (log scale)\n← {lb} needs less      {lb} needs more →", fontsize=8
    )
    ax.set_title(f"Same threshold as {la} at {head['reference_kerma_ugy']:.3g} µGy", fontsize=9)
    ax.tick_params(axis="x", labelsize=8)
    ax.grid(True, axis="x", alpha=0.3)
    return figure_to_svg(fig)


def drivers_svg(head: dict, det_a: dict | None, det_b: dict | None) -> str:
    """Three small panels: MTF (dots at the driver frequencies), DQE at a low and a high frequency (solid: flat
    fields' kerma; hatched: lowest kerma of the noise series), electronic-noise kerma with its CI."""
    drv = head.get("drivers")
    if not drv:
        return ""
    plt = _plt()
    la, lb = head["labels"]
    short = dict(zip((la, lb), head.get("short_labels") or (la, lb)))
    fig, axes = plt.subplots(1, 3, figsize=(6.9, 2.4), gridspec_kw={"width_ratios": [1.2, 1.0, 1.0]})
    ax = axes[0]
    for lab, det, col in ((la, det_a, PANEL_COLOURS[0]), (lb, det_b, PANEL_COLOURS[1])):
        m = (det or {}).get("mtf")
        p = drv["panels"][lab]
        if m:
            ax.plot(m["frequency_per_mm"], m["value"], color=col, lw=1.3, label=short[lab])
        fs = [float(f) for f in p["mtf"]]
        ax.plot(fs, [p["mtf"][k] for k in p["mtf"]], "o", color=col, ms=4)
        if p.get("nyquist_per_mm"):
            ax.axvline(p["nyquist_per_mm"], color=col, ls=":", lw=0.8)
    ax.set_ylim(0, 1.05)
    ax.set_xlabel("cycles/mm", fontsize=8)
    ax.set_title("MTF\n(dotted: Nyquist)", fontsize=8)
    ax.legend(fontsize=6, loc="lower left")
    ax = axes[1]
    fl, fh = drv["dqe_low_per_mm"], drv["dqe_high_per_mm"]
    above = False
    width = 0.2
    for i, (lab, col) in enumerate(((la, PANEL_COLOURS[0]), (lb, PANEL_COLOURS[1]))):
        p = drv["panels"][lab]
        vals = [p["dqe_low"], p["dqe_high"]]
        xs = np.arange(2) + (i - 0.5) * 2 * width
        ax.bar(xs - width / 2, [v or 0 for v in vals], width, color=col)
        low = p.get("low_kerma_dqe")
        if low:
            ax.bar(
                xs + width / 2,
                [low.get("dqe_low") or 0, low.get("dqe_high") or 0],
                width,
                color="white",
                edgecolor=col,
                hatch="////",
            )
        above |= any(v is not None and v > 1 for v in vals)
    ax.set_xticks([0, 1], [f"{fl:g} /mm", f"{fh:g} /mm"], fontsize=8)
    k0 = drv["panels"][la].get("dqe_kerma_ugy")
    low = drv["panels"][la].get("low_kerma_dqe")
    sub = f"solid {k0:g} µGy" if k0 else "solid: flats"
    if low:
        sub += f", hatched {low['kerma_ugy']:g} µGy"
    ax.set_title(f"DQE\n({sub})", fontsize=8)
    ax.set_ylim(0, 1.05 if not above else None)
    if above:
        ax.text(0.5, 0.95, "DQE > 1 — flagged", transform=ax.transAxes, ha="center", color="#a4161a", fontsize=8)
    ax = axes[2]
    ks, lo_hi = [], []
    for i, (lab, col) in enumerate(((la, PANEL_COLOURS[0]), (lb, PANEL_COLOURS[1]))):
        p = drv["panels"][lab]
        k = p.get("electronic_kerma_ugy")
        if k is None or not k > 0:
            continue
        ci = p.get("electronic_kerma_ci") or [None, None]
        lo = ci[0] if ci[0] and ci[0] > 0 else k
        hi = ci[1] if ci[1] and np.isfinite(ci[1]) else k
        ax.plot([lo, hi], [i, i], color=col, lw=2)
        ax.plot(k, i, "o", color=col)
        ks.append(k)
        lo_hi += [lo, hi]
    kermas = head.get("kermas_ugy") or []
    if ks:
        if kermas:
            ax.axvspan(kermas[0], kermas[-1], color="#ccc", alpha=0.5, lw=0)
            lo_hi += [kermas[0], kermas[-1]]
        ax.set_xscale("log")
        v = np.asarray(lo_hi)
        ax.set_xlim(v.min() / 2, v.max() * 2)
        round_log_ticks(ax, v.min() / 2, v.max() * 2)
        ax.tick_params(axis="x", labelsize=7)
    ax.set_yticks([0, 1], [short[la], short[lb]], fontsize=7)
    ax.set_ylim(-0.6, 1.6)
    ax.set_xlabel("air kerma (µGy)", fontsize=8)
    ax.set_title("electronic = quantum noise\n(grey: the dose series)", fontsize=8)
    fig.tight_layout()
    return figure_to_svg(fig)


def _fmt(v, digits: str = ".3g") -> str:
    return "—" if v is None or not np.isfinite(v) else format(v, digits)


def class_rows(head: dict) -> list[dict]:
    """One row per detail class: pooled ratio at the three kermas, heterogeneity, predicted ratio."""
    la, lb = head["labels"]
    out = []
    for c in head.get("classes") or []:
        lo_k, hi_k = c["other_kermas"]
        row = {
            "details": c["name"],
            "diameters (mm)": ", ".join(f"{d:g}" for d in c["diameters_mm"]),
            f"{lb}/{la} at {c['kerma_ugy']:.3g} µGy (95 % CI)": f"{_fmt(c['ratio'])} "
            f"({_fmt(c['ci_low'])}–{_fmt(c['ci_high'])})",
        }
        for o in (lo_k, hi_k):
            row[f"at {o['kerma_ugy']:.3g} µGy"] = (
                "—"
                if o["ratio"] is None
                else f"{_fmt(o['ratio'])} ({_fmt(o['ci_low'])}–{_fmt(o['ci_high'])})"
                + (f" EXTRAPOLATED ({o['n_extrapolated']})" if o.get("extrapolated") else "")
            )
        row["I² (Q, df, p)"] = (
            "one diameter"
            if c["k"] < 2
            else f"{100 * c['i2']:.0f} % ({c['q']:.2g}, {c['df']}, {_fmt(c['p_heterogeneity'], '.2g')})"
        )
        row["p (Holm, classes)"] = _fmt(c.get("p_holm_classes"), ".2g")
        row["predicted (MTF, NNPS, noise)"] = _fmt(c.get("predicted_ratio"))
        out.append(row)
    return out


def diameter_rows(head: dict) -> list[dict]:
    """One row per diameter at the reference kerma: ratio, CI, p, Holm-adjusted p, flags, class."""
    la, lb = head["labels"]
    out = []
    for r in head.get("per_diameter") or []:
        out.append(
            {
                "diameter (mm)": r["diameter_mm"],
                "class": r.get("detail_class") or "—",
                f"{lb}/{la} (95 % CI)": "—"
                if r.get("ratio") is None
                else f"{_fmt(r['ratio'])} ({_fmt(r['ci_low'])}–{_fmt(r['ci_high'])})",
                f"kerma {lb} needs (µGy)": _fmt(r.get("kerma_b_ugy")),
                "flag": "EXTRAPOLATED" if r.get("extrapolated") else "",
                "p": _fmt(r.get("p_value"), ".2g"),
                "p (Holm)": _fmt(r.get("p_holm"), ".2g"),
                "predicted": _fmt(r.get("predicted_ratio")),
                f"threshold {la} reaches (%)": _fmt(100 * r["threshold_contrast"]),
            }
        )
    return out


def headline_html(
    head: dict | None, det_a: dict | None = None, det_b: dict | None = None, *, compact: bool = False
) -> str:
    """The headline block: sentences, forest plot and drivers; ``compact`` (demo index) leaves out the
    per-diameter table."""
    if not head:
        return "<p>No headline: give both panels' dose series (--dose-a, --dose-b).</p>"
    if head.get("error"):
        return f"<p class='fail'>No headline: {html.escape(head['error'])}</p>"
    obs = (head.get("observer") or "").upper()
    items = "".join(f"<li>{html.escape(s)}</li>" for s in head["sentences"])
    if compact:
        parts = [f"<ul>{items}</ul>"]
    else:
        conclusion = html.escape(head.get("conclusion") or "")
        parts = [f"<div class='answer'><p><strong>{conclusion}</strong></p><ul>{items}</ul></div>"]
        if head.get("why"):
            parts.append(f"<p>Why — {html.escape(head['why'])}</p>")
    drivers = drivers_svg(head, det_a, det_b)
    parts.append(
        "<div style='display:flex;flex-wrap:wrap;gap:1.5em;align-items:flex-start'>"
        f"<figure style='margin:0'>{forest_svg(head)}<figcaption>How sure: per diameter, 95 % CIs (hollow: "
        "extrapolated); diamonds: each class pooled.</figcaption></figure>"
        + (
            f"<figure style='margin:0'>{drivers}<figcaption>Why: sharpness (MTF); DQE at a low frequency (large "
            "details) and a high one (small details), solid at the flat fields' kerma, hatched at the series' "
            "lowest; the kerma below which electronic noise takes over.</figcaption></figure>"
            if drivers
            else ""
        )
        + "</div>"
    )
    if head.get("driver_sentences"):
        items = "".join(f"<li>{html.escape(s)}</li>" for s in head["driver_sentences"])
        parts.append(
            f"<details><summary>The measured values behind it</summary><ul>{items}</ul></details>"
            if compact
            else f"<ul>{items}</ul>"
        )
    extrap = any(o.get("extrapolated") for c in head.get("classes") or [] for o in c["other_kermas"]) or any(
        r.get("extrapolated") for r in head.get("per_diameter") or []
    )
    note = (
        f"{html.escape(head['definition'])}. Thresholds of the {html.escape(obs)} model observer from each panel's "
        "dose series (C_T = a·K^(−β) per diameter); per-diameter ratios and their 95 % CIs by the delta method, "
        "pooled per class by random effects (DerSimonian & Laird 1986) with heterogeneity as Cochran's Q and I² "
        f"(Higgins & Thompson 2002); {html.escape(head['multiplicity'])}."
    )
    if extrap:
        note += (
            " <span class='flag'>EXTRAPOLATED</span> marks a kerma beyond those the other panel was measured at: "
            "the fitted power law is carried outside its data."
        )
    parts.append(f"<p class='meta'>{note}</p>")
    if not compact:
        parts.append(table_html(class_rows(head), left=("details", "diameters (mm)")))
        parts.append(
            "<details><summary>Per diameter (Holm-adjusted across diameters)</summary>"
            + table_html(diameter_rows(head), left=("class", "flag"))
            + "</details>"
        )
    for n in head.get("notes") or []:
        parts.append(f"<p class='meta'>{html.escape(n)}</p>")
    return "\n".join(parts)


def _ci_text(r: dict | None, k: int | None = None) -> str:
    """ "1.2 (0.93–1.5)" with an extrapolation flag ("extrap. 2/4") where the dict says so."""
    if not r or r.get("ratio") is None:
        return "—"
    txt = f"{_fmt(r['ratio'], '.2g')} ({_fmt(r['ci_low'], '.2g')}–{_fmt(r['ci_high'], '.2g')})"
    if r.get("extrapolated"):
        txt += f" <span class='flag'>extrap. {r['n_extrapolated']}/{k}</span>"
    return txt


def overview_html(pairs: list[tuple[str, str, dict]]) -> str:
    """The demo index's first screen: per pair of panels (title, link, headline) one bold line saying who
    needs less air kerma for which details, and one table of every class: ratio, CI, at what kerma, at the
    ends of the dose series, heterogeneity, and the ratio the panels' MTF and noise predict."""
    lines, rows = [], []
    for title, link, head in pairs:
        if not head or not head.get("classes"):
            continue
        la, lb = head["labels"]
        lines.append(
            f"<li><strong>{html.escape(title)}</strong> ({html.escape(la)} vs {html.escape(lb)}, "
            f"<a href='{html.escape(link)}'>comparison</a>): <strong>{html.escape(head['conclusion'])}</strong>"
            + (f"<br><span class='meta'>Why — {html.escape(head['why'])}</span>" if head.get("why") else "")
            + "</li>"
        )
        na, nb = head.get("short_labels") or (la, lb)
        for c in head["classes"]:
            lo_k, hi_k = c["other_kermas"]
            i2 = "—" if c["k"] < 2 else f"{100 * c['i2']:.0f} %"
            cells = [
                f"<td class='l'>{html.escape(title)}</td>",
                f"<td class='l'>{html.escape(c['name'])}</td>",
                f"<td>{html.escape(nb)} ÷ {html.escape(na)}</td>",
                f"<td>{_ci_text(c)}<br><span class='meta'>at {c['kerma_ugy']:.3g} µGy</span></td>",
                f"<td>{_ci_text(lo_k, c['k'])}<br><span class='meta'>at {lo_k['kerma_ugy']:.3g} µGy</span></td>",
                f"<td>{_ci_text(hi_k, c['k'])}<br><span class='meta'>at {hi_k['kerma_ugy']:.3g} µGy</span></td>",
                f"<td>{i2} ({c['k']})</td>",
                f"<td>{_fmt(c.get('predicted_ratio'), '.2g')}</td>",
                f"<td class='l'>{html.escape(c['verdict'])}</td>",
            ]
            rows.append("<tr>" + "".join(cells) + "</tr>")
    if not rows:
        return ""
    head_row = (
        "<tr><th class='l'>panels</th><th class='l'>details</th><th>kerma ratio</th><th>pooled (95 % CI)</th>"
        "<th>at the series' lowest kerma</th><th>at its highest</th><th>I² (diameters)</th>"
        "<th>predicted from MTF, NNPS, noise</th><th class='l'>verdict</th></tr>"
    )
    return (
        f"<ul class='answer'>{''.join(lines)}</ul>"
        f"<table><thead>{head_row}</thead><tbody>{''.join(rows)}</tbody></table>"
        "<p class='meta'>Kerma ratio: the air kerma the second panel needs ÷ the air kerma the first needs for the "
        "same threshold contrast (model observer, each panel's dose series), at the threshold the first reaches "
        "at the stated kerma; above 1 the first panel needs less. Pooled over the diameters of each class by "
        "random effects (DerSimonian & Laird); verdicts from the 95 % CI; extrap.: diameters whose kerma lies "
        "beyond those measured.</p>"
    )


def headline_csv(head: dict) -> str:
    """The headline as CSV: a row per class (pooled, kind = class) and per diameter (kind = diameter), with
    an ``extrapolated`` column."""
    rows = []
    for c in head.get("classes") or []:
        for k, r in [(c["kerma_ugy"], c)] + [(o["kerma_ugy"], o) for o in c["other_kermas"]]:
            rows.append(
                {
                    "kind": "class",
                    "detail_class": c["name"],
                    "diameter_mm": None,
                    "kerma_a_ugy": k,
                    "ratio": r.get("ratio"),
                    "ci_low": r.get("ci_low"),
                    "ci_high": r.get("ci_high"),
                    "i2": r.get("i2"),
                    "q": c["q"] if r is c else None,
                    "p_value": c["p_value"] if r is c else None,
                    "p_holm": c.get("p_holm_classes") if r is c else None,
                    "extrapolated": bool(r.get("n_extrapolated")),
                    "predicted_ratio": c.get("predicted_ratio") if r is c else None,
                }
            )
    for r in head.get("per_diameter") or []:
        rows.append(
            {
                "kind": "diameter",
                "detail_class": r.get("detail_class"),
                "diameter_mm": r["diameter_mm"],
                "kerma_a_ugy": r["kerma_a_ugy"],
                "ratio": r.get("ratio"),
                "ci_low": r.get("ci_low"),
                "ci_high": r.get("ci_high"),
                "i2": None,
                "q": None,
                "p_value": r.get("p_value"),
                "p_holm": r.get("p_holm"),
                "extrapolated": bool(r.get("extrapolated")),
                "predicted_ratio": r.get("predicted_ratio"),
            }
        )
    buf = io.StringIO()
    pd.DataFrame(rows).to_csv(buf, index=False)
    return buf.getvalue()
