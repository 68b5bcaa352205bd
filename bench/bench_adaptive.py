"""Adaptive trial placement against constant stimuli (issue 18, item 5): trials per reader per cell for a
±0.2 (ln) 95 % CI, and the bias and CI coverage of the pooled thresholds of studies read with each rule.

1. Plan: :func:`scorer.study.trials_for_precision` gives, per cell (detector × diameter), the trials per reader
   for a 95 % CI of half-width 0.2 in ln threshold (about ±20 %) for 80 % of readers, with the Psi rule and with
   constant stimuli; the ratio Psi / constant should be ≤ 0.5.  An independent check of what the plan delivers:
   with the levels the rule actually chose for readers of the generator below, the Wald half-width
   1.96/√(Σ Fisher information at the reader's true threshold), the information computed here from scipy's
   quadrature of the Green & Swets integral.
2. Validity: invented readers read studies trial by trial — the next cell from :func:`scorer.study.next_cell`,
   the level from :func:`scorer.study.next_level`, the answer from the generator, :func:`scorer.study.update` —
   with the planned trials per cell, and each study's pooled thresholds come from Limen's pooled analysis (GEE
   with the M-AFC link, readers × images as clusters).  Bias of the pooled ln threshold against the population
   median (goal < 2 %) and coverage of its 95 % CI (goal 93–97 %).

The generator is written here, independent of the reader simulator (scorer/study/reader_model.py) and of the
code under test: a reader chooses the largest of M Gaussian responses, the disc's site shifted by
d′ = a_r·C.  Two noise kinds: ``fresh`` (unit-variance noise new on every trial) and ``shared-image``
(each image × target carries a fixed external noise vector and true site, read by every reader, plus internal
noise of the same variance new on every reading; 16 images per detector).  Two plate geometries: the bundled
demo plate (ten contrasts ×1.53 apart; 0.1 mm in 3-AFC, 1.0 mm in 5-AFC) and the test mini plate (six contrasts
×1.6 apart; 0.25 mm in 3-AFC, 1.0 mm in 5-AFC).  Population median thresholds sit where the plates were drawn to
put them (human ≈ 1.6 × the model's, which lies 1/0.3 × above the lowest level), ×1.3 on the second detector;
six readers per study with a reader factor log-normal (CV 0.15) shared across cells.

Run with ``.venv/bin/python -m bench.bench_adaptive`` (a few minutes; LIMEN_BENCH_REPEATS sets the number of
studies per geometry × noise kind × rule, default 30).
"""

from __future__ import annotations

import json
import math
import os
import time
from functools import lru_cache
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import integrate, interpolate

from scorer.observer.mafc import criterion_for, dprime_for_pc
from scorer.phantom import load_layout
from scorer.study import new_state, next_cell, next_level, plate_levels, trials_for_precision, update
from scorer.study.pooled_gee import pooled_curves

ROOT = Path(__file__).resolve().parents[1]
RESULTS = Path(__file__).resolve().parent / "results"
GEOMETRIES = {
    "demo plate": (ROOT / "phantoms" / "cairn-demo-plate.toml", (0.1, 1.0)),
    "mini plate": (ROOT / "tests" / "data" / "mini-plate.toml", (0.25, 1.0)),
}
DETECTORS = {"panel-a": 1.0, "panel-b": 1.3}
N_READERS = 6
CV_BETWEEN = 0.15
N_IMAGES = 16
HALF_WIDTH_LN = 0.2
ASSURANCE = 0.8
RULES = ("psi", "constant")
NOISE = ("fresh", "shared-image")


@lru_cache(maxsize=None)
def pc_quad(d: float, m: int) -> float:
    """Green & Swets: Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx by scipy.integrate.quad."""

    def f(x):
        return math.exp(-0.5 * (x - d) ** 2) / math.sqrt(2 * math.pi) * (0.5 * math.erfc(-x / math.sqrt(2))) ** (m - 1)

    return integrate.quad(f, d - 10.0, d + 10.0, epsabs=1e-12, epsrel=1e-10, limit=200)[0]


@lru_cache(maxsize=None)
def info_spline(m: int) -> interpolate.CubicSpline:
    """Fisher information of one M-AFC trial about ln C_T against ln d′: (d·Pc′(d))²/(Pc(1 − Pc)), Pc from the
    quadrature on a grid of d′ (derivative by central differences), as a cubic spline in ln d′."""
    ln_d = np.linspace(math.log(0.01), math.log(12.0), 600)
    h = 1e-4
    vals = []
    for x in ln_d:
        d = math.exp(x)
        p = min(max(pc_quad(d, m), 1e-15), 1 - 1e-15)
        dp = (pc_quad(d * math.exp(h), m) - pc_quad(d * math.exp(-h), m)) / (2 * h)
        vals.append(dp * dp / (p * (1 - p)))
    return interpolate.CubicSpline(ln_d, np.asarray(vals))


@lru_cache(maxsize=None)
def dprime_t(m: int) -> float:
    return dprime_for_pc(criterion_for(m), m)


def info_ln_threshold(contrast: float, threshold: float, m: int) -> float:
    """Fisher information of one trial at ``contrast`` about ln C_T of a reader whose threshold is ``threshold``."""
    ln_d = math.log(dprime_t(m) * contrast / threshold)
    return float(info_spline(m)(min(max(ln_d, math.log(0.01)), math.log(12.0))))


def cells_of(geometry: str):
    path, diameters = GEOMETRIES[geometry]
    lv = plate_levels(load_layout(path))
    out = {}
    for det, ratio in DETECTORS.items():
        for d in diameters:
            levels, m = lv[float(d)]
            median = 1.6 / 0.3 * levels[0] * ratio  # see the module docstring
            out[(det, float(d))] = (levels, m, median)
    return out


def plan(geometry: str) -> list[dict]:
    rows = []
    for (det, d), (levels, m, median) in cells_of(geometry).items():
        row = {"geometry": geometry, "detector": det, "diameter_mm": d, "m": m, "median_threshold": median}
        for rule in RULES + ("quest",):
            p = trials_for_precision(
                levels,
                m,
                HALF_WIDTH_LN,
                method=rule,
                threshold=median,
                cv_between=CV_BETWEEN,
                assurance=ASSURANCE,
                n_max=3000,
                n_sim=200,
                seed=7,
            )
            row[rule] = p.n_trials
        row["ratio_psi_constant"] = row["psi"] / row["constant"] if row["psi"] and row["constant"] else None
        rows.append(row)
    return rows


def one_study(geometry, noise, rule, trials, rng):
    """Simulate one study; return (trials table, per reader-cell Wald half-widths, truth per cell)."""
    cells = cells_of(geometry)
    sigma_b = math.sqrt(math.log1p(CV_BETWEEN**2))
    factor = np.exp(sigma_b * rng.standard_normal(N_READERS))
    internal = 1.0 if noise == "shared-image" else 0.0
    # images: per detector × image × target (diameter, level) a true site and an external noise vector
    bank = {}
    for (det, d), (levels, m, _) in cells.items():
        for j in range(len(levels)):
            bank[(det, d, j)] = (rng.integers(0, m, N_IMAGES), rng.standard_normal((N_IMAGES, m)))
    rows, halfw = [], []
    for r in range(N_READERS):
        states = {k: new_state(levels, m, rule) for k, (levels, m, _) in cells.items()}
        used = {k: np.zeros(N_IMAGES, int) for k in bank}
        info = dict.fromkeys(cells, 0.0)
        want = {k: trials[k] for k in cells}
        while (k := next_cell(states, rng, want)) is not None:
            levels, m, median = cells[k]
            c = next_level(states[k], rng)
            j = levels.index(c)
            ct = median * factor[r]
            a = dprime_t(m) * math.sqrt(1.0 + internal**2) / ct  # reader's d′ = a·C/√(1 + σ²) reaches d′_T at C_T
            n_used = used[(k[0], k[1], j)]
            cand = np.flatnonzero(n_used == n_used.min())
            img = int(cand[rng.integers(cand.size)])
            n_used[img] += 1
            site, ext = bank[(k[0], k[1], j)]
            if noise == "fresh":
                resp = rng.standard_normal(m)
                true = int(rng.integers(m))
            else:
                resp = ext[img] + internal * rng.standard_normal(m)
                true = int(site[img])
            resp[true] += a * c
            chosen = int(np.argmax(resp))
            ok = chosen == true
            states[k] = update(states[k], c, ok)
            info[k] += info_ln_threshold(c, ct, m)
            rows.append((f"r{r}", k[0], f"{k[0]}-img{img:02d}", f"d{k[1]:g}-c{j}", k[1], c, chosen, true, int(ok), m))
        for k in cells:
            halfw.append({"cell": k, "half_width_ln": 1.96 / math.sqrt(info[k])})
    df = pd.DataFrame(
        rows,
        columns=[
            "reader",
            "detector",
            "image",
            "target",
            "diameter_mm",
            "contrast",
            "chosen_site",
            "true_site",
            "correct",
            "n_alternatives",
        ],
    )
    truth = {k: v[2] for k, v in cells.items()}
    return df, halfw, truth


def validate(geometry, noise, rule, trials, n_studies, seed) -> dict:
    rng = np.random.default_rng(seed)
    errs, covered, hw, failed, study_means = [], [], [], 0, []
    for _ in range(n_studies):
        n_before = len(errs)
        df, halfw, truth = one_study(geometry, noise, rule, trials, rng)
        hw += [h["half_width_ln"] for h in halfw]
        m = {float(d): int(g["n_alternatives"].iloc[0]) for d, g in df.groupby("diameter_mm")}
        pc, _ = pooled_curves(df, m, "detector")
        for k, ct in truth.items():
            row = pc[(pc["detector"] == k[0]) & np.isclose(pc["diameter_mm"], k[1])]
            if row.empty or not np.isfinite(row["ci_low"].iloc[0]) or not bool(row["converged"].iloc[0]):
                failed += 1
                continue
            est = float(row["threshold_contrast"].iloc[0])
            errs.append(math.log(est / ct))
            covered.append(float(row["ci_low"].iloc[0]) <= ct <= float(row["ci_high"].iloc[0]))
        if len(errs) > n_before:
            study_means.append(float(np.mean(errs[n_before:])))
    errs = np.asarray(errs)
    return {
        "geometry": geometry,
        "noise": noise,
        "rule": rule,
        "studies": n_studies,
        "cells": int(errs.size),
        "not_estimated": failed,
        "bias_ln": float(errs.mean()),
        # the cells of one study share its readers, so the SE is taken over studies (cluster), not cells
        "bias_se_ln": float(np.std(study_means, ddof=1) / math.sqrt(len(study_means))),
        "study_mean_errors_ln": study_means,
        "rmse_ln": float(np.sqrt(np.mean(errs**2))),
        "coverage": float(np.mean(covered)),
        "share_reader_cells_reaching_hw": float(np.mean(np.asarray(hw) <= HALF_WIDTH_LN)),
        "median_reader_half_width_ln": float(np.median(hw)),
    }


def run() -> dict:
    n_studies = int(os.environ.get("LIMEN_BENCH_REPEATS", "30"))
    t0 = time.perf_counter()
    plans = [row for g in GEOMETRIES for row in plan(g)]
    t_plan = time.perf_counter() - t0
    for p in plans:
        print(
            f"plan {p['geometry']}, {p['detector']} {p['diameter_mm']:g} mm ({p['m']}-AFC): psi {p['psi']}, "
            f"quest {p['quest']}, constant {p['constant']} trials per reader; psi/constant "
            f"{p['ratio_psi_constant']:.2f}",
            flush=True,
        )
    rows = []
    for gi, g in enumerate(GEOMETRIES):
        for ni, noise in enumerate(NOISE):
            for ri, rule in enumerate(RULES):
                trials = {(p["detector"], p["diameter_mm"]): p[rule] or 3000 for p in plans if p["geometry"] == g}
                t = time.perf_counter()
                row = validate(g, noise, rule, trials, n_studies, seed=[2026, gi, ni, ri])
                row["seconds"] = round(time.perf_counter() - t, 1)
                rows.append(row)
                print(
                    f"{g}, {noise}, {rule}: bias {100 * row['bias_ln']:+.2f} % (SE {100 * row['bias_se_ln']:.2f}), "
                    f"coverage {100 * row['coverage']:.1f} % of {row['cells']} cells, reader cells reaching "
                    f"±{HALF_WIDTH_LN} {100 * row['share_reader_cells_reaching_hw']:.0f} % ({row['seconds']} s)",
                    flush=True,
                )
    ratios = [p["ratio_psi_constant"] for p in plans]
    by_rule = {}
    for rule in RULES:
        rr = [r for r in rows if r["rule"] == rule]
        n = sum(r["cells"] for r in rr)
        cov = sum(r["coverage"] * r["cells"] for r in rr) / n
        means = [e for r in rr for e in r["study_mean_errors_ln"]]
        by_rule[rule] = {
            "bias_pooled_pct": 100 * math.expm1(float(np.mean(means))),
            "bias_pooled_se_pct": 100 * float(np.std(means, ddof=1) / math.sqrt(len(means))),
            "coverage_pooled": cov,
            "coverage_min": min(r["coverage"] for r in rr),
            "coverage_max": max(r["coverage"] for r in rr),
            "max_abs_bias_pct": max(100 * abs(math.expm1(r["bias_ln"])) for r in rr),
            "cells": n,
        }
    return {
        "half_width_ln": HALF_WIDTH_LN,
        "assurance": ASSURANCE,
        "n_readers": N_READERS,
        "cv_between": CV_BETWEEN,
        "n_images": N_IMAGES,
        "plans": plans,
        "plan_s": round(t_plan, 1),
        "validation": rows,
        "summary": {
            "psi_trials_worst_cell": max(p["psi"] for p in plans),
            "constant_trials_worst_cell": max(p["constant"] for p in plans),
            "ratio_worst": max(ratios),
            "ratio_median": float(np.median(ratios)),
            "by_rule": by_rule,
        },
        "coverage_goal": [0.93, 0.97],
        "bias_goal_pct": 2.0,
        "ratio_goal": 0.5,
    }


def main() -> None:
    res = run()
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_adaptive.json").write_text(json.dumps(res, indent=1, default=str), encoding="utf-8")
    s = res["summary"]
    print(
        f"trials per reader per cell for ±{HALF_WIDTH_LN} (ln), worst cell: psi {s['psi_trials_worst_cell']}, "
        f"constant {s['constant_trials_worst_cell']}; ratio worst {s['ratio_worst']:.2f} (goal ≤ 0.5)"
    )
    for rule, b in s["by_rule"].items():
        print(
            f"{rule}: pooled coverage {100 * b['coverage_pooled']:.1f} % ({100 * b['coverage_min']:.1f}–"
            f"{100 * b['coverage_max']:.1f}) of {b['cells']} cells; bias over all studies "
            f"{b['bias_pooled_pct']:+.2f} % (SE {b['bias_pooled_se_pct']:.2f}), worst condition |bias| "
            f"{b['max_abs_bias_pct']:.2f} %"
        )


if __name__ == "__main__":
    main()
