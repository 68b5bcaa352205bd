"""Model observers against the analytic NPW detectability (Barrett & Myers)."""

import numpy as np
import pytest
from helpers import grid_layout, known_placement

from scorer.detector.simulator import render_discs
from scorer.images import Image
from scorer.observer import ObserverConfig, SystemBlur, decide, estimate_blur, score_image
from scorer.phantom import disc_coverage

PIXEL_MM = 0.1


def _disc_image(diameter_mm, contrast, sigma, n_repeat, seed=0, blur_sigma_px=0.0, background=100.0):
    from scipy import ndimage

    lay = grid_layout([diameter_mm], [contrast], n_repeat=n_repeat, spacing_mm=4.0, seed=seed)
    shape = (int(lay.height_mm / PIXEL_MM) + 2, int(lay.width_mm / PIXEL_MM) + 2)
    pl = known_placement(lay, shape, PIXEL_MM)
    t = np.ones(shape)
    render_discs(
        t,
        pl.transform.to_pixel([m.xy_mm for m in lay.markers]),
        [m.diameter_mm / 2 / PIXEL_MM for m in lay.markers],
        [m.contrast for m in lay.markers],
    )
    sig = [tt.signal_xy_mm for tt in lay.targets]
    render_discs(t, pl.transform.to_pixel(sig), [diameter_mm / 2 / PIXEL_MM] * len(sig), [contrast] * len(sig))
    if blur_sigma_px > 0:
        t = ndimage.gaussian_filter(t, blur_sigma_px)
    rng = np.random.default_rng(seed + 100)
    return Image(background * t + sigma * rng.standard_normal(shape), (PIXEL_MM, PIXEL_MM)), lay, pl


@pytest.mark.parametrize("diameter_mm", [0.3, 1.0])
def test_npw_dprime_equals_norm_of_signal_over_sigma(diameter_mm):
    # NPW in white noise: d′ = ‖Δs‖/σ (Barrett & Myers, Foundations of Image Science (2004), ch. 13);
    # sampled d′ = (mean t_s − mean t_n)/√(½(var t_s + var t_n)) (docs/references.md)
    bg, c, sigma, n = 100.0, 0.05, 10.0, 150
    img, lay, pl = _disc_image(diameter_mm, c, sigma, n)
    df = score_image(img, lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0)))
    s, b = df[df.is_signal].response, df[~df.is_signal].response
    measured = (s.mean() - b.mean()) / np.sqrt(0.5 * (s.var() + b.var()))
    rad = diameter_mm / 2 / PIXEL_MM
    cov = disc_coverage((20.3, 20.6), rad, (41, 41))
    analytic = bg * c * np.sqrt((cov**2).sum()) / sigma
    # sampling error of a d′ estimate from n signal and 3n noise responses
    se = np.sqrt(1 / n + 1 / (3 * n) + analytic**2 / (4 * n))
    assert measured == pytest.approx(analytic, abs=3 * se)
    # the response is an unbiased contrast estimate (within 3 standard errors)
    assert s.mean() - b.mean() == pytest.approx(c, abs=3 * np.sqrt(s.var() / len(s) + b.var() / len(b)))


def test_npwe_response_is_unbiased_and_less_efficient_than_npw():
    # NPWE never beats the NPW matched filter in white noise (Burgess 1994; ICRU Report 54)
    img, lay, pl = _disc_image(0.3, 0.05, 10.0, 150, seed=3)
    out = {}
    for obs in ("npw", "npwe"):
        df = score_image(img, lay, pl, ObserverConfig(obs, blur=SystemBlur(0.0)))
        s, b = df[df.is_signal].response, df[~df.is_signal].response
        out[obs] = (s.mean() - b.mean(), (s.mean() - b.mean()) / np.sqrt(0.5 * (s.var() + b.var())))
    assert out["npwe"][0] == pytest.approx(0.05, rel=0.15)
    assert out["npwe"][1] < out["npw"][1]


def test_marker_blur_estimate_recovers_gaussian_spread():
    # the marker edges give back a known Gaussian blur (common practice: edge-spread fitting)
    img, lay, pl = _disc_image(0.5, 0.05, 0.5, 2, blur_sigma_px=1.2)
    pl.markers_px = {m.id: tuple(pl.transform.to_pixel(m.xy_mm)[0]) for m in lay.markers}
    assert estimate_blur(img, lay, pl).sigma_px == pytest.approx(1.2, abs=0.1)


def test_decide_picks_largest_response_and_scores_truth():
    img, lay, pl = _disc_image(1.0, 0.2, 1.0, 20, seed=5)  # obvious discs: every decision correct
    tr = decide(score_image(img, lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0))))
    assert len(tr) == 20 and tr["correct"].all()
    assert set(tr.columns) >= {
        "reader",
        "image",
        "target",
        "diameter_mm",
        "contrast",
        "chosen_site",
        "true_site",
        "correct",
    }
    img, lay, pl = _disc_image(1.0, 1e-6, 1.0, 400, seed=6)  # invisible discs: chance, 1/4
    tr = decide(score_image(img, lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0))))
    assert tr["correct"].mean() == pytest.approx(0.25, abs=3 * np.sqrt(0.25 * 0.75 / 400))


def test_saturated_sites_are_refused_not_scored():
    # a clipped pixel is no longer linear in air kerma: scoring it would give silently wrong numbers
    from scorer.errors import LimenError

    img, lay, pl = _disc_image(0.5, 0.05, 2.0, 4)
    img.pixels = np.minimum(img.pixels, 101.0)  # clip like a saturated read-out
    with pytest.raises(LimenError, match="saturated"):
        score_image(img, lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0)))
