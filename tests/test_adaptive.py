"""Adaptive trial placement (scorer.study.adaptive) and the trials-for-precision plan (scorer.study.precision),
checked against the methods' published behaviour with simulated observers whose truth comes from scipy.

Sources (docs/references.md): the Psi method (Kontsevich & Tyler 1999) picks the level of least expected
posterior entropy; QUEST (Watson & Pelli 1983) tests at the posterior's most probable threshold, placed where a
trial is most informative; the M-AFC proportion correct of a linear observer is the Green & Swets (1966)
integral (here by scipy.integrate.quad, scorer.observer.mafc.pc_mafc); the posterior of a regular one-parameter
model narrows like the inverse square root of the Fisher information (Cramér 1946), so its SD falls as 1/√n.
"""

from __future__ import annotations

import functools
import json
import math

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from scorer.errors import LimenError
from scorer.observer.mafc import criterion_for, dprime_for_pc, pc_mafc
from scorer.phantom import load_layout
from scorer.study import (
    estimate,
    expected_entropy,
    new_state,
    next_cell,
    next_level,
    plate_levels,
    posterior,
    state_from_json,
    trials_for_precision,
    update,
)

# the 0.1 mm contrasts of the bundled demo plate (ten levels, ×1.53 apart), and a coarser six-level set
LEVELS10 = (0.0085, 0.0129, 0.0196, 0.0298, 0.0454, 0.0691, 0.105, 0.16, 0.244, 0.371)
LEVELS6 = (0.016, 0.0256, 0.041, 0.0655, 0.105, 0.168)


@functools.lru_cache(maxsize=None)
def _pc_quad(d: float, m: int) -> float:
    """Green & Swets: Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx, by scipy.integrate.quad (math functions in the
    integrand, so that the simulated observers stay fast)."""

    def f(x):
        return math.exp(-0.5 * (x - d) ** 2) / math.sqrt(2 * math.pi) * (0.5 * math.erfc(-x / math.sqrt(2))) ** (m - 1)

    return integrate.quad(f, d - 10.0, d + 10.0, epsabs=1e-12, epsrel=1e-10, limit=200)[0]


def truth_pc(contrast, threshold, m, lapse=0.0):
    """Proportion correct of a linear observer with threshold ``threshold``."""
    d_t = dprime_for_pc(criterion_for(m), m)
    return (1 - lapse) * _pc_quad(float(d_t * contrast / threshold), int(m)) + lapse / m


def run_observer(state, threshold, n, rng, lapse=0.0, record=None):
    p = {c: truth_pc(c, threshold, state.m_alternatives, lapse) for c in state.levels}
    for _ in range(n):
        c = next_level(state, rng)
        if record is not None:
            record.append(c)
        state = update(state, c, rng.random() < p[c])
    return state


def test_the_likelihood_is_the_linear_observer_mafc_function_with_lapse():
    # Pc(C | C_T) = (1 − λ)·Pc_M(d′_T·C/C_T) + λ/M (Green & Swets 1966; lapse as in Wichmann & Hill 2001)
    s = update(new_state(LEVELS6, 3, lapse=0.03, grid_points=21), 0.041, True)
    grid, _ = posterior(s)
    table = s._table.p
    for i in (0, 2, 5):
        for j in (0, 7, 13, 20):
            want = truth_pc(LEVELS6[i], math.exp(grid[j]), 3, lapse=0.03)
            assert table[i, j] == pytest.approx(min(max(want, 1e-12), 1 - 1e-12), abs=2e-6)


def _brute_force_entropies(state, lapse):
    """Expected posterior entropy per level by explicit Bayes over both answers (scipy.stats.entropy, quad Pc)."""
    lv = np.asarray(state.levels)
    # the grid as documented: G points from ln(min level / margin) to ln(max level · margin)
    grid = np.linspace(np.log(lv[0] / state.grid_margin), np.log(lv[-1] * state.grid_margin), state.grid_points)
    prior = stats.norm.pdf(grid, state.prior_ln_mean, state.prior_ln_sd)
    lik = np.array([[truth_pc(c, math.exp(g), state.m_alternatives, lapse) for g in grid] for c in lv])
    post = prior.copy()
    for i, (n, y) in enumerate(zip(state.n_by_level, state.correct_by_level)):
        post *= lik[i] ** y * (1 - lik[i]) ** (n - y)
    post /= post.sum()
    out = []
    for i in range(lv.size):
        p1 = float(np.sum(post * lik[i]))
        after_correct, after_wrong = post * lik[i], post * (1 - lik[i])
        out.append(p1 * stats.entropy(after_correct) + (1 - p1) * stats.entropy(after_wrong))
    return grid, post, np.array(out)


@pytest.mark.parametrize("m", [3, 5])
def test_psi_choice_matches_a_brute_force_expected_entropy(m):
    # Kontsevich & Tyler (1999): the next stimulus minimises the expected entropy of the posterior
    s = new_state(LEVELS6, m, "psi", lapse=0.02, grid_points=41)
    for c, ok in [(0.105, 1), (0.041, 1), (0.0256, 0), (0.0655, 1), (0.041, 0)]:
        s = update(s, c, ok)
    grid, post, want = _brute_force_entropies(s, 0.02)
    got = expected_entropy(s)
    assert np.allclose(posterior(s)[0], grid) and np.allclose(posterior(s)[1], post, atol=1e-6)
    assert got == pytest.approx(want, abs=1e-5)
    order = np.argsort(want)
    assert want[order[1]] - want[order[0]] > 1e-3  # a clear winner, so the check below is not about a tie
    assert next_level(s, np.random.default_rng(0)) == LEVELS6[order[0]]


def test_quest_tests_at_the_posterior_mode_moved_to_the_most_informative_point():
    # Watson & Pelli (1983): test at the most probable threshold, on the level where a trial tells most;
    # here the Fisher information of one trial about ln C_T, (d·P′(d))²/(P(1 − P)), maximised by scipy
    m, lapse = 4, 0.02
    s = new_state(LEVELS10, m, "quest", lapse=lapse, grid_points=81)
    for c, ok in [(0.0454, 1), (0.0298, 0), (0.0454, 1), (0.0691, 1)]:
        s = update(s, c, ok)
    grid, post, _ = _brute_force_entropies(s, lapse)
    d_t = dprime_for_pc(criterion_for(m), m)

    def minus_info(d):
        h = 1e-5
        p = (1 - lapse) * _pc_quad(d, m) + lapse / m
        dp = (1 - lapse) * (_pc_quad(d + h, m) - _pc_quad(d - h, m)) / (2 * h)
        return -((d * dp) ** 2) / (p * (1 - p))

    d_opt = optimize.minimize_scalar(minus_info, bounds=(0.2, 6.0), method="bounded").x
    target = grid[np.argmax(post)] + math.log(d_opt / d_t)
    want = LEVELS10[int(np.argmin(np.abs(np.log(LEVELS10) - target)))]
    assert next_level(s, np.random.default_rng(0)) == want
    assert s._table.ln_offset_opt == pytest.approx(math.log(d_opt / d_t), abs=2e-3)


@pytest.mark.parametrize("method", ["psi", "quest"])
def test_posterior_converges_to_the_true_threshold_and_narrows_as_one_over_root_n(method):
    # simulated observers with known thresholds (Pc by quad); the placement model's lapse equals the observers'
    m, lapse, n_runs = 3, 0.02, 120
    rng = np.random.default_rng(5)
    errs, sd30, sd120, cover, crlb = [], [], [], [], []
    for _ in range(n_runs):
        ct = float(np.exp(rng.uniform(np.log(0.02), np.log(0.1))))
        s = run_observer(new_state(LEVELS10, m, method, lapse=lapse), ct, 30, rng, lapse)
        sd30.append(estimate(s).sd_ln)
        s = run_observer(s, ct, 90, rng, lapse)
        e = estimate(s)
        errs.append(e.mean_ln - math.log(ct))
        sd120.append(e.sd_ln)
        cover.append(e.ci_low <= ct <= e.ci_high)
        # Cramér–Rao: SD(ln C_T) ≈ 1/√(Σ trial information at the levels used), information by finite differences
        h, info = 1e-4, 0.0
        for c, n_c in zip(s.levels, s.n_by_level):
            p = truth_pc(c, ct, m, lapse)
            dp = (truth_pc(c, ct * math.exp(h), m, lapse) - truth_pc(c, ct * math.exp(-h), m, lapse)) / (2 * h)
            info += n_c * dp * dp / (p * (1 - p))
        crlb.append(1 / math.sqrt(info))
    errs = np.asarray(errs)
    assert abs(errs.mean()) < 0.03 and abs(errs.mean()) < 3 * errs.std() / math.sqrt(n_runs)  # unbiased
    ratio = np.median(np.asarray(sd120) / np.asarray(sd30))
    assert 0.4 < ratio < 0.62  # √(30/120) = 0.5
    assert np.median(np.asarray(sd120) / np.asarray(crlb)) == pytest.approx(1.0, abs=0.12)
    assert 0.8 < np.sqrt(np.mean(errs**2)) / np.mean(sd120) < 1.25  # the posterior SD is the real error
    # 95 % credible intervals cover about 95 % of the time: more than 99.9 % binomially compatible
    k = int(np.sum(cover))
    assert stats.binom.cdf(k, n_runs, 0.95) > 1e-3 and stats.binom.sf(k - 1, n_runs, 0.95) > 1e-3


@pytest.mark.parametrize("levels,m,ct", [(LEVELS10, 3, 0.05), (LEVELS10, 5, 0.02), (LEVELS6, 4, 0.05)])
def test_trials_concentrate_near_the_threshold(levels, m, ct):
    # the point of an adaptive rule (Watson & Pelli 1983; Kontsevich & Tyler 1999): after a few trials most
    # are placed near the threshold, far more than constant stimuli spread over the plate.  "Near": within a
    # factor 2.5, because the most informative point of the linear-observer function lies at 1.8–2.0 × C_T
    # (d′_opt/d′_T for M = 3–5, the QUEST test below) and the plate's levels are ×1.5–1.6 apart
    rng = np.random.default_rng(11)
    shares = {}
    for method in ("psi", "quest", "constant"):
        near = total = 0
        for _ in range(20):
            seen = []
            run_observer(new_state(levels, m, method), ct, 60, rng, record=seen)
            late = np.asarray(seen[10:])
            near += int(np.sum((late >= ct / 2.5) & (late <= ct * 2.5)))
            total += late.size
        shares[method] = near / total
    in_band = np.mean([(ct / 2.5 <= c <= 2.5 * ct) for c in levels])
    assert shares["constant"] == pytest.approx(in_band, abs=0.08)
    assert shares["psi"] > 0.7 and shares["quest"] > 0.7
    assert shares["psi"] > shares["constant"] + 0.2


def test_constant_stimuli_show_every_level_equally_in_random_order():
    # method of constant stimuli (common practice): each pass over the levels is a random permutation
    orders = set()
    for seed in range(5):
        rng = np.random.default_rng(seed)
        s, seq = new_state(LEVELS6, 3, "constant"), []
        for _ in range(4 * len(LEVELS6)):
            c = next_level(s, rng)
            seq.append(c)
            s = update(s, c, rng.random() < 0.5)
        assert s.n_by_level == (4,) * len(LEVELS6)
        for k in range(4):
            assert sorted(seq[6 * k : 6 * k + 6]) == list(LEVELS6)
        orders.add(tuple(seq[:6]))
    assert len(orders) == 5
    # restricted to the levels still available, the least-shown of them comes next
    s = update(update(new_state(LEVELS6, 3, "constant"), 0.016, 1), 0.0256, 0)
    assert next_level(s, np.random.default_rng(0), allowed=[0.016, 0.0256, 0.168]) == 0.168


def test_state_round_trips_through_json_and_gives_the_same_choices():
    rng_a, rng_b = np.random.default_rng(3), np.random.default_rng(3)
    s = new_state(LEVELS10, 4, "psi", prior_threshold=0.03, prior_sd_ln=1.0)
    stored = json.dumps(s.to_json())
    for _ in range(25):
        back = state_from_json(json.loads(stored))
        assert back == s
        c_a, c_b = next_level(s, rng_a), next_level(back, rng_b)
        assert c_a == c_b
        ok = bool(rng_a.random() < 0.7)
        rng_b.random()
        s = update(s, c_a, ok)
        stored = json.dumps(update(back, c_b, ok).to_json())
    assert s.n_trials == 25 and json.loads(stored)["format"] == "limen-adaptive/1"


def test_bad_states_and_answers_are_one_line_errors():
    good = new_state(LEVELS6, 3).to_json()
    cases = [
        ({**good, "format": "x"}, "not a limen-adaptive/1"),
        ({k: v for k, v in good.items() if k != "lapse"}, "missing lapse"),
        ({**good, "extra": 1}, "unknown key"),
        ({**good, "method": "staircase"}, "method must be one of"),
        ({**good, "levels": [0.02, 0.01, 0.03, 0.04, 0.05, 0.06]}, "ascending"),
        ({**good, "levels": [0.0, 0.01, 0.03, 0.04, 0.05, 0.06]}, r"contrasts in \(0, 1\]"),
        ({**good, "n_by_level": [-1, 0, 0, 0, 0, 0]}, "0 ≤ correct ≤ trials"),
        ({**good, "correct_by_level": [1, 0, 0, 0, 0, 0]}, "0 ≤ correct ≤ trials"),
        ({**good, "n_by_level": [1.5, 0, 0, 0, 0, 0]}, "integer"),
        ({**good, "n_by_level": [0, 0]}, "one count per level"),
        ({**good, "lapse": 0.5}, "lapse must lie"),
        ({**good, "criterion_pc": 0.2}, "criterion_pc"),
        ({**good, "m_alternatives": 1}, "m_alternatives"),
        ("nonsense", "not a limen-adaptive/1"),
    ]
    for data, msg in cases:
        with pytest.raises(LimenError, match=msg) as exc:
            state_from_json(data, source="study 3, reader ann, cell direct 0.1 mm")
        assert "\n" not in str(exc.value) and str(exc.value).startswith("study 3, reader ann")
    s = state_from_json(good)
    with pytest.raises(LimenError, match="not one of the levels"):
        update(s, 0.5, True)
    with pytest.raises(LimenError, match="correct must be"):
        update(s, 0.016, "yes")
    with pytest.raises(LimenError, match="no contrast level is allowed"):
        next_level(s, np.random.default_rng(0), allowed=[])
    with pytest.raises(LimenError, match="at least 2 contrast levels"):
        new_state([0.02], 3, "psi")


def test_interleaver_balances_cells_in_a_random_order():
    cells = [(det, d) for det in ("panel-a", "panel-b") for d in (0.1, 0.25, 0.5)]
    firsts = []
    for seed in range(300):
        rng = np.random.default_rng(seed)
        states = {c: new_state(LEVELS6, 3, "constant") for c in cells}
        seq = []
        while (c := next_cell(states, rng, 3)) is not None:
            seq.append(c)
            states[c] = update(states[c], next_level(states[c], rng), True)
        assert len(seq) == 18 and all(s.n_trials == 3 for s in states.values())
        for k in range(3):  # every pass over the cells is a permutation of them
            assert sorted(seq[6 * k : 6 * k + 6]) == sorted(cells)
        firsts.append(cells.index(seq[0]))
    # the first cell is uniform over the six (chi-square goodness of fit, scipy.stats.chisquare)
    assert stats.chisquare(np.bincount(firsts, minlength=6)).pvalue > 1e-3
    # per-cell counts, and a finished study
    states = {c: new_state(LEVELS6, 3) for c in cells[:2]}
    assert next_cell(states, np.random.default_rng(0), {cells[0]: 0, cells[1]: 1}) == cells[1]
    assert next_cell(states, np.random.default_rng(0), 0) is None


def test_plate_levels_reads_each_diameter_levels_and_m():
    lv = plate_levels(load_layout("tests/data/mini-plate.toml"))
    assert sorted(lv) == [0.1, 0.25, 1.0]
    assert lv[0.1][1] == 3 and lv[1.0][1] == 5
    assert len(lv[0.25][0]) == 6 and list(lv[0.25][0]) == sorted(lv[0.25][0])


def test_trials_for_precision_adaptive_needs_far_fewer_trials_than_constant_stimuli():
    plans = {
        meth: trials_for_precision(LEVELS10, 3, 0.3, method=meth, threshold=0.04, n_sim=120, seed=2)
        for meth in ("psi", "constant")
    }
    assert plans["psi"].n_trials and plans["constant"].n_trials
    assert plans["psi"].n_trials / plans["constant"].n_trials <= 0.5
    # precision grows with the Fisher information, ∝ n: a half-width ×1/√2 needs about twice the trials
    narrower = trials_for_precision(LEVELS10, 3, 0.3 / math.sqrt(2), method="psi", threshold=0.04, n_sim=120, seed=2)
    assert 1.6 < narrower.n_trials / plans["psi"].n_trials < 2.5
    # an independent check of the plan: readers run through the one-state API (new seed) at the planned n
    plan = plans["psi"]
    rng = np.random.default_rng(99)
    reached = []
    for _ in range(60):
        ct = 0.04 * math.exp(math.sqrt(math.log1p(0.15**2)) * rng.standard_normal())
        s = run_observer(new_state(LEVELS10, 3, "psi"), ct, plan.n_trials, rng)
        reached.append(estimate(s).half_width_ln <= 0.3)
    # the plan asks 80 % of readers to reach it; 60 readers: binomial 99.9 % range
    k = int(np.sum(reached))
    assert stats.binom.cdf(k, 60, 0.8) > 1e-3
    assert json.loads(json.dumps(plan.to_json()))["n_trials"] == plan.n_trials


def test_pooled_plan_and_designs_that_cannot_reach_the_interval():
    pooled = trials_for_precision(LEVELS10, 5, 0.25, method="quest", threshold=0.02, n_readers=6, n_sim=60)
    per_reader = trials_for_precision(LEVELS10, 5, 0.25, method="quest", threshold=0.02, n_sim=60)
    assert pooled.n_trials < per_reader.n_trials
    # the pooled interval cannot beat the readers' own spread: t₂ · σ_b / √3 > 0.1 (σ_b from CV 0.15)
    sigma_b = math.sqrt(math.log1p(0.15**2))
    assert stats.t.ppf(0.975, 2) * sigma_b / math.sqrt(3) > 0.1
    hopeless = trials_for_precision(LEVELS10, 5, 0.1, method="quest", n_readers=3, n_sim=30, n_max=40)
    assert hopeless.n_trials is None and any("add readers" in n for n in hopeless.notes)
    short = trials_for_precision(LEVELS10, 5, 0.05, method="constant", n_sim=30, n_max=30)
    assert short.n_trials is None and "do not give" in short.notes[0]
    for kwargs, msg in [
        ({"half_width_ln": -1}, "half-width"),
        ({"n_readers": 1}, "at least 2 readers"),
        ({"cv_between": -0.1}, "cv_between"),
        ({"method": "staircase"}, "method must be one of"),
    ]:
        with pytest.raises(LimenError, match=msg):
            trials_for_precision(LEVELS10, 5, **{"n_max": 5, **kwargs})


def test_a_plan_with_few_regions_per_level_needs_more_trials_and_says_add_images():
    """A study shows a reader each region once, so a cell offers (images × targets) trials per contrast level:
    the plan then runs the rule on the levels with regions left, as the web app does.  A generous cap changes
    nothing (same seed, same answers); a tight one costs trials (Psi keeps to the levels near the threshold,
    Kontsevich & Tyler 1999, so it runs out of them); one region per level cannot reach a narrow interval and
    the notes say to add images."""
    free = trials_for_precision(LEVELS10, 3, 0.4, threshold=0.04, n_readers=5, n_sim=100, seed=3)
    wide = trials_for_precision(LEVELS10, 3, 0.4, threshold=0.04, n_readers=5, n_sim=100, seed=3, max_per_level=500)
    assert wide.n_trials == free.n_trials and wide.curve.equals(free.curve)
    tight = trials_for_precision(LEVELS10, 3, 0.4, threshold=0.04, n_readers=5, n_sim=100, seed=3, max_per_level=6)
    assert tight.n_trials is not None and tight.n_trials > free.n_trials and tight.max_per_level == 6
    one = trials_for_precision(LEVELS10, 3, 0.2, threshold=0.04, n_readers=5, n_sim=60, seed=3, max_per_level=1)
    assert one.n_trials is None and len(one.curve) == 10  # every region of the cell shown once, then no more
    assert "1 per contrast level" in one.notes[0] and "add images" in one.notes[1]
    with pytest.raises(LimenError, match="max_per_level"):
        trials_for_precision(LEVELS10, 3, 0.2, max_per_level=0)


def test_scipy_truth_is_the_green_swets_integral():
    # the simulated observers' truth itself: Pc_4(1) = 0.5520, Pc_4(2) = 0.8228 (docs/references.md, Green &
    # Swets 1966), and Limen's own quadrature agrees
    assert _pc_quad(1.0, 4) == pytest.approx(0.5520, abs=5e-5) and _pc_quad(2.0, 4) == pytest.approx(0.8228, abs=5e-5)
    assert truth_pc(0.01, 0.01 * dprime_for_pc(criterion_for(4), 4), 4) == pytest.approx(_pc_quad(1.0, 4), abs=1e-9)
    for d, m in [(0.7, 3), (1.9, 5)]:
        assert _pc_quad(d, m) == pytest.approx(pc_mafc(d, m), abs=1e-8)
