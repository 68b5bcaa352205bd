"""HTML report and CSV tables of a reader-study analysis (:class:`scorer.study.analysis.Analysis`).

Plots: contrast-detail curves per group (per reader, pooled with CI, model observer and
human-equivalent model curve), log-log; forest plot of the group comparison; Bland–Altman
plot of log10 human vs model thresholds (Bland & Altman, Lancet 1986).
"""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np
import pandas as pd

from scorer.errors import LimenError  # noqa: E402
from scorer.files import atomic_write_text  # noqa: E402
from scorer.observer.flags import capped_percent, threshold_flags
from scorer.observer.flags import legend as flag_legend
from scorer.observer.flags import text as flag_text
from scorer.observer.mafc import criterion_text
from scorer.reports.html import (
    READABLE,
    display_records,
    error_bars,
    figure_to_svg,
    html_page,
    plain_log_ticks,
    table_html,
    write_json,
)
from scorer.study.estimability import not_estimable_text  # noqa: E402


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def curves_figure(a, level) -> str:
    """Log-log contrast-detail plot for one group level."""
    plt = _plt()
    by = a.by
    fig, ax = plt.subplots(figsize=(6.4, 4.6))
    rc = a.reader_curves[a.reader_curves[by] == level]
    rc = rc[rc["estimable"]] if "estimable" in rc.columns else rc  # a not-estimable threshold is never drawn
    for i, (_reader, g) in enumerate(rc.groupby("reader")):
        g = g.sort_values("diameter_mm")
        ax.plot(
            g["diameter_mm"],
            g["threshold_contrast"] * 100,
            "-",
            color="0.6",
            lw=0.8,
            alpha=0.8,
            label="readers" if i == 0 else None,
        )
    pc = a.pooled_curves[a.pooled_curves[by] == level] if len(a.pooled_curves) else pd.DataFrame()
    missing = []
    if len(pc) and "estimable" in pc.columns:
        missing = sorted(pc.loc[~pc["estimable"], "diameter_mm"])
        pc = pc[pc["estimable"]]
    if len(pc):
        pc = pc.sort_values("diameter_mm")
        y = pc["threshold_contrast"].to_numpy() * 100
        hi = np.minimum(pc["ci_high"].to_numpy() * 100, 100.0)  # drawn capped at 100 %; the table flags it
        err = np.vstack(error_bars(y, pc["ci_low"].to_numpy() * 100, hi))
        ax.errorbar(
            pc["diameter_mm"], y, yerr=err, fmt="o-", color="#1f4e79", lw=2, capsize=3, label="pooled readers (95 % CI)"
        )
        flagged = np.array([bool(threshold_flags(r)) for r in pc.to_dict("records")])
        if flagged.any():
            ax.plot(
                pc["diameter_mm"].to_numpy()[flagged],
                y[flagged],
                "o",
                ms=11,
                mfc="none",
                mec="#a4161a",
                label="pooled, flagged (extrapolated or CI above 100 %, capped)",
            )
    mc = a.model_curves[a.model_curves[by] == level] if len(a.model_curves) else pd.DataFrame()
    if len(mc) and "estimable" in mc.columns:
        mc = mc[mc["estimable"]]
    for obs, g in mc.groupby("reader") if len(mc) else []:
        g = g.sort_values("diameter_mm")
        ax.plot(g["diameter_mm"], g["threshold_contrast"] * 100, "s--", color="#b5541c", label=f"model {obs}")
    hm = a.human_model
    if hm and hm.get("per_diameter") and hm.get("factor") is not None:
        per = pd.DataFrame(hm["per_diameter"])
        per = per[(per[by] == level) & per["human_equivalent_threshold"].notna()].sort_values("diameter_mm")
        if len(per):
            ax.plot(
                per["diameter_mm"],
                pd.to_numeric(per["human_equivalent_threshold"]) * 100,
                ":",
                color="#b5541c",
                lw=2,
                label=f"{hm['observer']} × factor {hm['factor']:.2f} (human-equivalent)",
            )
    ax.set_xscale("log")
    ax.set_yscale("log")
    if missing:  # pooled thresholds that are not estimable: marked at the top, never plotted as a value
        if not ax.has_data():
            ax.set_ylim(0.1, 100)
        ax.plot(
            missing,
            [0.93] * len(missing),
            "x",
            color="#b5541c",
            ms=8,
            mew=2,
            transform=ax.get_xaxis_transform(),
            label="pooled: not estimable",
        )
        for d in missing:
            ax.annotate(
                "not estimable",
                (d, 0.93),
                xycoords=ax.get_xaxis_transform(),
                xytext=(0, -12),
                textcoords="offset points",
                ha="center",
                fontsize=7,
                color="#b5541c",
            )
    plain_log_ticks(ax)
    ax.set_xlabel("disc diameter (mm)")
    ax.set_ylabel("threshold contrast (%)")
    ax.set_title(f"{by} {level}")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    return figure_to_svg(fig)


def forest_figure(a) -> str:
    plt = _plt()
    comp = a.comparison
    if "estimable" in comp.columns:
        comp = comp[comp["estimable"]]  # the table below says which rows are not estimable
    fig, ax = plt.subplots(figsize=(6.4, 0.6 + 0.45 * max(len(comp), 1)))
    labels = [f"{r.level} / {r.reference}, {r.diameter_mm:g} mm" for r in comp.itertuples()]
    yy = np.arange(len(comp))[::-1]
    ax.errorbar(
        comp["ratio"],
        yy,
        xerr=error_bars(comp["ratio"], comp["ci_low"], comp["ci_high"]),
        fmt="o",
        color="#1f4e79",
        capsize=3,
    )
    ax.axvline(1.0, color="k", lw=0.8)
    ax.set_yticks(yy, labels)
    ax.set_xscale("log")
    ax.set_xlabel(f"threshold ratio ({a.by}), 95 % CI")
    ax.grid(True, axis="x", which="both", alpha=0.3)
    return figure_to_svg(fig)


def bland_altman_figure(ba: dict, observer: str) -> str:
    plt = _plt()
    pts = pd.DataFrame(ba["points"])
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    ax.scatter(pts["mean_log10"], pts["diff_log10"], s=14, color="#1f4e79")
    for yv, style in ((ba["bias_log10"], "-"), (ba["loa_low_log10"], "--"), (ba["loa_high_log10"], "--")):
        ax.axhline(yv, color="#b5541c", ls=style, lw=1)
    ax.set_xlabel(f"mean of log10 thresholds (reader, {observer})")
    ax.set_ylabel(f"log10 reader − log10 {observer}")
    ax.set_title("Bland–Altman: bias and 95 % limits of agreement")
    ax.grid(True, alpha=0.3)
    return figure_to_svg(fig)


def _table(df: pd.DataFrame, cols, left=(), ci_percent: bool = True) -> str:
    rows, heads = _display(df, cols, ci_percent)
    left = [READABLE.get(c, c.replace("_", " ")) for c in left] + ["flags"]
    seen = [f for r in rows for f in str(r.get("flags") or "").split("; ") if f]
    legend = f"<p class='meta'>Flags: {html.escape(flag_legend(seen))}</p>" if seen else ""
    return table_html(rows, heads, left=left) + legend


def _display(df: pd.DataFrame, cols, ci_percent: bool):
    """Rows in % with readable headings; a censored threshold shows as '> highest offered' with no CI; a
    not-estimable one as 'not estimable (reason; N trials)' with no number at all."""
    rows, heads = display_records(
        _records(df, cols), [c for c in cols if df is not None and c in df.columns], ci_percent=ci_percent
    )
    more = ["threshold_contrast", "ci_low", "ci_high", "converged", "censored", "offered_min", "offered_max"]
    more += ["estimable", "not_estimable", "n_trials"]
    recs = _records(df, list(dict.fromkeys(cols + more)))
    for row, rec in zip(rows, recs):
        if ci_percent and "threshold_contrast" in cols:
            row["flags"] = flag_text(threshold_flags(rec))
        side = rec.get("censored")
        if rec.get("estimable") is False:
            for h in ("threshold (%)", "ratio", "factor"):
                if h in row:
                    row[h] = not_estimable_text(rec)
            if side in ("above", "below") and "threshold (%)" in row and _censored_bound(rec):
                # the contrasts shown bound it (a fact of the data, not the fitted value)
                row["threshold (%)"] = f"{_censored_bound(rec)}; {row['threshold (%)']}"
            for h in ("95 % CI low (%)", "95 % CI high (%)", "95 % CI low", "95 % CI high", "p value", "p adjusted"):
                if h in row:
                    row[h] = "—"
            continue
        if ci_percent and "95 % CI high (%)" in row:
            row["95 % CI high (%)"] = capped_percent(rec.get("ci_high"))
        if side in ("above", "below") and "threshold (%)" in row and _censored_bound(rec):
            row["threshold (%)"] = _censored_bound(rec)
            for h in ("95 % CI low (%)", "95 % CI high (%)"):
                if h in row:
                    row[h] = "—"
    if ci_percent and "threshold_contrast" in cols and rows:
        heads = heads + ["flags"]
    return rows, heads


def _censored_bound(rec: dict) -> str:
    """'> 45 (censored)': the contrast shown that bounds a censored threshold, in %; "" when unknown."""
    side = rec.get("censored")
    bound = rec.get("offered_max") if side == "above" else rec.get("offered_min")
    try:
        ok = bound is not None and np.isfinite(float(bound))
    except (TypeError, ValueError):
        ok = False
    return f"{'>' if side == 'above' else '<'} {100 * float(bound):.3g} (censored)" if ok else ""


def _records(df: pd.DataFrame, cols) -> list[dict]:
    if df is None or not len(df):
        return []
    cols = list(dict.fromkeys(c for c in cols if c in df.columns))
    return df[cols].to_dict("records")


def _details(summary: str, body: str, open_: bool = False) -> str:
    """A collapsible block (HTML <details>): long per-reader tables stay one click away."""
    return f"<details{' open' if open_ else ''}><summary>{summary}</summary>{body}</details>"


def _factor_text(e: dict) -> str:
    if e.get("factor") is None:
        return f"<strong>none</strong> — {html.escape(e.get('note') or 'no usable cell')}"
    ci = (
        f"95 % CI {e['ci_low']:.3g}–{e['ci_high']:.3g}"
        if e.get("ci_low") is not None and e.get("ci_high") is not None
        else "no CI"
    )
    used = f"{e.get('n_used', e.get('n_cells', 0))} of {e.get('n_cells', 0)} cells"
    return f"<strong>{e['factor']:.3g}</strong> ({ci}; geometric mean over {used})"


def _trend_text(tr: dict | None) -> str:
    if not tr:
        return "not tested (one diameter, or no bootstrap)"
    verdict = "<strong>depends on diameter</strong>" if tr["depends_on_diameter"] else "no dependence shown"
    lo, hi = tr["diameter_range_mm"]
    return (
        f"{verdict}: slope of log factor on log diameter {tr['slope']:+.3f} (95 % CI {tr['slope_ci_low']:+.3f} to "
        f"{tr['slope_ci_high']:+.3f}), p = {tr['p_value']:.3g} ({html.escape(tr['test'])}); fitted over "
        f"{lo:g}–{hi:g} mm"
        + (
            ". Each diameter then gets the trend's own factor and CI (table), and a verdict that uses this factor "
            "applies it per diameter."
            if tr["depends_on_diameter"]
            else "."
        )
    )


def human_factor_html(hm: dict, by: str) -> str:
    """The human/model factor per threshold method: overall value, cells left out, diameter test, detail."""
    methods = hm.get("by_method") or {"count": hm}
    body = (
        f"<p>Human/model ({html.escape(str(hm['observer']))}) threshold factor: human threshold ÷ model threshold, "
        "measured per threshold method so that each is applied like for like (a verdict on d′-method thresholds "
        "uses the d′ factor). Human threshold: geometric mean of the readers' own fits; CIs: bootstrap drawing "
        "readers and images once per resample for every cell, widened for the number of readers.</p><ul>"
    )
    for e in methods.values():
        label = html.escape(e.get("method_label") or "count method")
        body += f"<li>{label}: {_factor_text(e)}."
        if e.get("n_excluded"):
            cells = ", ".join(f"{x[by]} {x['diameter_mm']:g} mm" for x in e.get("excluded", []))
            body += (
                f" <b>{e['n_excluded']} cell(s) left out</b> (fit at a search bound or not estimable: "
                f"{html.escape(cells)})."
            )
        body += f" Diameter: {_trend_text(e.get('diameter_trend'))}</li>"
    if "dprime" not in methods:
        body += (
            "<li>d′ method: not measured — the model table holds decisions only. Give <code>limen analyse "
            "--model</code> the model's responses.csv to measure it; a d′-method verdict refuses a count-method "
            "factor.</li>"
        )
    body += "</ul>"
    for method, e in methods.items():
        per = e.get("per_diameter") or []
        if not per:
            continue
        cols = [by, "diameter_mm", "human_threshold", "model_threshold", "factor", "ci_low", "ci_high"]
        if any("trend_factor" in r for r in per):
            cols += ["trend_factor", "trend_ci_low", "trend_ci_high"]
        cols += ["human_equivalent_threshold"]
        rows, heads = display_records(per, cols, ci_percent=False)
        for r, rec in zip(rows, per):
            for k in ("factor", "trend factor", "trend ci low", "trend ci high"):
                if isinstance(r.get(k), float):
                    r[k] = f"{r[k]:.3g}"
            if rec.get("estimable") is False:  # left out of the factor: the reason, never the number
                r["factor"] = not_estimable_text(rec)
                for h in heads:
                    if r.get(h) is None:
                        r[h] = "—"
            r["flags"] = flag_text(rec.get("flags") or [])
            r["note"] = rec.get("note", "")
        table = table_html(rows, heads + ["flags", "note"], left=[by, "flags", "note"])
        body += _details(
            f"{html.escape(e.get('method_label') or method)}: factor per {html.escape(by)} × diameter "
            f"({len(per)} cells)",
            table + "<p class='meta'>CI columns: 95 % CI of the factor.</p>",
        )
    ba = methods.get("count", hm).get("bland_altman")
    if ba:
        body += (
            f"<figure>{bland_altman_figure(ba, hm['observer'])}<figcaption>Bias {ba['bias_log10']:.3f} "
            f"(factor {ba['factor_from_bias']:.3g}); 95 % limits of agreement {ba['loa_low_log10']:.3f} to "
            f"{ba['loa_high_log10']:.3f} in log10; {ba['n_pairs']} pairs (count method).</figcaption></figure>"
        )
    return body


def write_outputs(a, out_dir, meta: dict | None = None) -> dict:
    """Write analysis.json, CSV tables and report.html into ``out_dir``; return their paths."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the output folder ({exc.strerror or exc})", out) from None
    paths = {}
    pub = a.public_tables()  # a not-estimable threshold is never written as a number
    tables = {
        "reader_curves.csv": pub["reader_curves"],
        "pooled_curves.csv": pub["pooled_curves"],
        "model_curves.csv": pub["model_curves"],
        "between_reader_cv.csv": a.cv,
        "comparison.csv": pub["comparison"],
    }
    if a.human_model:
        rows = [
            {**r, "flags": flag_text(r.get("flags") or [])}
            for e in (a.human_model.get("by_method") or {"count": a.human_model}).values()
            for r in e.get("per_diameter") or []
        ]
        if rows:
            tables["human_model_factor.csv"] = pd.DataFrame(rows)
    for name, df in tables.items():
        if df is not None and len(df):
            atomic_write_text(out / name, df.to_csv(index=False))
            paths[name] = str(out / name)

    write_json(out / "analysis.json", {**a.to_json(), "meta": meta or {}})
    paths["analysis.json"] = str(out / "analysis.json")
    atomic_write_text(out / "report.html", report_html(a, meta))
    paths["report.html"] = str(out / "report.html")
    return paths


def report_html(a, meta: dict | None = None) -> str:
    by = a.by
    sections = []
    if isinstance(a.m_alternatives, dict):
        design = ", ".join(f"{m}-AFC at {d:g} mm" for d, m in sorted(a.m_alternatives.items()))
        crit = ", ".join(f"{p:.3g}" for _, p in sorted(a.criterion_pc.items()))
        crit = f"Pc = {crit} respectively"
    else:
        design = f"{a.m_alternatives}-alternative forced choice"
        crit = f"Pc = {a.criterion_pc:.4g}"
    ms = a.m_alternatives.values() if isinstance(a.m_alternatives, dict) else [a.m_alternatives]
    summary = (
        f"<p>{len(a.readers)} reader(s); {design}; threshold criterion {crit}: "
        f"{html.escape(criterion_text(getattr(a, 'criterion', None), ms))}; {a.n_boot} bootstrap resamples, "
        f"seed {a.seed}. Contrasts are shown in percent, on the nominal contrast scale of the layout (the "
        "fractional drop of the primary beam's air kerma behind each disc).</p>"
    )
    if any(n.startswith("Simulated readers") for n in a.notes):
        summary = (
            "<p class='fail'><b>Simulated readers:</b> the trials on this page come from a documented "
            "observer model, not from people (invented demo data).</p>"
        ) + summary
    if a.notes:
        summary += (
            "<p><strong>Notes</strong></p><ul>" + "".join(f"<li>{html.escape(n)}</li>" for n in a.notes) + "</ul>"
        )
    rule = getattr(a, "rule", None)
    if rule is not None:
        summary += (
            f"<p>A threshold is reported only where it is estimable: an interior maximum of the likelihood, at "
            f"least {rule.min_trials} trials per reader, a 95 % CI spanning at most a factor of "
            f"{rule.max_ci_ratio:g}, and neither threshold nor CI above {100 * rule.max_contrast:g} % contrast. "
            "Elsewhere the tables say <em>not estimable</em>, with the reason and the trials it had.</p>"
        )
    sections.append(("Study", summary))
    pub = a.public_tables()
    levels = sorted(a.reader_curves[by].unique(), key=str) if len(a.reader_curves) else []
    figs = "".join(
        f"<figure>{curves_figure(a, lv)}<figcaption>Contrast-detail curves, {html.escape(by)} "
        f"{html.escape(str(lv))}: each reader (grey), pooled readers with 95 % CI, model observer "
        f"and the human-equivalent model curve.</figcaption></figure>"
        for lv in levels
    )
    sections.append(("Contrast-detail curves", figs))
    cols = [
        "reader",
        by,
        "diameter_mm",
        "threshold_contrast",
        "ci_low",
        "ci_high",
        "n_trials",
        "n_images",
        "converged",
        "note",
    ]
    sections.append(
        (
            "Pooled readers (GEE with reader clusters)",
            "<p>Population-averaged threshold from a GEE whose mean is the linear-observer M-AFC "
            "function Pc<sub>M</sub>(k·C) (guess rate 1/M built in), reader clusters, bias-reduced "
            "robust standard errors, t interval with readers − 1 degrees of freedom.</p>"
            + _table(pub["pooled_curves"], cols + ["n_readers"], left=["reader", by, "note"]),
        )
    )
    sections.append(
        (
            "Between-reader variation",
            _details(
                f"Coefficient of variation of the readers' thresholds per {html.escape(by)} and diameter "
                f"({len(a.cv)} rows)",
                table_html(_records(a.cv, list(a.cv.columns)), left=[by]),
            )
            if len(a.cv)
            else "<p><em>Not estimated.</em></p>",
        )
    )
    n_rows = len(a.reader_curves)
    sections.append(
        (
            "Per-reader thresholds (bootstrap over images within reader)",
            _details(
                f"Each reader's threshold per {html.escape(by)} and diameter ({n_rows} rows)",
                _table(pub["reader_curves"], cols, left=["reader", by, "note"]),
            ),
        )
    )
    if len(a.model_curves):
        sections.append(
            (
                "Model observer",
                _details(
                    f"The model observer's thresholds ({len(a.model_curves)} rows)",
                    _table(pub["model_curves"], cols, left=["reader", by, "note"]),
                ),
            )
        )
    if len(a.comparison):
        comp = pub["comparison"]
        sents = "<ul>" + "".join(f"<li>{html.escape(s)}</li>" for s in comp["sentence"]) + "</ul>"
        forest = (
            f"<figure>{forest_figure(a)}</figure>" if "estimable" not in comp.columns or comp["estimable"].any() else ""
        )
        sections.append(
            (
                f"{by.capitalize()} comparison (mixed model on log thresholds, Holm-adjusted)",
                sents
                + forest
                + _table(
                    comp,
                    [
                        "level",
                        "reference",
                        "diameter_mm",
                        "ratio",
                        "ci_low",
                        "ci_high",
                        "p_value",
                        "p_adjusted",
                        "n_readers",
                        "method",
                    ],
                    left=["level", "reference", "method"],
                    ci_percent=False,
                ),
            )
        )
    hm = a.human_model
    if hm:
        sections.append(("Human readers vs model observer", human_factor_html(hm, by)))
    agr = a.agreement
    inter, intra = agr.get("inter_reader", {}), agr.get("intra_reader", {})
    rows = []
    for key, label in (
        ("fleiss_chosen_site", "Fleiss' kappa, chosen site"),
        ("fleiss_correct", "Fleiss' kappa, correct"),
    ):
        if inter.get(key):
            rows.append(
                {
                    "measure": label,
                    "kappa": inter[key]["kappa"],
                    "items": inter[key]["n_items"],
                    "raters": inter[key]["n_raters"],
                }
            )
    if inter.get("pairwise_cohen_correct"):
        pcc = inter["pairwise_cohen_correct"]
        rows.append(
            {
                "measure": f"Cohen's kappa, correct, mean of {pcc['n_pairs_of_readers']} reader pairs",
                "kappa": pcc["mean"],
                "items": inter.get("n_items"),
                "raters": 2,
            }
        )
    body = table_html(rows, left=["measure"]) if rows else ""
    if intra.get("per_reader"):
        body += _details(
            f"Intra-reader agreement (first two repeats, chosen site; {len(intra['per_reader'])} readers)",
            table_html(
                intra["per_reader"],
                ["reader", "n_pairs", "observed_agreement", "kappa", "ci_low", "ci_high"],
                left=["reader"],
            ),
        )
    for note in agr.get("notes", []):
        body += f"<p><em>{html.escape(note)}</em></p>"
    sections.append(("Reader agreement", body or "<p><em>Not estimated.</em></p>"))
    return html_page("Reader study: contrast-detail analysis", sections, meta)
