"""One table of every benchmark's headline figures, read from bench/results/*.json after `make bench`.

Each figure prints as ``name: value unit (floor: X)``; `make bench` prints them last, and writes the same table
as Markdown to bench/results/table.md (copy it into bench/README.md with the date and machine kind).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

RESULTS = Path(__file__).resolve().parent / "results"


@dataclass(frozen=True)
class Figure:
    name: str
    file: str
    get: Callable[[dict], Any]
    unit: str
    floor: str


def _max_rows(key):
    return lambda r: max(row[key] for row in r["rows"])


FIGURES = [
    Figure(
        "human_factor_coverage_count_A",
        "human_factor.json",
        lambda r: r["designs"][0]["methods"]["count"]["coverage_population_factor"],
        "",
        "≥ 0.93",
    ),
    Figure(
        "human_factor_coverage_dprime_A",
        "human_factor.json",
        lambda r: r["designs"][0]["methods"]["dprime"]["coverage_population_factor"],
        "",
        "≥ 0.93",
    ),
    Figure(
        "dose_beta_worst_per_diameter_coverage",
        "dose_beta.json",
        lambda r: r["worst_per_diameter_coverage_independent_generator"],
        "",
        "≥ 0.89 per diameter; 0.93–0.97 per run",
    ),
    Figure("cli_start_ratio_to_bare_python", "bench_cli.json", lambda r: r["ratio"], "×", "≤ 3"),
    Figure("limen_help_s", "bench_cli.json", lambda r: r["limen_help_s"], "s", "< 1"),
    Figure("simulate_full_size_s", "bench_simulate.json", _max_rows("simulate_s"), "s", "< 3"),
    Figure("simulate_peak_rss", "bench_simulate.json", _max_rows("peak_rss_mb"), "MB", "< 1024"),
    Figure("register_full_size_worst_median_s", "bench_register.json", lambda r: r["worst_median_s"], "s", "< target"),
    Figure("score_to_load_ratio", "bench_score.json", lambda r: r["speed"]["ratio"], "×", "≤ 3"),
    Figure("score_s_per_image_1", "bench_score.json", lambda r: r["speed"]["per_image_s"]["1"], "s", "—"),
    Figure("score_s_per_image_16", "bench_score.json", lambda r: r["speed"]["per_image_s"]["16"], "s", "—"),
    Figure(
        "score_per_image_16_over_1",
        "bench_score.json",
        lambda r: r["speed"]["per_image_16_over_1"],
        "×",
        "≤ 1.2 (linear in images)",
    ),
    Figure(
        "ci_width_dprime4_over_count16_worst",
        "bench_score.json",
        lambda r: r["ci_width"]["worst_ratio_by_n"]["4"],
        "×",
        "≤ 1",
    ),
    Figure(
        "ci_width_smallest_n_dprime_matching_count16",
        "bench_score.json",
        lambda r: r["ci_width"]["smallest_n_matching_count_16"],
        "images",
        "≤ 4",
    ),
    Figure("detector_mtf_nnps_dqe_s", "bench_detector.json", lambda r: r["mtf_nnps_dqe_s"], "s", "< 10"),
    Figure(
        "analyse_20_readers_s",
        "analyse.json",
        lambda r: max(r["analyse_json_s"], r["analyse_with_report_s"]),
        "s",
        "< 60",
    ),
    Figure(
        "nightly_throughput_ratio_2_vs_1_workers", "bench_nightly.json", lambda r: r["throughput_ratio"], "×", "≥ 1.7"
    ),
    Figure("nightly_db_overhead", "bench_nightly.json", lambda r: 100 * r["db_fraction"], "% of scoring", "< 5"),
    Figure("web_region_get_p95", "web_load.json", lambda r: r["region_get_p95_ms"], "ms", "< 100"),
    Figure(
        "web_lost_plus_duplicated_responses",
        "web_load.json",
        lambda r: r["lost_responses"] + r["duplicated_responses"],
        "",
        "= 0",
    ),
    Figure(
        "dprime_ci_coverage_synthetic_M3",
        "bench_observer_coverage.json",
        lambda r: 100 * r["synthetic_coverage_m3"],
        "%",
        "93–97",
    ),
    Figure(
        "dprime_ci_coverage_synthetic_M5",
        "bench_observer_coverage.json",
        lambda r: 100 * r["synthetic_coverage_m5"],
        "%",
        "93–97",
    ),
    Figure(
        "truth_ci_coverage_min (d′, count; NPW, NPWE; 4/8/16 images)",
        "bench_observer_truth.json",
        lambda r: r["headline"]["coverage_min_pct"],
        "%",
        "≥ 93",
    ),
    Figure(
        "truth_ci_coverage_max",
        "bench_observer_truth.json",
        lambda r: r["headline"]["coverage_max_pct"],
        "%",
        "≤ 97",
    ),
    Figure(
        "truth_bias_pooled_max_abs (over diameters and plates)",
        "bench_observer_truth.json",
        lambda r: r["headline"]["pooled_bias_max_abs_pct"],
        "%",
        "< 1",
    ),
    Figure(
        "truth_bias_per_diameter_max_abs_z",
        "bench_observer_truth.json",
        lambda r: r["headline"]["diameter_bias_max_abs_z"],
        "SE",
        "< 3",
    ),
    Figure(
        "dose_series_to_score_time_ratio",
        "bench_dose_series.json",
        lambda r: max(v["ratio"] for v in r["speed"].values()),
        "×",
        "< 2",
    ),
    Figure(
        "adaptive_psi_trials_per_reader_cell_worst",
        "bench_adaptive.json",
        lambda r: r["summary"]["psi_trials_worst_cell"],
        "trials",
        "— (±0.2 ln, 95 % CI, 80 % of readers)",
    ),
    Figure(
        "adaptive_over_constant_trials_worst",
        "bench_adaptive.json",
        lambda r: r["summary"]["ratio_worst"],
        "×",
        "≤ 0.5",
    ),
    Figure(
        "adaptive_pooled_bias_worst",
        "bench_adaptive.json",
        lambda r: r["summary"]["by_rule"]["psi"]["max_abs_bias_pct"],
        "%",
        "< 2",
    ),
    Figure(
        "adaptive_pooled_ci_coverage",
        "bench_adaptive.json",
        lambda r: 100 * r["summary"]["by_rule"]["psi"]["coverage_pooled"],
        "%",
        "93–97",
    ),
    Figure(
        "constant_stimuli_pooled_ci_coverage",
        "bench_adaptive.json",
        lambda r: 100 * r["summary"]["by_rule"]["constant"]["coverage_pooled"],
        "%",
        "93–97",
    ),
    Figure("memory_peak_8_over_1_images", "bench_memory.json", lambda r: r["peak_ratio_8_vs_1_images"], "×", "≤ 8"),
    Figure(
        "memory_peak_sites_ratio",
        "bench_memory.json",
        lambda r: r["peak_ratio_sites"],
        "×",
        "≤ ratio of sites",
    ),
    Figure("memory_peak_per_extra_image", "bench_memory.json", lambda r: r["peak_per_extra_image_mb"], "MB", "—"),
    Figure(
        "memory_analyse_peak_10000_over_1000_resamples",
        "bench_memory.json",
        lambda r: r["analyse_peak_mb"]["10000"] / r["analyse_peak_mb"]["1000"],
        "×",
        "≤ 2",
    ),
    Figure("memory_refuse_12000_targets_s", "bench_memory.json", lambda r: r["layout_12000_refusal_s"], "s", "≤ 10"),
]


def collect() -> list[tuple[Figure, Any]]:
    """(figure, value) for every figure whose results file exists; value None when the file lacks it."""
    out = []
    for f in FIGURES:
        path = RESULTS / f.file
        if not path.is_file():
            continue
        try:
            value = f.get(json.loads(path.read_text(encoding="utf-8")))
        except (KeyError, TypeError, ValueError, ZeroDivisionError):
            value = None
        out.append((f, value))
    return out


def _fmt(v) -> str:
    if v is None:
        return "—"
    return f"{v:.3g}" if isinstance(v, float) else str(v)


def lines() -> list[str]:
    return [f"{f.name}: {_fmt(v)} {f.unit} (floor: {f.floor})".replace("  ", " ") for f, v in collect()]


def markdown(header: str = "") -> str:
    rows = ["| figure | value | unit | floor |", "|---|---|---|---|"]
    rows += [f"| {f.name} | {_fmt(v)} | {f.unit} | {f.floor} |" for f, v in collect()]
    return (header + "\n\n" if header else "") + "\n".join(rows) + "\n"
