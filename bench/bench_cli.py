"""CLI start time: `limen --help` against a bare `python -c pass`, medians of repeated runs in the same session.

Writes bench/results/bench_cli.json.  The ratio, not the seconds, is the figure (machines differ).
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

REPEATS = 7


def _median_s(cmd: list[str]) -> float:
    times = []
    for _ in range(REPEATS):
        t = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True)
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main() -> dict:
    bare = _median_s([sys.executable, "-c", "pass"])
    helps = _median_s([sys.executable, "-m", "scorer.cli", "--help"])
    version = _median_s([sys.executable, "-m", "scorer.cli", "--version"])
    out = {
        "bare_python_s": bare,
        "limen_help_s": helps,
        "limen_version_s": version,
        "ratio": helps / bare,
        "repeats": REPEATS,
    }
    res = Path(__file__).resolve().parent / "results"
    res.mkdir(exist_ok=True)
    (res / "bench_cli.json").write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    print(f"limen_help: {helps:.3f} s; bare python {bare:.3f} s; ratio {helps / bare:.2f} (floor: ≤ 3, < 1 s)")
    return out


if __name__ == "__main__":
    main()
