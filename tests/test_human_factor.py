"""The human/model factor (issue 21 item 4): per threshold method, bootstrap draws shared by every cell, cells at a
search bound left out, dependence on diameter tested, applied like for like.

Simulated readers come from the documented model in scorer/study/reader_model.py (linear observers in M-AFC,
Green & Swets 1966; Burgess, J. Opt. Soc. Am. A 11 (1994)): each reader's factor F_r is known and log-normal
about the population's median factor, which is the truth a study's CI must cover (its readers are a sample).
The full check (≥ 100 studies, two designs, both methods) is bench/bench_human_factor.py.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.errors import LimenError
from scorer.observer.limits import FactorTrend, HumanFactor, Limits, evaluate, parse_human_factor
from scorer.observer.threshold import ThresholdCurve, ThresholdPoint, dprime_thresholds
from scorer.study.human_factor import human_model_factor
from scorer.study.reader_model import ReaderPopulation, simulate_reader_study


def _factor(st, seed=0, n_boot=200, **kw):
    return human_model_factor(
        st.trials, st.model_trials, st.m_alternatives, np.random.default_rng(seed), n_boot,
        model_responses=st.model_responses, **kw,
    )  # fmt: skip


def test_ci_covers_the_readers_population_factor_for_both_methods():
    # 30 seeded studies of 6 readers (population median factor 1.8): the 95 % CI must cover 1.8 in ≥ 93 % of
    # them for each method.  Drawing the readers afresh for every detector × diameter cell (the old bootstrap)
    # averaged their shared effect away: 77 % over 30 studies of bench design A.
    hits = {"count": 0, "dprime": 0}
    for s in range(30):
        st = simulate_reader_study(
            np.random.default_rng(300 + s), 6, detectors={"A": 1.0}, diameters_mm=(0.25, 1.0), n_images=12,
            population=ReaderPopulation(median_factor=1.8),
        )  # fmt: skip
        for method, e in _factor(st, seed=s)["by_method"].items():
            hits[method] += e["ci_low"] <= 1.8 <= e["ci_high"]
    assert hits["count"] >= 28 and hits["dprime"] >= 28, hits


def test_the_overall_interval_carries_the_reader_effect_every_cell_shares():
    # Readers who differ a lot (CV 40 %) and many images: the overall factor's uncertainty is the readers'
    # spread of log factors over √R (standard error of a mean; the cells share the readers, so averaging 6 cells
    # does not shrink it).  With the readers drawn afresh per cell it shrank by about √6.
    st = simulate_reader_study(
        np.random.default_rng(5), 8, detectors={"A": 1.0, "B": 1.2}, diameters_mm=(0.25, 0.5, 1.0), n_images=40,
        population=ReaderPopulation(median_factor=1.8, cv_between=0.4),
    )  # fmt: skip
    e = _factor(st)["by_method"]["count"]
    se_ci = np.log(e["ci_high"] / e["ci_low"]) / (2 * 1.96)
    se_readers = np.std(np.log(st.readers["factor"]), ddof=1) / np.sqrt(8)
    assert 0.7 * se_readers < se_ci < 2.0 * se_readers, (se_ci, se_readers)


def test_the_dprime_factor_uses_the_threshold_limen_score_computes():
    # like for like: the d′ factor's model threshold is the d′ method's threshold of the same responses
    # (scorer.observer.threshold.dprime_thresholds, what `limen score` reports)
    st = simulate_reader_study(np.random.default_rng(2), 4, detectors={"A": 1.0}, diameters_mm=(0.5,), n_images=8)
    e = _factor(st, n_boot=50)["by_method"]
    want = dprime_thresholds(st.model_responses, n_boot=0).points[0].threshold_contrast
    assert e["dprime"]["per_diameter"][0]["model_threshold"] == pytest.approx(want, rel=1e-9)
    assert e["count"]["per_diameter"][0]["model_threshold"] != pytest.approx(want, rel=1e-3)
    assert e["dprime"]["method"] == "dprime" and e["count"]["method"] == "count"


def test_cells_at_a_search_bound_are_left_out_and_counted_and_none_gives_no_factor():
    st = simulate_reader_study(np.random.default_rng(4), 4, detectors={"A": 1.0}, diameters_mm=(0.25, 1.0), n_images=6)
    model = st.model_trials.copy()
    at1 = np.isclose(model["diameter_mm"], 1.0)
    model.loc[at1, "chosen_site"] = model.loc[at1, "true_site"]  # every 1 mm decision correct: no interior maximum
    model.loc[at1, "correct"] = 1
    hm = human_model_factor(st.trials, model, 4, np.random.default_rng(0), 100)
    assert hm["n_excluded"] == 1 and hm["n_used"] == 1
    assert hm["excluded"][0]["diameter_mm"] == 1.0 and "search bound" in hm["excluded"][0]["reason"]
    kept = next(r for r in hm["per_diameter"] if r["diameter_mm"] == 0.25)
    assert hm["factor"] == pytest.approx(kept["factor"])  # the overall factor rests on the one usable cell
    assert "1 of 2 detector × diameter cells left out" in hm["note"]
    assert next(r for r in hm["per_diameter"] if r["diameter_mm"] == 1.0)["flags"] == ["not estimable"]
    model["chosen_site"], model["correct"] = model["true_site"], 1  # every cell at the bound
    none = human_model_factor(st.trials, model, 4, np.random.default_rng(0), 100)
    assert none["factor"] is None and none["n_used"] == 0 and "no usable cell" in none["note"]
    # ... and such a factor is never exported: --human-factor-from refuses it
    with pytest.raises(LimenError, match="no usable human/model factor"):
        parse_human_factor({"human_model_factor": {**none, "by_observer": [none]}}, "npwe", "analysis.json")


def test_dependence_on_diameter_is_found_when_designed_and_not_when_absent():
    # readers fall behind the model at small details: F(d) = F·(d / 1 mm)^−0.4 (scorer/study/reader_model.py)
    kw = dict(detectors={"A": 1.0}, diameters_mm=(0.1, 0.25, 0.5, 1.0), n_images=30, c1=0.005)
    trend_st = simulate_reader_study(
        np.random.default_rng(8), 6, population=ReaderPopulation(median_factor=1.8, factor_slope=-0.4), **kw
    )
    e = _factor(trend_st)["by_method"]["dprime"]
    tr = e["diameter_trend"]
    assert tr["depends_on_diameter"] and tr["p_value"] < 0.05 and tr["slope_ci_low"] < -0.4 < tr["slope_ci_high"]
    geo = np.exp(np.log(trend_st.readers["factor"]).mean())  # these 6 readers' factor at 1 mm (1.50 here)
    for r in e["per_diameter"]:
        truth = geo * r["diameter_mm"] ** -0.4
        assert r["trend_ci_low"] < truth < r["trend_ci_high"], r
        assert r["human_equivalent_threshold"] == pytest.approx(r["model_threshold"] * r["trend_factor"])
    flat = simulate_reader_study(np.random.default_rng(8), 6, population=ReaderPopulation(median_factor=1.8), **kw)
    assert not _factor(flat)["by_method"]["dprime"]["diameter_trend"]["depends_on_diameter"]


def test_a_factor_that_depends_on_diameter_is_applied_per_diameter_and_said_beyond_the_study():
    trend = FactorTrend(np.log(2.0), -0.3, 0.5, ((0.001, 0.0), (0.0, 0.0004)), (0.1, 1.0), 0.001)
    f = HumanFactor(2.0, 1.9, 2.1, "a.json", "dprime", trend)
    # log F(d) = log 2 − 0.3·log(d / 0.5 mm)
    assert f.at(0.1).value == pytest.approx(2.0 * 0.2**-0.3) and f.at(0.5).value == pytest.approx(2.0)
    pts = [ThresholdPoint(d, 0.01, 0.009, 0.011, "dprime", "npwe", 8, 4, 0.625) for d in (0.1, 0.5, 2.0)]
    lim = Limits("t", "human", "test", (0.1, 0.5, 2.0), (0.5, 0.5, 0.5), (None, None, None))
    vs = evaluate(ThresholdCurve(pts, "dprime", "npwe", 0, 0), lim, f)
    assert [v.human_factor for v in vs] == pytest.approx([2.0 * 0.2**-0.3, 2.0, 2.0 * 4**-0.3])
    assert "extrapolated beyond the reader study's diameters" in vs[2].note and "extrapolated" in vs[2].flags
    assert "extrapolated" not in vs[0].note


def test_a_factor_applies_to_its_own_method_only():
    count = HumanFactor(1.9, 1.7, 2.1, "a.json", "count")
    assert count.for_method("count") is count
    with pytest.raises(LimenError, match="measured on the count method only"):
        count.for_method("dprime")
    both = HumanFactor(1.9, 1.7, 2.1, "a.json", "count", others=(HumanFactor(2.2, 2.0, 2.4, "a.json", "dprime"),))
    assert both.for_method("dprime").value == 2.2
    assert HumanFactor(1.8).for_method("dprime").value == 1.8  # a number given by hand applies to either
    pts = [ThresholdPoint(0.5, 0.01, 0.009, 0.011, "dprime", "npwe", 8, 4, 0.625)]
    lim = Limits("t", "human", "test", (0.5,), (0.5,), (None,))
    with pytest.raises(LimenError, match="like for like"):
        evaluate(ThresholdCurve(pts, "dprime", "npwe", 0, 0), lim, count)


def test_limen_analyse_measures_both_methods_from_a_responses_table(tmp_path):
    st = simulate_reader_study(np.random.default_rng(6), 4, detectors={"A": 1.0}, diameters_mm=(0.5, 1.0), n_images=6)
    st.trials.to_csv(tmp_path / "reads.csv", index=False)
    st.model_responses.to_csv(tmp_path / "responses.csv", index=False)
    st.model_trials.to_csv(tmp_path / "model.csv", index=False)
    res = CliRunner().invoke(
        main, ["analyse", str(tmp_path / "reads.csv"), "--model", str(tmp_path / "responses.csv"), "--n-boot", "60",
               "--json"],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    hm = json.loads(res.stdout)["human_model_factor"]
    assert set(hm["by_method"]) == {"count", "dprime"}
    f = parse_human_factor({"human_model_factor": hm}, "npwe", "analysis.json")
    assert f.method == "count" and f.for_method("dprime").value == pytest.approx(hm["by_method"]["dprime"]["factor"])
    # the decisions read from the responses are the model's trials
    res2 = CliRunner().invoke(
        main, ["analyse", str(tmp_path / "reads.csv"), "--model", str(tmp_path / "model.csv"), "--n-boot", "60",
               "--json"],
    )  # fmt: skip
    hm2 = json.loads(res2.stdout)["human_model_factor"]
    assert set(hm2["by_method"]) == {"count"}
    assert hm2["by_method"]["count"]["per_diameter"][0]["model_threshold"] == pytest.approx(
        hm["by_method"]["count"]["per_diameter"][0]["model_threshold"]
    )
    text = CliRunner().invoke(
        main, ["analyse", str(tmp_path / "reads.csv"), "--model", str(tmp_path / "responses.csv"), "--n-boot", "60"]
    )
    assert "d′ method (model responses)" in text.output and "depends on diameter" in text.output


def test_a_responses_table_with_two_signal_sites_is_a_one_line_error(tmp_path):
    st = simulate_reader_study(np.random.default_rng(6), 2, detectors={"A": 1.0}, diameters_mm=(0.5,), n_images=3)
    st.trials.to_csv(tmp_path / "reads.csv", index=False)
    bad = st.model_responses.copy()
    bad.loc[0:1, "is_signal"] = True
    bad.to_csv(tmp_path / "responses.csv", index=False)
    res = CliRunner().invoke(main, ["analyse", str(tmp_path / "reads.csv"), "--model", str(tmp_path / "responses.csv")])
    assert res.exit_code == 2 and "exactly one signal site" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1 and "Traceback" not in res.output


def test_bootstrap_draws_are_shared_not_redrawn_per_cell(monkeypatch):
    # one draw of the readers and one of each detector's images per study, whatever the number of cells
    import scorer.study.human_factor as hf

    calls = []
    real = hf.draws
    monkeypatch.setattr(hf, "draws", lambda n, b, rng: calls.append(n) or real(n, b, rng))
    st = simulate_reader_study(np.random.default_rng(1), 3, diameters_mm=(0.25, 0.5, 1.0), n_images=5)
    _factor(st, n_boot=20)
    assert sorted(calls) == [3, 5, 5]  # readers; the images of each of the 2 detectors
