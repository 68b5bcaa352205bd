"""Alert wording (issue 23, item 6): the printed numbers compare as the true ones do, and the limits rule
prints the human-equivalent threshold it compared (model × human/model factor, with the factor's CI).

The human-equivalent CI is checked against the quadrature sum of the two log-scale standard errors computed
here by hand (independent errors of a product add in quadrature on the log scale: Taylor, An Introduction to
Error Analysis, 2nd ed. (1997), §3.8, from memory).
"""

import re

import numpy as np
import pandas as pd
import pytest

from scorer.observer.limits import HumanFactor
from scorer.qc.config import AlertRules
from scorer.qc.control import compute_baseline, evaluate_session, pct_pair


def _nums(text):
    return [float(x) for x in re.findall(r"(\d+(?:\.\d+)?) %", text)]


@pytest.mark.parametrize(
    "a, b", [(0.011604, 0.011597), (0.0116, 0.0116000001), (0.5, 0.25), (0.0099999, 0.01), (0.02, 0.0199)]
)
def test_printed_values_compare_like_the_true_ones(a, b):
    sa, sb = pct_pair(a, b)
    fa, fb = float(sa.split()[0]), float(sb.split()[0])
    assert (fa > fb) == (a > b) and (fa < fb) == (a < b), (sa, sb)


def _history(values, cis, verdict=None, compared=None, acceptable=None):
    rows = []
    for i, (v, ci) in enumerate(zip(values, cis)):
        rows.append(
            {
                "session_id": i + 1,
                "session_date": f"2026-03-{i + 1:02d}",
                "method": "dprime",
                "diameter_mm": 0.5,
                "threshold_contrast": v,
                "ci_low": ci[0],
                "ci_high": ci[1],
                "verdict": verdict if i == len(values) - 1 else None,
                "compared_contrast": compared if i == len(values) - 1 else None,
                "acceptable": acceptable if i == len(values) - 1 else None,
            }
        )
    return pd.DataFrame(rows)


def test_a_shewhart_alert_whose_value_sits_just_outside_its_limit_prints_it_so():
    base = [0.0100, 0.0102, 0.0098, 0.0101]
    h0 = _history(base, [(v / 1.01, v * 1.01) for v in base])
    b = compute_baseline(h0)
    rules = AlertRules(rules=("shewhart",))
    m, s = b["mean_log10"].iloc[0], b["sigma_log10"].iloc[0]
    from scorer.qc.control import shewhart_halfwidth

    lim = 10 ** (m + shewhart_halfwidth(s, 4, rules, 0.0))
    v = lim * 1.0002  # 0.02 % above the limit: three digits would print the same number twice
    h = _history(base + [v], [(x / 1.01, x * 1.01) for x in base] + [(v / 1.0001, v * 1.0001)])
    (a,) = evaluate_session("det", 5, h, b, ("2026-03-04", 4), {1, 2, 3, 4}, rules)
    val, limit = _nums(a.message.split("control limit")[0])[0], _nums(a.message.split("control limit")[1])[0]
    assert val > limit, a.message


def test_limits_alert_prints_the_human_equivalent_value_with_the_factor_and_its_ci():
    # model threshold 0.716 %, factor 1.8 (CI 1.5–2.2): 1.289 % human-equivalent against a 1.0 % limit
    c, lo, hi = 0.00716, 0.0064, 0.0080
    f = HumanFactor(1.8, 1.5, 2.2)
    h = _history([c], [(lo, hi)], verdict="fail", compared=c * 1.8, acceptable=0.010)
    (a,) = evaluate_session("det", 1, h, None, None, set(), AlertRules(), f)
    assert a.rule == "limits" and a.value == pytest.approx(c * 1.8) and a.reference == 0.010
    assert "human-equivalent threshold contrast 1.29 %" in a.message and "model 0.716 %" in a.message
    assert "factor 1.8 (95 % CI 1.5–2.2)" in a.message and "acceptable limit 1 %" in a.message
    z = 1.959963984540054
    se_lo = np.hypot(np.log(c / lo) / z, np.log(1.8 / 1.5) / z)
    se_hi = np.hypot(np.log(hi / c) / z, np.log(2.2 / 1.8) / z)
    want = f"95 % CI {100 * c * 1.8 * np.exp(-z * se_lo):.3g}–{100 * c * 1.8 * np.exp(z * se_hi):.3g} %"
    assert want in a.message, a.message
