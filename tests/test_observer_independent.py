"""Limen's observer against analytic truth on an independent generator (tests/cd_truth_generator.py).

The generator renders blurred, pixel-integrated discs in the Fourier domain and adds noise of known covariance;
it shares no code with Limen's simulator, Limen's disc renderer or tests/npw_truth.py.  The first tests check
the generator itself against direct numerical integration and closed forms; the full bias and coverage run is
bench/bench_observer_truth.py.
"""

import dataclasses

import numpy as np
import pandas as pd
import pytest
from cd_truth_generator import (
    CORRELATED,
    RING5,
    ROW4,
    WHITE,
    Noise,
    Plate,
    blurred_disc,
    dprime_at_criterion,
    pc_mafc,
)
from cd_truth_runner import compare, plate_layout, score_set, thresholds
from scipy import ndimage, stats

from scorer.images import Image
from scorer.observer import ObserverConfig, estimate_blur, score_image
from scorer.phantom import register


def _brute_force_disc(center_rc, radius_px, sigma_px, n, sub=48):
    """Disc indicator on a sub-pixel grid, Gaussian-blurred there, then averaged over each pixel."""
    off = (np.arange(n * sub) + 0.5) / sub - 0.5
    inside = (off[:, None] - center_rc[0]) ** 2 + (off[None, :] - center_rc[1]) ** 2 <= radius_px**2
    fine = ndimage.gaussian_filter(inside.astype(float), sigma_px * sub, mode="constant", truncate=8)
    return fine.reshape(n, sub, n, sub).mean(axis=(1, 3))


@pytest.mark.parametrize("radius_px,sigma_px", [(0.6, 0.6), (0.59, 0.47), (2.5, 0.3)])
def test_fourier_disc_equals_direct_integration(radius_px, sigma_px):
    # Poisson summation: samples of (disc ⊛ Gaussian ⊛ pixel aperture) at pixel centres are the folded
    # transform R·J₁(2πRf)/f · exp(−2π²σ²f²) · sinc (Bracewell, The Fourier Transform and its Applications,
    # 2000, ch. 12); checked against direct integration on a 48× sub-pixel grid (its own error ≈ 1e-3 of the edge)
    n = int(2 * radius_px + 8 * sigma_px + 8)
    c = (n / 2 + 0.31, n / 2 - 0.17)
    exact = blurred_disc(c, radius_px, sigma_px, (n, n))
    assert np.abs(exact - _brute_force_disc(c, radius_px, sigma_px, n)).max() < 1.5e-3
    assert exact.sum() == pytest.approx(np.pi * radius_px**2, rel=1e-9)  # F(0) = disc area


def test_dprime_at_criterion_matches_two_afc_closed_form():
    # 2-AFC: Pc = Φ(d′/√2) (Green & Swets 1966), so d′ at Pc = 0.75 is √2·Φ⁻¹(0.75)
    assert dprime_at_criterion(2) == pytest.approx(np.sqrt(2) * stats.norm.ppf(0.75), abs=1e-9)
    assert pc_mafc(0.0, 5) == pytest.approx(0.2, abs=1e-9)  # chance at d′ = 0 (Green & Swets 1966)
    # 4-AFC: Pc = 0.625 at d′ = 1.235 (docs/references.md, Green & Swets 1966; Hacker & Ratcliff 1979)
    assert dprime_at_criterion(4) == pytest.approx(1.235, abs=5e-4)


def test_noise_has_the_stated_power_spectrum():
    # the periodogram of the generated noise averages to λ_k (Wiener–Khinchin; Bendat & Piersol 2010)
    rng = np.random.default_rng(3)
    shape = (64, 64)
    lam = CORRELATED.spectrum(shape)
    pg = np.mean([np.abs(np.fft.fft2(CORRELATED.draw(rng, shape))) ** 2 / lam.size for _ in range(400)], axis=0)
    ratio = pg / lam
    assert ratio.mean() == pytest.approx(1.0, abs=0.01)
    assert lam.mean() == pytest.approx(CORRELATED.white_sd**2 + CORRELATED.corr_sd**2)


def test_truth_in_the_fourier_domain_equals_the_spatial_formula():
    # d′ = b·ΔsᵀΔs/√(ΔsᵀKΔs) (Barrett & Myers 2004, ch. 13) computed once with K as a spatial kernel
    # (the inverse DFT of λ) and compared with the plate's Fourier-domain value
    for noise in (WHITE, Noise(white_sd=5.0, corr_sd=20.0, corr_px=1.5, name="c")):
        plate = Plate(ROW4, noise)
        dm = ROW4.diameters_mm[1]
        s, _ = plate._s1(dm)
        kernel = np.real(np.fft.ifft2(noise.spectrum(plate.shape)))
        kernel = np.roll(kernel, (15, 15), axis=(0, 1))[:31, :31]  # lags −15…15 (the kernel is ~3 px wide)
        ks = ndimage.convolve(s, kernel, mode="constant")
        k_spatial = ROW4.background * float((s * s).sum()) / np.sqrt(float((s * ks).sum()))
        assert plate.k_npw(dm) == pytest.approx(k_spatial, rel=1e-6)


# --------------------------------------------------------------------------- Limen on the generator's plates
REDUCED = dataclasses.replace(
    RING5,
    name="ring5-reduced",
    diameters_mm=(0.1, 0.5, 1.0),
    phases_px=((0.5, 0.5), (0.0, 0.0), (0.35, 0.25)),
    n_contrasts=8,
)


@pytest.fixture(scope="module")
def plates():
    return {d.name: Plate(d, WHITE) for d in (ROW4, REDUCED)}


@pytest.mark.parametrize("name", [ROW4.name, REDUCED.name])
def test_noise_free_response_is_the_disc_contrast_with_the_blur_from_the_markers(plates, name):
    # the NPW/NPWE response Σw(1 − g/b)/Σw·s₁ is an unbiased estimate of the disc's contrast when the template
    # is the disc's expected image (Barrett & Myers 2004, ch. 13).  Registration and blur come from the markers,
    # as in `limen score`.  (Before the template was blurred before the pixel aperture: 0.90 at 0.12 mm on
    # 0.1 mm pixels, 1.09 at 0.1 mm on 0.085 mm pixels.)
    plate = plates[name]
    p = plate.design.pixel_mm
    layout = plate_layout(plate)
    # a trace of noise (10⁻⁷ of the background) so that the flat background is not taken for a saturated plateau
    image = Image(plate.mean_image + 1e-4 * np.random.default_rng(0).standard_normal(plate.shape), (p, p))
    placement = register(image, layout)
    blur = estimate_blur(image, layout, placement)
    # the markers' blur is the generator's Gaussian (0.6 px and 0.47 px); on the pixel grid it came out 6–15 % high
    assert blur.sigma_px == pytest.approx(plate.design.blur_sigma_mm / p, rel=0.01)
    for obs in ("npw", "npwe"):
        df = score_image(image, layout, placement, ObserverConfig(obs, blur=blur))
        sig = df[df.is_signal]
        assert np.abs(sig.response / sig.contrast - 1).max() < 2e-3, obs
        assert np.abs(df[~df.is_signal].response).max() < 1e-4, obs  # the background surface is exact here


def test_thresholds_match_the_textbook_observers_on_correlated_noise():
    # truth: C_T = d′_T/k with k the textbook NPW (d′² = (ΔsᵀΔs)²/ΔsᵀKΔs) or NPWE observer's d′ per unit contrast
    # (Barrett & Myers 2004, ch. 13; Burgess 1994), d′_T at the halfway criterion of 5-AFC (Green & Swets 1966).
    # 12 sets of 8 images, correlated noise, five sites on a ring, 0.085 mm pixels.  Before the fix the d′
    # method read +13 % at 0.1 mm (template blurred on the pixel grid) and +4 % at 1 mm (a plane per site).
    # The full run (30 sets, 4/8/16 images, two geometries, two noises) is bench/bench_observer_truth.py.
    plate = Plate(REDUCED, CORRELATED)
    layout = plate_layout(plate)
    truth = {o: plate.truth(o) for o in ("npw", "npwe")}
    rows = []
    for s in range(12):
        responses = score_set(plate, layout, np.random.default_rng([20, s]), 8)
        for obs, r in responses.items():
            rows.append(compare(thresholds(r, range(8)), truth[obs]).assign(observer=obs))
    df = pd.concat(rows, ignore_index=True)
    for (obs, method, d), g in df.groupby(["observer", "method", "diameter_mm"]):
        se = g.log_error.std(ddof=1) / np.sqrt(len(g))
        # unbiased within 3 standard errors of the mean over sets (≈ 1.5 % for d′, 5 % for the count method)
        assert abs(g.log_error.mean()) < 3 * se + 0.005, (obs, method, d, g.log_error.mean(), se)
    # 95 % intervals: 144 of them; binomial 3σ slack below (√(0.05·0.95/144) = 1.8 %)
    assert df.covered.mean() >= 0.89, df.groupby(["observer", "method"]).covered.mean()
    assert df.covered.mean() <= 0.995
