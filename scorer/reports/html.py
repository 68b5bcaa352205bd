"""Self-contained HTML reports, plots embedded as SVG, and the caution text.

Every report Limen writes goes through :func:`html_page`, so the caution that
results support (and never replace) a qualified medical physicist's judgement
appears on every page.
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import platform
from pathlib import Path
from typing import Any, Iterable

import numpy as np
from markupsafe import Markup

from scorer.files import atomic_write_text
from scorer.reports.templating import render, stylesheet

CAUTION = (
    "Limen's results support, and never replace, the judgement of a qualified medical "
    "physicist. They inform the quality control of equipment used on patients; local "
    "regulations, national protocols and licensed practice prevail over anything shown here."
)

#: every page: Limen's numbers are for quality control of equipment, never for diagnosing a patient
NOT_FOR_DIAGNOSIS = "Not for clinical diagnosis: Limen measures equipment, not patients."
#: pages that speak of air kerma (README, "Dose series"): the choice of a clinical dose is not Limen's
DOSE_CAUTION = (
    "These numbers describe simulated or measured images under the stated model; choosing a clinical dose is a "
    "decision for a qualified medical physicist under local regulations, never for this tool alone."
)


def figure_to_svg(fig) -> str:
    """Render a matplotlib figure to an inline SVG string and close it."""
    import matplotlib.pyplot as plt

    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight")
    plt.close(fig)
    text = buf.getvalue()
    start = text.find("<svg")
    return text[start:] if start >= 0 else text


def table_html(
    rows: list[dict[str, Any]],
    columns: list[str] | None = None,
    headers: dict[str, str] | None = None,
    left: Iterable[str] = (),
) -> str:
    """A plain HTML table from a list of dicts (floats shown with 4 significant figures; template ``table.html``)."""
    if not rows:
        return str(render("table.html", rows=[], headings=[]))
    columns = columns or list(rows[0].keys())
    headers = headers or {}
    left = set(left)

    def cell(v: Any) -> str:
        if v is None or (isinstance(v, float) and not np.isfinite(v)):
            return "—"
        if isinstance(v, (float, np.floating)):
            return f"{float(v):.4g}"
        return str(v)

    headings = [{"cls": "l" if c in left else "", "text": headers.get(c, c)} for c in columns]
    body = []
    for r in rows:
        cells = []
        for c in columns:
            v = r.get(c)
            cls = "l" if c in left else ""
            if c == "verdict" and isinstance(v, str):
                cls = (cls + " " + v).strip()
            cells.append({"cls": cls, "text": cell(v)})
        body.append(cells)
    return str(render("table.html", rows=body, headings=headings))


def provenance() -> dict:
    """Versions and time, recorded in every report so a result can be reproduced."""
    import numpy  # noqa: E401
    import scipy

    from scorer import __version__
    from scorer.invocation import current_command

    out = {
        "command": current_command(),
        "limen_version": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }
    try:
        import statsmodels

        out["statsmodels"] = statsmodels.__version__
    except ImportError:  # pragma: no cover
        pass
    return out


def html_page(
    title: str,
    sections: list[tuple[str, str]],
    meta: dict[str, Any] | None = None,
    *,
    simulated: str | None = None,
    dose: bool = False,
) -> str:
    """A self-contained HTML page: title, caution, then (heading, html) sections, then provenance.

    Every page carries the physicist caution and "not for clinical diagnosis"; ``simulated`` (a sentence
    saying which inputs were simulated) adds the simulated-data banner, ``dose`` the caution on choosing a
    clinical dose (:data:`DOSE_CAUTION`). Rendered by the template ``page.html`` (autoescaped: the title,
    headings and sentences are text; each section's body is HTML built by the report)."""
    return render_page(
        "page.html",
        title,
        meta,
        simulated=simulated,
        dose=dose,
        sections=[(heading, Markup(body)) for heading, body in sections],
    )


def render_page(
    template: str,
    title: str,
    meta: dict[str, Any] | None = None,
    *,
    simulated: str | None = None,
    dose: bool = False,
    **context: Any,
) -> str:
    """A report page from ``template``, a template extending ``page.html`` (its ``content`` block), with the
    cautions, the simulated-data banner and the provenance every page carries (see :func:`html_page`)."""
    meta = dict(meta or {})
    meta.setdefault("provenance", provenance())
    caution = f"{CAUTION} {NOT_FOR_DIAGNOSIS}" + (f" {DOSE_CAUTION}" if dose else "")
    return str(
        render(
            template,
            title=title,
            stylesheet=stylesheet(),
            caution=caution,
            simulated=simulated,
            meta_json=json.dumps(meta, indent=2, default=str),
            **context,
        )
    )


def write_json(path: Path, obj) -> None:
    """Write ``obj`` as pretty, valid JSON (numpy scalars and arrays converted, NaN/inf as null), atomically.

    A dictionary without a ``provenance`` entry gets one (command, versions, time), so every JSON result
    says how it was made.
    """
    if isinstance(obj, dict) and "provenance" not in obj:
        obj = {**obj, "provenance": provenance()}
    atomic_write_text(path, json.dumps(clean_nans(obj), indent=2, default=_json_default, allow_nan=False) + "\n")


def _json_default(o):
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (Path,)):
        return str(o)
    if hasattr(o, "isoformat"):
        return o.isoformat()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def dumps(obj) -> str:
    """JSON text for stdout (same conversions as :func:`write_json`)."""
    return json.dumps(clean_nans(obj), default=_json_default, allow_nan=False)


def clean_nans(obj):
    """Replace NaN/inf floats (numpy ones too) by None recursively so the JSON is valid."""
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.ndarray):
        return clean_nans(obj.tolist())
    if isinstance(obj, dict):
        return {k: clean_nans(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean_nans(v) for v in obj]
    return obj


def error_bars(estimate, ci_low, ci_high) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper error-bar lengths for matplotlib's ``errorbar``: never negative, 0 where unknown."""
    est = np.asarray(estimate, dtype=float)
    lo = np.asarray(ci_low, dtype=float)
    hi = np.asarray(ci_high, dtype=float)
    below = np.where(np.isfinite(lo), est - lo, 0.0)
    above = np.where(np.isfinite(hi), hi - est, 0.0)
    return np.clip(np.nan_to_num(below), 0.0, None), np.clip(np.nan_to_num(above), 0.0, None)


def plain_log_ticks(ax, axes: str = "xy") -> None:
    """Plain tick labels (0.1, 0.2, 0.5, 1, 2 …) on log axes instead of powers of ten, without overlaps."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    def fmt(v, _pos):
        return f"{v:g}" if v > 0 else ""

    for name in axes:
        axis = ax.xaxis if name == "x" else ax.yaxis
        axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        axis.set_major_formatter(FuncFormatter(fmt))
        axis.set_minor_formatter(NullFormatter())


def round_log_ticks(lo: float, hi: float, max_ticks: int = 4) -> list[float]:
    """At most ``max_ticks`` round values (1, 2, 5 × 10^k, thinned to 1 × 10^k, then every other decade) in
    [lo, hi], so the labels of a small panel never run into each other (at least the two ends' decades)."""
    import math

    if not (lo > 0 and hi > lo):
        return []
    k0, k1 = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    for subs, step in (((1, 2, 5), 1), ((1, 3), 1), ((1,), 1), ((1,), 2), ((1,), 3)):
        ticks = [m * 10.0**k for k in range(k0, k1 + 1, step) for m in subs if lo <= m * 10.0**k <= hi]
        if 2 <= len(ticks) <= max_ticks:
            return ticks
    if len(ticks) > max_ticks:
        return ticks[:: max(1, len(ticks) // max_ticks + 1)]
    if len(ticks) < 2:  # less than a decade between round values: the two ends, to two figures
        ends = sorted({float(f"{lo:.2g}"), float(f"{hi:.2g}")})
        return [t for t in ends if lo <= t <= hi] or ends
    return ticks


def sparse_log_ticks(ax, axis: str = "x", max_ticks: int = 4) -> None:
    """Plain labels at a few round values on a log axis (:func:`round_log_ticks`) for the data range shown."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter

    a = ax.xaxis if axis == "x" else ax.yaxis
    lo, hi = ax.get_xlim() if axis == "x" else ax.get_ylim()
    ticks = round_log_ticks(lo, hi, max_ticks)
    if not ticks:
        return
    a.set_major_locator(FixedLocator(ticks))
    a.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    a.set_minor_formatter(NullFormatter())


#: readable column headings for the tables of every report
READABLE = {
    "diameter_mm": "diameter (mm)",
    "threshold_contrast": "threshold (%)",
    "ci_low": "95 % CI low (%)",
    "ci_high": "95 % CI high (%)",
    "n_trials": "trials",
    "n_images": "images",
    "n_readers": "readers",
    "human_threshold": "human threshold (%)",
    "model_threshold": "model threshold (%)",
    "human_equivalent_threshold": "human-equivalent threshold (%)",
    "p_value": "p",
    "p_adjusted": "p (Holm)",
    "dprime_per_unit_contrast": "d′ per unit contrast",
    "dprime_threshold": "d′ at threshold",
    "criterion_pc": "Pc at threshold",
    "m_alternatives": "alternatives (M)",
    "observed_agreement": "observed agreement",
    "n_pairs": "pairs",
}
#: columns that hold contrasts (fractions in code, % on the page)
CONTRAST_COLUMNS = {"threshold_contrast", "human_threshold", "model_threshold", "human_equivalent_threshold"}


def display_records(
    records, columns, percent=CONTRAST_COLUMNS, ci_percent: bool = True
) -> tuple[list[dict], list[str]]:
    """Rows for :func:`table_html` with contrasts in % (3 significant figures) and readable headings.

    ``ci_low``/``ci_high`` are shown in % too when ``ci_percent`` (they bound a contrast); pass False where they
    bound a ratio or a factor.
    """
    pct = set(percent) | ({"ci_low", "ci_high"} if ci_percent else set())
    rows = []
    for r in records:
        row = {}
        for c in columns:
            v = r.get(c)
            if c in pct and isinstance(v, (int, float, np.floating)) and np.isfinite(v):
                v = f"{100 * float(v):.3g}"
            heading = READABLE.get(c, c.replace("_", " "))
            if c in ("ci_low", "ci_high") and not ci_percent:
                heading = heading.replace(" (%)", "")
            row[heading] = v
        rows.append(row)
    headings = []
    for c in columns:
        h = READABLE.get(c, c.replace("_", " "))
        headings.append(h.replace(" (%)", "") if c in ("ci_low", "ci_high") and not ci_percent else h)
    return rows, headings
