"""The nightly trend report: per detector, threshold contrast per diameter against date with the
baseline, control limits, alerts and acquisition-setting flags; the latest session as a table.

Written by ``limen trend`` and by ``limen nightly --report``: ``trend.html`` (self-contained),
``trend.csv`` (one row per session, method and diameter, with baseline and limits),
``alerts.csv`` and ``trend.json`` beside it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Iterable, Mapping

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from markupsafe import Markup  # noqa: E402

from scorer.errors import LimenError  # noqa: E402
from scorer.files import atomic_write_text  # noqa: E402
from scorer.qc.config import AlertRules  # noqa: E402
from scorer.qc.control import control_limits, ewma, ewma_halfwidth  # noqa: E402
from scorer.qc.sensitivity import detectable_change  # noqa: E402
from scorer.qc.stability import choose_baseline_window, rejected_sessions  # noqa: E402
from scorer.reports.html import figure_to_svg, render_page, table_html, write_json  # noqa: E402
from scorer.reports.templating import render  # noqa: E402


def trend_frame(store, rules: AlertRules, baseline_sessions=None) -> pd.DataFrame:
    """Every scored threshold with its detector's baseline, control limits and alert rules that fired.

    ``baseline_sessions``: detector name → K (the nightly configuration's; default 5), to mark the sessions of
    rejected (unstable) baseline windows (:mod:`scorer.qc.stability`).
    """
    k_of = baseline_sessions or (lambda det: 5)
    df = store.thresholds_frame()
    if df.empty:
        return df.assign(
            baseline=[],
            shewhart_low=[],
            shewhart_high=[],
            ewma=[],
            ewma_low=[],
            ewma_high=[],
            in_baseline=[],
            rejected_for_baseline=[],
            alerts=[],
        )
    alerts = pd.DataFrame(store.alerts())
    extra = []
    for (det, method), g in df.groupby(["detector", "method"], sort=False):
        bl = store.baseline(det, method)
        chosen, tested = choose_baseline_window(g, k_of(det), rules.stability_alpha)
        rejected = rejected_sessions(tested, sorted(bl[2]) if bl is not None else chosen)
        g = g.sort_values(["session_date", "session_id"])
        order = g.drop_duplicates("session_id")
        for d, gd in g.groupby("diameter_mm"):
            row = None
            if bl is not None:
                frame, last, ids, _src = bl
                m = frame[np.isclose(frame["diameter_mm"], d)]
                row = m.iloc[0] if len(m) else None
            after = (
                []
                if bl is None
                else [
                    int(s)
                    for s, dt in zip(order["session_id"], order["session_date"])
                    if (str(dt), int(s)) > (str(bl[1][0]), int(bl[1][1])) and int(s) not in bl[2]
                ]
            )
            xs, t_after = [], 0
            for r in gd.itertuples():
                rec = {
                    "session_id": r.session_id,
                    "method": method,
                    "diameter_mm": d,
                    "in_baseline": bool(bl is not None and int(r.session_id) in bl[2]),
                    "rejected_for_baseline": int(r.session_id) in rejected,
                }
                if row is not None:
                    lim = control_limits(row, rules)
                    rec.update(
                        baseline=lim["baseline"], shewhart_low=lim["shewhart_low"], shewhart_high=lim["shewhart_high"]
                    )
                    if int(r.session_id) in after and np.isfinite(r.threshold_contrast) and r.threshold_contrast > 0:
                        xs.append(np.log10(r.threshold_contrast))
                        t_after += 1
                        z = ewma(xs, rules.ewma_lambda, row["mean_log10"])[-1]
                        w = ewma_halfwidth(row["sigma_log10"], int(row["n_sessions"]), rules, t_after)
                        rec.update(
                            ewma=10**z, ewma_low=10 ** (row["mean_log10"] - w), ewma_high=10 ** (row["mean_log10"] + w)
                        )
                if len(alerts):
                    hit = alerts[
                        (alerts["session_id"] == r.session_id)
                        & (alerts["method"] == method)
                        & np.isclose(alerts["diameter_mm"], d)
                    ]
                    rec["alerts"] = ", ".join(sorted(set(hit["rule"])))
                extra.append(rec)
    ex = pd.DataFrame(extra)
    out = df.merge(ex, on=["session_id", "method", "diameter_mm"], how="left")
    for c in ("baseline", "shewhart_low", "shewhart_high", "ewma", "ewma_low", "ewma_high"):
        if c not in out:
            out[c] = np.nan
    if "alerts" not in out:
        out["alerts"] = ""
    out["alerts"] = out["alerts"].fillna("")
    out["rejected_for_baseline"] = out["rejected_for_baseline"].fillna(False).astype(bool)
    out["flags"] = out["flags"].map(lambda f: "; ".join(json.loads(f or "[]")))
    return out


def trend_figure(det_frame: pd.DataFrame, method: str, rules: AlertRules):
    """One panel per diameter: threshold contrast (%) against date, CI bars, baseline band, limits."""
    g = det_frame[det_frame["method"] == method].copy()
    g["date"] = pd.to_datetime(g["session_date"])
    diams = sorted(g["diameter_mm"].unique())
    ncol = min(3, len(diams))
    nrow = int(np.ceil(len(diams) / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(4.3 * ncol, 3.0 * nrow), squeeze=False, sharex=True)
    for ax in axes.flat[len(diams) :]:
        ax.set_visible(False)
    for ax, d in zip(axes.flat, diams):
        s = g[np.isclose(g["diameter_mm"], d)].sort_values(["date", "session_id"])
        y = 100 * s["threshold_contrast"].to_numpy(float)
        lo = 100 * s["ci_low"].to_numpy(float)
        hi = 100 * s["ci_high"].to_numpy(float)
        x = s["date"].to_numpy()
        if s["baseline"].notna().any():
            b = 100 * s["baseline"].to_numpy(float)
            ax.plot(x, b, color="#2a6f97", lw=1, label="baseline")
            ax.fill_between(
                x,
                100 * s["shewhart_low"].to_numpy(float),
                100 * s["shewhart_high"].to_numpy(float),
                color="#2a6f97",
                alpha=0.12,
                lw=0,
                label=f"±{rules.control_sigma:g} σ control limits",
            )
            ax.plot(
                x,
                b * (1 + rules.worse_fraction),
                color="#2a6f97",
                ls=":",
                lw=1,
                label=f"baseline +{100 * rules.worse_fraction:g} %",
            )
            if s["ewma"].notna().any():
                ax.plot(x, 100 * s["ewma"].to_numpy(float), color="#8a6d00", lw=1, ls="--", label="EWMA")
                ax.plot(x, 100 * s["ewma_high"].to_numpy(float), color="#8a6d00", lw=0.8, ls=":", label="EWMA limit")
        if s["acceptable"].notna().any() and s["compared_contrast"].notna().any():
            f = (s["compared_contrast"] / s["threshold_contrast"]).to_numpy(float)
            ax.plot(
                x,
                100 * s["acceptable"].to_numpy(float) / f,
                color="#a4161a",
                lw=1,
                ls="-.",
                label="acceptable limit (model scale)",
            )
        err = np.vstack([np.clip(y - lo, 0, None), np.clip(hi - y, 0, None)])
        err = np.where(np.isfinite(err), err, 0)
        base = s["in_baseline"].fillna(False).to_numpy(bool)
        flagged = s["flags"].astype(bool).to_numpy()
        alert = s["alerts"].astype(bool).to_numpy()
        ax.errorbar(x, y, yerr=err, fmt="none", ecolor="#555", elinewidth=0.8, capsize=2)
        ax.plot(x[~flagged], y[~flagged], "o", color="#1b1b1b", ms=4, label="session")
        if flagged.any():
            ax.plot(x[flagged], y[flagged], "^", mfc="white", mec="#d08a00", ms=7, label="settings flag")
        if base.any():
            ax.plot(x[base], y[base], "s", mfc="none", mec="#2a6f97", ms=8, label="baseline session")
        rej = s["rejected_for_baseline"].fillna(False).to_numpy(bool)
        if rej.any():
            ax.plot(x[rej], y[rej], "x", color="#7b2cbf", ms=8, mew=1.5, label="rejected for baseline (unstable)")
        if alert.any():
            ax.plot(x[alert], y[alert], "o", mfc="none", mec="#a4161a", mew=2, ms=11, label="alert")
        # linear axis: a session's thresholds stay within a factor of a few, where log ticks would read 6×10⁻¹
        ax.set_title(f"{d:g} mm")
        ax.set_ylabel("threshold contrast (%)")
        ax.grid(True, which="both", alpha=0.25)
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%d %b"))
        ax.tick_params(axis="x", rotation=45, labelsize=8)
    handles, labels = [], []
    for ax in axes.flat:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if lab not in labels:
                handles.append(h)
                labels.append(lab)
    fig.legend(
        handles,
        labels,
        loc="lower center",
        ncol=min(4, len(labels)),
        fontsize=8,
        frameon=False,
        bbox_to_anchor=(0.5, -0.02),
    )
    fig.tight_layout(rect=(0, 0.07, 1, 1))
    return fig


def write_trend_report(
    store: Any,
    out_dir: str | Path,
    rules: AlertRules | None = None,
    programme: str = "Nightly phantom QC",
    method: str | None = None,
    config: Any = None,
) -> Path:
    """Write trend.html, trend.csv, alerts.csv and trend.json into ``out_dir``; returns the HTML path.

    ``config``: the nightly configuration (each detector's baseline length K); default K = 5.
    """
    rules = rules or AlertRules()
    k_of = (lambda det: config.by_name(det).baseline_sessions) if config is not None else None
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimenError(f"cannot create the output folder ({exc.strerror or exc})", out) from None
    frame = trend_frame(store, rules, k_of)
    alerts = store.alerts()
    cols = [
        "detector",
        "session_id",
        "session_date",
        "n_images",
        "kvp",
        "flags",
        "method",
        "observer",
        "diameter_mm",
        "threshold_contrast",
        "ci_low",
        "ci_high",
        "in_baseline",
        "rejected_for_baseline",
        "baseline",
        "shewhart_low",
        "shewhart_high",
        "ewma",
        "ewma_low",
        "ewma_high",
        "compared_contrast",
        "acceptable",
        "verdict",
        "alerts",
    ]
    atomic_write_text(out / "trend.csv", frame.reindex(columns=cols).to_csv(index=False))
    atomic_write_text(
        out / "alerts.csv",
        pd.DataFrame(
            alerts,
            columns=[
                "id",
                "session_id",
                "detector",
                "session_date",
                "method",
                "diameter_mm",
                "rule",
                "direction",
                "value",
                "reference",
                "message",
                "emailed",
            ],
        ).to_csv(index=False),
    )
    sessions = store.sessions()
    quarantine = store.quarantine_log()
    missing = store.missing_alerts()
    write_json(
        out / "trend.json",
        {
            "programme": programme,
            "rules": rules.__dict__,
            "sessions": sessions,
            "thresholds": frame.reindex(columns=cols).to_dict(orient="records"),
            "alerts": alerts,
            "missing_qc": missing,
            "quarantine": quarantine,
        },
    )
    detectors = []
    for det in sorted(frame["detector"].unique()) if len(frame) else []:
        dframe = frame[frame["detector"] == det]
        meth = method or _main_method(dframe, sessions, det)
        flagged = [s for s in sessions if s["detector"] == det and s["flags"]]
        det_alerts = [a for a in alerts if a["detector"] == det]
        detectors.append(
            {
                "name": det,
                "figure": Markup(figure_to_svg(trend_figure(dframe, meth, rules))),
                "method": meth,
                "observer": str(dframe["observer"].iloc[0]).upper(),
                "baseline": _baseline_status(store, det, meth, dframe),
                "latest": _latest(dframe, meth),
                "alerts_table": _alert_table(det_alerts) if det_alerts else None,
                "flags_table": None
                if not flagged
                else Markup(
                    table_html(
                        [
                            {"date": s["session_date"], "session": s["id"], "flags": "; ".join(s["flags"])}
                            for s in flagged
                        ],
                        left=["date", "flags"],
                    )
                ),
            }
        )
    missing_table = None
    if missing:
        missing_table = table_html(
            [
                {
                    "raised": f"{m['created_at']:%Y-%m-%d %H:%M}",
                    "kind": m["kind"],
                    "detector": m["detector"] or "—",
                    "message": m["message"],
                    "e-mailed": "yes" if m["emailed"] else "no",
                }
                for m in missing[-100:]
            ],
            left=["kind", "detector", "message", "e-mailed"],
        )
    quarantine_table = None
    if quarantine:
        quarantine_table = table_html(
            [{"file": q["path"], "reason": q["reason"], "moved to": q["moved_to"]} for q in quarantine[-50:]],
            left=["file", "reason", "moved to"],
        )
    page = out / "trend.html"
    atomic_write_text(
        page,
        render_page(
            "trend.html",
            f"{programme}: nightly trend",
            {"rules": rules.__dict__, "database": store_display(store)},
            simulated=simulated_sentence(sessions, store.simulated_images()),
            summary_table=_summary(frame, sessions, alerts),
            detectors=detectors,
            missing_table=None if missing_table is None else Markup(missing_table),
            quarantine_table=None if quarantine_table is None else Markup(quarantine_table),
        ),
    )
    return page


def simulated_sentence(sessions: list[dict], simulated: dict[int, int | None]) -> str | None:
    """A sentence naming, per detector, the images of ``sessions`` that Limen's simulator made, or None when none.

    ``simulated``: session id → its simulated images, as stored with the session when it was scored (the DICOM
    Manufacturer of each image; :meth:`scorer.qc.queries.QueryOps.simulated_images`).
    """
    per_det: dict[str, list[int]] = {}  # detector → [simulated images, all images, sessions with simulated ones]
    for s in sessions:
        counts = per_det.setdefault(str(s["detector"]), [0, 0, 0])
        n_sim = simulated.get(int(s["id"])) or 0
        counts[0] += n_sim
        counts[1] += int(s["n_images"])
        counts[2] += n_sim > 0
    parts = [
        f"{det}: {n_sim} of {n_all} image(s), in {n_ses} session(s)"
        for det, (n_sim, n_all, n_ses) in sorted(per_det.items())
        if n_sim
    ]
    if not parts:
        return None
    return "Made by Limen's physics simulator, not by an X-ray unit — " + "; ".join(parts) + "."


def baseline_sessions_text(session_ids: Iterable[int], dates: Mapping[int, str]) -> str:
    """The sessions of a baseline named by acquisition date, the database ids after them as a detail.

    "acquired 2026-03-02, 2026-03-03 (2 sessions), 2026-03-05 (session ids 1, 3, 4, 7)"; ``dates``: session id →
    its acquisition date (YYYY-MM-DD), a session missing from it is named by its id alone.
    """
    ids = sorted(int(i) for i in session_ids)
    order = sorted(ids, key=lambda i: (dates.get(i, "9999-99-99"), i))
    per_date: dict[str, int] = {}
    for i in order:
        day = dates.get(i, f"session {i} (date unknown)")
        per_date[day] = per_date.get(day, 0) + 1
    named = ", ".join(day if n == 1 else f"{day} ({n} sessions)" for day, n in per_date.items())
    label = "session id" if len(ids) == 1 else "session ids"
    return f"acquired {named} ({label} {', '.join(map(str, order))})"


def store_display(store) -> str:
    from scorer.qc.engine import display_url

    return display_url(store.url)


def _main_method(dframe, sessions, det) -> str:
    vm = [s["verdict_method"] for s in sessions if s["detector"] == det and s["verdict_method"]]
    return vm[-1] if vm else str(dframe["method"].iloc[0])


def _summary(frame: pd.DataFrame, sessions: list[dict[str, Any]], alerts: list[dict[str, Any]]) -> Markup | None:
    """The summary table, one row per detector (None when no session is scored yet)."""
    if frame.empty:
        return None
    rows = []
    for det in sorted(frame["detector"].unique()):
        ss = [s for s in sessions if s["detector"] == det]
        last = ss[-1]
        al = [a for a in alerts if a["detector"] == det]
        rows.append(
            {
                "detector": det,
                "sessions": len(ss),
                "first": ss[0]["session_date"],
                "latest": last["session_date"],
                "latest verdict": last["overall_verdict"],
                "alerts (latest session)": sum(a["session_id"] == last["id"] for a in al),
                "alerts (all)": len(al),
            }
        )
    return Markup(table_html(rows, left=["detector", "first", "latest", "latest verdict"]))


def _latest(dframe: pd.DataFrame, method: str) -> dict[str, Any]:
    """The latest session of a detector: its date, id, image count and its table per diameter."""
    g = dframe[dframe["method"] == method]
    last = g[g["session_id"] == g.sort_values(["session_date", "session_id"])["session_id"].iloc[-1]]
    rows = []
    for r in last.itertuples():
        rows.append(
            {
                "diameter mm": r.diameter_mm,
                "C_T %": 100 * r.threshold_contrast,
                "95% CI %": "—" if not np.isfinite(r.ci_low) else f"{100 * r.ci_low:.3g}–{100 * r.ci_high:.3g}",
                "baseline %": 100 * r.baseline if np.isfinite(r.baseline) else None,
                "ratio to baseline": r.threshold_contrast / r.baseline if np.isfinite(r.baseline) else None,
                "limit %": 100 * r.acceptable if np.isfinite(r.acceptable) else None,
                "verdict": r.verdict,
                "alerts": r.alerts or "",
            }
        )
    return {
        "date": str(last["session_date"].iloc[0]),
        "session_id": int(last["session_id"].iloc[0]),
        "n_images": int(last["n_images"].iloc[0]),
        "table": Markup(table_html(rows, left=["verdict", "alerts"])),
    }


def _baseline_status(
    store: Any, det: str, method: str, dframe: pd.DataFrame, rules: AlertRules | None = None
) -> Markup:
    """Which sessions form the baseline, or why there is none yet; the sessions rejected as unstable."""
    bl = store.baseline(det, method)
    g = dframe[dframe["method"] == method].drop_duplicates("session_id")
    rej = g[g["rejected_for_baseline"]].sort_values(["session_date", "session_id"])
    rej_txt = (
        ""
        if rej.empty
        else " Rejected as a baseline (a trend or step ran through them: baseline unstable): "
        + ", ".join(f"{d} (session {int(i)})" for d, i in zip(rej["session_date"], rej["session_id"]))
        + "."
    )
    if bl is None:
        head = (
            "<strong>No baseline yet</strong>: the control rules wait for a stable run of sessions "
            "(or `limen baseline set`)."
        )
    else:
        dates = {int(s["id"]): str(s["session_date"]) for s in store.sessions(det)}
        head = f"Baseline ({bl[3]}): {det}, {baseline_sessions_text(bl[2], dates)}."
    sensitivity_table = None
    if bl is not None and rules is not None:
        sens = detectable_change(bl[0], rules)
        sensitivity_table = Markup(
            table_html(
                [
                    {
                        "diameter mm": r["diameter_mm"],
                        "σ log10": round(r["sigma_log10"], 4),
                        "one session ×": round(r["single_session_ratio"], 3),
                        "rule": r["single_session_rule"] or "—",
                        "kerma fall %": round(100 * r["kerma_fall_single"]),
                        "sustained ×": round(r["sustained_ratio"], 3),
                        "rule ": r["sustained_rule"] or "—",
                        "kerma fall % ": round(100 * r["kerma_fall_sustained"]),
                    }
                    for r in sens.to_dict("records")
                ],
                left=["rule", "rule "],
            )
        )
    return render("trend_baseline.html", status=head + rej_txt, sensitivity_table=sensitivity_table)


def _alert_table(alerts: list[dict[str, Any]]) -> Markup:
    """The table of a detector's alerts (the latest 100)."""
    return Markup(
        table_html(
            [
                {
                    "date": a["session_date"],
                    "diameter mm": a["diameter_mm"],
                    "rule": a["rule"],
                    "direction": a["direction"],
                    "message": a["message"],
                    "e-mailed": "yes" if a["emailed"] else "no",
                }
                for a in alerts[-100:]
            ],
            left=["date", "rule", "direction", "message", "e-mailed"],
        )
    )
