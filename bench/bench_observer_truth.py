"""Floor (issue 20, item 5): Limen's thresholds against analytic truth on an independent generator.

Plates and images come from ``tests/cd_truth_generator.py`` — not Limen's simulator nor its disc renderer: blurred,
pixel-integrated discs rendered exactly in the Fourier domain, white or correlated noise of known covariance —
and are scored the way ``limen score`` scores them (registration, blur from the markers, NPW and NPWE responses,
d′ and count thresholds; ``tests/cd_truth_runner.py``).  Truth: the textbook observers' threshold
C_T = d′_T / k, k = b·ΔsᵀΔs/√(ΔsᵀKΔs) for NPW and its eye-filtered analogue for NPWE (Barrett & Myers 2004,
ch. 13; Burgess 1994), d′_T the fixed detectability of the threshold definition (3-AFC halfway, Green & Swets 1966).

Two geometries (four sites in a row on 0.1 mm pixels with 0.06 mm blur; five sites on a ring on 0.085 mm pixels
with 0.04 mm blur) × two noise kinds (white; white plus Gaussian-filtered) × ``n_sets`` sets of 16 images.  Each
16-image set is also split into two sets of 8 and four of 4 (disjoint images, so independent), which gives
n_sets, 2·n_sets and 4·n_sets intervals per diameter at 16, 8 and 4 images.

Reported per observer × method × image count: coverage of the 95 % CI pooled over geometries, noises and
diameters, and per diameter the bias (mean log error, in %) with its standard error.
Floors: |bias| < 1 % at every diameter, coverage 93–97 % at every image count.

With 30 sets a diameter's bias has a standard error of 0.6–1 % (d′) and 2–3 % (count), so a single cell cannot
show |bias| < 1 %; what the run can show is whether the cells' biases are consistent with none.  Per observer ×
method × image count the summary therefore also gives ``consistency``: χ² = Σ z² over the cells (z = bias / SE,
χ² with as many degrees of freedom as cells if every cell is unbiased; its upper-tail p-value), and the largest
|z| with the two-sided 5 % Šidák bound for that many cells (Šidák, J. Am. Stat. Assoc. 62 (1967)).

Run with ``.venv/bin/python -m bench.bench_observer_truth [n_sets]`` (about 3 minutes per 10 sets on an idle
machine), ``... --rows`` to summarise the rows of the last run again (bench/results/bench_observer_truth_rows.csv),
or ``... N --more ROWS.csv`` to add N sets after those of an earlier run's rows and summarise them together.
"""

from __future__ import annotations

import datetime as dt
import json
import sys
import time
import zlib
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats
from tqdm import tqdm

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from cd_truth_generator import CORRELATED, RING5, ROW4, WHITE, Design, Noise, Plate  # noqa: E402
from cd_truth_runner import compare, plate_layout, score_set, thresholds  # noqa: E402

CONFIGS = [(ROW4, WHITE), (ROW4, CORRELATED), (RING5, WHITE), (RING5, CORRELATED)]
SPLITS = {4: [range(0, 4), range(4, 8), range(8, 12), range(12, 16)], 8: [range(0, 8), range(8, 16)], 16: [range(16)]}
OBSERVERS = ("npw", "npwe")
BIAS_FLOOR_PCT = 1.0
COVERAGE_FLOOR = (0.93, 0.97)


def run_config(
    design: Design, noise: Noise, n_sets: int, seed: int = 0, n_boot: int = 400, first_set: int = 0
) -> pd.DataFrame:
    """Thresholds of sets ``first_set`` … ``first_set + n_sets − 1`` of one plate × noise, against the truth.

    Set s draws its images from a generator seeded by (seed, s, plate/noise), so a run of sets 30–59 adds to one
    of sets 0–29 exactly what a run of 60 sets would have given.
    """
    plate = Plate(design, noise)
    layout = plate_layout(plate)
    truth = {o: plate.truth(o) for o in OBSERVERS}
    rows = []
    for s in tqdm(range(first_set, first_set + n_sets), desc=f"{design.name} {noise.name}", file=sys.stderr):
        rng = np.random.default_rng([seed, s, zlib.crc32(f"{design.name}/{noise.name}".encode())])
        responses = score_set(plate, layout, rng, 16, OBSERVERS)
        for obs, resp in responses.items():
            for n, groups in SPLITS.items():
                for g, images in enumerate(groups):
                    th = compare(thresholds(resp, images, n_boot=n_boot, seed=s), truth[obs])
                    th = th.assign(plate=design.name, noise=noise.name, observer=obs, n_images=n, set=s, subset=g)
                    rows.append(th)
    return pd.concat(rows, ignore_index=True)


def summarise(df: pd.DataFrame) -> dict[str, Any]:
    out: dict[str, Any] = {"coverage": {}, "bias": {}}
    for (obs, method, n), g in df.groupby(["observer", "method", "n_images"]):
        out["coverage"][f"{obs}/{method}/{n}"] = {"coverage": float(g.covered.mean()), "intervals": int(len(g))}
    for (obs, method, n, plate, noise, d), g in df.groupby(
        ["observer", "method", "n_images", "plate", "noise", "diameter_mm"]
    ):
        e = g.log_error[np.isfinite(g.log_error)]
        out["bias"][f"{obs}/{method}/{n}/{plate}/{noise}/{d:g}"] = {
            "bias_pct": float(100 * e.mean()),
            "se_pct": float(100 * e.std(ddof=1) / np.sqrt(len(e))),
            "coverage": float(g.covered.mean()),
            "censored": int((g.censored != "").sum()),
            "n": int(len(e)),
            "truth": float(g.truth.iloc[0]),
        }
    pooled = {}
    for (obs, method, n), g in df.groupby(["observer", "method", "n_images"]):
        e = g.log_error[np.isfinite(g.log_error)]
        pooled[f"{obs}/{method}/{n}"] = {
            "bias_pct": float(100 * e.mean()),
            "se_pct": float(100 * e.std(ddof=1) / np.sqrt(len(e))),
        }
    out["pooled_bias"] = pooled
    out["consistency"] = consistency(out["bias"])
    cov = [v["coverage"] for v in out["coverage"].values()]
    per_d = list(out["bias"].values())
    out["headline"] = {
        "coverage_min_pct": 100 * min(cov),
        "coverage_max_pct": 100 * max(cov),
        "pooled_bias_max_abs_pct": max(abs(v["bias_pct"]) for v in pooled.values()),
        "diameter_bias_max_abs_pct": max(abs(v["bias_pct"]) for v in per_d),
        "diameter_bias_max_abs_z": max(abs(v["bias_pct"]) / v["se_pct"] for v in per_d if v["se_pct"] > 0),
    }
    return out


def consistency(bias: dict[str, dict[str, float]], alpha: float = 0.05) -> dict[str, dict[str, float]]:
    """Are the per-diameter biases of each observer × method × image count consistent with none?

    Parameters
    ----------
    bias
        ``summarise``'s per-cell entries, keyed "observer/method/n_images/plate/noise/diameter", each with
        ``bias_pct`` and ``se_pct``.
    alpha
        Family-wise level of the bound on the largest |z|.

    Returns
    -------
    dict
        Per "observer/method/n_images": ``chi2`` = Σ z² (z = bias / SE), ``cells``, ``p`` its upper-tail
        χ²(cells) probability, ``max_abs_z`` and ``z_bound`` the two-sided Šidák bound for that many cells.

    References
    ----------
    Šidák, Z. "Rectangular confidence regions for the means of multivariate normal distributions",
    J. Am. Stat. Assoc. 62 (1967) — the bound Φ⁻¹(1 − (1 − (1 − α)^(1/m))/2) for m independent z.
    """
    groups: dict[str, list[float]] = {}
    for key, v in bias.items():
        if v["se_pct"] > 0 and np.isfinite(v["bias_pct"]):
            groups.setdefault("/".join(key.split("/")[:3]), []).append(v["bias_pct"] / v["se_pct"])
    out: dict[str, dict[str, float]] = {}
    for key, zs in groups.items():
        z = np.asarray(zs)
        chi2 = float(np.sum(z**2))
        out[key] = {
            "chi2": chi2,
            "cells": int(z.size),
            "p": float(stats.chi2.sf(chi2, z.size)),
            "max_abs_z": float(np.max(np.abs(z))),
            "z_bound": float(stats.norm.isf((1.0 - (1.0 - alpha) ** (1.0 / z.size)) / 2.0)),
        }
    return out


def lines(summary: dict[str, Any]) -> list[str]:
    text = [f"truth_{k}: {v:.2f}" for k, v in summary["headline"].items()]
    for key, v in summary["pooled_bias"].items():
        text.append(f"truth_pooled_bias_{key.replace('/', '_')}: {v['bias_pct']:+.2f} ± {v['se_pct']:.2f} %")
    for key, v in summary.get("consistency", {}).items():
        text.append(
            f"truth_bias_consistency_{key.replace('/', '_')}: chi2 {v['chi2']:.1f} on {v['cells']} cells "
            f"(p {v['p']:.2f}), max |z| {v['max_abs_z']:.2f} (5 % bound {v['z_bound']:.2f})"
        )
    for key, v in summary["coverage"].items():
        text.append(
            f"truth_ci_coverage_{key.replace('/', '_')}: {100 * v['coverage']:.1f} % of {v['intervals']} "
            f"(floor {100 * COVERAGE_FLOOR[0]:.0f}–{100 * COVERAGE_FLOOR[1]:.0f} %)"
        )
    for key, v in summary["bias"].items():
        text.append(
            f"truth_bias_{key.replace('/', '_')}: {v['bias_pct']:+.2f} ± {v['se_pct']:.2f} % "
            f"(coverage {100 * v['coverage']:.0f} %, n {v['n']}, censored {v['censored']})"
        )
    return text


def main(
    n_sets: int = 30, configs: list[tuple[Design, Noise]] = CONFIGS, first_set: int = 0, rows: Path | None = None
) -> dict[str, Any]:
    """Run the bench; ``first_set`` and ``rows`` (an earlier run's rows file) extend an earlier run by new sets."""
    t0 = time.perf_counter()
    df = pd.concat([run_config(d, n, n_sets, first_set=first_set) for d, n in configs], ignore_index=True)
    if rows is not None:
        df = pd.concat([read_rows(rows), df], ignore_index=True)
        n_sets = int(df["set"].nunique())
    summary = summarise(df)
    summary.update(
        date=dt.datetime.now().isoformat(timespec="seconds"), n_sets=n_sets, seconds=time.perf_counter() - t0
    )
    res = Path(__file__).parent / "results"
    res.mkdir(exist_ok=True)
    (res / "bench_observer_truth.json").write_text(json.dumps(summary, indent=1), encoding="utf-8")
    df.to_csv(res / "bench_observer_truth_rows.csv", index=False)
    print("\n".join(lines(summary)))
    return summary


def read_rows(rows: Path) -> pd.DataFrame:
    """The rows file :func:`main` wrote, read back as it was written."""
    # censored is text ("" when not censored); only the literal "nan" of the numeric columns is missing
    return pd.read_csv(rows, dtype={"censored": str}, keep_default_na=False, na_values=["nan"])


def resummarise(rows: Path) -> dict[str, Any]:
    """Summarise the rows of an earlier run again (same JSON as :func:`main`, date and run time kept).

    Parameters
    ----------
    rows
        The rows file :func:`main` wrote (``bench_observer_truth_rows.csv``); the JSON beside it is rewritten.

    Returns
    -------
    dict
        The new summary.
    """
    summary = summarise(read_rows(rows))
    old_path = rows.parent / "bench_observer_truth.json"
    old = json.loads(old_path.read_text(encoding="utf-8")) if old_path.exists() else {}
    summary.update({k: old[k] for k in ("date", "n_sets", "seconds") if k in old})
    old_path.write_text(json.dumps(summary, indent=1), encoding="utf-8")
    print("\n".join(lines(summary)))
    return summary


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--rows":
        resummarise(Path(__file__).parent / "results" / "bench_observer_truth_rows.csv")
    elif len(sys.argv) > 3 and sys.argv[2] == "--more":
        # N --more FILE: N new sets after those in FILE (an earlier run's rows), summarised together
        earlier = Path(sys.argv[3])
        main(int(sys.argv[1]), first_set=int(read_rows(earlier)["set"].max()) + 1, rows=earlier)
    else:
        main(int(sys.argv[1]) if len(sys.argv) > 1 else 30)
