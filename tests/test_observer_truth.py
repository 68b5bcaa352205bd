"""Limen's NPW observer against analytic truth, on images this test builds itself (tests/npw_truth.py).

Truth: d′ = wᵀΔs/√(wᵀKw), and for the NPW template w = Δs, d′² = (ΔsᵀΔs)²/(ΔsᵀKΔs) (Barrett & Myers,
*Foundations of Image Science* (2004), ch. 13).  Limen's observer estimates the background (one surface fitted
to the rings round a target's sites) and reports the textbook, known-background observer: its σ̂ is divided by
√variance_ratio, the ratio of the two observers' response variances in white noise (DEVELOPERS.md, "The
observer Limen reports").  The d′ method reports the observer whose d′ per unit contrast is 1/σ_rms, σ_rms² the
mean textbook response variance over the diameter's sites.  tests/test_observer_independent.py does the same
with blurred discs on plates of another generator.
"""

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from helpers import MINI, grid_layout
from npw_truth import exact_disc, layout_truth, make_noise, mean_image

from scorer.images import Image
from scorer.observer import ObserverConfig, SystemBlur, criterion_for, dprime_for_pc, dprime_thresholds, score_image
from scorer.phantom import PhantomTransform, load_layout

PIX = 0.085
BACKGROUND = 1000.0
SHARP = ObserverConfig("npw", blur=SystemBlur(0.0))


def _pose(layout, rotation_deg=3.7, shift=(0.3, 0.6), margin=20):
    shape = (int(layout.height_mm / PIX) + margin, int(layout.width_mm / PIX) + margin)
    tf = PhantomTransform.from_params(
        rotation_deg=rotation_deg,
        flipped=False,
        magnification=1.0,
        phantom_center_mm=layout.center_mm,
        center_px=((shape[0] - 1) / 2 + shift[0], (shape[1] - 1) / 2 + shift[1]),
        pixel_mm=PIX,
    )
    return shape, SimpleNamespace(transform=tf, markers_px={})


def _score(layout, shape, pl, n_images, sigma, corr_px, seed):
    mean = mean_image(layout, pl.transform, shape, BACKGROUND)
    rng = np.random.default_rng(seed)
    frames = [
        score_image(
            Image(mean + make_noise(rng, shape, sigma, corr_px), (PIX, PIX)), layout, pl, SHARP, image_id=f"i{i}"
        )
        for i in range(n_images)
    ]
    return pd.concat(frames, ignore_index=True)


@pytest.mark.parametrize("rotation_deg", [3.7, 8.3])
def test_noise_free_response_is_the_disc_contrast_at_any_subpixel_position(rotation_deg):
    # the NPW response Σw(1 − g/b)/Σw·s₁ is an unbiased contrast estimate when w matches the signal
    # (Barrett & Myers 2004, ch. 13); our discs have exact coverage, so any error is the template's.
    # 0.07 mm on 0.085 mm pixels is a disc of radius 0.41 px: its Σs² changes 4× with the pixel phase.
    lay = grid_layout([0.07, 0.1, 0.25], [0.05], n_repeat=12, spacing_mm=3.0, seed=1)
    shape, pl = _pose(lay, rotation_deg, shift=(0.27, 0.81), margin=80)
    # a trace of noise (σ/b = 10⁻⁷) so that the flat background is not taken for a saturated plateau
    g = mean_image(lay, pl.transform, shape, BACKGROUND) + make_noise(np.random.default_rng(0), shape, 1e-4)
    df = score_image(Image(g, (PIX, PIX)), lay, pl, SHARP)
    sig = df[df.is_signal]
    err = sig.response / sig.contrast - 1.0
    assert np.abs(err).max() < 0.015, sig.assign(err=err).sort_values("err").iloc[[0, -1]]
    assert np.abs(df[~df.is_signal].response).max() < 1e-4  # flat background: the plane fit is exact


def _kb_templates(layout, tf):
    """The textbook known-background NPW observer's templates: exact disc coverage per site, on its bounding box."""
    out = []
    for t in layout.targets:
        for k, rc in enumerate(tf.to_pixel(t.sites)):
            rad = t.diameter_mm / 2 / PIX
            r0, c0 = int(rc[0] - rad) - 2, int(rc[1] - rad) - 2
            n = int(2 * rad) + 5
            s = exact_disc((rc[0] - r0, rc[1] - c0), rad, (n, n))
            out.append(
                (
                    t.id,
                    k,
                    t.diameter_mm,
                    t.contrast if k == t.signal_site else 0.0,
                    slice(r0, r0 + n),
                    slice(c0, c0 + n),
                    s,
                )
            )
    return out


@pytest.mark.parametrize("corr_px", [0.0, 1.0])
def test_dprime_per_unit_contrast_matches_barrett_myers(corr_px):
    # white noise (K = σ²I) and Gaussian-correlated noise of known NPS σ²|H(f)|², on the mini plate's sites
    lay = load_layout(MINI)
    shape, pl = _pose(lay)
    sigma, n_images = 20.0, 150
    mean = mean_image(lay, pl.transform, shape, BACKGROUND)
    kb_tpl = _kb_templates(lay, pl.transform)
    rng = np.random.default_rng(7 + int(corr_px))
    frames, kb_rows = [], []
    for i in range(n_images):
        g = mean + make_noise(rng, shape, sigma, corr_px)
        frames.append(score_image(Image(g, (PIX, PIX)), lay, pl, SHARP, image_id=f"i{i}"))
        # the known-background observer t = sᵀ(b − g)/(b·sᵀs), b known (Barrett & Myers 2004, ch. 13)
        kb_rows += [
            (tid, k, d, float(np.sum(s * (BACKGROUND - g[rs, cs]))) / (BACKGROUND * float(np.sum(s * s))) - c)
            for tid, k, d, c, rs, cs, s in kb_tpl
        ]
    df = pd.concat(frames, ignore_index=True)
    kb_df = pd.DataFrame(kb_rows, columns=["target", "site", "diameter_mm", "noise"])
    truth = layout_truth(lay, pl.transform, BACKGROUND, sigma, corr_px).set_index(["target", "site"])
    for (d, g), (_, gk) in zip(df.groupby("diameter_mm"), kb_df.groupby("diameter_mm")):
        t = truth.loc[list(zip(g.target, g.site))]
        v = 1.0 / t.kb.to_numpy() ** 2  # each textbook response's variance
        kb = 1.0 / np.sqrt(np.mean(v))  # analytic, with w
        # the textbook observer this test builds: relative SE of 1/σ̂ = ½·√(2Σv²)/Σv
        tol = 3.5 * 0.5 * np.sqrt(2 * np.sum(v**2)) / np.sum(v)
        assert 1.0 / np.sqrt(np.mean(gk.noise**2)) == pytest.approx(kb, rel=tol), d
        # Limen: the spread of the non-signal sites about their mean (as the d′ method takes it), over the
        # variance ratio; its degrees of freedom are images × targets × (M − 2)
        b = g[~g.is_signal]
        spread = b.response - b.groupby(["image", "target"]).response.transform("mean")
        m = int(g.m_alternatives.iloc[0])
        dof = len(spread) * (m - 2) / (m - 1)
        limen = 1.0 / np.sqrt(np.sum(spread**2) / dof / g.variance_ratio.mean())
        assert limen == pytest.approx(kb, rel=3.5 / np.sqrt(2 * dof) + 0.005), (d, limen, kb)


def test_dprime_ci_covers_the_named_observers_truth_quick():
    # the full 16-image coverage run is bench/bench_observer_coverage.py; here 8 images × 40 repeats
    # (truth: C_T = d′_T·σ_rms of the textbook observer, d′_T the fixed detectability: Pc_M(d′_T) by the M-AFC
    # integral, Green & Swets 1966)
    lay = load_layout(MINI)
    shape, pl = _pose(lay, rotation_deg=-12.0)
    sigma = 20.0
    truth = layout_truth(lay, pl.transform, BACKGROUND, sigma)
    ct = {}
    for d, g in truth.groupby("diameter_mm"):
        m = int(g.m_alternatives.iloc[0])
        ct[d] = dprime_for_pc(criterion_for(m), m) * np.sqrt(np.mean(1.0 / g.kb**2))
    hits, errs = {d: 0 for d in ct}, {d: [] for d in ct}
    n_rep = 40
    for r in range(n_rep):
        for p in dprime_thresholds(_score(lay, shape, pl, 8, sigma, 0.0, seed=500 + r), n_boot=0).points:
            hits[p.diameter_mm] += p.ci_low <= ct[p.diameter_mm] <= p.ci_high
            errs[p.diameter_mm].append(np.log(p.threshold_contrast / ct[p.diameter_mm]))
    for d in ct:
        assert hits[d] / n_rep >= 0.85, (d, hits[d])  # 95 % nominal; binomial slack for 40 repeats
        assert abs(np.mean(errs[d])) < 3 * np.std(errs[d]) / np.sqrt(n_rep) + 0.01, d
