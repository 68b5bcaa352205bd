"""Floors (issue: scorer).

1. Scoring one full-size image (registration + blur estimate + NPW observer at every site) takes at most 3× the
   time to load it (decode + linearise), measured side by side in one run; and the cost grows linearly with the
   number of images (time per image for 1, 2, 4 and 8 images).
2. With the d′ method, the threshold CI from 4 images is no wider than the count method's from 16: the ratio of
   the CI widths (in log contrast) per diameter, on simulated images of the demo plate.

Run with ``.venv/bin/python -m bench.bench_score`` (about two minutes).
"""

from __future__ import annotations

import datetime as dt
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from scorer.images import load_image
from scorer.phantom import load_layout
from scorer.observer import ObserverConfig, decide, estimate_blur, score_image
from scorer.phantom import register
from scorer.observer import score_images
from scorer.detector import detector_model, simulate, write_simulated
from scorer.observer import count_thresholds, dprime_thresholds

FLOOR_RATIO = 3.0


def speed(tmp: Path) -> dict:
    m = detector_model("direct")
    lay = load_layout()
    conv = m.conversion_function()
    paths = []
    for i in range(8):
        sim = simulate(m, "phantom", 100.0, seed=100 + i)
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
    for n in (1, 2, 4, 8):
        t = time.perf_counter()
        score_images(paths[:n], lay, methods=["dprime", "count"], conversion=conv, n_boot=200)
        per_image[n] = (time.perf_counter() - t) / n
    print(
        f"full-size {img.shape}: load {np.median(load_t):.3f} s, score {np.median(score_t):.3f} s "
        f"-> ratio {ratio:.2f} (floor {FLOOR_RATIO}) {'PASS' if ratio <= FLOOR_RATIO else 'FAIL'}"
    )
    print(
        "time per image with n images (whole score_images call incl. load and 200 bootstraps): "
        + ", ".join(f"n={n}: {v:.2f} s" for n, v in per_image.items())
    )
    return {
        "load_s": load_t,
        "score_s": score_t,
        "ratio": ratio,
        "pass": ratio <= FLOOR_RATIO,
        "per_image_s": per_image,
    }


def ci_widths() -> dict:
    lay = load_layout()
    rows = []
    for name in ("direct", "indirect"):
        m = detector_model(name)
        frames = []
        for i in range(16):
            sim = simulate(m, "phantom", 100.0, seed=1000 + i, small=True, layout=lay)
            from scorer.images import Image

            img = Image(sim.kerma_ugy(), sim.spacing_mm)
            pl = register(img, lay)
            frames.append(
                score_image(img, lay, pl, ObserverConfig("npw", blur=estimate_blur(img, lay, pl)), image_id=f"i{i}")
            )
        df = pd.concat(frames, ignore_index=True)
        b = count_thresholds(decide(df), n_boot=1000, seed=1)
        # d′ CIs from each of the four disjoint 4-image subsets of the same 16 images
        subsets = [
            dprime_thresholds(df[df["image"].isin([f"i{i}" for i in range(s0, s0 + 4)])], n_boot=0)
            for s0 in (0, 4, 8, 12)
        ]
        for j, pb in enumerate(b.points):
            wb = np.log(pb.ci_high / pb.ci_low)
            wa = [np.log(c.points[j].ci_high / c.points[j].ci_low) for c in subsets]
            rows.append(
                {
                    "detector": name,
                    "diameter_mm": pb.diameter_mm,
                    "dprime_4_width_log": wa,
                    "count_16_width_log": wb,
                    "ratio": float(np.mean(wa) / wb),
                    "ratio_each": [w / wb for w in wa],
                    "pass": bool(np.mean(wa) <= wb),
                }
            )
    for r in rows:
        print(
            f"{r['detector']:9s} {r['diameter_mm']:5.2f} mm: CI width d′(4 images) / count(16 images) = "
            f"{r['ratio']:.2f} (four subsets: {', '.join(f'{x:.2f}' for x in r['ratio_each'])}) "
            f"{'PASS' if r['pass'] else 'FAIL'}"
        )
    return {"rows": rows, "n_pass": sum(r["pass"] for r in rows), "n": len(rows)}


def main() -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        out = {"benchmark": "bench_score", "ci_width": ci_widths(), "speed": speed(Path(tmp))}
    Path("bench/results").mkdir(parents=True, exist_ok=True)
    Path("bench/results/bench_score.json").write_text(json.dumps(out, indent=2, default=float))
    return out


if __name__ == "__main__":
    main()
