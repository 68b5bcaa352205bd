"""Limits files and verdicts."""

import numpy as np
import pytest

from scorer.errors import LimenError
from scorer.observer import EXAMPLE_LIMITS, evaluate, load_limits, overall
from scorer.observer import ThresholdCurve, ThresholdPoint


def _curve(points, observer="npw"):
    return ThresholdCurve([ThresholdPoint(d, t, lo, hi, "dprime", observer, 8, 4, 0.625) for d, t, lo, hi in points],
                          "dprime", observer, 0, 0)


def test_example_file_holds_the_guideline_values_from_memory():
    # European guidelines, 4th ed. (2006), digital mammography (values from memory, REFERENCES.md)
    lim = load_limits(EXAMPLE_LIMITS)
    assert lim.observer == "human"
    assert lim.acceptable_at(0.1) == pytest.approx(0.23)
    assert lim.acceptable_at(1.0) == pytest.approx(0.014)
    assert lim.achievable_at(0.25) == pytest.approx(0.038)
    assert lim.acceptable_at(2.0) == pytest.approx(0.0105)   # from memory, like the rest of the file
    assert "from memory" in lim.source


def test_interpolation_is_linear_in_log_log_and_never_extrapolates():
    lim = load_limits(EXAMPLE_LIMITS)
    # halfway in log d between 0.5 and 1.0 mm lies halfway in log C between 2.35 % and 1.40 %
    d = np.sqrt(0.5 * 1.0)
    assert lim.acceptable_at(d) == pytest.approx(np.sqrt(0.0235 * 0.014), rel=1e-9)
    assert lim.acceptable_at(5.0) is None and lim.acceptable_at(0.08) is None


def test_verdicts_pass_fail_indeterminate_and_no_limit(tmp_path):
    p = tmp_path / "model.toml"
    p.write_text('format = "limen-limits/1"\nobserver = "npw"\nsource = "invented for the test"\n'
                 "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.005\n")
    lim = load_limits(p)
    curve = _curve([(0.1, 0.03, 0.025, 0.036),      # whole CI below the limit: pass
                    (0.25, 0.03, 0.028, 0.033),     # limit at 0.25 mm ≈ 0.0199: whole CI above: fail
                    (1.0, 0.005, 0.004, 0.006),     # CI straddles the limit: indeterminate
                    (2.0, 0.001, 0.0009, 0.0011)])  # outside the file's range
    v = evaluate(curve, lim)
    assert [x.verdict for x in v] == ["pass", "fail", "indeterminate", "no limit"]
    assert overall(v) == "fail"
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
    assert evaluate(curve, lim, human_factor=7.0)[0].verdict == "fail"           # 0.245–0.315 lies above
    with pytest.raises(LimenError, match="positive"):
        evaluate(curve, lim, human_factor=-1.0)


def test_limits_for_another_model_observer_are_refused(tmp_path):
    p = tmp_path / "npwe.toml"
    p.write_text('format = "limen-limits/1"\nobserver = "npwe"\nsource = "invented"\n'
                 "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n")
    with pytest.raises(LimenError, match="npwe observer"):
        evaluate(_curve([(0.1, 0.03, 0.02, 0.04)]), load_limits(p))


@pytest.mark.parametrize("body,needle", [
    ('format = "other"\n', "format"),
    ('format = "limen-limits/1"\nobserver = "eye"\nsource = "x"\n', "'observer' must be one of"),
    ('format = "limen-limits/1"\nobserver = "npw"\n[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.05\n', "'source' is required"),
    ('format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\n[[limits]]\ndiameter_mm = 0.1\nacceptable = 5\n',
     "limits entry 1: acceptable must be a contrast fraction"),
    ('format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\n[[limits]]\ndiameter_mm = 0.1\n', "missing 'acceptable'"),
    ('format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\ncolour = 1\n', "unknown key 'colour'"),
    ('format = = \n', "not valid TOML"),
])
def test_malformed_limits_files_name_the_file_and_problem(tmp_path, body, needle):
    p = tmp_path / "bad-limits.toml"
    p.write_text(body)
    with pytest.raises(LimenError) as exc:
        load_limits(p)
    msg = str(exc.value)
    assert "bad-limits.toml" in msg and needle in msg and "\n" not in msg
