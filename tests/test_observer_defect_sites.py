"""The observer's shared background fit with sites excluded and pixels masked for defects (scorer.observer.defects).

Images come from the tests' own generator (tests/npw_truth.py: exact disc coverage on a flat background).  The
checks rest on the NPW/NPWE response being an unbiased contrast estimate when the template is normalised by
Σw·s₁ over the pixels it covers (Barrett & Myers, *Foundations of Image Science* (2004), ch. 13), whatever
pixels are left out; and on the regions :func:`scorer.observer.npw.site_regions` reports being the pixels the
observer reads (common practice: a pixel outside every region cannot change a response, one inside can).
"""

from types import SimpleNamespace

import numpy as np
import pytest
from helpers import grid_layout
from npw_truth import make_noise, mean_image

from scorer.images import Image
from scorer.observer import ObserverConfig, SystemBlur, score_image
from scorer.observer.npw import site_regions
from scorer.phantom import PhantomTransform

PIX = 0.085
BACKGROUND = 1000.0
SHARP = SystemBlur(0.0)


@pytest.fixture(scope="module")
def plate():
    lay = grid_layout([0.25, 0.5], [0.05], n_repeat=2, spacing_mm=3.0, seed=3)
    shape = (int(lay.height_mm / PIX) + 40, int(lay.width_mm / PIX) + 40)
    tf = PhantomTransform.from_params(
        rotation_deg=2.3,
        flipped=False,
        magnification=1.0,
        phantom_center_mm=lay.center_mm,
        center_px=((shape[0] - 1) / 2 + 0.31, (shape[1] - 1) / 2 + 0.57),
        pixel_mm=PIX,
    )
    pl = SimpleNamespace(transform=tf, markers_px={})
    mean = mean_image(lay, tf, shape, BACKGROUND)
    noisy = mean + make_noise(np.random.default_rng(7), shape, 10.0)
    return lay, pl, mean, noisy


def _region(pl, lay, target, site, observer="npw"):
    return next(r for r in site_regions(lay, pl, SHARP, observer) if r.target == target and r.site == site)


def _at(reg, dist_px, angle=0.7):
    return int(round(reg.row_px + dist_px * np.sin(angle))), int(round(reg.col_px + dist_px * np.cos(angle)))


def _ring_pixels(reg, shape):
    """Pixels well inside the ring (beyond the disc footprint inner + 1 px, short of the region's edge)."""
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    d = np.hypot(yy - reg.row_px, xx - reg.col_px)
    return (d > reg.inner_px + 1.5) & (d < reg.radius_px - 1.0) & (yy < reg.row_px)


def test_a_skipped_site_is_nan_and_its_pixels_leave_the_shared_fit(plate):
    lay, pl, _mean, noisy = plate
    t = lay.targets[0]
    k = (t.signal_site + 1) % t.m_alternatives
    reg = _region(pl, lay, t.id, k)
    yy, xx = np.mgrid[: noisy.shape[0], : noisy.shape[1]]
    inside = np.hypot(yy - reg.row_px, xx - reg.col_px) <= reg.radius_px
    spoilt = np.where(inside, noisy * 1.3, noisy)  # the skipped site's whole region 30 % brighter
    a = score_image(Image(noisy, (PIX, PIX)), lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0)), skip={(t.id, k)})
    b = score_image(Image(spoilt, (PIX, PIX)), lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0)), skip={(t.id, k)})
    row = (a.target == t.id) & (a.site == k)
    assert np.isnan(a.loc[row, "response"]).all() and np.isnan(b.loc[row, "response"]).all()
    np.testing.assert_allclose(a.response[~row], b.response[~row], rtol=0, atol=1e-12)
    assert np.isfinite(a.variance_ratio[a.target == t.id]).all()
    # without the skip the brightened ring moves the target's shared background, so every site's response
    c = score_image(Image(spoilt, (PIX, PIX)), lay, pl, ObserverConfig("npw", blur=SystemBlur(0.0)))
    others = (c.target == t.id) & (c.site != k)
    assert np.abs(c.response[others].to_numpy() - a.response[others].to_numpy()).max() > 1e-3


@pytest.mark.parametrize("observer", ["npw", "npwe"])
def test_masked_ring_pixels_leave_the_fit_and_the_template(plate, observer):
    # noiseless disc on a flat background: with the masked pixels left out and the template renormalised over the
    # pixels kept, Σŵ(1 − g/b) is still the contrast (ŵ normalised by Σŵ·s₁ = 1; Barrett & Myers 2004, ch. 13)
    lay, pl, mean, _noisy = plate
    cfg = ObserverConfig(observer, blur=SystemBlur(0.0))
    g = mean + make_noise(np.random.default_rng(0), mean.shape, 1e-4)  # not a saturated plateau
    mask = np.zeros(mean.shape, bool)
    for t in lay.targets:
        mask |= _ring_pixels(_region(pl, lay, t.id, t.signal_site, observer=observer), mean.shape)
    assert mask.sum() > 100
    # a defect: the masked pixels wildly wrong (and not all equal, which would read as a saturated plateau)
    spoilt = np.where(mask, BACKGROUND * (5.0 + np.random.default_rng(1).random(mean.shape)), g)
    df = score_image(Image(spoilt, (PIX, PIX)), lay, pl, cfg, masked=mask)
    sig = df[df.is_signal]
    assert np.abs(sig.response / sig.contrast - 1.0).max() < 0.015
    assert np.abs(df[~df.is_signal].response).max() < 1e-4
    assert np.isfinite(df.variance_ratio).all() and (df.variance_ratio > 0).all()
    # the same pixels only 20 % too bright, unmasked, already move the contrast estimate by far more
    mild = np.where(mask, 1.2 * g, g)
    bad = score_image(Image(mild, (PIX, PIX)), lay, pl, cfg)
    assert np.abs(bad[bad.is_signal].response / sig.contrast.to_numpy() - 1.0).max() > 0.1


def test_site_regions_are_the_pixels_the_observer_reads(plate):
    lay, pl, _mean, noisy = plate
    cfg = ObserverConfig("npw", blur=SystemBlur(0.0))
    base = score_image(Image(noisy, (PIX, PIX)), lay, pl, cfg)
    for t in (lay.targets[0], lay.targets[-1]):
        reg = _region(pl, lay, t.id, 0)
        for dist, moves in ((reg.radius_px + 1.0, False), (reg.radius_px - 1.0, True), (reg.inner_px + 1.5, True)):
            g = noisy.copy()
            g[_at(reg, dist)] += 50.0 * BACKGROUND
            df = score_image(Image(g, (PIX, PIX)), lay, pl, cfg)
            changed = np.abs(df.response - base.response).max() > 1e-9
            assert changed == moves, (t.id, dist, reg.radius_px, reg.inner_px)
