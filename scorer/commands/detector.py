"""``limen detector``: conversion function, presampling MTF, NNPS and DQE of a flat panel."""

from __future__ import annotations

import csv
import io
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import click
import numpy as np
from numpy.typing import NDArray

from scorer.commands import options
from scorer.errors import LimenError
from scorer.files import OutputFolder, atomic_write_bytes, atomic_write_text
from scorer.reports import dumps, write_json
from scorer.reports.detector import summary_rows

#: options that take every following file name up to the next option (``--flat a.dcm b.dcm``)
GREEDY_OPTIONS = ("--flat", "--edge")


class GreedyFilesCommand(click.Command):
    """A command whose file-list options accept several values after one flag.

    ``--flat a b c --edge d`` is rewritten to ``--flat a --flat b --flat c --edge d``
    before click parses it, so shell globs (``--flat flats/*.dcm``) work; repeating
    the flag works too.
    """

    greedy = GREEDY_OPTIONS

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
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
        from scorer.workflow import load_layout

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

        from scorer.workflow import load_layout

        lay = load_layout(layout_file)
        return {
            float(d): Counter(t.m_alternatives for t in lay.targets_with_diameter(d)).most_common(1)[0][0]
            for d in lay.diameters_mm
        }
    return None


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
    flat_files: tuple[str, ...],
    edge_files: tuple[str, ...],
    kerma_ugy: float | None,
    q_per_mm2_ugy: float | None,
    beam: str | None,
    pixel_spacing_mm: float | None,
    conversion_file: str | None,
    kerma_csv: str | None,
    noise_csv: str | None,
    diameters: str | None,
    layout_file: str | None,
    m_alternatives: int | None,
    as_json: bool,
    out_dir: str | None,
    replace: bool,
) -> None:
    """Measure a detector as IEC 62220-1 describes: conversion function, MTF, NNPS and DQE.

    Flat fields give the NNPS, slanted-edge images the presampling MTF; the DQE
    needs the air kerma (--kerma-ugy) and q (--q, or --beam for an RQA quality).
    """
    if not flat_files and not edge_files and not kerma_csv and not noise_csv:
        raise LimenError("no images: give flat fields (--flat FILES) and/or edge images (--edge FILES)")
    if q_per_mm2_ugy is not None and beam is not None:
        raise LimenError("give either --q or --beam, not both", "--q")
    if beam is not None:
        from scorer.workflow import q_for_beam

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
    folder = OutputFolder(out_dir, replace=replace, command="detector", beside=True) if out_dir else None

    from scorer.workflow import measure_detector_files

    pending: list[str] = []
    measured = measure_detector_files(
        flat_files,
        edge_files,
        kerma_ugy=kerma_ugy,
        q_per_mm2_ugy=q_per_mm2_ugy,
        beam=beam,
        pixel_spacing_mm=pixel_spacing_mm,
        conversion_file=conversion_file,
        kerma_csv=kerma_csv,
        noise_csv=noise_csv,
        warn=pending.append,
    )
    for text in pending:  # shown once the measurement stands: a refusal is one line, never after a warning
        click.echo(f"warning: {text}", err=True)
    metrics, conv_dict, notes = measured.metrics, measured.conversion, measured.notes
    if metrics is not None:
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
    result: dict[str, Any] = (
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

    if folder is not None:
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


def write_csv(path: Path, result: dict[str, Any]) -> None:
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

    def interp(curve_f: Sequence[float], curve_v: Sequence[float]) -> NDArray[np.float64]:

        out: NDArray[np.float64] = np.interp(f, curve_f, curve_v, left=np.nan, right=np.nan)
        return out

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
