"""Run every floor benchmark in bench/ (``make bench``); each writes bench/results/<name>.json."""

from __future__ import annotations

import importlib
import sys
import time

BENCHES = ["bench_simulate", "bench_register", "bench_score", "bench_detector", "bench_analyse", "bench_nightly",
           "bench_observer_coverage", "bench_memory"]


def main() -> int:
    failed = []
    for name in BENCHES:
        print(f"\n== {name} ==", flush=True)
        t = time.perf_counter()
        try:
            importlib.import_module(f"bench.{name}").main()
        except Exception as exc:  # report and go on: one broken bench must not hide the others
            failed.append(name)
            print(f"{name} failed: {exc!r}")
        print(f"({time.perf_counter() - t:.0f} s)")
    if failed:
        print("failed: " + ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
