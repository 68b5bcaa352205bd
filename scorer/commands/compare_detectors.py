"""``limen compare-detectors``: two detectors' MTF, NNPS, DQE and threshold contrasts side by side."""

from __future__ import annotations

from pathlib import Path

import click
import numpy as np
import pandas as pd

from scorer.commands import options
from scorer.commands.detector import alternatives_from_options, diameters_from_options
from scorer.detector import compare
from scorer.detector.comparison import check_dose_pair
from scorer.errors import LimenError
from scorer.files import OutputFolder, atomic_write_text
from scorer.reports import dumps, write_json
from scorer.workflow import load_detector_json, load_dose_json, load_scored_json


@click.command("compare-detectors")
@click.argument("detector_a", type=click.Path(dir_okay=False))
@click.argument("detector_b", type=click.Path(dir_okay=False))
@click.option("--label-a", default=None, help="Name of the first detector (default: its file's folder or stem).")
@click.option("--label-b", default=None, help="Name of the second detector.")
@click.option(
    "--scored-a",
    type=click.Path(dir_okay=False),
    default=None,
    help="'limen score' JSON of phantom images from the first detector.",
)
@click.option(
    "--scored-b",
    type=click.Path(dir_okay=False),
    default=None,
    help="'limen score' JSON of phantom images from the second detector.",
)
@options.layout(options.PREDICTION_LAYOUT_HELP)
@options.diameters()
@options.alternatives(
    "M of the M-AFC criterion for predicted thresholds [default: each diameter's M in --layout or in the "
    "scored results, else 4]."
)
@click.option(
    "--scored-method",
    type=click.Choice(["dprime", "count"]),
    default="dprime",
    show_default=True,
    help="Which scoring method's thresholds the side-by-side table and summary compare (both are plotted).",
)
@click.option(
    "--dose-a",
    type=click.Path(dir_okay=False),
    default=None,
    help="'limen dose-series' JSON of the first detector: kerma each panel needs for the same threshold.",
)
@click.option(
    "--dose-b", type=click.Path(dir_okay=False), default=None, help="'limen dose-series' JSON of the second detector."
)
@click.option(
    "--detail-classes",
    default=None,
    help="Classes of detail size the headline pools the kerma ratio over: ranges in mm separated by commas, an "
    "open end left empty [default: 0-0.25,0.5- that is ≤ 0.25 mm and ≥ 0.5 mm].",
)
@options.json_output()
@options.out_folder("Write comparison.json, comparison.csv, headline.csv and comparison.html here.")
@options.replace()
def compare_detectors(
    detector_a: str,
    detector_b: str,
    label_a: str | None,
    label_b: str | None,
    scored_a: str | None,
    scored_b: str | None,
    layout_file: str | None,
    diameters: str | None,
    m_alternatives: int | None,
    scored_method: str,
    dose_a: str | None,
    dose_b: str | None,
    detail_classes: str | None,
    as_json: bool,
    out_dir: str | None,
    replace: bool,
) -> None:
    """Put two detectors measured by 'limen detector' side by side."""
    from scorer.detector.headline import parse_detail_classes

    classes = parse_detail_classes(detail_classes)  # a bad option fails before any file is read
    if detail_classes is not None and not (dose_a and dose_b):
        raise LimenError(
            "--detail-classes needs the dose series of both panels (--dose-a, --dose-b)", "--detail-classes"
        )
    a, b = load_detector_json(detector_a), load_detector_json(detector_b)
    folder = OutputFolder(out_dir, replace=replace, command="compare-detectors", beside=True) if out_dir else None

    def default_label(name: str) -> str:
        p = Path(name)
        return p.parent.name if p.stem == "detector" and p.parent.name else p.stem

    la = label_a or default_label(detector_a)
    lb = label_b or default_label(detector_b)
    if la == lb:
        la, lb = f"{la} (A)", f"{lb} (B)"
    sa = load_scored_json(scored_a) if scored_a else None
    sb = load_scored_json(scored_b) if scored_b else None
    diam = diameters_from_options(diameters, layout_file)
    if bool(dose_a) != bool(dose_b):
        raise LimenError("give both --dose-a and --dose-b (a dose series of each detector)", "--dose-a")
    da = load_dose_json(dose_a) if dose_a else None
    db = load_dose_json(dose_b) if dose_b else None
    if da is not None and db is not None:
        check_dose_pair(da, db, dose_a, dose_b)
    result = compare(
        a,
        b,
        (la, lb),
        diam,
        sa,
        sb,
        alternatives_from_options(m_alternatives, layout_file),
        scored_method=scored_method,
        dose_a=da,
        dose_b=db,
        detail_classes=classes,
    )
    la, lb = result["labels"]
    result["inputs"] = {
        "detector_a": str(detector_a),
        "detector_b": str(detector_b),
        "scored_a": scored_a,
        "scored_b": scored_b,
        "layout": layout_file,
        "dose_a": dose_a,
        "dose_b": dose_b,
    }
    if folder is not None:
        from scorer.reports import compare_report_html

        out = folder.path
        write_json(out / "comparison.json", result)
        rows = [
            {k: (v if not isinstance(v, list) else " – ".join(f"{x:.4g}" for x in v)) for k, v in r.items()}
            for r in result["table"]
        ]
        atomic_write_text(out / "comparison.csv", pd.DataFrame(rows).to_csv(index=False))
        if result.get("headline") and result["headline"].get("classes"):
            from scorer.reports.headline import headline_csv

            atomic_write_text(out / "headline.csv", headline_csv(result["headline"]))
        atomic_write_text(out / "comparison.html", compare_report_html(result, a, b))
        folder.finish()
    if as_json:
        click.echo(dumps(result))
        return
    w = max(len(r["quantity"]) for r in result["table"])
    click.echo(f"{'':<{w}}  {la:>14}  {lb:>14}  difference")
    for r in result["table"]:
        pct = "threshold contrast" in r["quantity"]

        def fmt(v: float | None, pct: bool = pct) -> str:

            if v is None or not np.isfinite(v):
                return "—"
            return f"{100 * v:.3g} %" if pct else f"{v:.4g}"

        verdict = r["better"] + (f" ({r['basis']})" if r.get("basis") and r["better"] else "")
        click.echo(f"{r['quantity']:<{w}}  {fmt(r[la]):>14}  {fmt(r[lb]):>14}  {verdict}")
    click.echo("")
    head = result.get("headline") or {}
    if head.get("sentences") or head.get("error"):
        click.echo("Headline (equal image quality, pooled over detail sizes):")
        for s in head.get("sentences") or [head["error"]]:
            click.echo(f"  {s}")
        for s in head.get("driver_sentences") or []:
            click.echo(f"  {s}")
        click.echo("")
    for s in result["summary"]:
        click.echo(s)
    if result.get("equal_quality"):
        click.echo("")
        for s in result["equal_quality"]["sentences"]:
            click.echo(s)
    for lab, n in (result.get("noise_components") or {}).items():
        if n.get("quantum_limited_text"):
            click.echo(f"{lab}: {n['quantum_limited_text']}.")
    if out_dir:
        click.echo(f"wrote comparison.json, comparison.csv and comparison.html to {out_dir}/")
