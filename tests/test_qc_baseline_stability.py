"""The baseline sessions are tested for a trend before they become a baseline (issue 23, item 2).

Sources: the slope of simple linear regression and its variance σ²/S_xx (Draper & Smith, Applied Regression
Analysis, 3rd ed. (1998), §1.4, from memory), checked against scipy.stats.linregress; Holm's step-down
adjustment (Holm, Scand. J. Statist. 6 (1979)), checked against statsmodels' multipletests. The drift is
physical, as in tests/test_qc_drift.py: by the Rose model (Rose, J. Opt. Soc. Am. 38 (1948)) a 40 % lower
kerma raises the threshold contrast by 1/√0.6 ≈ ×1.29 (more where electronic noise matters).
"""

import datetime as dt
import json
import re

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from qc_helpers import DIRECT, INDIRECT, write_config
from scipy import stats

from scorer.cli import main
from scorer.qc.simulated import Panel, simulate_night
from scorer.qc.stability import (
    MR_MEDIAN_FACTOR,
    check_window,
    choose_baseline_window,
    holm,
    rejected_sessions,
    slope_test,
)

K = 5
FIRST = dt.date(2026, 3, 2)


def test_slope_and_its_z_equal_the_regression_formulas():
    rng = np.random.default_rng(4)
    x = rng.normal(size=7) + 0.2 * np.arange(7)
    se = np.full(7, 5.0)  # a floor above the residual SD: σ is the floor
    b, sigma, z, p = slope_test(x, se)
    ref = stats.linregress(np.arange(7), x)
    assert b == pytest.approx(ref.slope, rel=1e-12)
    assert sigma == 5.0
    sxx = np.sum((np.arange(7) - 3.0) ** 2)
    assert z == pytest.approx(ref.slope * np.sqrt(sxx) / 5.0, rel=1e-12)  # Var b = σ²/S_xx
    assert p == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-12)
    # with a floor below the sessions' scatter, σ comes from the median moving range
    b, sigma, z, p = slope_test(x, np.full(7, 1e-6))
    assert sigma == pytest.approx(np.median(np.abs(np.diff(x))) / MR_MEDIAN_FACTOR, rel=1e-12)


def test_median_moving_range_factor_by_monte_carlo():
    # median |X1 − X2| of independent N(0, 1): √2 Φ⁻¹(0.75) = 0.9539 (half-normal of scale √2; Montgomery §6.4
    # uses moving ranges for σ of an individuals chart, from memory) — checked by simulation
    rng = np.random.default_rng(8)
    d = np.abs(rng.normal(size=400_000) - rng.normal(size=400_000))
    assert np.median(d) == pytest.approx(MR_MEDIAN_FACTOR, rel=0.005)
    assert MR_MEDIAN_FACTOR == pytest.approx(0.9539, abs=1e-4)


def test_holm_equals_statsmodels():
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(5)
    for _ in range(20):
        p = rng.uniform(0, 0.2, size=rng.integers(1, 8))
        np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1], rtol=1e-12)


def _window(values, se, diameters=(0.1, 0.25, 1.0), date0="2026-03-01", start_id=1):
    rows = []
    for i, v in enumerate(values):
        for j, d in enumerate(diameters):
            c = 10 ** v[j]
            rows.append(
                {
                    "session_id": start_id + i,
                    "session_date": str(pd.Timestamp(date0) + pd.Timedelta(days=i))[:10],
                    "flags": "[]",
                    "diameter_mm": d,
                    "threshold_contrast": c,
                    # a 95 % CI whose half-width in log10 is 1.96 se
                    "ci_low": 10 ** (v[j] - stats.norm.ppf(0.975) * se),
                    "ci_high": 10 ** (v[j] + stats.norm.ppf(0.975) * se),
                }
            )
    return pd.DataFrame(rows)


def test_false_rejections_of_steady_windows_stay_below_alpha_and_a_step_is_found():
    # Monte Carlo on our own generator: sessions scatter exactly by their reported SE (σ = 0.06 in log10,
    # the mini plate's with 4 images), K = 5, 3 diameters; the test is at α = 0.01 per window
    rng = np.random.default_rng(6)
    sigma, n = 0.06, 2000
    false = sum(not check_window(_window(rng.normal(0, sigma, (K, 3)), sigma), 0.01).stable for _ in range(n))
    # binomial: at the nominal 1 % the count would exceed 35 with probability < 1e-4; σ̂ ≥ σ makes it conservative
    assert false / n <= 0.0175, false
    # the simulated 40 % drop at 1 mm (+0.11 to +0.25 in log10) from the 4th of 5 sessions: a step of 4σ
    step = np.array([[0, 0, 0], [0, 0, 0], [0, 0, 0], [1, 1, 1], [1, 1, 1]]) * 4 * sigma
    found = sum(not check_window(_window(step + rng.normal(0, sigma, (K, 3)), sigma), 0.01).stable for _ in range(500))
    assert found / 500 >= 0.6, found


def test_the_first_stable_window_by_date_is_chosen_whatever_the_ids():
    sigma = 0.03
    rng = np.random.default_rng(7)
    v = rng.normal(0, sigma / 3, (8, 3))
    v[:3] += 0.4  # the first three sessions are far off (a step down after them)
    w = _window(v, sigma)
    chosen, tested = choose_baseline_window(w, K, 0.01)
    # 3–7 has one session off at its edge (slope 0.2 Δ, residual SD inflated): found by the diameters together
    assert chosen == [4, 5, 6, 7, 8]
    assert [t.stable for t in tested] == [False, False, False, True]
    assert rejected_sessions(tested, chosen) == {1, 2, 3}
    # the same sessions with ids in another order (scored in another order): the same dates are chosen
    perm = {i + 1: sid for i, sid in enumerate([8, 3, 6, 1, 7, 2, 5, 4])}
    w2 = w.assign(session_id=w["session_id"].map(perm))
    chosen2, _ = choose_baseline_window(w2, K, 0.01)
    assert sorted(chosen2) == sorted(perm[i] for i in chosen)
    # flagged sessions are not part of a run
    w3 = w.assign(flags=np.where(w["session_id"] == 6, '["kVp 30 (expected 28)"]', "[]"))
    chosen3, _ = choose_baseline_window(w3, K, 0.01)
    assert chosen3 is None  # sessions 4, 5, 7, 8: only four unflagged sessions after the step


@pytest.fixture(scope="module")
def drift_inside_baseline(tmp_path_factory):
    """Five nights, K = 5, 4 images of the bundled plate; the direct panel's kerma drops by 40 % from night 4.

    The bundled plate, not the mini plate: on the mini plate the simulator's 40 % drop shows at 1 mm only
    (+0.12 in log10 C_T, about 2 SD of the night-to-night scatter even with 16 images), which no test on 2 of 5
    sessions can tell from noise at α = 0.01; the bundled plate's nine diameters see it at 0.35–2 mm
    (+0.06 to +0.14 each), and the diameters together (Stouffer's z ≈ 4.5) give it away.
    """
    root = tmp_path_factory.mktemp("unstable")
    cfg = write_config(root / "cfg", baseline_sessions=K, n_boot=50, methods=("dprime",))
    cfg.write_text(re.sub(r"^layout = .*\n", "", cfg.read_text(), flags=re.M))  # the bundled plate
    db = f"sqlite:///{root / 'db.sqlite'}"
    doses = [100.0, 100.0, 100.0, 60.0, 60.0]
    runs = []
    for k, dose in enumerate(doses):
        date = FIRST + dt.timedelta(days=k)
        simulate_night(root / "inbox", date, [Panel("direct", dose), Panel("indirect", 100.0)], seed=300 + k)
        res = CliRunner().invoke(
            main,
            ["nightly", "--inbox", str(root / "inbox"), "--config", str(cfg), "--db", db, "--settle-seconds", "0"]
            + ["--json"]
            + (["--report", str(root / "report")] if k == len(doses) - 1 else []),
        )
        assert res.exit_code in (0, 1), res.output
        runs.append((res.exit_code, json.loads(res.stdout)))
    return {"root": root, "cfg": cfg, "db": db, "runs": runs}


def test_a_drift_inside_the_baseline_window_raises_baseline_unstable(drift_inside_baseline):
    runs = drift_inside_baseline["runs"]
    for code, js in runs[: K - 1]:
        assert code == 0 and js["alerts"] == []  # no baseline can form before K sessions
    code, js = runs[K - 1]
    unstable = [a for a in js["alerts"] if a["rule"] == "unstable"]
    assert code == 1 and unstable, js["alerts"]
    assert {a["detector"] for a in unstable} == {DIRECT}
    assert all(a["direction"] == "worse" and a["value"] > 1.1 for a in unstable)
    assert "baseline unstable" in unstable[0]["message"] and "limen baseline set" in unstable[0]["message"]
    # the steady panel got its baseline from its first five sessions; the drifting one has none
    rows = json.loads(
        CliRunner().invoke(main, ["baseline", "show", "--db", drift_inside_baseline["db"], "--json"]).stdout
    )
    assert {r["detector"] for r in rows} == {INDIRECT}


def test_trend_report_marks_the_rejected_sessions(drift_inside_baseline):
    rep = drift_inside_baseline["root"] / "report"
    df = pd.read_csv(rep / "trend.csv")
    d = df[df["detector"] == DIRECT]
    assert d["rejected_for_baseline"].all() and not d["in_baseline"].any()
    i = df[df["detector"] == INDIRECT]
    assert not i["rejected_for_baseline"].any() and i["in_baseline"].sum() == K * i["diameter_mm"].nunique()
    html = (rep / "trend.html").read_text()
    assert "rejected" in html and "unstable" in html


def test_baseline_set_ends_the_wait_and_says_what_changed(drift_inside_baseline, tmp_path):
    import shutil

    db = tmp_path / "copy.sqlite"
    shutil.copy(drift_inside_baseline["root"] / "db.sqlite", db)
    res = CliRunner().invoke(
        main,
        ["baseline", "set", "--db", str(db), "--detector", DIRECT, "--from", str(FIRST)]
        + ["--to", str(FIRST + dt.timedelta(days=2)), "--config", str(drift_inside_baseline["cfg"])],
    )
    assert res.exit_code == 0, res.output
    # the three full-dose nights are the baseline now: the low-dose nights are judged against them
    assert "new alert" in res.output and "worse" in res.output, res.output
    rows = json.loads(CliRunner().invoke(main, ["baseline", "show", "--db", str(db), "--json"]).stdout)
    assert {r["source"] for r in rows if r["detector"] == DIRECT} == {"explicit"}
    assert all(r["detectable"]["single_session_ratio"] > 1 for r in rows)
