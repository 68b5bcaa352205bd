"""Study planning by simulation (scorer.study.planning): the test it simulates keeps its size, detects a large
effect, and reads its reader population from a pilot analysis."""

from __future__ import annotations

import pytest
from scipy import stats as sps

from scorer.errors import LimenError
from scorer.study import ReaderPopulation, population_from_analysis, power_by_simulation


def test_without_a_difference_the_rejection_rate_is_the_significance_level():
    # Size of a test: P(reject | no difference) = alpha (Neyman & Pearson 1933). With 60 simulated studies the
    # count of rejections is Binomial(60, 0.05); more than its 99.9th percentile means an anticonservative test.
    plan = power_by_simulation(1.0, readers=(4,), images=(8,), n_sim=60, n_boot=50, seed=11)
    cell = plan.cells.iloc[0]
    assert cell["power"] * 60 <= sps.binom.ppf(0.999, 60, 0.05)
    assert cell["median_ratio"] == pytest.approx(1.0, abs=0.08)
    assert plan.recommended is None and plan.notes


def test_a_doubled_threshold_is_detected_far_above_chance():
    # 12 or more rejections of 20 would have probability ~1e-11 under alpha = 0.05 (scipy.stats.binom)
    plan = power_by_simulation(2.0, readers=(4,), images=(8,), n_sim=20, n_boot=50, seed=3, target_power=0.5)
    cell = plan.cells.iloc[0]
    assert cell["power"] >= 0.6 and sps.binom.sf(round(cell["power"] * 20) - 1, 20, 0.05) < 1e-6
    assert cell["median_ratio"] == pytest.approx(2.0, rel=0.2)
    assert plan.recommended == {"n_readers": 4, "n_images": 8, "power": cell["power"], "ci_low": cell["ci_low"]}
    assert cell["ci_low"] < cell["power"] < cell["ci_high"]


def test_population_from_a_pilot_analysis_and_bad_input():
    pop = population_from_analysis(
        {"between_reader_cv": [{"cv_between": 0.1}, {"cv_between": 0.2}], "human_model_factor": {"factor": 2.5}}
    )
    assert isinstance(pop, ReaderPopulation) and pop.median_factor == 2.5 and pop.cv_between == pytest.approx(0.15)
    with pytest.raises(LimenError, match="between-reader CV"):
        population_from_analysis({"between_reader_cv": []})
    with pytest.raises(LimenError, match="ratio"):
        power_by_simulation(-1.0)
    with pytest.raises(LimenError, match="at least 2 readers"):
        power_by_simulation(1.3, readers=(1,))
