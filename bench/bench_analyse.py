"""Floor for issue 5: `limen analyse` on 20 readers × 2 detectors × 2 000 trials each, 1 000 bootstrap
resamples, under 60 s.  Runs the real CLI (click) on CSV files in a temporary folder and writes
bench/results/analyse.json.

    .venv/bin/python -m bench.bench_analyse
"""

from __future__ import annotations

import json
import tempfile
import time
from pathlib import Path

import numpy as np
from click.testing import CliRunner

from scorer.cli import main as limen_cli
from scorer.study import simulate_reader_study

FLOOR_S = 60.0


def run() -> dict:
    # 4 diameters × 10 contrasts × 50 images = 2 000 trials per reader and detector
    t0 = time.perf_counter()
    st = simulate_reader_study(
        np.random.default_rng(2026), 20, diameters_mm=(0.1, 0.25, 0.5, 1.0), n_contrasts=10, n_images=50
    )
    per = st.trials.groupby(["reader", "detector"]).size()
    assert per.min() == per.max() == 2000, per
    t_sim = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        st.trials.to_csv(tmp / "reads.csv", index=False)
        st.model_trials.to_csv(tmp / "model.csv", index=False)
        t1 = time.perf_counter()
        res = CliRunner().invoke(
            limen_cli,
            [
                "analyse",
                str(tmp / "reads.csv"),
                "--model",
                str(tmp / "model.csv"),
                "--n-boot",
                "1000",
                "--seed",
                "1",
                "--json",
            ],
        )
        elapsed = time.perf_counter() - t1
        if res.exit_code != 0:
            raise RuntimeError(res.output)
        out = json.loads(res.stdout)
        t2 = time.perf_counter()
        res = CliRunner().invoke(
            limen_cli,
            [
                "analyse",
                str(tmp / "reads.csv"),
                "--model",
                str(tmp / "model.csv"),
                "--n-boot",
                "1000",
                "--seed",
                "1",
                "--out",
                str(tmp / "out"),
            ],
        )
        elapsed_out = time.perf_counter() - t2
    result = {
        "readers": 20,
        "detectors": 2,
        "trials_per_reader_detector": 2000,
        "n_trials": int(len(st.trials)),
        "n_boot": 1000,
        "simulate_s": round(t_sim, 2),
        "analyse_json_s": round(elapsed, 2),
        "analyse_with_report_s": round(elapsed_out, 2),
        "floor_s": FLOOR_S,
        "within_floor": bool(max(elapsed, elapsed_out) < FLOOR_S),
        "human_model_factor": out["human_model_factor"]["factor"],
        "true_geometric_mean_factor": float(np.exp(np.log(st.readers.factor).mean())),
    }
    return result


def main() -> dict:
    r = run()
    for k, v in r.items():
        print(f"{k:>30}: {v}")
    path = Path(__file__).parent / "results" / "analyse.json"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(r, indent=2) + "\n")
    print(f"wrote {path}")
    return r


if __name__ == "__main__":
    main()
