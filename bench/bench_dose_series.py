"""Floors and accuracy of the dose series (issue 11).

1. Speed: a 5-kerma × 8-image series per panel (full-size simulated images of the demo plate) scored and fitted by
   :func:`scorer.workflow.score_dose_series` in under 2× the time :func:`scorer.workflow.score_files` (what
   ``limen score`` runs) needs for the same 40 images.
2. Coverage of the kerma-ratio CI: a simulated pair with a known ratio — panel B is the direct panel with its
   quantum detection efficiency divided by 1.4, so it needs 1.4× the air kerma for the same threshold wherever
   quantum noise dominates (Rose 1948; the direct panel's electronic noise equals its quantum noise near
   0.05 µGy) — scored at 25, 50, 100 and 180 µGy (4 mini-plate images per group), repeated with new seeds; the
   95 % CI should cover 1.4 in 90–98 % of diameters × repeats.

Run with ``.venv/bin/python -m bench.bench_dose_series`` (several minutes; LIMEN_BENCH_REPEATS sets the number of
coverage repeats, default 60).
"""

from __future__ import annotations

import datetime as dt
import json
import os
import tempfile
import time
from collections import OrderedDict
from pathlib import Path

import numpy as np
from tqdm import tqdm

from scorer.detector import detector_model, kerma_ratio, simulate
from scorer.detector.dose import PowerLawFit
from scorer.phantom import load_layout
from scorer.workflow import score_dose_series, score_files, write_simulated

FLOOR_SPEED = 2.0
COVERAGE = (0.90, 0.98)
TRUE_RATIO = 1.4
MINI = Path(__file__).resolve().parents[1] / "tests" / "data" / "mini-plate.toml"


def _groups(model, layout, kermas, n, tmp: Path, seed, small: bool) -> OrderedDict:
    groups = OrderedDict()
    for k in kermas:
        paths = []
        for i in range(n):
            sim = simulate(model, "phantom", k, seed=[seed, int(10 * k), i], small=small, layout=layout)
            paths.append(
                str(write_simulated(sim, tmp / f"{seed}" / f"k{k:g}", f"i{i}", dt.datetime(2026, 11, 30, 8, i)))
            )
        groups[float(k)] = paths
    return groups


def speed(tmp: Path) -> dict:
    lay = load_layout()
    out = {}
    for panel in ("direct", "indirect"):
        m = detector_model(panel)
        groups = _groups(m, lay, [25.0, 50.0, 100.0, 140.0, 180.0], 8, tmp / panel, 1, small=False)
        paths = [p for ps in groups.values() for p in ps]
        conv = m.conversion_function()
        t = time.perf_counter()
        score_files(paths, lay, conversion=conv)
        t_score = time.perf_counter() - t
        t = time.perf_counter()
        score_dose_series(groups, lay, conversion=conv)
        t_series = time.perf_counter() - t
        out[panel] = {"score_s": t_score, "dose_series_s": t_series, "ratio": t_series / t_score}
        print(
            f"{panel}: limen score on 40 images {t_score:.1f} s, dose series {t_series:.1f} s "
            f"-> ratio {t_series / t_score:.2f}"
        )
    return out


def coverage(tmp: Path, repeats: int) -> dict:
    lay = load_layout(MINI)
    a = detector_model("direct")
    b = a.with_overrides(qde=a.qde / TRUE_RATIO)
    kermas = [25.0, 50.0, 100.0, 180.0]
    hits, total, ratios = {}, {}, {}
    for r in tqdm(range(repeats), desc="coverage repeats", file=os.sys.stderr):
        res = {}
        for name, m in (("a", a), ("b", b)):
            g = _groups(m, lay, kermas, 4, tmp / f"cov{r}{name}", 1000 + 2 * r + (name == "b"), small=True)
            res[name] = score_dose_series(g, lay, conversion=m.conversion_function())
        fa = {round(f["diameter_mm"], 6): PowerLawFit.from_dict(f) for f in res["a"].fits if f.get("beta")}
        fb = {round(f["diameter_mm"], 6): PowerLawFit.from_dict(f) for f in res["b"].fits if f.get("beta")}
        for d in sorted(set(fa) & set(fb)):
            k = kerma_ratio(fa[d], fb[d], seed=r)
            total[d] = total.get(d, 0) + 1
            hits[d] = hits.get(d, 0) + int(k["ci_low"] <= TRUE_RATIO <= k["ci_high"])
            ratios.setdefault(d, []).append(k["ratio"])
    all_cov = sum(hits.values()) / max(sum(total.values()), 1)
    for d in sorted(total):
        print(
            f"{d:g} mm: coverage {hits[d] / total[d]:.3f} of {total[d]}, median ratio "
            f"{np.median(ratios[d]):.3f} (truth {TRUE_RATIO})"
        )
    return {
        "per_diameter": {
            f"{d:g}": {"coverage": hits[d] / total[d], "n": total[d], "median_ratio": float(np.median(ratios[d]))}
            for d in total
        },
        "coverage": all_cov,
        "repeats": repeats,
    }


def main() -> None:
    repeats = int(os.environ.get("LIMEN_BENCH_REPEATS", "60"))
    with tempfile.TemporaryDirectory() as tmp:
        cov = coverage(Path(tmp), repeats)
        sp = speed(Path(tmp))
    worst = max(v["ratio"] for v in sp.values())
    res = {"speed": sp, "coverage": cov}
    Path("bench/results").mkdir(parents=True, exist_ok=True)
    Path("bench/results/bench_dose_series.json").write_text(json.dumps(res, indent=2), encoding="utf-8")
    ok_s = worst < FLOOR_SPEED
    ok_c = COVERAGE[0] <= cov["coverage"] <= COVERAGE[1]
    print(f"dose_series_time_ratio: {worst:.2f} x (floor: {FLOOR_SPEED}) {'PASS' if ok_s else 'FAIL'}")
    print(
        f"kerma_ratio_ci_coverage: {100 * cov['coverage']:.1f} % (floor: {100 * COVERAGE[0]:.0f}–"
        f"{100 * COVERAGE[1]:.0f} %) {'PASS' if ok_c else 'FAIL'}"
    )


if __name__ == "__main__":
    main()
