"""Floors (issue: scorer).

1. Scoring one full-size image (registration + blur estimate + NPW observer at every site) takes at most 3× the
   time to load it (decode + linearise), measured side by side in one run (median of 4 images); and the cost
   grows linearly with the number of images: time per image of a whole ``score_files`` call for 1, 2, 4, 8 and
   16 images (median of 3 repeats each), and its ratio 16 vs 1.
2. With the d′ method, the threshold CI from N images is no wider than the count method's from 16: the ratio of
   mean CI widths (in log contrast) per diameter, on simulated images of the demo plate, for N = 2, 4 and 8
   (disjoint subsets of 48 images, averaged; the count side averaged over the three 16-image sets of the same
   images), and the smallest N at which it holds at every diameter.

Run with ``.venv/bin/python -m bench.bench_score`` (about five minutes).
"""

from __future__ import annotations

import datetime as dt
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from scorer.detector import detector_model, simulate
from scorer.images import load_image
from scorer.observer import ObserverConfig, count_thresholds, decide, dprime_thresholds, estimate_blur, score_image
from scorer.phantom import load_layout, register
from scorer.workflow import score_files, write_simulated

FLOOR_RATIO = 3.0
N_DPRIME = (2, 4, 8)
N_SETS = 3  # independent sets of 16 images per panel for the CI-width comparison


def speed(tmp: Path) -> dict:
    m = detector_model("direct")
    lay = load_layout()
    conv = m.conversion_function()
    paths = []
    for i in range(16):
        sim = simulate(m, "phantom", 100.0, seed=100 + i, layout=lay)
        paths.append(write_simulated(sim, tmp, f"full-{i}", dt.datetime(2026, 11, 30, 8, i)))
    load_t, score_t = [], []
    for p in paths[:4]:
        t = time.perf_counter()
        img = load_image(p, conversion=conv)
        load_t.append(time.perf_counter() - t)
        t = time.perf_counter()
        pl = register(img, lay)
        blur = estimate_blur(img, lay, pl)
        score_image(img, lay, pl, ObserverConfig("npw", blur=blur))
        score_t.append(time.perf_counter() - t)
    ratio = float(np.median(score_t) / np.median(load_t))
    per_image = {}
    for n in (1, 2, 4, 8, 16):
        runs = []
        for _ in range(3):
            t = time.perf_counter()
            score_files(paths[:n], lay, methods=["dprime", "count"], conversion=conv, n_boot=200)
            runs.append((time.perf_counter() - t) / n)
        per_image[n] = float(np.median(runs))
    print(
        f"full-size {img.shape}: load {np.median(load_t):.3f} s, score {np.median(score_t):.3f} s "
        f"-> ratio {ratio:.2f} (floor {FLOOR_RATIO}) {'PASS' if ratio <= FLOOR_RATIO else 'FAIL'}"
    )
    print(
        "time per image with n images (whole score_files call incl. load and 200 bootstraps, median of 3): "
        + ", ".join(f"n={n}: {v:.2f} s" for n, v in per_image.items())
    )
    return {
        "load_s": load_t,
        "score_s": score_t,
        "ratio": ratio,
        "pass": ratio <= FLOOR_RATIO,
        "per_image_s": per_image,
        "per_image_16_over_1": per_image[16] / per_image[1],
    }


def ci_widths() -> dict:
    lay = load_layout()
    rows = []
    for name in ("direct", "indirect"):
        m = detector_model(name)
        frames = []
        for i in range(16 * N_SETS):
            sim = simulate(m, "phantom", 100.0, seed=1000 + i, small=True, layout=lay)
            from scorer.images import Image

            img = Image(sim.kerma_ugy(), sim.spacing_mm)
            pl = register(img, lay)
            frames.append(
                score_image(img, lay, pl, ObserverConfig("npw", blur=estimate_blur(img, lay, pl)), image_id=f"i{i}")
            )
        df = pd.concat(frames, ignore_index=True)

        def subset(s0, n, df=df):
            return df[df["image"].isin([f"i{i}" for i in range(s0, s0 + n)])]

        # a CI's width is itself a random quantity: both sides are averaged over disjoint image sets (count at 16
        # images over N_SETS sets, d′ at N images over all 16·N_SETS/N subsets of the same images)
        counts = [count_thresholds(decide(subset(s0, 16)), n_boot=1000, seed=1) for s0 in range(0, 16 * N_SETS, 16)]
        for n in N_DPRIME:
            subsets = [dprime_thresholds(subset(s0, n), n_boot=0) for s0 in range(0, 16 * N_SETS, n)]
            for j, pb in enumerate(counts[0].points):
                wb = [np.log(c.points[j].ci_high / c.points[j].ci_low) for c in counts]
                wa = [np.log(c.points[j].ci_high / c.points[j].ci_low) for c in subsets]
                rows.append(
                    {
                        "detector": name,
                        "n_images_dprime": n,
                        "diameter_mm": pb.diameter_mm,
                        "dprime_width_log": wa,
                        "count_16_width_log": wb,
                        "ratio": float(np.mean(wa) / np.mean(wb)),
                        "pass": bool(np.mean(wa) <= np.mean(wb)),
                    }
                )
    for r in rows:
        print(
            f"{r['detector']:9s} {r['diameter_mm']:5.2f} mm: CI width d′({r['n_images_dprime']} images) / "
            f"count(16 images) = {r['ratio']:.2f} {'PASS' if r['pass'] else 'FAIL'}"
        )
    by_n = {n: [r for r in rows if r["n_images_dprime"] == n] for n in N_DPRIME}
    smallest = next((n for n in N_DPRIME if all(r["pass"] for r in by_n[n])), None)
    worst = {n: max(r["ratio"] for r in by_n[n]) for n in N_DPRIME}
    print(
        "worst CI-width ratio d′@N / count@16 over diameters and panels: "
        + ", ".join(f"N={n}: {w:.2f}" for n, w in worst.items())
        + f"; smallest N matching count@16 at every diameter: {smallest}"
    )
    return {"rows": rows, "worst_ratio_by_n": worst, "smallest_n_matching_count_16": smallest}


def main() -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        out = {"benchmark": "bench_score", "ci_width": ci_widths(), "speed": speed(Path(tmp))}
    res_dir = Path(__file__).resolve().parent / "results"
    res_dir.mkdir(parents=True, exist_ok=True)
    (res_dir / "bench_score.json").write_text(json.dumps(out, indent=2, default=float))
    return out


if __name__ == "__main__":
    main()
