"""Flags on reported values (issue 21 item 3): extrapolated, censored, above 100 % contrast, not estimable — one
test per flag, and one per output (JSON, CSV, HTML) of `limen score`, `limen dose-series` and `limen analyse`.

The facts checked are definitions of the trade: a disc's contrast is the fractional drop of air kerma behind it, so
it lies in (0, 1] and a threshold above 100 % is no contrast a plate could hold (common practice); a value outside
the range measured is an extrapolation (common practice); a count-method threshold outside the contrasts offered
is only known to lie beyond them, i.e. censored (Klein & Moeschberger, *Survival Analysis* (2003), ch. 1 —
censoring); a likelihood without interior maximum gives no estimate (Wichmann & Hill, Perception &
Psychophysics 63 (2001)).
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest
from helpers import MINI

from scorer.observer import flags
from scorer.observer.threshold import ThresholdCurve, ThresholdPoint, censor_point


def _point(t, lo, hi, method="dprime", offered=(0.015, 0.687)):
    return censor_point(ThresholdPoint(0.07, t, lo, hi, method, "npwe", 4, 3, 2 / 3), *offered)


# ----------------------------------------------------------------------------- one test per flag
def test_extrapolated_flag_for_a_dprime_threshold_beyond_the_contrasts_offered():
    # the case: 76 % (CI 30–193 %) at 25 µGy, above the plate's highest contrast 68.7 %
    p = _point(0.76, 0.30, 1.93)
    assert p.extrapolated and p.flags == [flags.EXTRAPOLATED, flags.ABOVE_100]
    assert _point(0.05, 0.04, 0.06).flags == []
    assert flags.EXTRAPOLATED in _point(0.01, 0.008, 0.012).flags  # below the lowest offered, 1.5 %


def test_censored_flag_for_a_count_threshold_beyond_the_contrasts_offered():
    p = _point(0.9, 0.5, 3.0, method="count")
    assert p.censored == "above" and p.threshold_contrast == pytest.approx(0.687)
    assert p.flags == [flags.CENSORED]  # the one-sided interval [0.687, ∞) is a bound, not a CI above 100 %
    low = _point(0.001, 0.0005, 0.002, method="count")
    assert low.censored == "below" and low.flags == [flags.CENSORED]


def test_above_100_flag_for_a_value_or_ci_end_above_100_percent():
    assert flags.contrast_flags(0.6, 0.34, 1.08) == [flags.ABOVE_100]  # the pooled readers' CI of the issue
    assert flags.contrast_flags(1.2, 0.9, 1.6) == [flags.ABOVE_100]
    assert flags.contrast_flags(0.6, 0.34, 0.99) == []
    assert flags.capped_percent(1.08) == "100 (capped)" and flags.capped_percent(0.5) == "50"


def test_not_estimable_flag():
    assert _point(float("nan"), float("nan"), float("nan")).flags == [flags.NOT_ESTIMABLE]
    rec = {"threshold_contrast": 0.02, "ci_low": 0.01, "ci_high": 0.04, "converged": False}  # fit at a bound
    assert flags.threshold_flags(rec) == [flags.NOT_ESTIMABLE]
    assert flags.kerma_flags(float("nan"), [25, 180]) == [flags.NOT_ESTIMABLE]


def test_kerma_flags_beyond_the_series():
    assert flags.kerma_flags(340.0, [25.0, 50.0, 100.0, 180.0]) == [flags.EXTRAPOLATED]
    assert flags.kerma_flags(12.0, [25.0, 180.0]) == [flags.EXTRAPOLATED]
    assert flags.kerma_flags(120.0, [25.0, 180.0]) == []


def test_kerma_ratio_sentence_says_when_panel_b_needs_a_kerma_beyond_its_series():
    # the "1.87× at 0.15 mm": B reaches A's threshold only beyond the highest kerma B was measured at
    from scorer.detector.dose import fit_power_law, kerma_ratio, ratio_sentence

    k = np.array([25.0, 50.0, 100.0, 180.0])
    se = np.full(4, 0.05)
    fa = fit_power_law(k, 0.01 * (k / 100) ** -0.5, se, 0.15)
    fb = fit_power_law(k, 0.03 * (k / 100) ** -0.5, se, 0.15)  # 3× A's threshold: needs 9× the kerma
    r = kerma_ratio(fa, fb)
    assert r["ratio"] == pytest.approx(9.0, rel=1e-6) and r["flags"] == [flags.EXTRAPOLATED]
    assert r["kerma_b_ugy"] > 180
    s = ratio_sentence(0.15, r, "direct", "indirect")
    assert "extrapolated" in s and "beyond the kermas it was measured at" in s
    inside = kerma_ratio(fa, fit_power_law(k, 0.012 * (k / 100) ** -0.5, se, 0.15))
    assert inside["flags"] == [] and "extrapolated" not in ratio_sentence(0.15, inside, "direct", "indirect")


# ----------------------------------------------------------------------------- limen score: JSON, CSV, HTML
@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    """A real `limen score` result of the mini plate, with one point turned into the issue's flagged value."""
    from click.testing import CliRunner

    from scorer.cli import main
    from scorer.workflow import load_layout, load_limits, score_files

    d = tmp_path_factory.mktemp("flags-score")
    res = CliRunner().invoke(
        main, ["simulate", "--small", "--layout", str(MINI), "--count", "3", "--seed", "21", "--out", str(d)]
    )
    assert res.exit_code == 0, res.output
    lim = d / "limits.toml"
    lim.write_text(
        'format = "limen-limits/1"\nobserver = "npw"\nsource = "test"\n'
        "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.5\n[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.05\n"
    )
    result = score_files(sorted(str(p) for p in d.glob("*.dcm")), load_layout(MINI), n_boot=50, limits=load_limits(lim))
    p = result.curves["dprime"].points[0]
    p.threshold_contrast, p.ci_low, p.ci_high = 0.76, 0.30, 1.93
    censor_point(p, p.offered_min, 0.687)
    from scorer.observer.limits import evaluate

    result.verdicts = evaluate(result.curves["dprime"], result.limits)
    return result, d


def test_score_outputs_carry_the_flags(scored, tmp_path):
    from scorer.reports.score import write_score_outputs

    result, _ = scored
    write_score_outputs(result, tmp_path)
    js = json.loads((tmp_path / "results.json").read_text())
    first = next(t for t in js["thresholds"] if t["method"] == "dprime")
    assert first["flags"] == [flags.EXTRAPOLATED, flags.ABOVE_100]
    assert js["verdicts"][0]["flags"] == [flags.EXTRAPOLATED, flags.ABOVE_100]
    csv = pd.read_csv(tmp_path / "thresholds.csv", keep_default_na=False)
    assert csv["flags"].iloc[0] == "extrapolated; above 100 %"
    assert set(csv["flags"].iloc[1:]) <= {"", "extrapolated", "censored", "above 100 %", "censored; above 100 %"}
    assert pd.read_csv(tmp_path / "verdicts.csv")["flags"].iloc[0] == "extrapolated; above 100 %"
    page = (tmp_path / "report.html").read_text()
    assert "extrapolated; above 100 %" in page and "100 (capped)" in page
    assert "no disc can have" in page  # the legend says what the flag means
    assert "193" not in page.split("Threshold contrast")[1].split("</table>")[0]  # the CI end is shown capped


# ----------------------------------------------------------------------------- limen dose-series: JSON, CSV, HTML
def _series():
    pts = {
        25.0: {"threshold_contrast": 0.76, "ci_low": 0.30, "ci_high": 1.93, "censored": "", "extrapolated": True},
        100.0: {"threshold_contrast": 0.30, "ci_low": 0.20, "ci_high": 0.45, "censored": "", "extrapolated": False},
    }
    groups = []
    for k, p in pts.items():
        p = {**p, "diameter_mm": 0.07, "method": "dprime", "observer": "npwe", "offered_min": 0.015,
             "offered_max": 0.687}  # fmt: skip
        p["flags"] = flags.threshold_flags(p)
        groups.append(
            {
                "kerma_ugy": k,
                "n_images": 4,
                "n_simulated": 0,
                "paths": [],
                "thresholds": [p],
                "figure_of_merit": [{"diameter_mm": 0.07, "fom_per_ugy": 1.0, "ci_low": 0.5, "ci_high": 2.0}],
            }
        )
    return {"groups": groups, "fits": [], "settings": {}}


def test_dose_series_outputs_carry_the_flags():
    from scorer.reports.dose import dose_series_csv, dose_series_html

    s = _series()
    assert s["groups"][0]["thresholds"][0]["flags"] == ["extrapolated", "above 100 %"]  # the JSON record
    csv = pd.read_csv(io.StringIO(dose_series_csv(s)), keep_default_na=False)
    assert list(csv["flags"]) == ["extrapolated; above 100 %", ""]
    page = dose_series_html(s)
    table = page.split("Per kerma group")[1].split("</table>")[0]
    assert "extrapolated; above 100 %" in table and "76 (30–100 (capped))" in table and "193" not in table
    # a dose_series.json written before the flags is flagged from its fields
    for g in s["groups"]:
        del g["thresholds"][0]["flags"]
    assert "extrapolated; above 100 %" in dose_series_html(s)


def test_dose_series_json_flags_thresholds_fits_and_kermas(tmp_path):
    from scorer.detector.dose import DoseGroup, fit_series

    k = [25.0, 50.0, 100.0]
    groups = []
    for kk in k:
        t = 0.02 * (kk / 50) ** -0.5
        p = _point(t, t / 1.2, t * 1.2, offered=(0.0005, 0.5)).to_dict()
        p["diameter_mm"] = 0.5
        groups.append(DoseGroup(kk, [], [p]))
    groups[0].thresholds[0].update(extrapolated=True)  # as if beyond the plate's contrasts
    from scorer.observer.limits import Limits

    lim = Limits("t", "npwe", "test", (0.5,), (0.005,), (None,))
    fits, _ = fit_series(groups, limits=lim)
    f = fits[0]
    assert f["flags"] == [flags.EXTRAPOLATED] and f["n_extrapolated_thresholds"] == 1
    # 0.5 % needs 16× the 50 µGy kerma (β = 0.5): far beyond 100 µGy
    assert f["kerma_for_limit_ugy"] == pytest.approx(800, rel=1e-6)
    assert f["kerma_for_limit_flags"] == [flags.EXTRAPOLATED]
    assert groups[0].to_dict()["figure_of_merit"][0]["flags"] == [flags.EXTRAPOLATED]


# ----------------------------------------------------------------------------- limen analyse: JSON, CSV, HTML
def test_reader_study_outputs_carry_the_flags(tmp_path):
    from scorer.reports.study import _table, write_outputs
    from scorer.study import simulate_reader_study
    from scorer.study.analysis import analyse_study

    # the pooled table's CI above 100 % of the issue: shown capped and flagged
    pooled = pd.DataFrame(
        [{"reader": "pooled", "detector": "A", "diameter_mm": 0.07, "threshold_contrast": 0.61, "ci_low": 0.34,
          "ci_high": 1.08, "converged": True, "offered_min": 0.015, "offered_max": 0.687, "note": ""}]
    )  # fmt: skip
    html = _table(pooled, ["reader", "detector", "diameter_mm", "threshold_contrast", "ci_low", "ci_high"])
    assert "100 (capped)" in html and "above 100 %" in html and "108" not in html

    st = simulate_reader_study(
        np.random.default_rng(3), 3, detectors={"A": 1.0}, diameters_mm=(0.5, 1.0), n_images=4, n_contrasts=6
    )
    a = analyse_study(st.trials, st.model_trials, n_boot=30, seed=1)
    a.reader_curves.loc[0, "converged"] = False  # a reader whose fit sits at its search bound
    from scorer.study.analysis import add_flags

    add_flags(a.reader_curves)
    write_outputs(a, tmp_path)
    js = json.loads((tmp_path / "analysis.json").read_text())
    assert all(isinstance(c["flags"], list) for c in js["curves"])
    assert js["curves"][0]["flags"] == [flags.NOT_ESTIMABLE]
    csv = pd.read_csv(tmp_path / "reader_curves.csv", keep_default_na=False)
    assert "flags" in csv.columns and csv["flags"].iloc[0] == "not estimable"
    assert "flags" in pd.read_csv(tmp_path / "human_model_factor.csv").columns
    page = (tmp_path / "report.html").read_text()
    assert "<details>" in page and "not estimable" in page


def test_curve_frame_flags_are_one_text_cell():
    pts = [_point(0.76, 0.30, 1.93), _point(0.05, 0.04, 0.06)]
    frame = ThresholdCurve(pts, "dprime", "npwe", 0, 0).to_frame()
    assert list(frame["flags"]) == ["extrapolated; above 100 %", ""]
    assert ThresholdCurve(pts, "dprime", "npwe", 0, 0).to_records()[0]["flags"] == ["extrapolated", "above 100 %"]
