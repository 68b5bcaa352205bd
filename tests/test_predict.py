"""Predicted threshold contrast from MTF and NNPS (NPW / NPWE, ICRU Report 54 Fourier form)."""

import numpy as np
import pytest
from scipy import integrate, ndimage, special

from scorer.detector.predict import disc_ft, dprime_per_contrast, predict_from_detector, predict_thresholds
from scorer.observer import dprime_for_pc


def ones(f):
    return np.ones_like(f)


def white(value):
    return lambda f: np.full_like(f, value)


def test_disc_ft_matches_hankel_transform():
    # FT of a disc of radius R: R·J₁(2πRf)/f (ICRU Report 54; docs/references.md), equal to the Hankel
    # transform 2π∫₀ᴿ r J₀(2πfr) dr computed here with scipy.integrate.quad.
    r = 0.4
    for f in (0.0, 0.3, 1.1, 2.7):
        ref, _ = integrate.quad(lambda x, f=f: 2 * np.pi * x * special.j0(2 * np.pi * f * x), 0, r)
        assert disc_ft(np.array([f]), r)[0] == pytest.approx(ref, rel=1e-8, abs=1e-12)
    assert disc_ft(np.array([0.0]), r, amplitude=2.0)[0] == pytest.approx(2 * np.pi * r * r)


@pytest.mark.parametrize("radius_px", [8, 15])
def test_npw_white_noise_matches_spatial_form(radius_px):
    # NPW in white noise of sd σ (relative units), MTF = 1: d′ = a√A/σ, A the disc area in pixels
    # (Barrett & Myers, Foundations of Image Science (2004) ch. 13; docs/references.md).
    p, sigma = 0.1, 0.02
    dp = dprime_per_contrast(2 * radius_px * p, ones, white(sigma**2 * p * p), p)
    expected = np.sqrt(np.pi * radius_px**2) / sigma
    assert dp == pytest.approx(expected, rel=0.01)  # measured: −0.38 % (R = 8 px), −0.20 % (15 px)


def test_npw_small_blurred_disc_counts_aliased_signal():
    # Barrett & Myers ch. 13: for white noise, NPW d′ = ‖Δs‖/σ over the *sampled* signal. A disc only
    # 1.6 px across, slightly blurred (Gaussian MTF) and point-sampled: the signal energy above Nyquist folds
    # back into the digital image, so the prediction must keep it. Brute force: mean of ‖Δs‖²
    # over sub-pixel positions of the disc.
    p, sigma, r_mm, blur_mm = 0.1, 0.01, 0.08, 0.02
    sub = 20  # sub-samples per pixel
    n = 16 * sub
    y, x = (np.mgrid[0:n, 0:n] + 0.5) / sub * p
    c = n / 2 / sub * p
    fine = ((x - c) ** 2 + (y - c) ** 2 <= r_mm**2).astype(float)
    blurred = ndimage.gaussian_filter(fine, blur_mm / p * sub, mode="constant")
    energies = [np.sum(blurred[oy::sub, ox::sub] ** 2) for oy in range(0, sub, 2) for ox in range(0, sub, 2)]
    brute = np.sqrt(np.mean(energies)) / sigma
    mtf = lambda f: np.exp(-2 * np.pi**2 * blur_mm**2 * f**2)  # noqa: E731
    dp = dprime_per_contrast(2 * r_mm, mtf, white(sigma**2 * p * p), p)
    assert dp == pytest.approx(brute, rel=0.015)  # measured: −0.6 %
    # without the aliased power (integrating only inside the Nyquist square) it is clearly low (−3.4 %)
    dp_nyq = dprime_per_contrast(2 * r_mm, mtf, white(sigma**2 * p * p), p, extent_nyquist=1.0)
    assert dp_nyq < 0.98 * brute


def test_threshold_uses_mafc_criterion():
    # the default threshold definition: d′_T = 1.1159, the d′ where 3-AFC reaches Pc = 2/3 (Green & Swets 1966;
    # M-AFC integral computed with quad), the same for every M; a Pc given by hand: 4-AFC Pc = 0.625 ↔ d′ = 1.235
    p = 0.1
    res = predict_thresholds([0.5, 1.0], ones, white(1e-6), p, observers=["npw"])
    for r in res:
        assert r.dprime_threshold == pytest.approx(1.1159, abs=1e-3)
        assert r.threshold_contrast * r.dprime_per_unit_contrast == pytest.approx(dprime_for_pc(2 / 3, 3))
    for r in predict_thresholds([0.5], ones, white(1e-6), p, observers=["npw"], criterion_pc=0.625):
        assert r.dprime_threshold == pytest.approx(1.235, abs=1e-3)
        assert r.method == "predicted" and r.observer == "npw"
    assert set(res[0].to_dict()) >= {
        "diameter_mm",
        "threshold_contrast",
        "method",
        "observer",
        "ci_low",
        "ci_high",
        "n_images",
    }


def test_each_diameter_uses_the_criterion_of_its_own_m():
    # A plate whose cells differ in M (3-AFC and 5-AFC): every diameter's threshold is at the same d′_T, so its
    # Pc is Pc_M(d′_T) of its own M: 2/3 at M = 3, 0.5316 at M = 5 (Green & Swets 1966; M-AFC integral by quad).
    p = 0.1
    res = predict_thresholds(
        [0.25, 1.0, 2.0], ones, white(1e-6), p, observers=["npw"], m_alternatives={0.25: 3, 1.0: 5}
    )
    by_d = {r.diameter_mm: r for r in res}
    assert by_d[0.25].m_alternatives == 3 and by_d[0.25].criterion_pc == pytest.approx(2 / 3)
    assert by_d[1.0].m_alternatives == 5 and by_d[1.0].criterion_pc == pytest.approx(0.5316, abs=1e-4)
    assert by_d[2.0].m_alternatives == 4  # not in the mapping: 4-AFC
    for r in res:
        assert r.dprime_threshold == pytest.approx(dprime_for_pc(r.criterion_pc, r.m_alternatives))
    single = predict_thresholds([1.0], ones, white(1e-6), p, observers=["npw"], m_alternatives=5)[0]
    assert by_d[1.0].threshold_contrast == pytest.approx(single.threshold_contrast, rel=1e-12)


def test_rose_scaling():
    # Rose model (Rose, J. Opt. Soc. Am. 38 (1948)): with MTF ≈ 1 and quantum noise, C_T ∝ 1/(d·√Φ):
    # slope −1 in log C_T vs log d, and C_T halves when the dose quadruples.
    p = 0.1
    nn = white(1.0 / (30000 * 10.0))  # ideal counter at q = 30 000 /mm²/µGy, K = 10 µGy
    a = predict_thresholds([2.0, 4.0], ones, nn, p, observers=["npw"])
    slope = np.log(a[1].threshold_contrast / a[0].threshold_contrast) / np.log(2.0)
    assert slope == pytest.approx(-1.0, abs=0.02)
    b = predict_thresholds([2.0], ones, nn, p, observers=["npw"], measured_kerma_ugy=10.0, target_kerma_ugy=40.0)
    assert b[0].threshold_contrast == pytest.approx(a[0].threshold_contrast / 2, rel=1e-6)


def test_npwe_not_better_than_npw_in_white_noise():
    # In white noise the NPW template is the ideal linear observer's, so any other template (the eye-
    # filtered NPWE) cannot reach a higher d′ (Cauchy–Schwarz; Barrett & Myers ch. 13).
    p = 0.085
    mtf = (np.linspace(0, 12, 200), np.abs(np.sinc(0.085 * np.linspace(0, 12, 200))))
    for d in (0.1, 0.5, 2.0):
        npw = dprime_per_contrast(d, mtf, white(2e-6), p, observer="npw")
        npwe = dprime_per_contrast(d, mtf, white(2e-6), p, observer="npwe")
        assert 0 < npwe <= npw * (1 + 1e-9)


def test_predict_from_detector_dict():
    f = np.linspace(0, 11.76, 300)
    det = {
        "mtf_extended": {"frequency_per_mm": f.tolist(), "value": np.abs(np.sinc(0.085 * f)).tolist()},
        "nnps": {
            "radial_frequency_per_mm": [0.1, 8.0],
            "radial_mm2": [2e-6, 2e-6],
            "frequency_per_mm": [0.1, 5.88],
            "value_mm2": [2e-6, 2e-6],
        },
        "pixel_spacing_mm": [0.085, 0.085],
        "kerma_ugy": 100.0,
    }
    res = predict_from_detector(det, [0.1, 1.0])
    assert [r.observer for r in res] == ["npw", "npw", "npwe", "npwe"]
    assert res[0].threshold_contrast > res[1].threshold_contrast > 0
    from scorer.errors import LimenError

    with pytest.raises(LimenError):
        predict_from_detector({"mtf": None, "nnps": None}, [0.1])
