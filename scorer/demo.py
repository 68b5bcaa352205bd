"""``make demo``: the main job on the bundled demo scenario, step by step, as a user would type it.

The scenario is invented: the breast-imaging unit of the "Harbourside Women's
Health Centre" commissions two mammography panels in neighbouring rooms — a
direct-conversion (amorphous selenium) panel, serial HSX-SE-0417 in room MAM2, and
an indirect-conversion (CsI + a-Si:H) panel, serial HSX-CS-2291 in room MAM3.  For
each panel Limen simulates eight exposures of the Tessera demo plate plus flat
fields and slanted edges at 100 µGy, scores the plate images with the NPW model
observer, measures MTF/NNPS/DQE, predicts the contrast-detail curve from them and
puts the two panels side by side.  A simulated reader study (invented readers)
is analysed when the statistics module is present.

Run ``python -m scorer.demo --out DIR`` (``make demo`` does this in ``.venv``).
"""

from __future__ import annotations

import argparse
import html
import importlib.util
import shlex
import sys
import time
from pathlib import Path

from .report import CAUTION, html_page

DOSE_UGY = 100.0
N_PHANTOM = 8


def _limen(args: list[str], allowed_exit=(0,)) -> int:
    """Run one ``limen`` command in-process, echoing it as a user would type it."""
    from .cli import main

    print(f"\n$ limen {' '.join(shlex.quote(a) for a in args)}", flush=True)
    try:
        main.main(args=args, prog_name="limen", standalone_mode=False)
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    if code not in allowed_exit:
        raise SystemExit(f"demo step failed (exit {code}): limen {' '.join(args)}")
    return code


def run(out: Path) -> Path:
    out = Path(out)
    t0 = time.perf_counter()
    links: list[tuple[str, str]] = []
    for panel, seed in (("direct", 417), ("indirect", 2291)):
        d = out / panel
        _limen(["simulate", "--detector", panel, "--kind", "phantom", "--small", "--count", str(N_PHANTOM),
                "--dose-ugy", str(DOSE_UGY), "--rotate", "1.5", "--seed", str(seed), "--out", str(d / "images")])
        _limen(["simulate", "--detector", panel, "--kind", "flat", "--small", "--count", "4",
                "--dose-ugy", str(DOSE_UGY), "--seed", str(seed + 1), "--out", str(d / "flats")])
        _limen(["simulate", "--detector", panel, "--kind", "edge", "--small", "--edge-angle-deg", "2.5",
                "--dose-ugy", str(DOSE_UGY), "--seed", str(seed + 2), "--out", str(d / "edges")])
        _limen(["simulate", "--detector", panel, "--kind", "edge", "--small", "--edge-angle-deg", "92.5",
                "--dose-ugy", str(DOSE_UGY), "--seed", str(seed + 3), "--out", str(d / "edges")])
        conv = str(d / "images" / f"{panel}-conversion.toml")
        images = sorted(str(p) for p in (d / "images").glob("*.dcm"))
        # measure the panel first, then score the plate with templates shaped by the measured MTF
        _limen(["detector", "--flat", *sorted(str(p) for p in (d / "flats").glob("*.dcm")),
                "--edge", *sorted(str(p) for p in (d / "edges").glob("*.dcm")),
                "--kerma-ugy", str(DOSE_UGY), "--q", "5000", "--conversion", conv, "--out", str(d / "detector")])
        _limen(["score", *images, "--observer", "npw", "--conversion", conv,
                "--mtf", str(d / "detector" / "detector.json"), "--out", str(d / "score")])
        links += [(f"{panel} panel: contrast-detail report", f"{panel}/score/report.html"),
                  (f"{panel} panel: MTF, NNPS, DQE", f"{panel}/detector/detector.html")]
    _limen(["compare-detectors", str(out / "direct" / "detector" / "detector.json"),
            str(out / "indirect" / "detector" / "detector.json"), "--label-a", "direct (a-Se)",
            "--label-b", "indirect (CsI)", "--scored-a", str(out / "direct" / "score" / "results.json"),
            "--scored-b", str(out / "indirect" / "score" / "results.json"), "--out", str(out / "comparison")])
    links.append(("direct vs indirect, side by side", "comparison/comparison.html"))
    if importlib.util.find_spec("scorer.reader_model") and importlib.util.find_spec("scorer.commands.analyse"):
        links += _reader_study(out)
    body = "<ul>" + "".join(f"<li><a href='{html.escape(h)}'>{html.escape(t)}</a></li>" for t, h in links) + "</ul>"
    body += ("<p>Scenario (invented): Harbourside Women's Health Centre commissions a direct-conversion panel "
             "(HSX-SE-0417, room MAM2) and an indirect-conversion panel (HSX-CS-2291, room MAM3); every image "
             "is simulated by Limen's physics model at 100 µGy.</p>")
    index = out / "index.html"
    index.write_text(html_page("Limen demo — two mammography panels compared", [("Reports", body)]), encoding="utf-8")
    print(f"\nDemo finished in {time.perf_counter() - t0:.0f} s. Open {index.resolve()}")
    print(CAUTION)
    return index


def _reader_study(out: Path) -> list[tuple[str, str]]:
    from . import reader_model

    study = out / "reader-study"
    paths = reader_model.write_demo_study(study)
    print(f"\nsimulated reader study (invented readers, documented observer model) written to {study}")
    _limen(["analyse", paths["readers"], "--model", paths["model"], "--by", "detector",
            "--out", str(study / "analysis")])
    return [("reader study: human curves, human/model factor, detector comparison",
             "reader-study/analysis/report.html")]


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="demo-output", help="output folder (default: demo-output)")
    args = ap.parse_args(argv)
    run(Path(args.out))


if __name__ == "__main__":
    sys.exit(main())
