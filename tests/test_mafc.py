"""M-AFC proportion correct against published values and against scipy."""

import numpy as np
import pytest
from scipy import stats

from scorer.observer import dprime_for_pc, halfway_criterion, pc_mafc


@pytest.mark.parametrize("d", [0.0, 0.5, 1.0, 2.0, 3.5])
def test_two_afc_is_phi_of_d_over_root2(d):
    # 2-AFC: Pc = Φ(d′/√2) (Green & Swets 1966; docs/references.md)
    assert pc_mafc(d, 2) == pytest.approx(stats.norm.cdf(d / np.sqrt(2)), abs=1e-12)


@pytest.mark.parametrize("d,pc", [(0.5, 0.3933), (1.0, 0.5520), (2.0, 0.8228), (3.0, 0.9564)])
def test_four_afc_matches_tabulated_values(d, pc):
    # M = 4 values of ∫φ(x−d′)Φ(x)³dx (docs/references.md, computed with scipy.integrate.quad;
    # tables in Hacker & Ratcliff, Perception & Psychophysics 26 (1979))
    assert pc_mafc(d, 4) == pytest.approx(pc, abs=6e-5)


def test_inverse_at_the_halfway_criterion():
    # Pc = 0.625 at M = 4 ↔ d′ = 1.235 (docs/references.md); halfway between chance and 1 is common practice
    assert halfway_criterion(4) == 0.625
    assert dprime_for_pc(0.625, 4) == pytest.approx(1.235, abs=5e-4)
    for m in (2, 3, 4, 8):
        for pc in (0.6, 0.8, 0.95):
            if pc > 1 / m:
                assert pc_mafc(dprime_for_pc(pc, m), m) == pytest.approx(pc, abs=1e-8)


def test_monte_carlo_agrees_with_the_integral():
    # the definition itself: the signal response exceeds M−1 noise responses (Green & Swets 1966)
    rng = np.random.default_rng(1)
    n, m, d = 400_000, 4, 1.3
    sig = rng.standard_normal(n) + d
    noise = rng.standard_normal((n, m - 1))
    mc = np.mean(sig > noise.max(axis=1))
    assert mc == pytest.approx(pc_mafc(d, m), abs=4 * np.sqrt(mc * (1 - mc) / n))


def test_bad_arguments():
    with pytest.raises(ValueError):
        pc_mafc(1.0, 1)
    with pytest.raises(ValueError):
        dprime_for_pc(0.2, 4)
