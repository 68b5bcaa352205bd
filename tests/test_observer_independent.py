"""Limen's observer against analytic truth on an independent generator (tests/cd_truth_generator.py).

The generator renders blurred, pixel-integrated discs in the Fourier domain and adds noise of known covariance;
it shares no code with Limen's simulator, Limen's disc renderer or tests/npw_truth.py.  The first tests check
the generator itself against direct numerical integration and closed forms; the full bias and coverage run is
bench/bench_observer_truth.py.
"""

import numpy as np
import pytest
from scipy import ndimage, stats

from cd_truth_generator import CORRELATED, ROW4, WHITE, Noise, Plate, blurred_disc, dprime_at_criterion, pc_mafc


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
