"""Run every floor benchmark in bench/ (``make bench``); each writes bench/results/<name>.json."""

from __future__ import annotations

import importlib
import sys
import time

BENCHES = [
    "bench_cli",
    "bench_simulate",
    "bench_register",
    "bench_score",
    "bench_detector",
    "bench_analyse",
    "bench_nightly",
    "bench_observer_coverage",
    "bench_observer_truth",
    "bench_dose_series",
    "bench_adaptive",
    "bench_dose_beta",
    "bench_human_factor",
    "bench_memory",
    "bench_web_load",
]


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
    if "bench_web_load" not in BENCHES:
        print("\n(the web load bench runs apart: python -m bench.bench_web_load)")
    from bench.figures import RESULTS, lines, markdown

    print("\n== figures ==")
    for line in lines():
        print(line)
    import datetime
    import platform

    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "table.md").write_text(
        markdown(f"Measured {datetime.date.today()} on {platform.machine()}, {platform.python_version()}"),
        encoding="utf-8",
    )
    if failed:
        print("failed: " + ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
