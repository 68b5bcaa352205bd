"""``limen detector``: conversion function, presampling MTF, NNPS and DQE of a flat panel."""

from __future__ import annotations

import csv
import io
import sys
import warnings
from pathlib import Path

import click
import numpy as np

from scorer.commands import options
from scorer.images import load_conversion
from scorer.detector.measure import central_mean, fit_conversion, measure_detector, measure_noise_series, q_for_beam
from scorer.errors import LimenError
from scorer.files import OutputFolder, atomic_write_bytes, atomic_write_text
from scorer.reports.detector import summary_rows
from scorer.reports import dumps, write_json

#: options that take every following file name up to the next option (``--flat a.dcm b.dcm``)
GREEDY_OPTIONS = ("--flat", "--edge")


class GreedyFilesCommand(click.Command):
    """A command whose file-list options accept several values after one flag.

    ``--flat a b c --edge d`` is rewritten to ``--flat a --flat b --flat c --edge d``
    before click parses it, so shell globs (``--flat flats/*.dcm``) work; repeating
    the flag works too.
    """

    greedy = GREEDY_OPTIONS

    def parse_args(self, ctx, args):
        out: list[str] = []
        i = 0
        while i < len(args):
            tok = args[i]
            name, eq, val = tok.partition("=")
            if name in self.greedy:
                if eq:
                    out += [name, val]
                i += 1
                while i < len(args) and not args[i].startswith("-"):
                    out += [name, args[i]]
                    i += 1
                continue
            if tok == "--":
                out += args[i:]
                break
            out.append(tok)
            i += 1
        return super().parse_args(ctx, out)


def _parse_diameters(text: str | None) -> list[float] | None:
    if not text:
        return None
    try:
        vals = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise LimenError(f"--diameters must be comma-separated numbers in mm, got {text!r}", "--diameters") from None
    if not vals or any(not v > 0 for v in vals):
        raise LimenError(f"--diameters must be positive numbers in mm, got {text!r}", "--diameters")
    return vals


def diameters_from_options(diameters: str | None, layout_file: str | None) -> list[float] | None:
    """Diameters (mm) from ``--diameters`` or a layout file's targets."""
    d = _parse_diameters(diameters)
    if d is None and layout_file:
        from scorer.phantom import load_layout

        d = [float(v) for v in load_layout(layout_file).diameters_mm]
    return d


def alternatives_from_options(m_alternatives: int | None, layout_file: str | None) -> int | dict[float, int] | None:
    """M of the M-AFC criterion: ``--alternatives`` for every diameter, else each diameter's M in the layout.

    ``None`` when neither is given (the caller then uses the scored results' M, or 4).
    """
    if m_alternatives is not None:
        return int(m_alternatives)
    if layout_file:
        from collections import Counter

        from scorer.phantom import load_layout

        lay = load_layout(layout_file)
        return {
            float(d): Counter(t.m_alternatives for t in lay.targets_with_diameter(d)).most_common(1)[0][0]
            for d in lay.diameters_mm
        }
    return None


def _read_kerma_csv(path: Path) -> list[tuple[Path, float]]:
    """CSV with columns ``path,kerma_ugy`` (paths relative to the CSV's folder)."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise LimenError(f"cannot read kerma CSV ({exc.strerror or exc})", path) from None
    rows = list(csv.DictReader(ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")))
    if not rows or not {"path", "kerma_ugy"} <= set(rows[0]):
        raise LimenError("kerma CSV needs the columns path,kerma_ugy", path)
    out = []
    for n, r in enumerate(rows, start=2):
        try:
            k = float(r["kerma_ugy"])
        except (TypeError, ValueError):
            raise LimenError(f"line {n}: kerma_ugy {r['kerma_ugy']!r} is not a number", path) from None
        p = Path(r["path"].strip())
        out.append((p if p.is_absolute() else path.parent / p, k))
    return out


def load_images_warn(paths, *, spacing, conversion, role: str, for_conversion_fit: bool = False):
    """Load images, turning LimenWarnings into one stderr line each; FOR PRESENTATION flats get the NNPS warning.
    ``for_conversion_fit`` reads the stored values whatever their relation to the beam (see ``load_image``)."""
    from scorer.images import load_image

    images = []
    for p in paths:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            im = load_image(p, pixel_spacing_mm=spacing, conversion=conversion, for_conversion_fit=for_conversion_fit)
        shown = set()
        for w in caught:
            text = str(w.message)
            if text not in shown:
                shown.add(text)
                click.echo(f"warning: {text}", err=True)
        for text in im.metadata.warnings:
            if text not in shown and not any(text in s for s in shown):
                shown.add(text)
                click.echo(f"warning: {p}: {text}", err=True)
        if (im.metadata.presentation_intent or "").upper() == "FOR PRESENTATION":
            if role == "flat":
                msg = (
                    f"{p}: flat field is FOR PRESENTATION (processed for display): the NNPS of a processed "
                    "image is meaningless; use FOR PROCESSING images"
                )
            else:
                msg = (
                    f"{p}: edge image is FOR PRESENTATION (processed for display): its MTF includes the "
                    "processing and is not the detector's presampling MTF"
                )
            click.echo(f"warning: {msg}", err=True)
            im.metadata.warnings.append(msg)
        images.append(im)
    return images


@click.command("detector", cls=GreedyFilesCommand)
@click.option(
    "--flat",
    "flat_files",
    multiple=True,
    type=click.Path(dir_okay=False),
    help="Flat-field image(s) at one air kerma, for the NNPS (several files after one flag).",
)
@click.option(
    "--edge",
    "edge_files",
    multiple=True,
    type=click.Path(dir_okay=False),
    help="Slanted-edge image(s); one near-vertical and one near-horizontal give both orientations.",
)
@click.option("--kerma-ugy", type=float, default=None, help="Air kerma at the detector for the flat fields (µGy).")
@click.option(
    "--q",
    "q_per_mm2_ugy",
    type=float,
    default=None,
    help="Photon fluence per air kerma of the beam, per mm² per µGy (required for mammography beams).",
)
@click.option("--beam", default=None, help="Beam quality with a tabulated q: RQA3, RQA5, RQA7 or RQA9.")
@click.option(
    "--pixel-spacing",
    "pixel_spacing_mm",
    type=float,
    default=None,
    help="Pixel spacing in mm (needed for TIFF/PNG/NPY; overrides DICOM).",
)
@click.option(
    "--conversion",
    "conversion_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Conversion function (TOML or JSON) to linearise the images.",
)
@click.option(
    "--fit-conversion",
    "kerma_csv",
    type=click.Path(dir_okay=False),
    default=None,
    help="CSV path,kerma_ugy of flat fields at several kermas: fit the conversion function and use it.",
)
@click.option(
    "--noise-series",
    "noise_csv",
    type=click.Path(dir_okay=False),
    default=None,
    help="CSV path,kerma_ugy of flat fields at several kermas: electronic, quantum and structure noise "
    "with CIs, the quantum-limited kerma range, and the DQE at each kerma (may be the "
    "--fit-conversion file).",
)
@options.diameters()
@options.layout(options.PREDICTION_LAYOUT_HELP)
@options.alternatives(
    "M of the M-AFC criterion used for predicted thresholds [default: each diameter's M in --layout, else 4]."
)
@options.json_output()
@options.out_folder("Write detector.json, detector.csv, nnps_2d.npy and detector.html here.")
@options.replace()
def detector(
    flat_files,
    edge_files,
    kerma_ugy,
    q_per_mm2_ugy,
    beam,
    pixel_spacing_mm,
    conversion_file,
    kerma_csv,
    noise_csv,
    diameters,
    layout_file,
    m_alternatives,
    as_json,
    out_dir,
    replace,
):
    """Measure a detector as IEC 62220-1 describes: conversion function, MTF, NNPS and DQE.

    Flat fields give the NNPS, slanted-edge images the presampling MTF; the DQE
    needs the air kerma (--kerma-ugy) and q (--q, or --beam for an RQA quality).
    """
    if not flat_files and not edge_files and not kerma_csv and not noise_csv:
        raise LimenError("no images: give flat fields (--flat FILES) and/or edge images (--edge FILES)")
    if q_per_mm2_ugy is not None and beam is not None:
        raise LimenError("give either --q or --beam, not both", "--q")
    if beam is not None:
        q_per_mm2_ugy = q_for_beam(beam)
    if q_per_mm2_ugy is not None and not q_per_mm2_ugy > 0:
        raise LimenError(f"q must be positive, got {q_per_mm2_ugy}", "--q")
    if kerma_ugy is not None and not kerma_ugy > 0:
        raise LimenError(f"air kerma must be positive, got {kerma_ugy}", "--kerma-ugy")
    if (kerma_ugy is None) != (q_per_mm2_ugy is None) and not (noise_csv and kerma_ugy is None):
        missing = "--q or --beam" if q_per_mm2_ugy is None else "--kerma-ugy"
        raise LimenError(f"DQE needs both the air kerma and q: {missing} missing", missing.split()[0])
    if conversion_file and kerma_csv:
        raise LimenError("give either --conversion or --fit-conversion, not both", "--conversion")
    diam = diameters_from_options(diameters, layout_file)
    folder = OutputFolder(out_dir, replace=replace, command="detector") if out_dir else None

    conv_fn = None
    conv_dict = None
    if conversion_file:
        conv_fn = load_conversion(conversion_file)
        conv_dict = conv_fn.to_dict()
    elif kerma_csv:
        entries = _read_kerma_csv(Path(kerma_csv))
        raw = load_images_warn(
            [p for p, _ in entries], spacing=pixel_spacing_mm, conversion=None, role="flat", for_conversion_fit=True
        )
        fit = fit_conversion(
            [k for _, k in entries], [central_mean(im.pixels, im.spacing_mm) for im in raw], path=kerma_csv
        )
        conv_fn = fit.conversion
        conv_dict = fit.to_dict()
        if fit.nonlinear:
            click.echo(f"warning: {kerma_csv}: {fit.note}", err=True)

    spacing = pixel_spacing_mm
    flats = load_images_warn(flat_files, spacing=spacing, conversion=conv_fn, role="flat")
    edges = load_images_warn(edge_files, spacing=spacing, conversion=conv_fn, role="edge")
    _check_distinct_and_kerma(
        list(flat_files) + list(edge_files),
        flats + edges,
        kerma_ugy,
        linearised=conv_fn is not None,
        n_flats=len(flats),
    )
    notes = []
    if conv_fn is None and (flats or edges):
        notes.append(
            "no conversion function given: pixel values are taken as proportional to air kerma "
            "(zero offset); give --conversion or --fit-conversion for raw images"
        )
        click.echo(f"warning: {notes[-1]}", err=True)
    if not flats and not edges and not noise_csv:
        metrics = None
    else:
        series_images: list = []
        if noise_csv:
            series = _read_kerma_csv(Path(noise_csv))
            series_images = load_images_warn([p for p, _ in series], spacing=spacing, conversion=conv_fn, role="flat")
        if flats or edges:
            metrics = measure_detector(
                flats, edges, kerma_ugy=kerma_ugy, q_per_mm2_ugy=q_per_mm2_ugy, beam=beam, conversion=conv_dict
            )
        else:
            metrics = measure_detector(series_images, (), conversion=conv_dict, q_per_mm2_ugy=q_per_mm2_ugy)
        if not flats and not edges:
            metrics.nnps = None  # a noise series alone gives no headline NNPS
        if noise_csv:
            metrics.noise_series = measure_noise_series(
                series_images,
                [k for _, k in series],
                mtf=metrics.mtf,
                mtf_by_direction=metrics.mtf_by_direction,
                q_per_mm2_ugy=q_per_mm2_ugy,
                path=noise_csv,
            )
        for w in metrics.warnings:  # the measurement's own (edge angle, NNPS, DQE): on stderr, not only in JSON
            click.echo(f"warning: {' '.join(str(w).split())}", err=True)
        metrics.warnings = notes + [w for im in flats + edges for w in im.metadata.warnings] + metrics.warnings
        if metrics.dqe is None and metrics.mtf is not None and metrics.nnps is not None:
            click.echo("note: DQE not computed: give --kerma-ugy and --q (or --beam)", err=True)
        if diam and metrics.mtf is not None and metrics.nnps is not None:
            from scorer.detector import predict_from_detector

            metrics.predicted = [
                p.to_dict()
                for p in predict_from_detector(
                    metrics.to_dict(), diam, m_alternatives=alternatives_from_options(m_alternatives, layout_file) or 4
                )
            ]
        elif diam:
            raise LimenError(
                "predicted thresholds need both flat fields (--flat) and an edge image (--edge)", "--diameters"
            )
    result = (
        metrics.to_dict()
        if metrics is not None
        else {
            "mtf": None,
            "mtf_extended": None,
            "nnps": None,
            "dqe": None,
            "conversion": conv_dict,
            "edge_angle_deg": None,
            "predicted": None,
            "warnings": notes,
        }
    )

    if out_dir:
        out = folder.path
        write_json(out / "detector.json", result)
        write_csv(out / "detector.csv", result)
        if metrics is not None and metrics.nnps is not None:
            buf = io.BytesIO()
            np.save(buf, metrics.nnps.nnps_2d_mm2)
            atomic_write_bytes(out / "nnps_2d.npy", buf.getvalue())
        from scorer.reports import detector_report_html

        atomic_write_text(out / "detector.html", detector_report_html(result, metrics))
        folder.finish()
    if as_json:
        click.echo(dumps(result))
    else:
        for k, v in summary_rows(result):
            click.echo(f"{k:<32} {v}")
        if result.get("predicted"):
            click.echo("predicted threshold contrast (%):")
            for p in result["predicted"]:
                click.echo(f"  {p['observer']:<5} {p['diameter_mm']:>6.3g} mm  {100 * p['threshold_contrast']:.3g}")
        if out_dir:
            click.echo(f"wrote detector.json, detector.csv and detector.html to {out_dir}/")


#: plausible air kerma at the detector for a DQE measurement, µGy (common practice: IEC 62220-1 uses a few
#: to a few hundred µGy; a factor of 100 either side is allowed)
KERMA_RANGE_UGY = (0.01, 1.0e5)


def _check_distinct_and_kerma(paths, images, kerma_ugy, *, linearised: bool, n_flats: int) -> None:
    """Refuse the same image given twice (it would count as independent noise) and an air kerma that cannot be
    the flats' (outside a plausible range, or, with a conversion function, far from the flats' own kerma)."""
    seen: dict[str, str] = {}
    for p, im in zip(paths, images):
        twin = seen.get(im.metadata.content_sha256)
        if twin is not None:
            what = "given twice" if twin == str(p) else f"holds the same image as {twin}"
            raise LimenError(f"{what}: it would be counted as two independent images", p)
        seen[im.metadata.content_sha256] = str(p)
    if kerma_ugy is None:
        return
    lo, hi = KERMA_RANGE_UGY
    if not lo <= kerma_ugy <= hi:
        raise LimenError(
            f"{kerma_ugy:g} µGy is outside the plausible range {lo:g}–{hi:g} µGy of air kerma at the detector",
            "--kerma-ugy",
        )
    if linearised and n_flats:
        measured = float(np.median([central_mean(im.pixels, im.spacing_mm) for im in images[:n_flats]]))
        if not 0.5 <= kerma_ugy / measured <= 2.0:
            raise LimenError(
                f"{kerma_ugy:g} µGy disagrees with the flat fields' air kerma from the conversion "
                f"function ({measured:.4g} µGy)",
                "--kerma-ugy",
            )


def write_csv(path: Path, result: dict) -> None:
    """One row per NNPS frequency (up to Nyquist): MTF per direction and mean, NNPS cuts, DQE."""
    nn = result.get("nnps")
    mtf = result.get("mtf")
    if nn:
        f = np.asarray(nn["frequency_per_mm"])
    elif mtf:
        f = np.asarray(mtf["frequency_per_mm"])
    else:
        atomic_write_text(path, "frequency_per_mm\n")
        return
    cols: dict[str, np.ndarray] = {"frequency_per_mm": f}

    def interp(curve_f, curve_v):
        return np.interp(f, curve_f, curve_v, left=np.nan, right=np.nan)

    if mtf:
        for d, m in (mtf.get("by_direction") or {}).items():
            cols[f"mtf_{d}"] = interp(m["frequency_per_mm"], m["value"])
        cols["mtf"] = interp(mtf["frequency_per_mm"], mtf["value"])
    if nn:
        cols["nnps_x_mm2"] = np.asarray(nn["x_mm2"])
        cols["nnps_y_mm2"] = np.asarray(nn["y_mm2"])
        cols["nnps_mm2"] = np.asarray(nn["value_mm2"])
    if result.get("dqe"):
        q = result["dqe"]
        for d, v in (q.get("by_direction") or {}).items():
            cols[f"dqe_{d}"] = interp(q["frequency_per_mm"], v)
        cols["dqe"] = interp(q["frequency_per_mm"], q["value"])
    fh = io.StringIO(newline="")
    w = csv.writer(fh)
    w.writerow(list(cols))
    for i in range(len(f)):
        w.writerow(["" if not np.isfinite(c[i]) else f"{c[i]:.6g}" for c in cols.values()])
    atomic_write_text(path, fh.getvalue())


if __name__ == "__main__":  # pragma: no cover
    detector(sys.argv[1:])
