"""``make demo``: the main job on the bundled demo scenario, step by step, as a user would type it.

The scenario is invented: the breast-imaging unit of the "Harbourside Women's
Health Centre" commissions two mammography panels in neighbouring rooms — a
direct-conversion (amorphous selenium) panel, serial HSX-SE-0417 in room MAM2, and
an indirect-conversion (CsI + a-Si:H) panel, serial HSX-CS-2291 in room MAM3.  For
each panel Limen simulates eight exposures of the Cairn demo plate plus flat
fields and slanted edges at 100 µGy, scores the plate images with the NPW model
observer, measures MTF/NNPS/DQE, predicts the contrast-detail curve from them and
puts the two panels side by side.  Six invented readers (a documented
human-observer model on the NPWE responses) then read the same images; their
human/model factor turns NPWE thresholds into human-equivalent ones, which are
checked against the example limits file.

Run ``python -m scorer.demo --out DIR`` (``make demo`` does this in ``.venv``).
"""

from __future__ import annotations

import argparse
import html
import shlex
import time
from pathlib import Path

from scorer.files import atomic_write_text
from scorer.reports import CAUTION, html_page
from scorer.reports.html import NOT_FOR_DIAGNOSIS

DOSE_UGY = 100.0
N_PHANTOM = 8
#: the dose series: extra kermas (µGy; the 100 µGy images above are the fourth group), below saturation
#: (direct panel ≈ 209 µGy, indirect ≈ 290 µGy), with few small images per group to keep the demo short
SERIES_UGY = (25.0, 50.0, 180.0)
N_SERIES = 4
#: the two mammography panels as every report names them: type, converter and the (invented) serial
PANEL_LABELS = {"direct": "direct a-Se (HSX-SE-0417)", "indirect": "indirect CsI (HSX-CS-2291)"}
#: general radiography at RQA5 (scorer/detector/presets.py): kermas at the detector (µGy), the flats' kerma
RAD_LABELS = {"direct-rad": "direct a-Se (HGX-SE-0731)", "indirect-rad": "indirect CsI (HGX-CS-1186)"}
RAD_SERIES_UGY = (1.25, 2.5, 5.0, 10.0)
RAD_FLAT_UGY = 2.5
#: the plate lies slightly turned, as on a real table (registration must find it)
PHANTOM_ROTATE_DEG = 1.5
#: two slanted edges per panel: near-vertical and near-horizontal (MTF in both directions)
EDGE_ANGLES_DEG = (2.5, 92.5)


def _limen(args: list[str], allowed_exit: tuple[int, ...] = (0,)) -> int:
    """Run one ``limen`` command in-process, echoing it as a user would type it."""
    from scorer.cli import main

    print(f"\n$ limen {' '.join(shlex.quote(a) for a in args)}", flush=True)
    try:
        main.main(args=args, prog_name="limen", standalone_mode=False)
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    if code not in allowed_exit:
        raise SystemExit(f"demo step failed (exit {code}): limen {' '.join(args)}")
    return code


def _simulate(
    panel: str,
    kind: str,
    folder: Path,
    seed: int,
    *,
    count: int | None = None,
    dose_ugy: float = DOSE_UGY,
    edge_angle_deg: float | None = None,
    rotate_deg: float | None = None,
) -> None:
    """One ``limen simulate`` step of the demo: small field, images of one panel, kind and kerma into folder
    (replacing those of an earlier demo run)."""
    args = ["simulate", "--detector", panel, "--kind", kind, "--small"]
    if count is not None:
        args += ["--count", str(count)]
    if edge_angle_deg is not None:
        args += ["--edge-angle-deg", str(edge_angle_deg)]
    args += ["--dose-ugy", str(dose_ugy)]
    if rotate_deg is not None:
        args += ["--rotate", str(rotate_deg)]
    _limen([*args, "--seed", str(seed), "--out", str(folder), "--overwrite"])


def run(out: Path) -> Path:
    out = Path(out)
    t0 = time.perf_counter()
    links: list[tuple[str, str]] = []
    for panel, seed in (("direct", 417), ("indirect", 2291)):
        d = out / panel
        _simulate(panel, "phantom", d / "images", seed, count=N_PHANTOM, rotate_deg=PHANTOM_ROTATE_DEG)
        _simulate(panel, "flat", d / "flats", seed + 1, count=4)
        for i, angle_deg in enumerate(EDGE_ANGLES_DEG):  # near-vertical and near-horizontal edge
            _simulate(panel, "edge", d / "edges", seed + 2 + i, edge_angle_deg=angle_deg)
        noise_csv = _simulate_series(d, panel, seed)
        conv = str(d / "images" / f"{panel}-conversion.toml")
        images = sorted(str(p) for p in (d / "images").glob("*.dcm"))
        # measure the panel first, then score the plate with templates shaped by the measured MTF
        _limen(
            [
                "detector",
                "--flat",
                *sorted(str(p) for p in (d / "flats").glob("*.dcm")),
                "--edge",
                *sorted(str(p) for p in (d / "edges").glob("*.dcm")),
                "--kerma-ugy",
                str(DOSE_UGY),
                "--q",
                "5000",
                "--conversion",
                conv,
                "--noise-series",
                noise_csv,
                "--replace",
                "--out",
                str(d / "detector"),
            ]
        )
        for observer, folder in (("npw", "score"), ("npwe", "score-npwe")):
            _limen(
                [
                    "score",
                    *images,
                    "--observer",
                    observer,
                    "--conversion",
                    conv,
                    "--mtf",
                    str(d / "detector" / "detector.json"),
                    "--replace",
                    "--out",
                    str(d / folder),
                ]
            )
        links += [
            (f"{panel} panel: contrast-detail report, NPW observer", f"{panel}/score/report.html"),
            (f"{panel} panel: contrast-detail report, NPWE observer", f"{panel}/score-npwe/report.html"),
            (f"{panel} panel: MTF, NNPS, DQE", f"{panel}/detector/detector.html"),
        ]
    links += _reader_study(out)
    links += _dose_series(out)
    _limen(
        [
            "compare-detectors",
            str(out / "direct" / "detector" / "detector.json"),
            str(out / "indirect" / "detector" / "detector.json"),
            "--label-a",
            PANEL_LABELS["direct"],
            "--label-b",
            PANEL_LABELS["indirect"],
            "--scored-a",
            str(out / "direct" / "score" / "results.json"),
            "--scored-b",
            str(out / "indirect" / "score" / "results.json"),
            "--dose-a",
            str(out / "direct" / "dose-series" / "dose_series.json"),
            "--dose-b",
            str(out / "indirect" / "dose-series" / "dose_series.json"),
            "--replace",
            "--out",
            str(out / "comparison"),
        ]
    )
    links.insert(
        0,
        (
            "direct vs indirect, side by side: equal-quality kerma, noise components, MTF/NNPS/DQE",
            "comparison/comparison.html",
        ),
    )
    links.insert(1, _general_radiography(out))  # the same question at RQA5, where thin selenium absorbs less
    links += _nightly(out)  # nightly scoring (issue 13): simulated nights, one panel drifts and is caught
    body = "<ul>" + "".join(f"<li><a href='{html.escape(h)}'>{html.escape(t)}</a></li>" for t, h in links) + "</ul>"
    scenario = (
        "<p class='fail'><b>Simulated data, invented scenario.</b> Harbourside Women's Health Centre "
        "(invented) commissions a direct-conversion panel (HSX-SE-0417, room MAM2) and an indirect-conversion "
        "panel (HSX-CS-2291, room MAM3); every image is simulated by Limen's physics model (at 100 µGy; the dose "
        "series also at 25, 50 and 180 µGy) and the "
        "six readers are a documented observer model, not people. Its general-radiography department "
        "(Harbourside General Hospital, invented) compares an a-Se and a CsI panel at the RQA5 beam quality "
        "(1.25–10 µGy). The panels' DQE, MTF and electronic noise are published typical values "
        "(scorer/detector/presets.py), not any product's.</p>"
    )
    index = out / "index.html"
    from scorer.invocation import set_invocation

    set_invocation(["--out", str(out)], prog="python -m scorer.demo")  # the index is the demo's, not the last step's
    atomic_write_text(
        index,
        html_page(
            "Limen demo — direct or indirect panel?",
            [
                ("The answer", _answer(out)),
                ("Scenario", scenario),
                ("Verdicts", _verdict_summary(out)),
                ("Reports", body),
            ],
            simulated="Every image on these pages was made by Limen's physics simulator and every reader is an "
            "observer model: the scenario, hospitals, rooms and serials are invented.",
            dose=True,
        ),
    )
    print(f"\nDemo finished in {time.perf_counter() - t0:.0f} s. Open {index.resolve()}")
    print(f"{CAUTION} {NOT_FOR_DIAGNOSIS}")
    return index


def _answer(out: Path) -> str:
    """The first screen of the index: for each pair of panels the headline of its comparison (pooled
    equal-quality kerma ratio per detail class, how sure, at what kerma), then why, pair by pair."""
    import json

    from scorer.reports.headline import headline_html, overview_html

    pairs, details = [], []
    for title, folder, pair in (
        ("Mammography (~28 kV W/Rh)", "comparison", ("direct", "indirect")),
        ("General radiography (RQA5)", "comparison-rad", ("direct-rad", "indirect-rad")),
    ):
        path = out / folder / "comparison.json"
        if not path.is_file():
            continue
        head = json.loads(path.read_text(encoding="utf-8")).get("headline")
        dets = [json.loads((out / p / "detector" / "detector.json").read_text(encoding="utf-8")) for p in pair]
        pairs.append((title, f"{folder}/comparison.html", head))
        details.append(
            f"<h3>{html.escape(title)} — <a href='{folder}/comparison.html'>full comparison</a></h3>"
            + headline_html(head, *dets, compact=True)
        )
    if not pairs:
        return "<p>No comparison was written.</p>"
    return overview_html(pairs) + "".join(details)


def _general_radiography(out: Path) -> tuple[str, str]:
    """The same comparison for a general-radiography pair at RQA5: flats, edges and a noise series per panel,
    the plate at four kermas (1.25–10 µGy) scored with the NPW observer, and the two panels compared."""
    for panel, seed in (("direct-rad", 731), ("indirect-rad", 1186)):
        d = out / panel
        _simulate(panel, "flat", d / "flats", seed + 1, count=4, dose_ugy=RAD_FLAT_UGY)
        for i, angle_deg in enumerate(EDGE_ANGLES_DEG):
            _simulate(panel, "edge", d / "edges", seed + 2 + i, edge_angle_deg=angle_deg, dose_ugy=RAD_FLAT_UGY)
        rows = ["path,kerma_ugy"]
        for i, k in enumerate(RAD_SERIES_UGY):
            folder = d / "dose" / f"{k:g}uGy"
            _simulate(
                panel, "phantom", folder, seed + 10 + i, count=N_SERIES, dose_ugy=k, rotate_deg=PHANTOM_ROTATE_DEG
            )
            _simulate(panel, "flat", d / "dose-flats" / f"{k:g}uGy", seed + 20 + i, count=2, dose_ugy=k)
            rows += [f"{p.resolve()},{k:g}" for p in sorted((d / "dose-flats" / f"{k:g}uGy").glob("*.dcm"))]
        atomic_write_text(d / "dose-flats" / "flats.csv", "\n".join(rows) + "\n")
        conv = str(d / "dose" / f"{RAD_SERIES_UGY[0]:g}uGy" / f"{panel}-conversion.toml")
        _limen(
            [
                "detector",
                "--flat",
                *sorted(str(p) for p in (d / "flats").glob("*.dcm")),
                "--edge",
                *sorted(str(p) for p in (d / "edges").glob("*.dcm")),
                "--kerma-ugy",
                str(RAD_FLAT_UGY),
                "--beam",
                "RQA5",
                "--conversion",
                conv,
                "--noise-series",
                str(d / "dose-flats" / "flats.csv"),
                "--replace",
                "--out",
                str(d / "detector"),
            ]
        )
        images = sorted(str(p) for k in RAD_SERIES_UGY for p in (d / "dose" / f"{k:g}uGy").glob("*.dcm"))
        _limen(
            [
                "dose-series",
                *images,
                "--conversion",
                conv,
                "--mtf",
                str(d / "detector" / "detector.json"),
                "--out",
                str(d / "dose-series"),
            ]
        )
    _limen(
        [
            "compare-detectors",
            str(out / "direct-rad" / "detector" / "detector.json"),
            str(out / "indirect-rad" / "detector" / "detector.json"),
            "--label-a",
            RAD_LABELS["direct-rad"],
            "--label-b",
            RAD_LABELS["indirect-rad"],
            "--dose-a",
            str(out / "direct-rad" / "dose-series" / "dose_series.json"),
            "--dose-b",
            str(out / "indirect-rad" / "dose-series" / "dose_series.json"),
            "--replace",
            "--out",
            str(out / "comparison-rad"),
        ]
    )
    return (
        "general radiography (RQA5): direct vs indirect, equal-quality kerma, MTF/NNPS/DQE",
        "comparison-rad/comparison.html",
    )


def _simulate_series(d: Path, panel: str, seed: int) -> str:
    """Phantom images and flat fields at the series' other kermas; returns the flats' CSV path,kerma_ugy."""
    rows = ["path,kerma_ugy"] + [f"{p.resolve()},{DOSE_UGY:g}" for p in sorted((d / "flats").glob("*.dcm"))]
    for i, k in enumerate(SERIES_UGY):
        _simulate(
            panel,
            "phantom",
            d / "dose" / f"{k:g}uGy",
            seed + 10 + i,
            count=N_SERIES,
            dose_ugy=k,
            rotate_deg=PHANTOM_ROTATE_DEG,
        )
        _simulate(panel, "flat", d / "dose-flats" / f"{k:g}uGy", seed + 20 + i, count=2, dose_ugy=k)
        rows += [f"{p.resolve()},{k:g}" for p in sorted((d / "dose-flats" / f"{k:g}uGy").glob("*.dcm"))]
    path = d / "dose-flats" / "flats.csv"
    atomic_write_text(path, "\n".join(rows) + "\n")
    return str(path)


def _against_limits(out: Path, panel: str) -> list[str]:
    """Options that score a panel's plate as the readers would see it: NPWE templates shaped by the measured
    MTF, thresholds turned human-equivalent by the reader study's factor and checked against the example
    limits (shared by the verdict and the dose series)."""
    from scorer.workflow import EXAMPLE_LIMITS

    d = out / panel
    return [
        "--observer",
        "npwe",
        "--conversion",
        str(d / "images" / f"{panel}-conversion.toml"),
        "--mtf",
        str(d / "detector" / "detector.json"),
        "--limits",
        str(EXAMPLE_LIMITS),
        "--human-factor-from",
        str(out / "reader-study" / "analysis" / "analysis.json"),
    ]


def _dose_series(out: Path) -> list[tuple[str, str]]:
    """Each panel's plate images at four kermas (25–180 µGy), scored per kerma with the NPWE observer; the
    kerma at which each diameter meets the example limits through the readers' human/model factor."""

    links = []
    for panel in ("direct", "indirect"):
        d = out / panel
        images = sorted(str(p) for p in (d / "images").glob("*.dcm"))
        images += sorted(str(p) for k in SERIES_UGY for p in (d / "dose" / f"{k:g}uGy").glob("*.dcm"))
        _limen(
            [
                "dose-series",
                *images,
                *_against_limits(out, panel),
                "--replace",
                "--out",
                str(d / "dose-series"),
            ]
        )
        links.append(
            (
                f"{panel} panel: threshold against air kerma (25–180 µGy), β, kerma for the limits",
                f"{panel}/dose-series/dose_series.html",
            )
        )
    return links


def _verdict_summary(out: Path) -> str:
    """Per panel: the overall verdict and the human-equivalent threshold against the limit at each diameter."""
    import json

    from scorer.reports import table_html

    rows, overall = [], []
    for panel in ("direct", "indirect"):
        path = out / panel / "verdict" / "results.json"
        if not path.is_file():
            continue
        r = json.loads(path.read_text(encoding="utf-8"))
        overall.append(
            f"<li>{panel} panel: <span class='{html.escape(r['overall_verdict'])}'>"
            f"{html.escape(r['overall_verdict'].upper())}</span> against {html.escape(r['limits']['name'])}"
            f" (human/model factor {r['human_factor']:.3g})</li>"
        )
        for v in r["verdicts"]:
            if v["verdict"] == "no limit":
                continue
            ci = (
                f"{100 * v['ci_low']:.3g}–{100 * v['ci_high']:.3g}"
                if v.get("ci_low") is not None and v.get("ci_high") is not None
                else "—"
            )
            rows.append(
                {
                    "panel": panel,
                    "diameter (mm)": v["diameter_mm"],
                    "human-equivalent threshold (%)": f"{100 * v['threshold_contrast']:.3g}",
                    "95 % CI (%)": ci,
                    "acceptable limit (%)": f"{100 * v['acceptable']:.3g}"
                    + (" (interpolated)" if v.get("limit_interpolated") else ""),
                    "verdict": v["verdict"],
                }
            )
    if not rows:
        return "<p>No verdicts were computed.</p>"
    return (
        "<ul>"
        + "".join(overall)
        + "</ul>"
        + table_html(rows, left=["panel", "verdict", "95 % CI (%)", "acceptable limit (%)"])
        + "<p class='meta'>Verdicts at interpolated limits inform; the overall verdict rests on the diameters the "
        "limits file lists.</p>"
    )


def _nightly(out: Path) -> list[tuple[str, str]]:
    """Eight simulated mornings of phantom QC scored by `limen nightly`; the direct panel's dose falls from
    night 5 and the alerts catch it (scenario in scorer/qc/simulated.py)."""
    import shutil

    from scorer.qc.simulated import demo_nights, simulate_night

    # the nightly part starts from an empty inbox and database every time: a second `make demo` would otherwise
    # write the same mornings again (new DICOM UIDs, so new files) and store every session twice
    for stale in ("nightly.sqlite", "nightly.sqlite-wal", "nightly.sqlite-shm"):
        (out / "nightly" / stale).unlink(missing_ok=True)
    shutil.rmtree(out / "nightly" / "inbox", ignore_errors=True)
    plan = demo_nights(out / "nightly")
    db = str(out / "nightly" / "nightly.sqlite")
    print(
        "\nNightly QC, eight simulated mornings. Expected: from night 5 a simulated fault lowers the direct "
        "panel's (HSX-SE-0417) dose by 40 % each night, so from about night 5–6 on `limen nightly` prints ALERT "
        "lines for that panel and exits with status 1 — that is Limen catching the drift, not a demo failure. "
        "Night 3's indirect images at 29 kV instead of 28 kV are flagged as a settings change, with no alert.",
        flush=True,
    )
    for i, (date, panels) in enumerate(plan.nights):
        simulate_night(plan.inbox, date, panels, n_images=5, seed=2026)
        report = ["--report", str(out / "nightly" / "trend")] if i == len(plan.nights) - 1 else []
        _limen(
            [
                "nightly",
                "--inbox",
                str(plan.inbox),
                "--config",
                str(plan.config),
                "--db",
                db,
                "--settle-seconds",
                "0",
                *report,
            ],
            allowed_exit=(0, 1),
        )
    return [("nightly QC: eight simulated mornings, one panel drifts and is caught", "nightly/trend/trend.html")]


def _reader_study(out: Path) -> list[tuple[str, str]]:
    """Six invented readers read the same demo images (human-observer model on the NPWE responses);
    the human/model factor they give turns the NPWE thresholds into human-equivalent ones, which are
    then checked against the example limits."""
    import numpy as np
    import pandas as pd

    import scorer.study.reader_model as reader_model

    study = out / "reader-study"
    study.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(2026)
    readers = reader_model.draw_readers(rng, 6, reader_model.ReaderPopulation(median_factor=1.8, lapse_max=0.03))
    responses = pd.concat(
        [pd.read_csv(out / p / "score-npwe" / "responses.csv") for p in ("direct", "indirect")], ignore_index=True
    )
    human = reader_model.readers_from_responses(responses, readers, rng, n_repeats=2)
    atomic_write_text(study / "reader_trials.csv", human.to_csv(index=False))
    # the model's responses (not only its decisions): the human/model factor is then measured for the d′ method
    # too, which the verdicts use (like for like, issue 21)
    atomic_write_text(study / "model_responses.csv", responses.to_csv(index=False))
    atomic_write_text(study / "reader_parameters.csv", readers.to_csv(index=False))
    print(
        f"\n6 invented readers (documented observer model, scorer/study/reader_model.py) read the demo images: "
        f"{study / 'reader_trials.csv'}"
    )
    _limen(
        [
            "analyse",
            str(study / "reader_trials.csv"),
            "--model",
            str(study / "model_responses.csv"),
            "--by",
            "detector",
            "--replace",
            "--out",
            str(study / "analysis"),
        ]
    )
    links = [
        ("reader study: human curves, human/model factor, detector comparison", "reader-study/analysis/report.html")
    ]
    print(
        "\nNext, each panel's human-equivalent thresholds against the example limits: a FAIL (exit status 1) or "
        "INDETERMINATE (exit status 3) verdict is a result the demo reports, not a demo failure.",
        flush=True,
    )
    for panel in ("direct", "indirect"):
        d = out / panel
        images = sorted(str(p) for p in (d / "images").glob("*.dcm"))
        _limen(
            [
                "score",
                *images,
                *_against_limits(out, panel),
                "--replace",
                "--out",
                str(d / "verdict"),
            ],
            allowed_exit=(0, 1, 3),
        )
        links.append(
            (f"{panel} panel: human-equivalent thresholds against the example limits", f"{panel}/verdict/report.html")
        )
    return links


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="demo-output", help="output folder (default: demo-output)")
    args = ap.parse_args(argv)
    run(Path(args.out))


if __name__ == "__main__":
    main()
