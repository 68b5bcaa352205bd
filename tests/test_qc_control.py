"""Baselines and control-chart rules of the nightly alerts, against the textbook formulas.

Sources: Roberts, Technometrics 1 (1959) and Montgomery, Introduction to Statistical Quality Control,
6th ed. (2009), §9.2 eq. 9.22–9.26 (EWMA recursion and variance), §6.4 (Shewhart individuals chart)
— equation numbers from memory; the checks below use the formulas themselves and independent
numerical means (Monte Carlo, the standard library's statistics module, scipy's normal quantiles).
"""

import statistics

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from scorer.qc.config import AlertRules
from scorer.qc.control import compute_baseline, evaluate_session, ewma, ewma_sigma_factor, log_se_from_ci


def test_ewma_recursion_equals_the_closed_form():
    # z_t = λ Σ_{j<t} (1−λ)^j x_{t−j} + (1−λ)^t z_0   (Montgomery eq. 9.23, from memory)
    rng = np.random.default_rng(1)
    x = rng.normal(size=12)
    lam, z0 = 0.3, 0.7
    z = ewma(x, lam, z0)
    for t in range(1, 13):
        closed = lam * sum((1 - lam) ** j * x[t - 1 - j] for j in range(t)) + (1 - lam) ** t * z0
        assert z[t - 1] == pytest.approx(closed, rel=1e-12)


def test_ewma_standard_deviation_matches_monte_carlo_and_its_limit():
    lam = 0.2
    # asymptote √(λ/(2−λ)) = 1/3 for λ = 0.2 (exact arithmetic)
    assert float(ewma_sigma_factor(lam, 10_000)) == pytest.approx(1 / 3, rel=1e-12)
    assert float(ewma_sigma_factor(lam, 1)) == pytest.approx(lam, rel=1e-12)  # z_1 = λ x_1: SD λσ
    rng = np.random.default_rng(2)
    x = rng.normal(size=(40_000, 8))
    z = np.zeros(40_000)
    sds = []
    for t in range(8):
        z = lam * x[:, t] + (1 - lam) * z
        sds.append(z.std())
    np.testing.assert_allclose(sds, ewma_sigma_factor(lam, np.arange(1, 9)), rtol=0.015)


def _history(values, cis=None, start=1, date0="2026-03-01"):
    rows = []
    for i, v in enumerate(values):
        lo, hi = (v / 1.2, v * 1.2) if cis is None else cis[i]
        rows.append(
            {
                "session_id": start + i,
                "session_date": str(pd.Timestamp(date0) + pd.Timedelta(days=i))[:10],
                "method": "dprime",
                "diameter_mm": 0.5,
                "threshold_contrast": v,
                "ci_low": lo,
                "ci_high": hi,
                "verdict": None,
                "acceptable": None,
            }
        )
    return pd.DataFrame(rows)


def test_baseline_mean_sd_and_within_session_floor():
    vals = [0.010, 0.012, 0.011, 0.0105]
    h = _history(vals)
    b = compute_baseline(h).iloc[0]
    logs = [np.log10(v) for v in vals]
    assert b.mean_log10 == pytest.approx(statistics.fmean(logs), rel=1e-12)
    assert b.sd_between_log10 == pytest.approx(statistics.stdev(logs), rel=1e-12)
    z = stats.norm.ppf(0.975)
    assert b.se_within_log10 == pytest.approx(2 * np.log10(1.2) / (2 * z), rel=1e-12)
    assert b.sigma_log10 == max(b.sd_between_log10, b.se_within_log10)
    # CI → SE round trip: a normal CI m ± z·se in log10 gives se back
    assert float(log_se_from_ci(10 ** (-2 - z * 0.05), 10 ** (-2 + z * 0.05))) == pytest.approx(0.05, rel=1e-12)


def _judge(history, sid, rules=None, k=4):
    rules = AlertRules() if rules is None else rules
    base_ids = set(range(1, k + 1))
    b = compute_baseline(history[history["session_id"].isin(base_ids)])
    last = history[history["session_id"] == k]["session_date"].iloc[0]
    return evaluate_session("det", sid, history, b, (last, k), base_ids, rules)


def test_shewhart_rule_at_three_sigma_on_both_sides():
    base = [0.010, 0.012, 0.011, 0.0105]
    b = compute_baseline(_history(base)).iloc[0]
    # a new session minus the mean of K baseline sessions has SD σ√(1 + 1/K) (prediction interval)
    m, s = b.mean_log10, b.sigma_log10 * np.sqrt(1 + 1 / len(base))
    rules = AlertRules(rules=("shewhart",))
    for k, expect in ((2.9, []), (3.1, ["worse"]), (-3.1, ["better"]), (-2.9, [])):
        h = _history(base + [10 ** (m + k * s)])
        got = [a.direction for a in _judge(h, 5, rules)]
        assert got == expect, (k, got)
    # false-alarm probability of a ±3σ individuals chart under control: 2·(1 − Φ(3)) = 0.0027, ARL₀ ≈ 370
    assert 1 / (2 * stats.norm.sf(3)) == pytest.approx(370.4, abs=0.1)


def test_baseline_rule_needs_the_whole_ci_beyond_the_allowed_fraction():
    base = [0.010, 0.010, 0.010, 0.010]
    ref = 0.010
    rules = AlertRules(rules=("baseline",), worse_fraction=0.25)
    h = _history(base + [0.016], cis=[(0.008, 0.0125)] * 4 + [(0.0124, 0.02)])  # CI reaches below 1.25×
    assert _judge(h, 5, rules) == []
    h = _history(base + [0.016], cis=[(0.008, 0.0125)] * 4 + [(0.0126, 0.02)])  # CI entirely above 1.25×
    (a,) = _judge(h, 5, rules)
    assert a.rule == "baseline" and a.reference == pytest.approx(ref)


def test_ewma_catches_a_small_sustained_shift_the_shewhart_rule_misses():
    k = 20
    rng = np.random.default_rng(3)
    base = list(0.01 * 10 ** rng.normal(0, 0.05, k))
    b = compute_baseline(_history(base)).iloc[0]
    m, s = b.mean_log10, b.sigma_log10
    shifted = [10 ** (m + 1.5 * s)] * 10  # 1.5 σ: inside the Shewhart limits every time
    h = _history(base + shifted)
    rules = AlertRules(rules=("shewhart", "ewma"))
    first = None
    for sid in range(k + 1, k + 11):
        alerts = _judge(h, sid, rules, k=k)
        assert all(a.rule == "ewma" for a in alerts)
        if alerts and first is None:
            first = sid - k
    # z_t − m = 1.5σ(1 − 0.8^t) exceeds 3σ·√(0.2/1.8·(1 − 0.64^t) + 1/K) first at this t (direct arithmetic)
    t = np.arange(1, 11)
    expect = int(t[1.5 * (1 - 0.8**t) > 3 * np.sqrt(ewma_sigma_factor(0.2, t) ** 2 + 1 / k)][0])
    assert first == expect


def test_limits_rule_follows_the_verdict():
    h = _history([0.01] * 5)
    h.loc[4, "verdict"] = "fail"
    h.loc[4, "acceptable"] = 0.008
    (a,) = evaluate_session("det", 5, h, None, None, set(), AlertRules())
    assert a.rule == "limits" and a.reference == 0.008
