"""Limits files and verdicts."""

import numpy as np
import pytest

from scorer.errors import LimenError
from scorer.observer import ThresholdCurve, ThresholdPoint, evaluate, overall
from scorer.workflow import EXAMPLE_LIMITS, load_limits


def _curve(points, observer="npw"):
    return ThresholdCurve(
        [ThresholdPoint(d, t, lo, hi, "dprime", observer, 8, 4, 0.625) for d, t, lo, hi in points],
        "dprime",
        observer,
        0,
        0,
    )


def test_example_file_holds_the_guideline_values_from_memory():
    # European guidelines, 4th ed. (2006), digital mammography (values from memory, docs/references.md)
    lim = load_limits(EXAMPLE_LIMITS)
    assert lim.observer == "human"
    assert lim.acceptable_at(0.1) == pytest.approx(0.23)
    assert lim.acceptable_at(1.0) == pytest.approx(0.014)
    assert lim.achievable_at(0.25) == pytest.approx(0.038)
    assert lim.acceptable_at(2.0) == pytest.approx(0.0105)  # from memory, like the rest of the file
    assert "from memory" in lim.source


def test_interpolation_is_linear_in_log_log_and_never_extrapolates():
    lim = load_limits(EXAMPLE_LIMITS)
    # halfway in log d between 0.5 and 1.0 mm lies halfway in log C between 2.35 % and 1.40 %
    d = np.sqrt(0.5 * 1.0)
    assert lim.acceptable_at(d) == pytest.approx(np.sqrt(0.0235 * 0.014), rel=1e-9)
    assert lim.acceptable_at(5.0) is None and lim.acceptable_at(0.08) is None


def test_verdicts_pass_fail_indeterminate_and_no_limit(tmp_path):
    p = tmp_path / "model.toml"
    p.write_text(
        'format = "limen-limits/1"\nobserver = "npw"\nsource = "invented for the test"\n'
        "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.005\n"
    )
    lim = load_limits(p)
    curve = _curve(
        [
            (0.1, 0.03, 0.025, 0.036),  # whole CI below the limit: pass
            (0.25, 0.03, 0.028, 0.033),  # limit at 0.25 mm ≈ 0.0199: whole CI above: fail
            (1.0, 0.005, 0.004, 0.006),  # CI straddles the limit: indeterminate
            (2.0, 0.001, 0.0009, 0.0011),
        ]
    )  # outside the file's range
    v = evaluate(curve, lim)
    assert [x.verdict for x in v] == ["pass", "fail", "indeterminate", "no limit"]
    # the fail sits at an interpolated limit: informative only while listed diameters were measured
    assert overall(v) == "indeterminate" and overall([v[1]]) == "fail"
    assert overall(v[:1]) == "pass" and overall([v[0], v[2]]) == "indeterminate"


def test_human_limits_need_a_human_model_factor():
    lim = load_limits(EXAMPLE_LIMITS)
    curve = _curve([(0.1, 0.04, 0.035, 0.045)])
    with pytest.raises(LimenError, match="human-factor"):
        evaluate(curve, lim)
    v = evaluate(curve, lim, human_factor=4.0)[0]
    assert v.threshold_contrast == pytest.approx(0.16) and v.ci_high == pytest.approx(0.18)
    assert v.verdict == "pass" and v.human_factor == 4.0
    assert evaluate(curve, lim, human_factor=6.0)[0].verdict == "indeterminate"  # 0.21–0.27 straddles 0.23
    assert evaluate(curve, lim, human_factor=7.0)[0].verdict == "fail"  # 0.245–0.315 lies above
    with pytest.raises(LimenError, match="positive"):
        evaluate(curve, lim, human_factor=-1.0)


def test_limits_for_another_model_observer_are_refused(tmp_path):
    p = tmp_path / "npwe.toml"
    p.write_text(
        'format = "limen-limits/1"\nobserver = "npwe"\nsource = "invented"\n'
        "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n"
    )
    with pytest.raises(LimenError, match="npwe observer"):
        evaluate(_curve([(0.1, 0.03, 0.02, 0.04)]), load_limits(p))


@pytest.mark.parametrize(
    "body,needle",
    [
        ('format = "other"\n', "format"),
        ('format = "limen-limits/1"\nobserver = "eye"\nsource = "x"\n', "'observer' must be one of"),
        (
            'format = "limen-limits/1"\nobserver = "npw"\n[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n',
            "'source' is required",
        ),
        (
            'format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\n'
            "[[limits]]\ndiameter_mm = 0.1\nacceptable = 5\n",
            "limits entry 1: acceptable must be a contrast fraction",
        ),
        (
            'format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\n[[limits]]\ndiameter_mm = 0.1\n',
            "missing 'acceptable'",
        ),
        ('format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\ncolour = 1\n', "unknown key 'colour'"),
        ("format = = \n", "not valid TOML"),
    ],
)
def test_malformed_limits_files_name_the_file_and_problem(tmp_path, body, needle):
    p = tmp_path / "bad-limits.toml"
    p.write_text(body)
    with pytest.raises(LimenError) as exc:
        load_limits(p)
    msg = str(exc.value)
    assert "bad-limits.toml" in msg and needle in msg and "\n" not in msg


def test_human_equivalent_ci_carries_the_factor_uncertainty():
    # Independent model and factor uncertainties multiply: check the quadrature-on-log-scale interval against a
    # Monte-Carlo product of the two log-normal distributions (the delta method's reference; Efron & Tibshirani
    # 1993 for percentile intervals of a simulated distribution).
    from scorer.observer import HumanFactor
    from scorer.observer.limits import human_equivalent

    t, lo, hi = 0.010, 0.008, 0.0125
    f = HumanFactor(2.0, 1.6, 2.5)
    th, lo_h, hi_h = human_equivalent(t, lo, hi, f)
    rng = np.random.default_rng(1)
    z = 1.959963984540054
    sm, sf = np.log(hi / lo) / (2 * z), np.log(f.ci_high / f.ci_low) / (2 * z)
    prod = np.exp(np.log(t) + sm * rng.standard_normal(400_000) + np.log(2.0) + sf * rng.standard_normal(400_000))
    assert th == pytest.approx(0.02)
    assert lo_h == pytest.approx(np.quantile(prod, 0.025), rel=0.01)
    assert hi_h == pytest.approx(np.quantile(prod, 0.975), rel=0.01)
    assert lo_h < lo * 2.0 and hi_h > hi * 2.0  # wider than the model CI times the point factor


def test_verdict_uses_the_factor_ci_so_a_borderline_pass_becomes_indeterminate(tmp_path):
    from scorer.observer import HumanFactor

    p = tmp_path / "h.toml"
    p.write_text(
        'format = "limen-limits/1"\nobserver = "human"\nsource = "invented for the test"\n'
        "[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.027\n"
    )
    curve = _curve([(1.0, 0.010, 0.009, 0.011)])
    assert evaluate(curve, load_limits(p), 2.0)[0].verdict == "pass"  # 0.018–0.022 < 2.7 %
    v = evaluate(curve, load_limits(p), HumanFactor(2.0, 1.4, 2.9))[0]
    assert v.verdict == "indeterminate" and v.ci_high > 0.027 and v.human_factor_ci == (1.4, 2.9)


def test_interpolated_limits_are_marked():
    lim = load_limits(EXAMPLE_LIMITS)
    vs = {
        v.diameter_mm: v
        for v in evaluate(_curve([(0.35, 0.01, 0.009, 0.011), (0.5, 0.01, 0.009, 0.011)], "human"), lim)
    }
    assert vs[0.35].limit_interpolated and "interpolated" in vs[0.35].note
    assert not vs[0.5].limit_interpolated


def test_censored_thresholds_get_one_sided_verdicts():
    from scorer.observer.threshold import censor_point

    lim_file = EXAMPLE_LIMITS
    above = censor_point(ThresholdPoint(0.1, 0.9, 0.5, 1.5, "count", "human", 8, 4, 0.625), 0.01, 0.45)
    assert above.censored == "above" and above.threshold_contrast == 0.45 and above.display() == "> 45 %"
    below = censor_point(ThresholdPoint(1.0, 0.0005, 0.0003, 0.0008, "count", "human", 8, 4, 0.625), 0.0007, 0.05)
    assert below.censored == "below" and below.display() == "< 0.07 %"
    curve = ThresholdCurve([above, below], "count", "human", 0, 0)
    vs = {v.diameter_mm: v for v in evaluate(curve, load_limits(lim_file))}
    assert vs[0.1].verdict == "fail"  # known to exceed 45 % > the 23 % limit
    assert vs[1.0].verdict == "pass"  # known to be below 0.07 % < 1.4 %
    ext = censor_point(ThresholdPoint(0.1, 0.9, 0.5, 1.5, "dprime", "npw", 8, 4, 0.625), 0.01, 0.45)
    assert ext.extrapolated and ext.threshold_contrast == 0.9 and "(extrapolated)" in ext.display()


def test_overall_verdict_rests_on_the_listed_diameters_when_any_was_measured():
    lim = load_limits(EXAMPLE_LIMITS)
    # fails only at 0.35 mm, whose limit is interpolated between 0.25 and 0.5 mm; passes at the listed 0.5 mm
    vs = evaluate(_curve([(0.35, 0.05, 0.045, 0.055), (0.5, 0.01, 0.009, 0.011)], "human"), lim)
    assert [v.verdict for v in vs] == ["fail", "pass"]
    assert overall(vs) == "pass"
    # with no listed diameter measured, the interpolated verdicts are all there is
    assert overall(evaluate(_curve([(0.35, 0.05, 0.045, 0.055)], "human"), lim)) == "fail"
