"""Floors (issue 14, bounded resources).

1. Peak memory of scoring grows at most linearly with images × sites: tracemalloc's peak (numpy arrays are
   traced) while ``score_files`` scores 1, 2, 4 and 8 simulated images of the demo plate, and the plate cut to
   ¼, ½ and all of its targets. The peak must grow no faster than linearly: peak(8 images) / peak(1 image) ≤ 8
   and peak(all sites) / peak(¼ of them) ≤ the ratio of sites. (Images are scored one after another, so the
   peak is in fact nearly flat.)
2. Peak memory of scoring one image ≤ 8× the image's float64 pixels; the marginal MB per extra image.
3. A layout with 12 000 targets is refused (LIMEN_MAX_LAYOUT_SITES) within 10 s instead of being scored for
   minutes in gigabytes.
4. Peak memory of ``analyse_study`` (4 readers, 2 detectors, 8 images, 8 contrasts, model observer) at 1 000 and
   10 000 bootstrap resamples: the fits' likelihood grid is evaluated in chunks, so ten times the resamples may
   at most double the peak (before the chunks: 60 and 600 MB).

Run with ``.venv/bin/python -m bench.bench_memory`` (about a minute and a half).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from scorer.detector import detector_model, simulate
from scorer.errors import LimenError
from scorer.phantom import load_layout
from scorer.workflow import score_files, write_simulated

FLOOR_PEAK_X = 8.0  # peak of scoring one image, in multiples of its float64 pixels
FLOOR_REFUSAL_S = 10.0
FLOOR_ANALYSE_X = 2.0  # peak at 10 000 resamples / peak at 1 000


def _peak_mb(fn) -> float:
    tracemalloc.start()
    tracemalloc.reset_peak()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1] / 1e6
    finally:
        tracemalloc.stop()


def _analyse_peaks() -> dict[int, float]:
    from scorer.study import analyse_study, simulate_reader_study

    st = simulate_reader_study(
        np.random.default_rng(5), 4, diameters_mm=(0.25, 1.0), n_images=8, n_repeats=1, n_contrasts=8
    )
    analyse_study(st.trials, st.model_trials, n_boot=10)  # imports and tables outside the measurement
    peaks = {}
    for n_boot in (1000, 10000):
        peaks[n_boot] = _peak_mb(lambda n_boot=n_boot: analyse_study(st.trials, st.model_trials, n_boot=n_boot))
        print(f"  analyse_study, {n_boot} resamples: peak {peaks[n_boot]:.1f} MB", flush=True)
    return peaks


def main() -> dict:
    m = detector_model("direct")
    lay = load_layout()
    conv = m.conversion_function()
    rows = []
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        paths = []
        for i, s in enumerate(np.random.SeedSequence(14).spawn(8)):
            sim = simulate(m, "phantom", 100.0, np.random.default_rng(s), small=True, layout=lay)
            paths.append(write_simulated(sim, tmp, f"mem-{i}", dt.datetime(2026, 1, 1), "dicom"))
        n_px = sim.pixels.size
        targets = lay.targets
        for frac in (0.25, 0.5, 1.0):
            sub = dataclasses.replace(lay, targets=targets[: max(1, int(round(frac * len(targets))))])
            n_sites = sum(len(t.sites_mm) for t in sub.targets)
            for n_img in (1, 2, 4, 8):
                peak = _peak_mb(
                    lambda n_img=n_img, sub=sub: score_files(paths[:n_img], sub, conversion=conv, n_boot=200, seed=0)
                )
                rows.append({"images": n_img, "sites": n_sites, "peak_mb": peak})
                print(f"  {n_img} image(s) × {n_sites} sites: peak {peak:.1f} MB", flush=True)
        # refusal of a huge layout
        head = lay.source_path and Path(lay.source_path).read_text(encoding="utf-8").split("[[targets]]")[0]
        body = "".join(
            f'[[targets]]\nid = "t{i}"\ndiameter_mm = 0.05\ncontrast = 0.01\n'
            f"sites_mm = [[{20 + (i % 110) * 0.4:.2f}, {20 + (i // 110) * 0.4:.2f}], "
            f"[{20.2 + (i % 110) * 0.4:.2f}, {20 + (i // 110) * 0.4:.2f}]]\nsignal_site = 0\n"
            for i in range(12000)
        )
        huge = tmp / "huge.toml"
        huge.write_text(head + body, encoding="utf-8")
        t = time.perf_counter()
        try:
            load_layout(huge)
            refused = False
        except LimenError as exc:
            refused = "LIMEN_MAX_LAYOUT_SITES" in str(exc)
        refusal_s = time.perf_counter() - t

    analyse = _analyse_peaks()
    analyse_x = analyse[10000] / analyse[1000]

    def peak(n_img, n_sites):
        return next(r["peak_mb"] for r in rows if r["images"] == n_img and r["sites"] == n_sites)

    s_lo, s_hi = min(r["sites"] for r in rows), max(r["sites"] for r in rows)
    ratio_images = peak(8, s_hi) / peak(1, s_hi)  # linear growth would be 8
    ratio_sites = peak(8, s_hi) / peak(8, s_lo)  # linear growth would be s_hi / s_lo
    full = [r for r in rows if r["sites"] == s_hi]
    per_image = float(np.polyfit([r["images"] for r in full], [r["peak_mb"] for r in full], 1)[0])
    image_mb = n_px * 8 / 1e6
    out = {
        "rows": rows,
        "peak_ratio_8_vs_1_images": ratio_images,
        "peak_ratio_sites": ratio_sites,
        "site_ratio": s_hi / s_lo,
        "peak_per_extra_image_mb": per_image,
        "peak_one_image_mb": peak(1, s_hi),
        "image_float64_mb": image_mb,
        "layout_12000_refused": refused,
        "layout_12000_refusal_s": refusal_s,
        "analyse_peak_mb": analyse,
    }
    Path("bench/results").mkdir(parents=True, exist_ok=True)
    Path("bench/results/bench_memory.json").write_text(json.dumps(out, indent=2))
    one_x = peak(1, s_hi) / image_mb
    print(f"memory_peak_ratio_8_vs_1_images: {ratio_images:.2f} (floor: ≤ 8, linear)")
    print(f"memory_peak_ratio_{s_hi}_vs_{s_lo}_sites: {ratio_sites:.2f} (floor: ≤ {s_hi / s_lo:.2f}, linear)")
    print(f"memory_peak_per_extra_image: {per_image:.1f} MB (floor: none)")
    print(
        f"memory_peak_one_image: {one_x:.1f} × the image's float64 pixels, {peak(1, s_hi):.0f} MB "
        f"(floor: ≤ {FLOOR_PEAK_X:g})"
    )
    print(f"layout_12000_targets_refused: {refusal_s:.2f} s (floor: ≤ {FLOOR_REFUSAL_S:g} s, refused={refused})")
    print(
        f"memory_analyse_peak_10000_vs_1000_resamples: {analyse_x:.2f} ({analyse[1000]:.0f} → {analyse[10000]:.0f} MB) "
        f"(floor: ≤ {FLOOR_ANALYSE_X:g})"
    )
    ok = (
        ratio_images <= 8
        and ratio_sites <= s_hi / s_lo
        and one_x <= FLOOR_PEAK_X
        and refused
        and refusal_s <= FLOOR_REFUSAL_S
        and analyse_x <= FLOOR_ANALYSE_X
    )
    if not ok:
        raise SystemExit("bench_memory: floor not met")
    return out


if __name__ == "__main__":
    main()
