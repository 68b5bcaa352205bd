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
from scorer.study.estimability import not_estimable_text  # noqa: E402
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
        err = np.vstack(error_bars(y, pc["ci_low"].to_numpy() * 100, pc["ci_high"].to_numpy() * 100))
        ax.errorbar(
            pc["diameter_mm"], y, yerr=err, fmt="o-", color="#1f4e79", lw=2, capsize=3, label="pooled readers (95 % CI)"
        )
    mc = a.model_curves[a.model_curves[by] == level] if len(a.model_curves) else pd.DataFrame()
    if len(mc) and "estimable" in mc.columns:
        mc = mc[mc["estimable"]]
    for obs, g in mc.groupby("reader") if len(mc) else []:
        g = g.sort_values("diameter_mm")
        ax.plot(g["diameter_mm"], g["threshold_contrast"] * 100, "s--", color="#b5541c", label=f"model {obs}")
    hm = a.human_model
    if hm and hm.get("per_diameter"):
        per = pd.DataFrame(hm["per_diameter"])
        per = per[(per[by] == level) & per["human_equivalent_threshold"].notna()].sort_values("diameter_mm")
        if len(per):
            ax.plot(
                per["diameter_mm"],
                per["human_equivalent_threshold"] * 100,
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
    return table_html(rows, heads, left=[READABLE.get(c, c.replace("_", " ")) for c in left])


def _display(df: pd.DataFrame, cols, ci_percent: bool):
    """Rows in % with readable headings; a censored threshold shows as '> highest offered' with no CI; a
    not-estimable one as 'not estimable (reason; N trials)' with no number at all."""
    rows, heads = display_records(
        _records(df, cols), [c for c in cols if df is not None and c in df.columns], ci_percent=ci_percent
    )
    more = ["censored", "offered_min", "offered_max", "estimable", "not_estimable", "n_trials"]
    recs = _records(df, list(dict.fromkeys(cols + more)))
    for row, rec in zip(rows, recs):
        if rec.get("estimable") is False:
            for h in ("threshold (%)", "ratio", "factor"):
                if h in row:
                    row[h] = not_estimable_text(rec)
            for h in ("95 % CI low (%)", "95 % CI high (%)", "95 % CI low", "95 % CI high", "p value", "p adjusted"):
                if h in row:
                    row[h] = "—"
            continue
        side = rec.get("censored")
        if side in ("above", "below") and "threshold (%)" in row:
            bound = rec["offered_max"] if side == "above" else rec["offered_min"]
            row["threshold (%)"] = f"{'>' if side == 'above' else '<'} {100 * bound:.3g} (censored)"
            for h in ("95 % CI low (%)", "95 % CI high (%)"):
                if h in row:
                    row[h] = "—"
    return rows, heads


def _records(df: pd.DataFrame, cols) -> list[dict]:
    if df is None or not len(df):
        return []
    cols = [c for c in cols if c in df.columns]
    return df[cols].to_dict("records")


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
    if a.human_model and a.human_model.get("per_diameter"):
        tables["human_model_factor.csv"] = pd.DataFrame(a.human_model["per_diameter"])
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
    summary = (
        f"<p>{len(a.readers)} reader(s); {design}; threshold criterion {crit} (halfway between chance and "
        f"1 unless set); {a.n_boot} bootstrap resamples, seed {a.seed}. Contrasts are shown in percent.</p>"
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
    sections.append(("Between-reader variation", table_html(_records(a.cv, list(a.cv.columns)), left=[by])))
    sections.append(
        (
            "Per-reader thresholds (bootstrap over images within reader)",
            _table(pub["reader_curves"], cols, left=["reader", by, "note"]),
        )
    )
    if len(a.model_curves):
        sections.append(("Model observer", _table(pub["model_curves"], cols, left=["reader", by, "note"])))
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
    if hm and (hm.get("factor") is not None or hm.get("per_diameter")):
        if hm.get("factor") is not None:
            body = (
                f"<p>Human/model ({html.escape(hm['observer'])}) threshold factor over all diameters: "
                f"<strong>{hm['factor']:.3g}</strong> (95 % CI {hm['ci_low']:.3g}–{hm['ci_high']:.3g}; bootstrap "
                f"over readers and images). Multiply the model's thresholds by it for human-equivalent values.</p>"
            )
        else:
            body = (
                f"<p>Human/model ({html.escape(hm['observer'])}) threshold factor: <strong>not estimable</strong> — "
                "no diameter has an estimable pooled human and model threshold (reasons below).</p>"
            )
        per_recs = hm["per_diameter"]
        rows, heads = display_records(
            per_recs,
            [
                by,
                "diameter_mm",
                "human_threshold",
                "model_threshold",
                "factor",
                "ci_low",
                "ci_high",
                "human_equivalent_threshold",
            ],
            ci_percent=False,
        )
        for r, rec in zip(rows, per_recs):
            r["factor"] = None if r.get("factor") is None else f"{r['factor']:.3g}"
            if rec.get("estimable") is False:
                r["factor"] = not_estimable_text(rec)
                for h in heads:
                    if r.get(h) is None:
                        r[h] = "—"
        body += table_html(rows, heads, left=[by]) + "<p class='meta'>CI columns: 95 % CI of the factor.</p>"
        if hm.get("bland_altman"):
            ba = hm["bland_altman"]
            body += (
                f"<figure>{bland_altman_figure(ba, hm['observer'])}<figcaption>Bias {ba['bias_log10']:.3f} "
                f"(factor {ba['factor_from_bias']:.3g}); 95 % limits of agreement {ba['loa_low_log10']:.3f} to "
                f"{ba['loa_high_log10']:.3f} in log10; {ba['n_pairs']} pairs.</figcaption></figure>"
            )
        sections.append(("Human readers vs model observer", body))
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
        body += "<p>Intra-reader (first two repeats, chosen site):</p>" + table_html(
            intra["per_reader"],
            ["reader", "n_pairs", "observed_agreement", "kappa", "ci_low", "ci_high"],
            left=["reader"],
        )
    for note in agr.get("notes", []):
        body += f"<p><em>{html.escape(note)}</em></p>"
    sections.append(("Reader agreement", body or "<p><em>Not estimated.</em></p>"))
    return html_page("Reader study: contrast-detail analysis", sections, meta)
