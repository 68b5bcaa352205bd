"""Floors (issue 13, nightly scoring).

1. 64 full-size images in 8 sessions: throughput (images per second, wall clock of the whole run: scan,
   claims, scoring, writes) with ``--workers 2`` at least 1.7× that with one worker, on a 2-core machine.
2. Database overhead per image (claims, writes of thresholds/responses/registrations, baseline and
   alerts, file cache: the coordinator's database time) under 5 % of the image's scoring time.

Each run starts from a fresh copy of the inbox and a fresh SQLite database; one and two workers are run in
turn three times and the ratio is the median of the three pairs (database overhead: median per
configuration).  The load average is recorded: other work on the machine lowers the two-worker ratio.  Run with
``.venv/bin/python -m bench.bench_nightly`` (about ten minutes); results in bench/results/bench_nightly.json.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path

FLOOR_RATIO = 1.7
FLOOR_DB_FRACTION = 0.05
N_SESSIONS, PER_SESSION = 8, 8
REPEATS = 3


def _inbox(root: Path) -> Path:
    from scorer.qc.simulated import Panel, simulate_night

    inbox = root / "inbox"
    t = time.perf_counter()
    for k in range(N_SESSIONS):
        simulate_night(
            inbox,
            dt.date(2026, 3, 2) + dt.timedelta(days=k),
            [Panel("direct", 100.0)],
            n_images=PER_SESSION,
            seed=k,
            small=False,
        )
    print(f"simulated {N_SESSIONS * PER_SESSION} full-size images in {time.perf_counter() - t:.0f} s", flush=True)
    return inbox


def _config(root: Path):
    from scorer.detector import detector_model
    from scorer.images import save_conversion
    from scorer.qc import load_config

    m = detector_model("direct")
    save_conversion(m.conversion_function(), root / "direct-conversion.toml")
    p = root / "nightly.toml"
    p.write_text(
        'format = "limen-nightly/1"\n[defaults]\nmin_images = 8\n'
        f'[[detectors]]\ndetector_id = "{m.detector_id}"\nconversion = "direct-conversion.toml"\n'
    )
    return load_config(p)


def run(root: Path, inbox: Path, config, workers: int, rep: int = 0) -> dict:
    from scorer.qc import run_nightly

    work = root / f"w{workers}-{rep}"
    shutil.copytree(inbox, work)
    t = time.perf_counter()
    r = run_nightly(work, config, db_url=f"sqlite:///{root / f'w{workers}-{rep}.sqlite'}", workers=workers)
    wall = time.perf_counter() - t
    assert len(r.sessions_scored) == N_SESSIONS and r.scored_images == N_SESSIONS * PER_SESSION, r.to_json()
    n = r.scored_images
    out = {
        "workers": workers,
        "wall_s": wall,
        "images_per_s": n / wall,
        "timings_s": r.timings,
        "scoring_s_per_image": r.timings["scoring_s"] / n,
        "db_s_per_image": r.timings["db_s"] / n,
        "read_s_per_image": r.timings.get("read_s", 0.0) / n,
    }
    out["db_fraction"] = out["db_s_per_image"] / out["scoring_s_per_image"]
    print(
        f"workers={workers}: {wall:.1f} s wall, {out['images_per_s']:.3f} images/s; per image: scoring "
        f"{out['scoring_s_per_image']:.2f} s, database {1000 * out['db_s_per_image']:.1f} ms "
        f"({100 * out['db_fraction']:.2f} %), scan read {out['read_s_per_image']:.2f} s",
        flush=True,
    )
    return out


def main() -> dict:
    results_dir = Path(__file__).resolve().parent / "results"
    results_dir.mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        inbox = _inbox(root)
        config = _config(root)
        load_before = os.getloadavg()
        ones, twos = [], []
        for rep in range(REPEATS):  # alternated, so a change in the machine's load moves both sides
            ones.append(run(root, inbox, config, 1, rep))
            twos.append(run(root, inbox, config, 2, rep))
            shutil.rmtree(root / f"w1-{rep}")
            shutil.rmtree(root / f"w2-{rep}")
        load_after = os.getloadavg()
    ratios = [b["images_per_s"] / a["images_per_s"] for a, b in zip(ones, twos)]
    ratio = float(statistics.median(ratios))
    one = min(ones, key=lambda r: abs(r["images_per_s"] - statistics.median(x["images_per_s"] for x in ones)))
    two = min(twos, key=lambda r: abs(r["images_per_s"] - statistics.median(x["images_per_s"] for x in twos)))
    db_frac = max(statistics.median(r["db_fraction"] for r in ones), statistics.median(r["db_fraction"] for r in twos))
    res = {
        "n_images": N_SESSIONS * PER_SESSION,
        "n_sessions": N_SESSIONS,
        "cpu_count": os.cpu_count(),
        "load_average_before": load_before,
        "load_average_after": load_after,
        "one_worker": one,
        "two_workers": two,
        "repeats": REPEATS,
        "throughput_ratios": ratios,
        "throughput_ratio": ratio,
        "floor_ratio": FLOOR_RATIO,
        "ratio_pass": ratio >= FLOOR_RATIO,
        "db_fraction": db_frac,
        "floor_db_fraction": FLOOR_DB_FRACTION,
        "db_pass": db_frac < FLOOR_DB_FRACTION,
    }
    print(
        f"throughput ratio 2 vs 1 workers: {ratio:.2f}, median of {REPEATS} alternated pairs "
        f"({', '.join(f'{x:.2f}' for x in ratios)}) (floor {FLOOR_RATIO}) {'PASS' if res['ratio_pass'] else 'FAIL'}"
    )
    print(
        f"database overhead per image: {100 * db_frac:.2f} % of scoring time (floor {100 * FLOOR_DB_FRACTION:g} %) "
        f"{'PASS' if res['db_pass'] else 'FAIL'}"
    )
    print(f"load average before/after: {load_before} / {load_after}")
    (results_dir / "bench_nightly.json").write_text(json.dumps(res, indent=2) + "\n")
    return res


if __name__ == "__main__":
    main()
