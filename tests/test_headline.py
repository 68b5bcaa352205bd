"""The comparison's headline (scorer/detector/headline.py): pooling, detail classes, ratio at a common kerma.

Each check names its published source; the synthetic dose series come from power laws drawn here, not
from the simulator.
"""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects

from scorer.detector.dose import PowerLawFit, fit_power_law, kerma_ratio
from scorer.detector.headline import (
    DetailClass,
    headline,
    holm,
    log_ratio_at,
    parse_detail_classes,
    pool_random_effects,
)
from scorer.errors import LimenError

# ----------------------------------------------------------------------------- pooling


@pytest.mark.parametrize("seed", range(6))
def test_random_effects_pooling_equals_statsmodels_combine_effects(seed):
    # DerSimonian & Laird, Controlled Clinical Trials 7 (1986): τ² by the method of moments, weights 1/(v + τ²);
    # the reference implementation is statsmodels.stats.meta_analysis.combine_effects(method_re="dl").
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 9))
    v = rng.uniform(0.005, 0.08, k)
    y = rng.normal(0.2, np.sqrt(v + rng.choice([0.0, 0.02, 0.1])))
    mine = pool_random_effects(y, v)
    ref = combine_effects(y, v, method_re="dl", use_t=False)
    frame = ref.summary_frame()
    fe = frame.loc["fixed effect"]
    assert mine.estimate_fixed == pytest.approx(fe["eff"], abs=1e-12)
    assert mine.se_fixed == pytest.approx(fe["sd_eff"], abs=1e-12)
    assert mine.q == pytest.approx(ref.q, abs=1e-10)
    # I² = (Q − df)/Q truncated at 0 (Higgins & Thompson, Stat. Med. 21 (2002))
    assert mine.i2 == pytest.approx(max(0.0, (ref.q - ref.df) / ref.q), abs=1e-12)
    if ref.tau2 > 0:
        re = frame.loc["random effect"]
        assert mine.tau2 == pytest.approx(ref.tau2, abs=1e-12)
        assert mine.estimate == pytest.approx(re["eff"], abs=1e-12)
        assert mine.se == pytest.approx(re["sd_eff"], abs=1e-12)
        assert (mine.ci_low, mine.ci_high) == pytest.approx((re["ci_low"], re["ci_upp"]), abs=1e-9)
        assert np.asarray(mine.weights) == pytest.approx(np.asarray(frame["w_re"])[:k], abs=1e-12)
    else:
        # Q below its df: DerSimonian & Laird truncate τ² at 0 (statsmodels leaves the negative moment
        # estimate), so the random-effects result is the fixed-effect one
        assert mine.tau2 == 0.0
        assert (mine.estimate, mine.se) == pytest.approx((fe["eff"], fe["sd_eff"]), abs=1e-12)
        assert (mine.ci_low, mine.ci_high) == pytest.approx((fe["ci_low"], fe["ci_upp"]), abs=1e-9)


@pytest.mark.parametrize("seed", range(4))
def test_random_effects_pooling_with_heterogeneity_equals_statsmodels(seed):
    # between-diameter spread large enough that τ² > 0: the full random-effects result is statsmodels'
    rng = np.random.default_rng(100 + seed)
    v = rng.uniform(0.005, 0.02, 6)
    y = np.array([-0.4, -0.1, 0.0, 0.2, 0.5, 0.9]) + rng.normal(0, 0.05, 6)
    ref = combine_effects(y, v, method_re="dl", use_t=False)
    assert ref.tau2 > 0
    mine = pool_random_effects(y, v)
    re = ref.summary_frame().loc["random effect"]
    assert (mine.estimate, mine.se, mine.tau2) == pytest.approx((re["eff"], re["sd_eff"], ref.tau2), abs=1e-12)
    assert mine.i2 == pytest.approx(ref.i2, abs=1e-12)


def test_i_squared_worked_values():
    # Higgins & Thompson (2002): I² = (Q − df)/Q; Q = 20 on 9 df gives 55 %; Q below its df gives 0 and τ² = 0,
    # so the random-effects estimate equals the fixed-effect one.
    v = np.full(10, 0.01)
    y = np.linspace(-1, 1, 10)
    y = y / np.sqrt(np.sum(y**2 / v) / 20.0)  # scale so that Q = Σ y²/v = 20 (mean 0)
    p = pool_random_effects(y, v)
    assert p.q == pytest.approx(20.0)
    assert p.i2 == pytest.approx(11 / 20)
    small = pool_random_effects(y * 0.1, v)
    assert small.i2 == 0.0 and small.tau2 == 0.0
    assert small.estimate == pytest.approx(small.estimate_fixed)
    one = pool_random_effects([0.3], [0.04])
    assert (one.estimate, one.se, one.k) == (0.3, 0.2, 1) and np.isnan(one.i2)


def test_pooling_refuses_bad_input():
    with pytest.raises(ValueError):
        pool_random_effects([], [])
    with pytest.raises(ValueError):
        pool_random_effects([0.1, 0.2], [0.01, 0.0])


def test_holm_by_hand():
    # Holm, Scand. J. Statist. 6 (1979): sorted p_(i) × (m − i + 1), running maximum, capped at 1.
    p = [0.01, 0.04, 0.03, 0.005, float("nan")]
    want = [0.03, 0.06, 0.06, 0.02, float("nan")]
    got = holm(p)
    assert got[:4] == pytest.approx(want[:4]) and np.isnan(got[4])
    # and the same as the reference implementation the reader-study comparison uses
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(5)
    for _ in range(5):
        q = rng.uniform(0, 0.2, 9)
        assert holm(q) == pytest.approx(multipletests(q, method="holm")[1], abs=1e-15)


# ----------------------------------------------------------------------------- detail classes


def test_detail_classes_default_and_custom():
    # issue 21: small details ≤ 0.25 mm, large ≥ 0.5 mm (classes configurable)
    small, large = parse_detail_classes(None)
    assert small == DetailClass(0.0, 0.25) and large == DetailClass(0.5, None)
    assert (small.name, large.name) == ("≤ 0.25 mm", "≥ 0.5 mm")
    assert small.contains(0.25) and not small.contains(0.35) and large.contains(2.0) and not large.contains(0.35)
    three = parse_detail_classes("-0.1, 0.15-0.35 ,0.5-")
    assert [c.name for c in three] == ["≤ 0.1 mm", "0.15–0.35 mm", "≥ 0.5 mm"]


@pytest.mark.parametrize("text", ["small", "0.5-0.25", "0-0.3,0.25-", "0-,0.5-", "-"])
def test_detail_classes_bad_text_is_one_line_error(text):
    with pytest.raises(LimenError, match="detail class") as exc:
        parse_detail_classes(text)
    assert "--detail-classes" in str(exc.value)


# ----------------------------------------------------------------------------- ratio at a common kerma


def _fit(a, beta, kermas, se, d=0.5, rng=None, x_noise=True):
    """A power law C = a·K^(−β) sampled at ``kermas`` with log-normal error ``se`` (drawn when rng is given)."""
    k = np.asarray(kermas, dtype=float)
    c = a * k ** (-beta)
    if rng is not None:
        c = c * np.exp(rng.normal(0.0, se, k.size))
    return fit_power_law(k, c, np.full(k.size, se), diameter_mm=d)


def test_ratio_at_reference_kerma_equals_kerma_ratio():
    # at K = exp(x̄_A) the headline's ratio is scorer.detector.dose.kerma_ratio's (the same definition)
    rng = np.random.default_rng(3)
    fa = _fit(0.5, 0.5, [25, 50, 100, 180], 0.1, rng=rng)
    fb = _fit(0.6, 0.45, [25, 50, 100, 180], 0.1, rng=rng)
    y, se = log_ratio_at(fa, fb, fa.reference_kerma_ugy)
    assert np.exp(y) == pytest.approx(kerma_ratio(fa, fb)["ratio"], rel=1e-12)
    # definition: panel B at K·R reaches the threshold A reaches at K (C_T = a·K^(−β))
    for k in (25.0, 67.0, 180.0):
        y, _ = log_ratio_at(fa, fb, k)
        assert fb.threshold_at(k * np.exp(y)) == pytest.approx(fa.threshold_at(k), rel=1e-10)


@pytest.mark.parametrize("se_point", [0.05, 0.12])
def test_delta_method_se_matches_the_spread_of_draws(se_point):
    # delta method (Cramér 1946): checked against the spread of the log ratio over draws of both fits' (α, β).
    # The ratio holds 1/β_B, whose draws have a heavy tail when β is poorly known, so the check uses the
    # interquartile range / 1.349 (the SD of a normal distribution); the plain SD exceeds it by ≤ 10 % here.
    fa = _fit(0.5, 0.5, [25, 50, 100, 180], se_point)
    fb = _fit(0.7, 0.5, [25, 50, 100, 180], se_point)
    rng = np.random.default_rng(0)
    for k in (25.0, 67.0, 180.0):
        y, se = log_ratio_at(fa, fb, k)
        da, db = fa.draws(40000, rng), fb.draws(40000, rng)
        lk = np.log(k)
        yd = fb.x_center - lk + (db[:, 0] - da[:, 0] + da[:, 1] * (lk - fa.x_center)) / db[:, 1]
        q25, q75 = np.percentile(yd, [25, 75])
        assert (q75 - q25) / 1.349 == pytest.approx(se, rel=0.03)
        assert np.median(yd) == pytest.approx(y, abs=0.02 * se + 0.005)


def _series(fits: list[PowerLawFit]) -> dict:
    return {"fits": [f.to_dict() for f in fits], "groups": [], "observer": "npw", "method": "dprime"}


@pytest.mark.parametrize(
    "kermas, truth, se_range, tau",
    [
        # mammography-like series, 3 diameters per class, per-point SE 0.08–0.2, one true ratio per class
        ([25.0, 50.0, 100.0, 180.0], {0.1: 1.5, 0.15: 1.5, 0.25: 1.5, 0.5: 0.8, 1.0: 0.8, 2.0: 0.8}, (0.08, 0.2), 0.0),
        # general-radiography-like series, 4 diameters per class, true ratios spread between diameters (τ = 0.08
        # on the log scale: the random-effects case; the target is the class's mean log ratio)
        (
            [1.25, 2.5, 5.0, 10.0],
            {0.07: 1.5, 0.1: 1.5, 0.15: 1.5, 0.25: 1.5, 0.5: 0.7, 0.7: 0.7, 1.0: 0.7, 2.0: 0.7},
            (0.15, 0.15),
            0.08,
        ),
    ],
)
def test_pooled_ci_coverage_on_synthetic_series(kermas, truth, se_range, tau):
    # Two panels with a known kerma ratio R per diameter (a_B = a_A·R^β at equal β, so K_B/K_A = R at every
    # kerma); thresholds drawn log-normally with the SE their fits are told — a generator independent of the
    # simulator, two series designs and two kinds of spread.  The pooled 95 % CI should cover the class's
    # log ratio about 95 % of the time (DerSimonian & Laird 1986).  Measured (1000 / 600 repeats): 97.3 % /
    # 96.3 % and 96.0 % / 97.2 % — slightly conservative, as the moment τ² is positive by chance.
    rng = np.random.default_rng(21)
    hits = {"≤ 0.25 mm": 0, "≥ 0.5 mm": 0}
    n = 250
    for _ in range(n):
        fa, fb = [], []
        for d, r in truth.items():
            r_d = r * np.exp(rng.normal(0.0, tau)) if tau else r
            a, beta, se = 0.02 / d, 0.5, float(rng.uniform(*se_range))
            fa.append(_fit(a, beta, kermas, se, d=d, rng=rng))
            fb.append(_fit(a * r_d**beta, beta, kermas, se, d=d, rng=rng))
        h = headline(_series(fa), _series(fb), ("A", "B"))
        for c in h["classes"]:
            want = 1.5 if c["name"].startswith("≤") else min(truth.values())
            hits[c["name"]] += c["ci_low"] <= want <= c["ci_high"]
    for name, h_ in hits.items():
        assert 0.92 <= h_ / n <= 0.99, (name, h_ / n)


def test_headline_states_the_trade_off_and_flags_extrapolation():
    # B needs 2× A's kerma for small details, half for large ones (a_B = a_A·R^β): the sentences say who needs
    # more, by how much, and a K_B beyond B's measured kermas (25–180 µGy) is flagged extrapolated.
    kermas = [25.0, 50.0, 100.0, 180.0]
    fa, fb = [], []
    for d, r in {0.1: 2.0, 0.25: 2.0, 0.5: 0.5, 1.0: 0.5}.items():
        a = 0.02 / d
        fa.append(_fit(a, 0.5, kermas, 0.05, d=d))
        fb.append(_fit(a * r**0.5, 0.5, kermas, 0.05, d=d))
    h = headline(_series(fa), _series(fb), ("direct", "indirect"))
    small, large = h["classes"]
    assert small["ratio"] == pytest.approx(2.0, rel=1e-9) and large["ratio"] == pytest.approx(0.5, rel=1e-9)
    assert small["sentence"].startswith("For details ≤ 0.25 mm indirect needs 2× (95 % CI 1.")
    assert "the air kerma of direct for the same threshold" in small["sentence"]
    assert large["sentence"].startswith("For details ≥ 0.5 mm direct needs 2× (95 % CI")
    assert small["i2"] == 0.0 and small["k"] == 2
    # at the top kerma (180 µGy) the indirect panel would need 360 µGy for small details: extrapolated
    top = small["other_kermas"][1]
    assert top["kerma_ugy"] == 180.0 and top["extrapolated"] and "2 of 2 diameters extrapolated" in small["sentence"]
    assert h["kermas_ugy"] == pytest.approx([25.0, np.sqrt(25 * 180), 180.0])
    rows = h["per_diameter"]
    assert all(r["p_holm"] >= r["p_value"] for r in rows)
    assert h["conclusion"] == (
        f"details ≤ 0.25 mm: direct better (indirect needs 2×, 95 % CI {small['ci_low']:.2g}–{small['ci_high']:.2g}); "
        f"details ≥ 0.5 mm: indirect better (direct needs 2×, 95 % CI {1 / large['ci_high']:.2g}–"
        f"{1 / large['ci_low']:.2g})."
    )
