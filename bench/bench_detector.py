"""Speed floor: MTF + NNPS from one full-size edge image and four full-size flat fields (< 10 s).

Run with ``.venv/bin/python -m bench.bench_detector``; prints the figures and writes
bench/results/bench_detector.json.  The images come from the lead's simulator at the
panel's full size (2816 × 3520 px of 0.085 mm, direct conversion); simulation time
is not counted.
"""

from __future__ import annotations

import json
import platform
import time
from pathlib import Path

import numpy as np

from scorer.detector import detector_model, measure_detector, simulate
from scorer.images import Image

FLOOR_S = 10.0


def main() -> dict:
    model = detector_model("direct")
    t0 = time.perf_counter()
    edge = simulate(model, "edge", dose_ugy=100.0, seed=1, edge_angle_deg=2.5)
    flats = [simulate(model, "flat", dose_ugy=100.0, seed=10 + i) for i in range(4)]
    edge_im = Image(edge.kerma_ugy(), edge.spacing_mm)
    flat_ims = [Image(f.kerma_ugy(), f.spacing_mm) for f in flats]
    t_sim = time.perf_counter() - t0

    t1 = time.perf_counter()
    met = measure_detector(flat_ims, [edge_im], kerma_ugy=100.0, q_per_mm2_ugy=model.q_per_mm2_ugy)
    t_measure = time.perf_counter() - t1

    fn = met.mtf.nyquist_per_mm
    out = {
        "benchmark": "bench_detector",
        "image_shape": list(edge.pixels.shape),
        "n_flat": len(flats),
        "simulation_s": round(t_sim, 3),
        "mtf_nnps_dqe_s": round(t_measure, 3),
        "floor_s": FLOOR_S,
        "within_floor": t_measure < FLOOR_S,
        "n_rois": met.nnps.n_rois,
        "mtf_at_nyquist": float(met.mtf.at(fn)),
        "mtf_at_nyquist_expected_2_over_pi": 2 / np.pi,
        "dqe_mean_below_1_per_mm": float(np.mean(met.dqe.value[met.dqe.frequency_per_mm <= 1.0])),
        "dqe_expected_eta_swank": model.qde * model.swank,
        "machine": platform.machine(),
        "python": platform.python_version(),
    }
    for k, v in out.items():
        print(f"{k:<34} {v}")
    res_dir = Path(__file__).resolve().parent / "results"
    res_dir.mkdir(exist_ok=True)
    (res_dir / "bench_detector.json").write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    return out


if __name__ == "__main__":
    main()
