"""``limen dose-series``: contrast-detail thresholds at several air kermas, β per diameter, kerma for a limit."""

from __future__ import annotations

import sys

import click

from scorer.commands import options


@click.command("dose-series")
@click.argument("images", nargs=-1, required=True, type=click.Path(dir_okay=False))
@options.layout()
@options.conversion(
    "Conversion function that linearises the images; without --kerma-csv each image's kerma is "
    "its plate background through it."
)
@click.option(
    "--kerma-csv",
    "kerma_csv",
    type=click.Path(dir_okay=False),
    default=None,
    help="CSV path,kerma_ugy giving each image's air kerma at the detector (µGy).",
)
@options.observer()
@options.threshold_method(
    "dprime", "Threshold method per group; the d′ method is fitted when computed, else the count method."
)
@options.limits("Limits TOML: report the kerma at which each diameter's threshold meets its limit.")
@options.human_factor("Human/model threshold factor, needed to use limits written for human readers.")
@options.human_factor_from()
@options.mtf()
@options.pixel_spacing()
@options.n_boot("Bootstrap resamples of the images for the count method.")
@options.seed("Seed of the bootstrap and of the kerma CIs' draws.")
@options.json_output()
@options.out_folder("Write dose_series.json, dose_series.csv and dose_series.html here.")
@options.replace()
def dose_series(
    images: tuple[str, ...],
    layout_file: str | None,
    conversion_file: str | None,
    kerma_csv: str | None,
    observer: str,
    method: str,
    limits_file: str | None,
    human_factor: float | None,
    factor_file: str | None,
    mtf_file: str | None,
    pixel_spacing: float | None,
    n_boot: int,
    seed: int,
    as_json: bool,
    out_dir: str | None,
    replace: bool,
) -> None:
    """Score phantom IMAGES taken at several air kermas: per diameter C_T(K) = a·K^(−β) with CIs.

    Images are grouped by kerma (by folder when they lie in several folders, else by value);
    each group is scored as `limen score` would, and the thresholds are fitted on log–log axes.
    """
    import numpy as np
    from tqdm import tqdm

    from scorer.files import OutputFolder
    from scorer.reports import CAUTION, dumps, write_json
    from scorer.workflow import (
        load_conversion,
        load_layout,
        load_limits,
        load_mtf,
        resolve_human_factor,
        score_dose_series,
        series_groups,
    )

    fitted_method = "count" if method == "count" else "dprime"  # as scorer.detector.dose.dose_series fits
    factor = resolve_human_factor(human_factor, factor_file, observer, fitted_method if limits_file else None)
    layout = load_layout(layout_file)
    limits = load_limits(limits_file) if limits_file else None
    options.refuse_unused_factor(factor, limits)
    conversion = load_conversion(conversion_file) if conversion_file else None
    blur = load_mtf(mtf_file) if mtf_file else None
    # the folder is checked before any image is read: an unusable or (without --replace) non-empty --out is
    # refused at once
    folder = OutputFolder(out_dir, replace=replace, command="dose-series", beside=True) if out_dir else None
    groups, kerma_warnings = series_groups(
        images,
        kerma_csv=kerma_csv,
        conversion=conversion,
        pixel_spacing_mm=pixel_spacing,
        progress=lambda it: tqdm(
            it, desc="kerma of each image", unit="image", file=sys.stderr, disable=len(images) < 2, total=len(images)
        ),
    )
    bar = tqdm(total=len(images), desc="scoring kerma groups", unit="image", file=sys.stderr)
    try:
        result = score_dose_series(
            groups,
            layout,
            observer=observer,
            method=method,
            limits=limits,
            human_factor=factor,
            seed=seed,
            conversion=conversion,
            pixel_spacing_mm=pixel_spacing,
            blur=blur,
            n_boot=n_boot,
            on_group=lambda k, paths, res: bar.update(len(paths)),
        )
    finally:
        bar.close()
    result.warnings[:0] = kerma_warnings
    data = result.to_json()
    data["inputs"] = {
        "images": list(images),
        "kerma_source": "csv" if kerma_csv else "conversion",
        "kerma_csv": kerma_csv,
        "conversion": conversion_file,
        "layout": layout_file,
        "limits": limits_file,
    }
    if folder is not None:
        from scorer.files import atomic_write_text
        from scorer.reports.dose import dose_series_csv, dose_series_html

        out = folder.path
        write_json(out / "dose_series.json", data)
        atomic_write_text(out / "dose_series.csv", dose_series_csv(data))
        atomic_write_text(out / "dose_series.html", dose_series_html(data))
        folder.finish()
    if as_json:
        click.echo(dumps(data))
        return
    click.echo(
        f"{len(data['groups'])} kerma groups: "
        + ", ".join(f"{g['kerma_ugy']:.3g} µGy ({g['n_images']} images)" for g in data["groups"])
    )
    click.echo(f"{'diameter mm':>11}  {'β':>6}  {'95% CI':>13}  {'kerma for limit µGy (95% CI)':>30}")
    for f in data["fits"]:
        if f.get("beta") is None:
            click.echo(f"{f['diameter_mm']:>11.3g}  {'—':>6}  {'':>13}  {f.get('note', '')}")
            continue
        k = f.get("kerma_for_limit_ugy")
        ci = f.get("kerma_for_limit_ci") or [np.nan, np.nan]
        ktxt = (
            "—"
            if k is None or not np.isfinite(k)
            else f"{k:.3g} ({ci[0]:.3g}–{ci[1]:.3g})"
            + (" extrapolated" if f.get("kerma_for_limit_extrapolated") else "")
        )
        click.echo(
            f"{f['diameter_mm']:>11.3g}  {f['beta']:>6.3f}  {f['beta_ci_low']:>6.3f}–{f['beta_ci_high']:<6.3f}"
            f"  {ktxt:>30}"
        )
    for w in data["warnings"]:
        click.echo(f"warning: {w}", err=True)
    if out_dir:
        click.echo(f"wrote dose_series.json, dose_series.csv and dose_series.html to {out_dir}/")
    click.echo(CAUTION)


if __name__ == "__main__":  # pragma: no cover
    dose_series(sys.argv[1:])
