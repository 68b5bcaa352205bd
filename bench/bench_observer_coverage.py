"""Floor (issue 14, item 1): each d′-method CI covers the truth of the observer it names.

Images of the mini plate are built by our own generator (tests/npw_truth.py: exact disc coverage on a flat
background, white or Gaussian-correlated noise of known covariance — not Limen's simulator), 16 per repeat,
scored by Limen's NPW observer (sharp template) and thresholded by the d′ method with its analytic CI.

Truth of the observer Limen reports (DEVELOPERS.md, "The observer Limen reports"): C_T = d′_T · σ_rms, σ_rms²
the mean over the diameter's candidate sites of the textbook (known-background) NPW response variance
wᵀKw/(b·wᵀs)² (Barrett & Myers, *Foundations of Image Science* (2004), ch. 13), d′_T from the M-AFC integral
at the threshold definition, a fixed d′_T (scorer.observer.mafc.criterion_for; Green & Swets 1966).
For information the medians are also given against the
observer with a background plane per site (what Limen reported before) and against the phase average of d′²
(what a Fourier prediction computes).  Blurred discs on other plates: bench/bench_observer_truth.py.  A synthetic
linear observer checks the σ̂ degrees of freedom with M = 3 and M = 5.

Run with ``.venv/bin/python -m bench.bench_observer_coverage [repeats]`` (about 10 minutes with 300).
Floor: 93–97 % coverage at every diameter with 16 images.
"""

from __future__ import annotations

import datetime as dt
import json
import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
from tqdm import tqdm

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from npw_truth import layout_truth, make_noise, mean_image  # noqa: E402

from scorer.images import Image  # noqa: E402
from scorer.observer import (
    ObserverConfig,
    SystemBlur,
    criterion_for,
    dprime_for_pc,
    dprime_thresholds,  # noqa: E402
    score_image,
)
from scorer.phantom import PhantomTransform, load_layout  # noqa: E402

FLOOR = (0.93, 0.97)
PIX, BACKGROUND, SIGMA, N_IMAGES = 0.085, 1000.0, 20.0, 16
MINI = Path(__file__).resolve().parents[1] / "tests" / "data" / "mini-plate.toml"


def _pose(layout, rotation_deg=3.7, shift=(0.3, 0.6)):
    shape = (int(layout.height_mm / PIX) + 20, int(layout.width_mm / PIX) + 20)
    tf = PhantomTransform.from_params(
        rotation_deg=rotation_deg,
        flipped=False,
        magnification=1.0,
        phantom_center_mm=layout.center_mm,
        center_px=((shape[0] - 1) / 2 + shift[0], (shape[1] - 1) / 2 + shift[1]),
        pixel_mm=PIX,
    )
    return shape, SimpleNamespace(transform=tf, markers_px={})


def coverage(corr_px: float, n_rep: int, seed: int = 0) -> pd.DataFrame:
    lay = load_layout(MINI)
    shape, pl = _pose(lay)
    mean = mean_image(lay, pl.transform, shape, BACKGROUND)
    truth = {}
    for d, g in layout_truth(lay, pl.transform, BACKGROUND, SIGMA, corr_px).groupby("diameter_mm"):
        m = int(g.m_alternatives.iloc[0])
        dt_ = dprime_for_pc(criterion_for(m), m)
        truth[d] = {
            "local": dt_ * np.sqrt(np.mean(1 / g.local**2)),
            "kb": dt_ * np.sqrt(np.mean(1 / g.kb**2)),
            "phase_avg": dt_ / np.sqrt(np.mean(g.kb**2)),
            "kb_min": dt_ / g.kb.max(),
            "kb_max": dt_ / g.kb.min(),
        }
    cfg = ObserverConfig("npw", blur=SystemBlur(0.0))
    rows = []
    for r in tqdm(range(n_rep), desc=f"coverage, noise corr {corr_px:g} px", file=sys.stderr):
        rng = np.random.default_rng([seed, r, int(10 * corr_px)])
        frames = [
            score_image(
                Image(mean + make_noise(rng, shape, SIGMA, corr_px), (PIX, PIX)), lay, pl, cfg, image_id=f"i{i}"
            )
            for i in range(N_IMAGES)
        ]
        for p in dprime_thresholds(pd.concat(frames, ignore_index=True), n_boot=0).points:
            rows.append(
                {
                    "repeat": r,
                    "diameter_mm": p.diameter_mm,
                    "estimate": p.threshold_contrast,
                    "ci_low": p.ci_low,
                    "ci_high": p.ci_high,
                    **truth[p.diameter_mm],
                }
            )
    return pd.DataFrame(rows)


def synthetic_df(m: int, n_rep: int = 1000, seed: int = 1) -> float:
    """Coverage of the analytic CI for a linear observer with M sites (checks σ̂'s degrees of freedom)."""
    rng = np.random.default_rng(seed)
    contrasts = np.geomspace(0.3, 3.5, 6) * 0.01
    dt_ = dprime_for_pc(criterion_for(m), m)
    sigma, hits = 0.01, 0
    for _ in range(n_rep):
        truth_site = rng.integers(m, size=(N_IMAGES, contrasts.size))
        resp = sigma * rng.standard_normal((N_IMAGES, contrasts.size, m))
        resp[np.arange(N_IMAGES)[:, None], np.arange(contrasts.size)[None, :], truth_site] += contrasts
        ii, jj, ss = np.meshgrid(np.arange(N_IMAGES), np.arange(contrasts.size), np.arange(m), indexing="ij")
        df = pd.DataFrame(
            {
                "image": ii.ravel(),
                "target": jj.ravel(),
                "diameter_mm": 0.5,
                "contrast": contrasts[jj.ravel()],
                "m_alternatives": m,
                "site": ss.ravel(),
                "is_signal": (ss == truth_site[..., None]).ravel(),
                "response": resp.ravel(),
                "observer": "npw",
            }
        )
        p = dprime_thresholds(df, n_boot=0).points[0]
        hits += p.ci_low <= dt_ * sigma <= p.ci_high
    return hits / n_rep


def main(n_rep: int = 300) -> dict:
    out = {"date": dt.datetime.now().isoformat(timespec="seconds"), "repeats": n_rep, "images": N_IMAGES, "noise": {}}
    lines = []
    for corr in (0.0, 1.0):
        res = coverage(corr, n_rep)
        name = "white" if corr == 0 else f"corr{corr:g}px"
        per = {}
        for d, g in res.groupby("diameter_mm"):
            cov = float(np.mean((g.ci_low <= g.kb) & (g.kb <= g.ci_high)))
            per[d] = {
                "coverage": cov,
                "median_error_vs_local_pct": 100 * float(np.median(g.estimate / g.local) - 1),
                "median_error_vs_known_background_pct": 100 * float(np.median(g.estimate / g.kb) - 1),
                "median_error_vs_phase_average_pct": 100 * float(np.median(g.estimate / g.phase_avg) - 1),
                "site_range_kb_threshold": [float(g.kb_min.iloc[0]), float(g.kb_max.iloc[0])],
            }
            lines.append(
                f"dprime_ci_coverage_{name}_{d:g}mm: {100 * cov:.1f} % (floor: {100 * FLOOR[0]:.0f}–"
                f"{100 * FLOOR[1]:.0f} %)"
            )
            lines.append(
                f"dprime_median_error_{name}_{d:g}mm: {per[d]['median_error_vs_known_background_pct']:+.2f} % "
                f"(vs a plane per site {per[d]['median_error_vs_local_pct']:+.2f} %, "
                f"vs phase-averaged d′² {per[d]['median_error_vs_phase_average_pct']:+.2f} %)"
            )
        out["noise"][name] = per
    for m in (3, 5):
        cov = synthetic_df(m)
        out[f"synthetic_coverage_m{m}"] = cov
        lines.append(f"dprime_ci_coverage_synthetic_M{m}: {100 * cov:.1f} % (floor: 93–97 %)")
    res_dir = Path(__file__).parent / "results"
    res_dir.mkdir(exist_ok=True)
    (res_dir / "bench_observer_coverage.json").write_text(json.dumps(out, indent=2), encoding="utf-8")
    print("\n".join(lines))
    return out


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 300)
