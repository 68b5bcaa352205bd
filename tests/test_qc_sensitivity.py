"""The smallest detectable change per diameter (issue 23, item 7): a session just beyond the stated change is
flagged by the rule named, one just inside it is not; the EWMA's sustained figure is its asymptotic limit
L σ √(λ/(2−λ) + 1/K) (Montgomery, Introduction to Statistical Quality Control, 6th ed. (2009), eq. 9.26, from
memory); the kerma equivalent is the Rose model's C_T ∝ kerma^(−1/2) (Rose, J. Opt. Soc. Am. 38 (1948)).
"""

import numpy as np
import pandas as pd
import pytest

from scorer.qc.config import AlertRules
from scorer.qc.control import compute_baseline, evaluate_session
from scorer.qc.sensitivity import detectable_change, sensitivity_sentence


def _history(values, se):
    z = 1.959963984540054
    return pd.DataFrame(
        [
            {
                "session_id": i + 1,
                "session_date": f"2026-03-{i + 1:02d}",
                "method": "dprime",
                "diameter_mm": 0.5,
                "threshold_contrast": v,
                "ci_low": v * 10 ** (-z * se),
                "ci_high": v * 10 ** (z * se),
                "verdict": None,
                "acceptable": None,
                "compared_contrast": None,
            }
            for i, v in enumerate(values)
        ]
    )


@pytest.mark.parametrize("rule", ["shewhart", "baseline"])
def test_a_session_just_beyond_the_stated_change_is_flagged_and_one_just_inside_is_not(rule):
    base = [0.0100, 0.0106, 0.0097, 0.0103, 0.0099]
    se = 0.02
    h = _history(base, se)
    b = compute_baseline(h)
    rules = AlertRules(rules=(rule,))
    (row,) = detectable_change(b, rules).to_dict("records")
    assert row["single_session_rule"] == rule
    ref = 10 ** b["mean_log10"].iloc[0]
    for factor, expect in ((1.001, 1), (0.999, 0)):
        v = ref * row["single_session_ratio"] * factor
        hh = _history(base + [v], se)
        got = evaluate_session("det", 6, hh, b, ("2026-03-05", 5), {1, 2, 3, 4, 5}, rules)
        assert len(got) == expect, (factor, got)


def test_sustained_shift_and_kerma_equivalent():
    b = pd.DataFrame(
        [
            {
                "diameter_mm": 1.0,
                "mean_log10": -2.0,
                "sigma_log10": 0.05,
                "sd_between_log10": 0.05,
                "se_within_log10": 0.04,
                "n_sessions": 5,
            }
        ]
    )
    rules = AlertRules()
    (row,) = detectable_change(b, rules).to_dict("records")
    lam, L, s, k = 0.2, 3.0, 0.05, 5
    assert row["sustained_ratio"] == pytest.approx(10 ** (L * s * np.sqrt(lam / (2 - lam) + 1 / k)), rel=1e-9)
    assert row["sustained_rule"] == "ewma"
    # Rose: ratio r of thresholds ⇔ kerma × 1/r²
    assert row["kerma_fall_sustained"] == pytest.approx(1 - row["sustained_ratio"] ** -2, rel=1e-12)
    assert row["single_session_ratio"] == pytest.approx(10 ** (L * s * np.sqrt(1 + 1 / k)), rel=1e-9)
    assert "in one session (shewhart" in sensitivity_sentence(row) and "sustained (ewma" in sensitivity_sentence(row)
