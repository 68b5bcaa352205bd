"""One threshold definition across the plate: a fixed detectability d′_T for every M (issue 20, item 4).

Pc_M(d′) is checked against an independent quadrature (scipy), the 2-AFC closed form, published values, and the
default d′_T against its stated choice; a plate of the independent generator (tests/cd_truth_generator.py)
mixing 3-AFC and 5-AFC cells gives a contrast-detail curve without a step where M changes.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from cd_truth_generator import WHITE, Design, Plate, dprime_at_criterion
from cd_truth_runner import plate_layout, score_set
from scipy import integrate, optimize, special, stats

from scorer.observer import count_thresholds, decide, dprime_thresholds
from scorer.observer.mafc import (
    DEFAULT_DETECTABILITY,
    Detectability,
    criterion_for,
    criterion_json,
    criterion_text,
    dprime_for_pc,
    pc_mafc,
)


def _pc_reference(d: float, m: int) -> float:
    """Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx (Green & Swets 1966), written out with scipy.special over ℝ."""
    f = lambda x: np.exp(-0.5 * (x - d) ** 2) / np.sqrt(2 * np.pi) * special.ndtr(x) ** (m - 1)  # noqa: E731
    return integrate.quad(f, -np.inf, np.inf, epsabs=1e-13, epsrel=1e-12)[0]


@pytest.mark.parametrize("m", [2, 3, 4, 5, 8, 16])
@pytest.mark.parametrize("d", [0.0, 0.4, 1.1159, 1.8, 3.0])
def test_pc_matches_scipy_quadrature(d, m):
    # the M-AFC integral (Green & Swets 1966, docs/references.md) by scipy's adaptive quadrature over ℝ
    assert pc_mafc(d, m) == pytest.approx(_pc_reference(d, m), abs=1e-9)


def test_pc_at_zero_is_chance_and_two_afc_is_closed_form():
    # Pc_M(0) = 1/M by symmetry; Pc_2(d′) = Φ(d′/√2) (Green & Swets 1966): 0.7602 at d′ = 1
    for m in (2, 3, 5, 10):
        assert pc_mafc(0.0, m) == pytest.approx(1.0 / m, abs=1e-10)
    assert pc_mafc(1.0, 2) == pytest.approx(0.7602, abs=5e-5)
    assert pc_mafc(1.0, 2) == pytest.approx(stats.norm.cdf(1 / np.sqrt(2)), abs=1e-12)


@pytest.mark.parametrize(
    "m,pc,d",
    [
        (4, 0.50, 0.84),  # from memory: Hacker & Ratcliff (1979) table, 2 decimals
        (4, 0.90, 2.45),  # from memory: Hacker & Ratcliff (1979) table
        (8, 0.50, 1.34),  # from memory: Hacker & Ratcliff (1979) table
        (4, 0.625, 1.235),  # docs/references.md (Green & Swets 1966, computed with quad)
    ],
)
def test_inverse_matches_published_table_values(m, pc, d):
    assert dprime_for_pc(pc, m) == pytest.approx(d, abs=0.006)


def test_default_detectability_is_the_3afc_halfway_d_prime():
    # the stated choice (scorer/observer/mafc.py): the d′ where 3-AFC reaches Pc = 2/3, so the thresholds of
    # the demo plate's 3-AFC cells are unchanged; solved here by brentq on the reference integral
    d3 = optimize.brentq(lambda d: _pc_reference(d, 3) - 2 / 3, 0.1, 3.0, xtol=1e-12)
    assert DEFAULT_DETECTABILITY == pytest.approx(d3, abs=1e-9)
    assert criterion_for(3) == pytest.approx(2 / 3, abs=1e-9)
    # the same d′ at every M: Pc_5 = 0.5316, Pc_4 = 0.5884, Pc_2 = 0.7850 (reference integral)
    for m in (2, 4, 5, 8):
        assert criterion_for(m) == pytest.approx(_pc_reference(d3, m), abs=1e-9)
        assert dprime_for_pc(criterion_for(m), m) == pytest.approx(d3, abs=1e-8)
    # a d′_T given, or one Pc for every M (the option kept from before)
    assert criterion_for(5, Detectability(1.5)) == pytest.approx(_pc_reference(1.5, 5), abs=1e-9)
    assert criterion_for(5, 0.6) == 0.6
    with pytest.raises(ValueError):
        Detectability(0.0)


def test_definition_is_stated_for_each_m():
    info = criterion_json(None, [5, 3, 3])
    assert info["dprime_threshold"] == DEFAULT_DETECTABILITY and info["default"]
    assert set(info["pc_by_m"]) == {"3", "5"}
    assert info["pc_by_m"]["5"]["pc"] == pytest.approx(0.5316, abs=1e-4)
    assert "Green & Swets" in info["source"] and "Hacker & Ratcliff" in info["source"]
    text = criterion_text(None, [3, 5])
    assert "d′ = 1.116" in text and "Pc = 0.667 at 3-AFC" in text and "Pc = 0.532 at 5-AFC" in text
    by_pc = criterion_json(0.6, [3, 5])
    assert by_pc["dprime_threshold"] is None and by_pc["pc_by_m"]["5"]["dprime"] == pytest.approx(1.3287, abs=1e-3)


# --------------------------------------------------------------------------- a plate mixing 3-AFC and 5-AFC
MIXED = Design(
    "row-mixed-0.1mm",
    "row",
    pixel_mm=0.1,
    blur_sigma_mm=0.06,
    diameters_mm=(0.2, 0.3, 0.4, 0.5),
    phases_px=((0.0, 0.0), (0.3, 0.45), (0.5, 0.5), (0.15, 0.7)),
    alternatives=(3, 3, 5, 5),
    n_contrasts=8,
)


@pytest.fixture(scope="module")
def mixed():
    plate = Plate(MIXED, WHITE)
    layout = plate_layout(plate)
    resp = score_set(plate, layout, np.random.default_rng(2026), 32, observers=("npw",))["npw"]
    return plate, resp


def test_mixed_plate_generator_holds_both_m(mixed):
    plate, resp = mixed
    m_of = resp.groupby("diameter_mm")["m_alternatives"].first().to_dict()
    assert m_of == {0.2: 3, 0.3: 3, 0.4: 5, 0.5: 5}
    # the generator's own truth uses one d′_T for every M (its own brentq on its own integral)
    assert plate.dprime_t == pytest.approx(dprime_at_criterion(3), abs=1e-12)


def test_mixed_plate_curve_is_continuous_across_m(mixed):
    # Truth per diameter: C_T = d′_T/k with k the NPW d′ per unit contrast (Barrett & Myers 2004, ch. 13), which
    # does not depend on M.  Limen's d′ thresholds over truth must not step where M changes (0.3 → 0.4 mm): with
    # the former halfway-Pc criterion the ratio stepped by d′_half(5)/d′_half(3) = 1.19 there.
    plate, resp = mixed
    truth = plate.truth("npw")
    curve = dprime_thresholds(resp, n_boot=0)
    ratio = {p.diameter_mm: p.threshold_contrast / truth[p.diameter_mm] for p in curve.points}
    # 32 images: each within 12 % of the truth (the d′ CI half-width here ≈ 8–10 %; bias < 2 %, DEVELOPERS.md);
    # measured on seeds 2026, 1, 2: 0.94–1.07
    for d, r in ratio.items():
        assert r == pytest.approx(1.0, abs=0.12), (d, r)
    # the step where M changes, geometric means of two diameters each side: SE ≈ 0.045 in log; measured 0.974–1.002
    step = np.sqrt(ratio[0.4] * ratio[0.5]) / np.sqrt(ratio[0.2] * ratio[0.3])
    assert step == pytest.approx(1.0, abs=0.09)  # no ~19 % step
    former = dprime_for_pc(0.6, 5) / dprime_for_pc(2 / 3, 3)
    assert former == pytest.approx(1.19, abs=0.005) and abs(np.log(step)) < 0.5 * np.log(former)
    for p in curve.points:
        assert p.criterion_pc == pytest.approx(criterion_for(p.m_alternatives), abs=1e-12)
    # the count method uses the same definition (its step is not tested: its sampling SE here is ≈ 0.1 in log)
    for p in count_thresholds(decide(resp), n_boot=0).points:
        assert dprime_for_pc(p.criterion_pc, p.m_alternatives) == pytest.approx(DEFAULT_DETECTABILITY, abs=1e-8)


# --------------------------------------------------------------------------- the readers' analysis, the CLI
@pytest.fixture(scope="module")
def study():
    from scorer.study import simulate_reader_study

    return simulate_reader_study(np.random.default_rng(31), 4, diameters_mm=(0.25, 1.0), n_images=8, n_repeats=2)


def test_reader_analysis_uses_the_same_definition(study):
    # the pooled readers' curve is Pc_M(k·C) fitted by GEE; its threshold is d′_T/k (Green & Swets 1966), so a
    # different d′_T scales every pooled threshold by the ratio of the d′s, whatever the M
    from scorer.reports.study import report_html
    from scorer.study.analysis import analyse_study

    a = analyse_study(study.trials, n_boot=0, seed=1)
    b = analyse_study(study.trials, n_boot=0, seed=1, criterion_pc=Detectability(1.5))
    ta = a.pooled_curves.set_index(["detector", "diameter_mm"])["threshold_contrast"]
    tb = b.pooled_curves.set_index(["detector", "diameter_mm"])["threshold_contrast"]
    np.testing.assert_allclose((tb / ta).to_numpy(), 1.5 / DEFAULT_DETECTABILITY, rtol=1e-4)
    js = a.to_json()["threshold_definition"]
    assert js["dprime_threshold"] == DEFAULT_DETECTABILITY and js["default"]
    assert b.to_json()["threshold_definition"]["dprime_threshold"] == 1.5
    page = report_html(a)
    assert "reaches d′ = 1.116" in page and "nominal contrast scale" in page and "primary beam" in page


def test_cli_detectability_option(study, tmp_path):
    from click.testing import CliRunner

    from scorer.cli import main

    study.trials.to_csv(tmp_path / "reads.csv", index=False)
    args = ["analyse", str(tmp_path / "reads.csv"), "--json", "--n-boot", "0"]
    res = CliRunner().invoke(main, [*args, "--detectability", "1.5"])
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["threshold_definition"]["dprime_threshold"] == 1.5
    both = CliRunner().invoke(main, [*args, "--detectability", "1.5", "--criterion", "0.7"])
    assert both.exit_code == 2 and "not both" in both.output
