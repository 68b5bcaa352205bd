"""``limen score``: threshold contrast per diameter from contrast-detail phantom images."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import TYPE_CHECKING

import click
import numpy as np
from tqdm import tqdm

from scorer.commands import options
from scorer.files import OutputFolder
from scorer.invocation import current_command
from scorer.reports import CAUTION, draw_overlay, dumps
from scorer.reports.checks import draw_defect_overlay
from scorer.reports.score import METHOD_LABEL, write_score_outputs
from scorer.workflow import (
    load_conversion,
    load_defect_map,
    load_layout,
    load_limits,
    load_mtf,
    resolve_human_factor,
    score_files,
)

if TYPE_CHECKING:
    from scorer.images.image import Image
    from scorer.observer.checks import ImageChecks
    from scorer.observer.scoring import ScoreResult
    from scorer.phantom.registration import Placement

#: exit status of `limen score` (documented in the README)

EXIT_FAIL = 1
EXIT_INDETERMINATE = 3


@click.command("score")
@click.argument("images", nargs=-1, required=True, type=click.Path(dir_okay=False))
@options.layout()
@options.observer()
@options.threshold_method(
    "both",
    "Threshold method: d′ regression on the responses, counts of correct M-AFC decisions, or both.",
)
@options.limits("Limits TOML (threshold contrast per diameter, the observer it is for, its source).")
@options.human_factor("Human/model threshold factor, needed to compare model thresholds with limits for human readers.")
@options.human_factor_from()
@options.conversion("Conversion function TOML/JSON that linearises pixel values to air kerma.")
@options.mtf()
@click.option(
    "--viewing-distance-mm",
    type=float,
    default=None,
    help="NPWE: eye-to-image distance in image-plane millimetres (default 500).",
)
@options.pixel_spacing()
@click.option(
    "--defect-map",
    "defect_map_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Detector JSON from `limen detector` (with flat fields) whose defective pixels and lines exclude the "
    "sites they touch, besides the defects found in each image.",
)
@click.option(
    "--notch",
    is_flag=True,
    help="Remove each narrow peak of the background spectrum (grid lines, interference) found in an image with a "
    "notch filter before scoring it; recorded in results.json.",
)
@options.n_boot("Bootstrap resamples of the images for the count method (and a bootstrap d′ interval).")
@click.option(
    "--psychometric",
    "psychometric_form",
    type=click.Choice(["mafc", "logistic"]),
    default="mafc",
    show_default=True,
    help="Count method's psychometric function: the linear-observer M-AFC form, or a "
    "logistic in log contrast (documented alternative; reads ~10 % low).",
)
@click.option(
    "--dprime-ci",
    type=click.Choice(["analytic", "bootstrap"]),
    default="analytic",
    show_default=True,
    help="d′ method's confidence interval: analytic (sampling variance of d′) or image bootstrap.",
)
@click.option(
    "--criterion",
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
@options.seed()
@options.json_output()
@options.out_folder(
    "Write results.json, CSV tables, registration overlays (a diagnostic one when the phantom "
    "cannot be found) and report.html here."
)
@options.replace()
def score(
    images: tuple[str, ...],
    layout_file: str | None,
    observer: str,
    method: str,
    limits_file: str | None,
    human_factor: float | None,
    factor_file: str | None,
    conversion_file: str | None,
    mtf_file: str | None,
    viewing_distance_mm: float | None,
    pixel_spacing: float | None,
    defect_map_file: str | None,
    notch: bool,
    n_boot: int,
    psychometric_form: str,
    dprime_ci: str,
    criterion: float | None,
    detectability: float | None,
    seed: int,
    as_json: bool,
    out_dir: str | None,
    replace: bool,
) -> None:
    """Score contrast-detail phantom IMAGES with a model observer: threshold contrast per diameter.

    Exit status: 0 when every verdict passes or no limits were given, 1 when a verdict
    fails, 2 on bad input, 3 when the overall verdict is indeterminate (a confidence
    interval straddles a limit: more images are needed).
    """
    methods = ["dprime", "count"] if method == "both" else [method]
    # the verdicts use the d′ method when it is computed: the factor must be the one measured for it
    verdict_method = "dprime" if "dprime" in methods else "count"
    factor = resolve_human_factor(human_factor, factor_file, observer, verdict_method if limits_file else None)
    if (factor is not None) and not limits_file:
        click.echo("warning: --human-factor/--human-factor-from has no effect without --limits", err=True)
    if detectability is not None:
        from scorer.errors import LimenError
        from scorer.observer.mafc import Detectability

        if criterion is not None:
            raise LimenError("give either --criterion (one Pc for every M) or --detectability (one d′), not both")
        criterion_pc: float | Detectability | None = Detectability(float(detectability))
    else:
        criterion_pc = criterion
    layout = load_layout(layout_file)
    limits = load_limits(limits_file) if limits_file else None
    options.refuse_unused_factor(factor, limits)
    conversion = load_conversion(conversion_file) if conversion_file else None
    blur = load_mtf(mtf_file) if mtf_file else None
    defect_map = load_defect_map(defect_map_file) if defect_map_file else None
    folder = OutputFolder(out_dir, replace=replace, command="score", beside=True) if out_dir else None
    out = folder.path if folder else None
    overlays: list[Path] = []
    defect_overlays: list[Path] = []
    bar = tqdm(
        total=len(images), desc=f"scoring ({observer.upper()})", unit="image", file=sys.stderr, disable=len(images) < 2
    )

    def on_image(i: int, path: str, image: Image, placement: Placement) -> None:
        if out is not None:
            overlays.append(
                draw_overlay(
                    image, layout, placement, out / "overlays" / f"{Path(path).stem}.png", title=Path(path).name
                )
            )
        bar.update(1)

    def on_checked(i: int, path: str, image: Image, placement: Placement, checks: ImageChecks) -> None:
        if out is not None and (checks.excluded or checks.defects):
            defect_overlays.append(
                draw_defect_overlay(
                    image,
                    placement,
                    checks,
                    out / "overlays" / f"{Path(path).stem}-defects.png",
                    title=f"{Path(path).name}: defects and excluded sites",
                )
            )

    def on_failure(path: str, image: Image, exc: Exception) -> None:
        if out is not None:
            png = draw_overlay(
                image,
                layout,
                getattr(exc, "placement", None),
                out / "overlays" / f"{Path(path).stem}-FAILED.png",
                candidates_px=getattr(exc, "candidates_px", None),
                title=f"{Path(path).name}: {exc}",
            )
            click.echo(f"diagnostic overlay: {png}", err=True)

    try:
        result = score_files(
            list(images),
            layout,
            observer=observer,
            methods=methods,
            conversion=conversion,
            pixel_spacing_mm=pixel_spacing,
            blur=blur,
            viewing_distance_mm=viewing_distance_mm,
            n_boot=n_boot,
            seed=seed,
            criterion_pc=criterion_pc,
            limits=limits,
            human_factor=factor,
            on_image=on_image,
            on_failure=on_failure,
            count_form=psychometric_form,
            dprime_ci=dprime_ci,
            defect_map=defect_map,
            notch=notch,
            on_checked=on_checked,
        )
    finally:
        bar.close()
    command = current_command() or ""
    if out is not None:
        write_score_outputs(result, out, overlays, command, defect_overlays)
        assert folder is not None  # out is its path
        folder.finish()
    if as_json:
        click.echo(dumps(result.to_json()))
    else:
        _print_table(result)
        if folder is not None:
            click.echo(f"\nreport: {folder.path / 'report.html'}  (JSON, CSV and overlays beside it)")
    for w in result.warnings:
        click.echo(f"warning: {w}", err=True)
    for c in result.curves.values():
        for p in c.points:
            if p.method == "count" and p.n_images < 3:
                click.echo(
                    f"warning: count method at {p.diameter_mm:g} mm rests on {p.n_images} image(s): "
                    "its threshold and CI are unreliable; score more images",
                    err=True,
                )
                break
    if result.verdicts is not None and result.overall_verdict == "fail":
        sys.exit(EXIT_FAIL)
    if result.verdicts is not None and result.overall_verdict == "indeterminate":
        sys.exit(EXIT_INDETERMINATE)


def _print_table(result: ScoreResult) -> None:

    click.echo(f"{result.layout.name}: {len(result.images)} image(s), {result.observer.upper()} observer")
    curves = result.curves
    header = f"{'diameter mm':>11}"
    for m in curves:
        header += f"  {METHOD_LABEL[m] + ' C_T %':>18} {'95% CI %':>15}"
    if result.verdicts is not None:
        if result.human_factor:
            header += f"  {'×' + format(result.human_factor, '.3g') + ' %':>8} {'95% CI %':>13}"
        header += f"  {'limit %':>8}  verdict"
    click.echo(header)
    diams = sorted({p.diameter_mm for c in curves.values() for p in c.points})
    vmap = {v.diameter_mm: v for v in (result.verdicts or [])}
    for d in diams:
        line = f"{d:>11.3g}"
        for c in curves.values():
            p = c.at(d)
            assert p is not None  # both methods' curves have a point at every diameter of the layout
            if p.censored:
                ci = "—"
            else:
                ci = f"{100 * p.ci_low:.3g}–{100 * p.ci_high:.3g}" if np.isfinite(p.ci_low) else "—"
            line += f"  {p.display(unit=''):>18} {ci:>15}"
        if result.verdicts is not None:
            v = vmap.get(d)
            lim = (
                "—"
                if v is None or v.acceptable is None
                else f"{100 * v.acceptable:.3g}" + ("*" if v.limit_interpolated else "")
            )
            if result.human_factor:
                if v:
                    vci = (
                        f"{100 * v.ci_low:.3g}–{100 * v.ci_high:.3g}"
                        if np.isfinite(v.ci_low) and np.isfinite(v.ci_high)
                        else "—"
                    )
                    line += f"  {100 * v.threshold_contrast:>8.3g} {vci:>13}"
                else:
                    line += f"  {'':>8} {'':>13}"
            line += f"  {lim:>8}  {v.verdict if v else ''}"
        click.echo(line)
    if result.verdicts is not None:
        if any(v.limit_interpolated for v in result.verdicts):
            click.echo("* limit interpolated (log–log) between the diameters of the limits file")
        if result.human_factor_ci:
            lo, hi = result.human_factor_ci
            click.echo(
                f"human/model factor {result.human_factor:.3g} (95 % CI {lo:.3g}–{hi:.3g}); its uncertainty "
                "is included in the human-equivalent CIs"
            )
        click.echo(f"overall: {result.overall_verdict.upper()}")
    click.echo(CAUTION)
