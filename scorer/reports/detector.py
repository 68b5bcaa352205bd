"""HTML reports for ``limen detector`` and ``limen compare-detectors`` (via :func:`scorer.reports.html.html_page`)."""

from __future__ import annotations

import html

import numpy as np

from scorer.reports.html import display_records, figure_to_svg, html_page, plain_log_ticks, table_html


def summary_rows(d: dict) -> list[tuple[str, str]]:
    """(quantity, value) lines summarising a detector JSON (printed by the CLI, tabled in the report)."""
    rows = []
    nyq = d.get("nyquist_per_mm")
    if d.get("mtf"):
        m = d["mtf"]
        f, v = np.asarray(m["frequency_per_mm"]), np.asarray(m["value"])
        for x in (0.5, 1, 2, 5):
            if x <= f.max():
                rows.append((f"MTF at {x:g} /mm", f"{np.interp(x, f, v):.3f}"))
        if nyq:
            rows.append((f"MTF at Nyquist ({nyq:.2f} /mm)", f"{np.interp(nyq, f, v):.3f}"))
        rows.append(("edge angle", ", ".join(f"{k}: {a:.2f}°" for k, a in (d.get("edge_angle_deg") or {}).items())))
    if d.get("nnps"):
        n = d["nnps"]
        f, v = np.asarray(n["frequency_per_mm"]), np.asarray(n["value_mm2"])
        for x in (0.5, 2):
            rows.append((f"NNPS at {x:g} /mm", f"{np.interp(x, f, v):.3e} mm²"))
        rows.append(
            (
                "NNPS ROIs",
                f"{n['n_rois']} from {n['n_images']} image(s), ±{100 * n['relative_uncertainty']:.1f} % per frequency",
            )
        )
    if d.get("dqe"):
        q = d["dqe"]
        f, v = np.asarray(q["frequency_per_mm"]), np.asarray(q["value"])
        for x in (0.5, 2):
            rows.append((f"DQE at {x:g} /mm", f"{np.interp(x, f, v):.3f}"))
    if d.get("defect_map"):
        dm = d["defect_map"]
        lines = [x.get("name", "") for x in dm.get("lines", [])]
        rows.append(
            (
                "defect map (flat fields)",
                f"{len(dm.get('pixels', []))} defective pixel(s), {len(lines)} line(s)"
                + (f": {', '.join(lines[:5])}" if lines else "")
                + f" (expected false flags {dm.get('false_flag_rate', 0):g} per map; for limen score --defect-map)",
            )
        )
    if d.get("conversion"):
        c = d["conversion"]
        rows.append(
            (
                "conversion",
                f"{c.get('kind')} offset {c.get('offset'):.4g} gain {c.get('gain'):.4g}"
                + (f" R² {c['r_squared']:.5f}" if c.get("r_squared") is not None else "")
                + (" NON-LINEAR" if c.get("nonlinear") else ""),
            )
        )
    return rows


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _fig(title: str, xlabel: str, ylabel: str, logy: bool = False):
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6.4, 3.8))
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if logy:
        ax.set_yscale("log")
    ax.grid(True, alpha=0.3)
    return fig, ax


def _figure(svg: str, caption: str) -> str:
    return f"<figure>{svg}<figcaption>{html.escape(caption)}</figcaption></figure>"


def _mtf_plot(curves: dict[str, dict], nyquist: dict[str, float | None], colours: dict[str, str] | None = None) -> str:
    fig, ax = _fig("Presampling MTF", "spatial frequency (cycles/mm)", "MTF")
    for label, m in curves.items():
        line = ax.plot(m["frequency_per_mm"], m["value"], label=label, color=(colours or {}).get(label))
        _band(ax, m["frequency_per_mm"], m.get("ci_low"), m.get("ci_high"), line[0].get_color())
    for n in nyquist.values():
        if n:
            ax.axvline(n, ls=":", color="grey")
    ax.set_ylim(0, 1.05)
    ax.legend()
    return figure_to_svg(fig)


def _band(ax, f, lo, hi, color) -> None:
    """A 95 % CI as a shaded band (nothing when the curve has none)."""
    if lo is None or hi is None:
        return
    n = min(len(f), len(lo), len(hi))
    ax.fill_between(
        np.asarray(f)[:n],
        np.asarray(lo, dtype=float)[:n],
        np.asarray(hi, dtype=float)[:n],
        color=color,
        alpha=0.2,
        lw=0,
    )


def _nnps_plot(curves: dict[str, tuple], colours: dict[str, str] | None = None) -> str:
    fig, ax = _fig("Normalised noise power spectrum", "spatial frequency (cycles/mm)", "NNPS (mm²)", logy=True)
    for label, (f, v, *ci) in curves.items():
        line = ax.plot(f, v, label=label, color=(colours or {}).get(label))
        if ci:
            _band(ax, f, ci[0], ci[1], line[0].get_color())
    ax.legend()
    return figure_to_svg(fig)


def _dqe_plot(curves: dict[str, tuple], colours: dict[str, str] | None = None) -> str:
    """DQE curves with CI bands; values above 1 (not physical) stay visible and are flagged on the plot."""
    fig, ax = _fig("Detective quantum efficiency", "spatial frequency (cycles/mm)", "DQE")
    top = 1.05
    for label, (f, v, *ci) in curves.items():
        line = ax.plot(f, v, label=label, color=(colours or {}).get(label))
        if ci:
            _band(ax, f, ci[0], ci[1], line[0].get_color())
        vv = np.asarray([np.nan if x is None else x for x in v], dtype=float)
        if np.nanmax(vv, initial=0.0) > 1.0:
            top = max(top, float(np.nanmax(vv)) * 1.05)
            above = vv > 1.0
            ax.plot(np.asarray(f)[above], vv[above], "x", color="#a4161a", ms=5)
    if top > 1.05:
        ax.axhline(1.0, color="#a4161a", lw=0.8, ls="--")
        ax.text(
            0.98,
            0.97,
            "DQE > 1 (×): not physical — flagged",
            transform=ax.transAxes,
            ha="right",
            va="top",
            color="#a4161a",
            fontsize=8,
        )
    ax.set_ylim(0, top)
    ax.legend()
    return figure_to_svg(fig)


def nnps_display_scale(log_nnps: np.ndarray, fv, fu) -> np.ndarray:
    """The 2-D log NNPS with the zero-frequency bin masked (NaN): after detrending it holds ~nothing and would
    otherwise stretch the colour scale over decades and hide the structure."""
    out = np.array(log_nnps, dtype=float)
    iv, iu = int(np.argmin(np.abs(np.asarray(fv)))), int(np.argmin(np.abs(np.asarray(fu))))
    out[iv, iu] = np.nan
    return out


def _nnps_2d_plot(nnps) -> str:
    plt = _plt()
    fv, fu = nnps.frequency_2d_per_mm
    fig, ax = plt.subplots(figsize=(5.0, 4.4))
    img = np.log10(np.clip(nnps.nnps_2d_mm2, 1e-30, None))
    img = nnps_display_scale(img, fv, fu)
    lo, hi = np.nanpercentile(img, [2, 98])
    im = ax.imshow(img, extent=(fu[0], fu[-1], fv[-1], fv[0]), cmap="viridis", vmin=lo, vmax=hi)
    ax.set_xlabel("u (cycles/mm)")
    ax.set_ylabel("v (cycles/mm)")
    ax.set_title("2-D NNPS, log10(mm²); colour scale 2nd–98th percentile, f = 0 masked", fontsize=9)
    fig.colorbar(im, ax=ax)
    return figure_to_svg(fig)


def _thresholds_plot(series: dict[str, list[dict]], colours: dict[str, str] | None = None) -> str:
    """Threshold contrast against diameter: one colour per panel (``colours`` maps a series name's leading
    panel label to its colour), dashed for predictions, markers per scoring method, 95 % CIs as error bars."""
    fig, ax = _fig("Threshold contrast", "disc diameter (mm)", "threshold contrast (%)", logy=True)
    ax.set_xscale("log")
    for i, (label, rows) in enumerate(series.items()):
        rows = sorted((r for r in rows if r.get("threshold_contrast") is not None), key=lambda r: r["diameter_mm"])
        if not rows:
            continue
        col = next((c for name, c in (colours or {}).items() if label.startswith(name)), None)
        predicted = "predicted" in label
        ls = (":" if "NPWE" in label else "--") if predicted else "-"
        marker = "" if predicted else ("s" if "count" in label else "o")
        x = np.array([r["diameter_mm"] for r in rows])
        y = np.array([100 * r["threshold_contrast"] for r in rows])
        line = ax.plot(x, y, ls, marker=marker or None, ms=4, color=col, label=label, lw=1.2)
        lo = [r.get("ci_low") for r in rows]
        hi = [r.get("ci_high") for r in rows]
        if any(v is not None for v in lo) and any(v is not None for v in hi):
            lo_a = np.array([np.nan if v is None else 100 * v for v in lo])
            hi_a = np.array([np.nan if v is None else 100 * v for v in hi])
            ok = np.isfinite(lo_a) & np.isfinite(hi_a)
            ax.errorbar(
                x[ok] * (1.0 + 0.03 * (i % 3 - 1)),
                y[ok],
                yerr=[y[ok] - lo_a[ok], hi_a[ok] - y[ok]],
                fmt="none",
                ecolor=line[0].get_color(),
                elinewidth=0.9,
                capsize=2,
            )
        flagged = [r for r in rows if r.get("extrapolated") or r.get("censored")]
        if flagged:
            ax.plot(
                [r["diameter_mm"] for r in flagged],
                [100 * r["threshold_contrast"] for r in flagged],
                "x",
                color="#a4161a",
                ms=8,
                mew=1.5,
            )
    plain_log_ticks(ax)
    ax.legend(fontsize=7)
    return figure_to_svg(fig)


_METHOD = (
    "<p>Presampling MTF by the slanted-edge method (edge and angle found from the image; pixels projected on "
    "the edge normal into bins of a quarter pixel; central-difference LSF in a Tukey window; |FFT| normalised "
    "at zero frequency and corrected for the bin average and the finite difference). NNPS from 256 × 256 ROIs "
    "overlapping by half, each detrended with a 2-D second-order polynomial; 1-D cuts average 7 frequency "
    "rows each side of an axis, the axis excluded. DQE(f) = MTF²(f) / (K·q·NNPS(f)). After IEC 62220-1-1 and "
    "62220-1-2; results are not a compliance test of either standard.</p>"
)


def detector_report_html(result: dict, metrics=None, title: str = "Limen detector measurement") -> str:
    """The ``limen detector`` report: summary table, MTF, NNPS (1-D and 2-D), DQE, conversion, predictions."""
    sections = [
        (
            "Summary",
            table_html([{"quantity": k, "value": v} for k, v in summary_rows(result)], left=("quantity", "value")),
        )
    ]
    if result.get("warnings"):
        sections.append(
            ("Warnings", "<ul>" + "".join(f"<li>{html.escape(w)}</li>" for w in result["warnings"]) + "</ul>")
        )
    nyq = result.get("nyquist_per_mm")
    if result.get("mtf"):
        m = result["mtf"]
        curves = {f"{d} direction": c for d, c in (m.get("by_direction") or {}).items()}
        if len(curves) != 1:
            curves["mean"] = m
        sections.append(
            (
                "MTF",
                _figure(_mtf_plot(curves, {"": nyq}), "Presampling MTF up to 1.1 × Nyquist (dotted line: Nyquist)."),
            )
        )
    if result.get("nnps"):
        n = result["nnps"]
        body = _figure(
            _nnps_plot(
                {
                    "x cut": (n["frequency_per_mm"], n["x_mm2"]),
                    "y cut": (n["frequency_per_mm"], n["y_mm2"]),
                    "mean of the cuts": (n["frequency_per_mm"], n["value_mm2"], n.get("ci_low"), n.get("ci_high")),
                    "radial average": (n["radial_frequency_per_mm"], n["radial_mm2"]),
                }
            ),
            f"NNPS from {n['n_rois']} ROIs of {n['n_images']} flat field(s); relative standard error "
            f"≈ {100 * n['relative_uncertainty']:.1f} % per frequency.",
        )
        if metrics is not None and getattr(metrics, "nnps", None) is not None:
            body += _figure(_nnps_2d_plot(metrics.nnps), "2-D NNPS (zero frequency at the centre).")
        sections.append(("NNPS", body))
    if result.get("dqe"):
        q = result["dqe"]
        curves = {f"{d} direction": (q["frequency_per_mm"], v) for d, v in (q.get("by_direction") or {}).items()}
        curves["headline"] = (q["frequency_per_mm"], q["value"], q.get("ci_low"), q.get("ci_high"))
        sections.append(
            (
                "DQE",
                _figure(_dqe_plot(curves), f"K = {q['kerma_ugy']:g} µGy, q = {q['q_per_mm2_ugy']:g} per mm² per µGy."),
            )
        )
    else:
        sections.append(
            (
                "DQE",
                "<p>Not computed: the DQE needs an edge image, flat fields, the air kerma K and "
                "q of the beam; Limen does not guess them.</p>",
            )
        )
    ns = result.get("noise_series")
    if ns:
        comp = ns["components"]
        rows = [
            {
                "term": t,
                "value": f"{comp[t]['value']:.4g}",
                "95 % CI": "fixed at 0"
                if comp[t].get("fixed")
                else f"{comp[t]['ci_low']:.4g} – {comp[t]['ci_high']:.4g}",
                "units": u,
            }
            for t, u in (("electronic", "µGy² (e)"), ("quantum", "µGy (q)"), ("structure", "1 (s)"))
        ]
        groups = [
            {
                "kerma (µGy)": g["kerma_ugy"],
                "flats": g["n_images"],
                "ROIs": g["n_rois"],
                "variance (µGy²)": f"{g['variance']:.4g} ± {g['variance_se']:.2g}",
                "relative SD": f"{100 * g['relative_sd']:.3g} %" if g.get("relative_sd") else "—",
                "fitted": _fitted_variance(comp, g["kerma_ugy"]),
            }
            for g in ns["groups"]
        ]
        body = (
            f"<p>{html.escape(ns['quantum_limited_text'][:1].upper() + ns['quantum_limited_text'][1:])}.</p>"
            + table_html(rows, left=("term", "units"))
            + table_html(groups)
            + f"<p class='note'>{html.escape(ns['model'])}; weighted least squares, 95 % CIs.</p>"
        )
        dq = {
            f"{g['kerma_ugy']:g} µGy": (
                g["dqe"]["frequency_per_mm"],
                g["dqe"]["value"],
                g["dqe"]["ci_low"],
                g["dqe"]["ci_high"],
            )
            for g in ns["groups"]
            if g.get("dqe")
        }
        if dq:
            body += _figure(_dqe_plot(dq), "DQE at each kerma of the series (bands: 95 % CIs).")
        sections.append(("Noise components from flats at several kermas", body))
    if result.get("conversion"):
        c = result["conversion"]
        rows = []
        for kind in ("linear", "logarithmic"):
            if isinstance(c.get(kind), dict):
                rows.append(c[kind])
        body = (
            table_html(rows) if rows else table_html([{k: v for k, v in c.items() if not isinstance(v, (list, dict))}])
        )
        if c.get("nonlinear"):
            body += f"<p class='fail'>{html.escape(c.get('note') or 'non-linear response')}</p>"
        sections.append(("Conversion function", body))
    if result.get("predicted"):
        sections.append(
            (
                "Predicted threshold contrast",
                _figure(
                    _thresholds_plot(_by_observer(result["predicted"], "predicted")),
                    "From the MTF and NNPS (NPW/NPWE, ICRU Report 54 Fourier form), on the nominal contrast scale "
                    "(the fractional drop of the primary beam's air kerma behind the disc, no scatter); threshold "
                    "where the observer reaches the fixed detectability d′_T (dprime_threshold below), the same "
                    "for every M.",
                )
                + table_html(
                    *display_records(
                        result["predicted"],
                        [
                            "observer",
                            "diameter_mm",
                            "threshold_contrast",
                            "dprime_per_unit_contrast",
                            "dprime_threshold",
                            "criterion_pc",
                            "m_alternatives",
                        ],
                    ),
                    left=("observer",),
                ),
            )
        )
    sections.append(("Method", _METHOD))
    return html_page(title, sections, meta={"inputs": result.get("inputs")})


def _by_observer(rows: list[dict], prefix: str) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for r in rows:
        out.setdefault(f"{prefix} {r.get('observer', '')}".strip(), []).append(r)
    return out


def _side_by_side_rows(comparison: dict) -> list[dict]:
    """Table rows with readable values: contrasts in %, a value's 95 % CI beside it, the basis of each claim."""
    la, lb = comparison["labels"]
    out = []
    for r in comparison["table"]:
        pct = "threshold contrast" in r["quantity"]

        def show(v, ci, pct=pct):
            if v is None or not np.isfinite(v):
                return "—"
            txt = f"{100 * v:.3g} %" if pct else f"{v:.4g}"
            if ci:
                lo, hi = ci
                txt += f" ({100 * lo:.3g}–{100 * hi:.3g})" if pct else f" ({lo:.3g}–{hi:.3g})"
            return txt

        diff = r.get("better") or ""
        if r.get("basis"):
            diff = f"{diff} — {r['basis']}" if diff else r["basis"]
        out.append(
            {
                "quantity": r["quantity"].replace("threshold contrast", "threshold contrast (%)"),
                la: show(r.get(la), r.get(f"{la} 95% CI")),
                lb: show(r.get(lb), r.get(f"{lb} 95% CI")),
                "difference": diff,
            }
        )
    return out


def compare_report_html(comparison: dict, a: dict, b: dict, title: str = "Limen detector comparison") -> str:
    """The ``limen compare-detectors`` report: the headline first (when both dose series were given), then
    the summary, side-by-side table, overlaid curves (panel A blue, panel B orange throughout)."""
    from scorer.reports.headline import PANEL_COLOURS, headline_html

    la, lb = comparison["labels"]
    colours = {la: PANEL_COLOURS[0], lb: PANEL_COLOURS[1]}
    method = {"dprime": "d′ method", "count": "count method"}.get(comparison.get("scored_method", "dprime"), "")
    sections = []
    if comparison.get("headline"):
        sections.append(("The answer: air kerma for equal image quality", headline_html(comparison["headline"], a, b)))
    first = len(sections)  # where the summary goes; the equal-quality and noise sections follow it
    sections += [
        (
            "Summary",
            "<ul>"
            + "".join(f"<li>{html.escape(s)}</li>" for s in comparison["summary"])
            + "</ul>"
            + f"<p class='note'>A detector is called better at a point only where the two 95 % confidence "
            f"intervals do not overlap; where they overlap the page says “no clear difference”, and where "
            f"a quantity has no interval (predicted thresholds, MTF and DQE without repeated measurements) "
            f"it shows the values and claims nothing. Scored thresholds in the table: {method}.</p>",
        ),
        (
            "Side by side",
            table_html(
                _side_by_side_rows(comparison),
                columns=["quantity", la, lb, "difference"],
                left=("quantity", "difference"),
            ),
        ),
    ]
    if a.get("mtf") and b.get("mtf"):
        sections.append(
            (
                "MTF",
                _figure(
                    _mtf_plot(
                        {la: a["mtf"], lb: b["mtf"]},
                        {la: a.get("nyquist_per_mm"), lb: b.get("nyquist_per_mm")},
                        colours,
                    ),
                    "Mean presampling MTF of each detector (dotted: Nyquist).",
                ),
            )
        )
    if a.get("nnps") and b.get("nnps"):
        sections.append(
            (
                "NNPS",
                _figure(
                    _nnps_plot(
                        {
                            lab: (
                                d["nnps"]["frequency_per_mm"],
                                d["nnps"]["value_mm2"],
                                d["nnps"].get("ci_low"),
                                d["nnps"].get("ci_high"),
                            )
                            for lab, d in ((la, a), (lb, b))
                        },
                        colours,
                    ),
                    "Mean of the two axis cuts; NNPS scales as 1/kerma, so compare at equal kerma.",
                ),
            )
        )
    if a.get("dqe") and b.get("dqe"):
        sections.append(
            (
                "DQE",
                _figure(
                    _dqe_plot(
                        {
                            lab: (
                                d["dqe"]["frequency_per_mm"],
                                d["dqe"]["value"],
                                d["dqe"].get("ci_low"),
                                d["dqe"].get("ci_high"),
                            )
                            for lab, d in ((la, a), (lb, b))
                        },
                        colours,
                    ),
                    "Headline DQE of each detector (bands: 95 % CIs; a DQE above 1 is marked ×, flagged).",
                ),
            )
        )
    eq = comparison.get("equal_quality")
    if eq and eq.get("ratios"):
        rows = []
        for r in eq["ratios"]:
            rows.append(
                {
                    "diameter (mm)": r["diameter_mm"],
                    f"kerma ratio {lb}/{la} (95 % CI)": "—"
                    if r.get("ratio") is None
                    else f"{r['ratio']:.3g} ({_num(r.get('ci_low'))}–{_num(r.get('ci_high'))})",
                    "predicted from MTF, NNPS and noise": "—"
                    if r.get("predicted_ratio") is None
                    else f"{r['predicted_ratio']:.3g}",
                    f"β {la}": f"{r['beta_a']:.3f}",
                    f"β {lb}": f"{r['beta_b']:.3f}",
                    "at threshold (%)": f"{100 * r['threshold_contrast']:.3g}",
                }
            )
        sections.insert(
            first + 1,
            (
                "Equal image quality per diameter, at each diameter's own reference kerma",
                "<details><summary>The ratio at the centre of each diameter's own dose series, with CIs from "
                "draws of the two fits (the headline above compares every diameter at one kerma)</summary><ul>"
                + "".join(f"<li>{html.escape(s)}</li>" for s in eq["sentences"])
                + "</ul>"
                + table_html(rows)
                + f"<p class='note'>{html.escape(eq['note'])}; measured from the "
                "dose series (scored thresholds fitted as a·K^(−β)); the predicted ratio uses each "
                "panel's MTF and NNPS (Fourier NPW) carried to other kermas by its noise components, and "
                "has no CI.</p></details>",
            ),
        )
    nc = comparison.get("noise_components") or {}
    if nc:
        rows = []
        for lab, n in nc.items():
            c = n.get("components") or {}
            row = {"detector": lab}
            for t, unit in (("electronic", "µGy²"), ("quantum", "µGy"), ("structure", "")):
                v = c.get(t) or {}
                row[f"{t} ({unit})" if unit else t] = (
                    "—"
                    if v.get("value") is None
                    else (
                        f"{v['value']:.3g}"
                        + ("" if v.get("ci_low") is None else f" ({v['ci_low']:.3g}–{v['ci_high']:.3g})")
                    )
                )
            row["where quantum noise dominates"] = n.get("quantum_limited_text") or ""
            rows.append(row)
        sections.insert(
            first + (2 if eq and eq.get("ratios") else 1),
            (
                "Noise components",
                table_html(rows, left=("detector", "where quantum noise dominates"))
                + "<p class='note'>Pixel variance of the linearised flat fields σ²(K) = e + q·K + s·K² "
                "(electronic, quantum, structure), fitted by weighted least squares with 95 % CIs.</p>",
            ),
        )
    th = comparison.get("thresholds") or []
    if th:
        series: dict[str, list[dict]] = {}
        for r in th:
            series.setdefault(f"{r['detector']} {r['source']}", []).append(r)
        sections.append(
            (
                "Threshold contrast: predicted and scored",
                _figure(
                    _thresholds_plot(series, colours),
                    f"Blue: {la}; orange: {lb}. Dashed/dotted: predicted (NPW/NPWE) from MTF and NNPS; solid: "
                    "scored from phantom images, with 95 % CIs; red ×: extrapolated or censored.",
                )
                + table_html(
                    *display_records(
                        th, ["detector", "source", "diameter_mm", "threshold_contrast", "ci_low", "ci_high"]
                    ),
                    left=("detector", "source"),
                ),
            )
        )
    sections.append(("Method", _METHOD))
    return html_page(
        title,
        sections,
        meta={"inputs": comparison.get("inputs")},
        simulated=comparison.get("simulated"),
        dose=bool(eq or comparison.get("headline")),
    )


def _num(v) -> str:
    return "∞ (unbounded)" if v is None or not np.isfinite(v) else f"{v:.3g}"


def _fitted_variance(comp: dict, kerma_ugy: float) -> str:
    """σ² = e + q·K + s·K² from the fitted noise components, as shown in the table."""
    k = float(kerma_ugy)
    v = comp["electronic"]["value"] + comp["quantum"]["value"] * k + comp["structure"]["value"] * k**2
    return f"{v:.4g}"
