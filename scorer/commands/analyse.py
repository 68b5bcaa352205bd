"""``limen analyse``: reader-study statistics from a tidy trial table (CSV)."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING, Any

import click

from scorer.commands import options
from scorer.reports import dumps

if TYPE_CHECKING:
    from scorer.study.analysis import Analysis


@click.command("analyse")
@click.argument("responses", type=click.Path(dir_okay=False))
@click.option(
    "--model",
    "model_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Model observer's responses (DIR/responses.csv from `limen score --out DIR`: the human/model factor "
    "for both threshold methods) or its trials (DIR/trials.csv: the count method only).",
)
@click.option(
    "--by",
    default="detector",
    show_default=True,
    help="Column whose levels are compared (ratio of thresholds to the reference level).",
)
@click.option("--reference", default=None, help="Reference level of --by (default: first in sort order).")
@options.n_boot("Bootstrap resamples.")
@click.option(
    "--criterion",
    "criterion_pc",
    type=float,
    default=None,
    help="One proportion correct at threshold for every M (default: the Pc where the observer reaches the "
    "detectability of --detectability).",
)
@click.option(
    "--detectability",
    type=click.FloatRange(0.0, 6.0, min_open=True),
    default=None,
    help="d′ at threshold, the same for every M (default 1.116: where 3-AFC reaches Pc = 2/3).",
)
@click.option(
    "--min-trials",
    type=click.IntRange(1, 100000),
    default=10,
    show_default=True,
    help="Fewest trials per reader behind a threshold; fewer: reported as not estimable.",
)
@click.option(
    "--max-ci-ratio",
    type=click.FloatRange(1.0, None, min_open=True),
    default=10.0,
    show_default=True,
    help="Widest 95 % CI accepted (upper / lower); wider: reported as not estimable.",
)
@options.seed()
@options.json_output()
@options.out_folder("Write analysis.json, CSV tables and report.html here.")
@options.replace()
def analyse(
    responses: str,
    model_file: str | None,
    by: str,
    reference: str | None,
    n_boot: int,
    criterion_pc: float | None,
    detectability: float | None,
    min_trials: int,
    max_ci_ratio: float,
    seed: int,
    as_json: bool,
    out_dir: str | None,
    replace: bool,
) -> None:
    """Per-reader and pooled contrast-detail curves, human/model factor, group comparison, agreement.

    A threshold without an interior maximum, on too few trials, with too wide a CI or above 100 % contrast is
    reported as not estimable (with the reason and its trials), never as a number.
    """
    from scorer.errors import LimenError
    from scorer.files import OutputFolder
    from scorer.observer.mafc import Detectability
    from scorer.study import analyse_study
    from scorer.study.alternatives import m_alternatives_of
    from scorer.study.estimability import EstimabilityRule
    from scorer.workflow import image_content_hash as file_sha256  # SHA-256 of a file's bytes
    from scorer.workflow import load_model_table, load_trials

    if detectability is not None:
        if criterion_pc is not None:
            raise LimenError("give either --criterion (one Pc for every M) or --detectability (one d′), not both")
        criterion: float | Detectability | None = Detectability(float(detectability))
    else:
        criterion = criterion_pc
    trials = load_trials(responses)
    m_alternatives_of(trials, responses)  # a table with one candidate site is refused naming its file
    model, model_responses = load_model_table(model_file) if model_file else (None, None)
    if model is not None:
        m_alternatives_of(model, model_file)
    folder = OutputFolder(out_dir, replace=replace, command="analyse", beside=True) if out_dir else None
    steps = (
        ["per-reader fits", "pooled curves", f"{by} comparison"]
        + (["model observer", "human/model factor"] if model is not None else [])
        + ["agreement"]
    )
    from tqdm import tqdm

    bar = tqdm(total=len(steps), desc="analysing", file=sys.stderr, disable=as_json and not sys.stderr.isatty())

    def progress(step: str) -> None:
        bar.set_postfix_str(step)
        bar.update(1)

    try:
        a = analyse_study(
            trials,
            model,
            by=by,
            n_boot=n_boot,
            seed=seed,
            criterion_pc=criterion,
            reference=reference,
            progress=progress,
            model_responses=model_responses,
            rule=EstimabilityRule(min_trials=min_trials, max_ci_ratio=max_ci_ratio),
        )
    finally:
        bar.close()
    meta: dict[str, Any] = {
        "inputs": {"responses": {"path": str(responses), "sha256": file_sha256(responses)}},
        "seed": seed,
        "n_boot": n_boot,
    }
    if model_file:
        meta["inputs"]["model"] = {"path": str(model_file), "sha256": file_sha256(model_file)}
    if folder is not None:
        from scorer.reports import write_outputs

        write_outputs(a, folder.path, meta)
        folder.finish()
    if as_json:
        click.echo(dumps(a.to_json()))
        return
    click.echo(_text_summary(a))
    if out_dir:
        click.echo(f"wrote report.html, analysis.json and CSV tables to {out_dir}/")


def _text_summary(a: Analysis) -> str:
    if isinstance(a.m_alternatives, dict):
        design = ", ".join(f"{m}-AFC at {d:g} mm" for d, m in sorted(a.m_alternatives.items()))
        assert isinstance(a.criterion_pc, dict)  # one Pc per diameter where M varies (analyse_study)

        crit = ", ".join(f"{p:.3g}" for _, p in sorted(a.criterion_pc.items()))
        lines = [f"{len(a.readers)} reader(s), {design}; criterion Pc = {crit} respectively"]
    else:
        lines = [f"{len(a.readers)} reader(s), {a.m_alternatives}-AFC, criterion Pc = {a.criterion_pc:.4g}"]
    from scorer.study.estimability import not_estimable_text

    pc = a.public_tables()["pooled_curves"]
    if len(pc):
        lines.append("")
        lines.append(f"{a.by:<14}{'diam mm':>8}{'C_T %':>9}{'95 % CI %':>19}{'readers':>9}")
        bounds = False
        for r in pc.to_dict("records"):
            if r.get("estimable") is False:
                lines.append(f"{str(r[a.by]):<14}{r['diameter_mm']:>8g}  {not_estimable_text(r)}")
                continue
            ci = (
                f"{100 * r['ci_low']:>9.3g} – {100 * r['ci_high']:<7.3g}"
                if _finite(r["ci_low"], r["ci_high"])
                else f"{'—':>9}   {'':<7}"
            )
            ct = f"{100 * r['threshold_contrast']:>9.3g}" if _finite(r["threshold_contrast"]) else f"{'—':>9}"
            if not r.get("converged", True):
                ct = f"{format(100 * r['threshold_contrast'], '.3g') + '*':>9}"
                bounds = True
            lines.append(f"{str(r[a.by]):<14}{r['diameter_mm']:>8g}{ct}{ci}{int(r['n_readers']):>9d}")
        if bounds:
            lines.append("* a bound, not an estimate: every trial correct, or all at chance")
    comp = a.public_tables()["comparison"]
    if len(comp):
        lines.append("")
        lines.extend(comp["sentence"])
    hm = a.human_model
    if hm:
        lines.append("")
        for e in (hm.get("by_method") or {"count": hm}).values():
            label = e.get("method_label") or "count method"
            if e.get("factor") is None:
                lines.append(f"human/model ({hm['observer']}) threshold factor, {label}: none ({e.get('note')})")
                continue
            ci = f"{e['ci_low']:.3g}–{e['ci_high']:.3g}" if _finite(e.get("ci_low"), e.get("ci_high")) else "—"
            left = f"; {e['n_excluded']} of {e['n_cells']} cells left out" if e.get("n_excluded") else ""
            lines.append(
                f"human/model ({hm['observer']}) threshold factor, {label}: {e['factor']:.3g} (95 % CI {ci}{left})"
            )
            tr = e.get("diameter_trend")
            if tr:
                lines.append(
                    f"  depends on diameter: {'yes' if tr['depends_on_diameter'] else 'no'} (slope of log factor on "
                    f"log diameter {tr['slope']:+.3f}, 95 % CI {tr['slope_ci_low']:+.3f} to {tr['slope_ci_high']:+.3f},"
                    f" p = {tr['p_value']:.3g})"
                )
    for note in a.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def _finite(*values: float | None) -> bool:

    import math

    return all(v is not None and math.isfinite(float(v)) for v in values)
