"""Floor (issue: foundation): `limen simulate` of one full-size phantom image under 3 s, memory under 1 GB.

Run with ``.venv/bin/python -m bench.bench_simulate``.  Times the simulation itself (quanta, gain noise,
spread, read-out) and, separately, writing the DICOM file; peak memory is the child process's maximum
resident set size.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FLOOR_S = 3.0
FLOOR_MB = 1024.0

_CHILD = r"""
import json, resource, sys, time, datetime
from pathlib import Path
from scorer.detector import detector_model, simulate
from scorer.workflow import load_layout, write_simulated
name, out = sys.argv[1], Path(sys.argv[2])
m, lay = detector_model(name), load_layout()
t = time.perf_counter(); sim = simulate(m, "phantom", 100.0, seed=1, layout=lay); t_sim = time.perf_counter() - t
t = time.perf_counter()
write_simulated(sim, out, name, datetime.datetime(2026, 11, 30, 8, 0))
t_write = time.perf_counter() - t
print(json.dumps({"detector": name, "shape": list(sim.pixels.shape), "simulate_s": t_sim, "write_dicom_s": t_write,
                  "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))
"""


def main() -> dict:
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name in ("direct", "indirect"):
            t = time.perf_counter()
            res = subprocess.run([sys.executable, "-c", _CHILD, name, tmp], capture_output=True, text=True, check=True)
            row = json.loads(res.stdout.strip().splitlines()[-1])
            row["process_s"] = time.perf_counter() - t
            row["pass"] = row["simulate_s"] < FLOOR_S and row["peak_rss_mb"] < FLOOR_MB
            rows.append(row)
            print(
                f"{name:9s} {row['shape']}: simulate {row['simulate_s']:.2f} s (floor {FLOOR_S} s), write DICOM "
                f"{row['write_dicom_s']:.2f} s, peak memory {row['peak_rss_mb']:.0f} MB (floor {FLOOR_MB:.0f} MB)"
                f" -> {'PASS' if row['pass'] else 'FAIL'}"
            )
    out = {"benchmark": "bench_simulate", "rows": rows}
    Path("bench/results").mkdir(parents=True, exist_ok=True)
    Path("bench/results/bench_simulate.json").write_text(json.dumps(out, indent=2))
    return out


if __name__ == "__main__":
    main()
