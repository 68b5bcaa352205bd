"""scorer.observer.patterns: background spectrum, periodic peaks, notch, fixed pattern.

Sources (docs/references.md): a sinusoid a·cos(2πf·r) puts a²/4 of mean power in each of its two spectral
lines (Parseval; Bendat & Piersol), so the Hann-windowed periodogram normalised by Σw² recovers a; white noise
of variance σ² gives a flat NNPS σ²·Δx·Δy (IEC 62220-1 normalisation); an average of K periodograms of
Gaussian noise is Gamma(K, 1/K) about its mean (Bendat & Piersol), the distribution the peak bound uses;
for a shared pattern of SD s in images of noise σ, the mean of n images has variance σ²/n + s².
"""

from __future__ import annotations

import numpy as np
import pytest

from scorer.observer import patterns as pat

PIX = 0.1


def _spectrum(e, valid=None):
    return pat.background_spectrum(e, np.ones(e.shape, bool) if valid is None else valid, PIX)


def test_white_noise_spectrum_is_flat_at_sigma_squared_times_pixel_area():
    e = 0.01 * np.random.default_rng(0).standard_normal((1024, 1024))
    sp = _spectrum(e)
    assert sp.n_rois == 64
    f, med, mx = sp.radial_profile()
    mean_level = float(np.mean(sp.nnps_mm2[1:, 1:]))
    assert mean_level == pytest.approx(1e-4 * PIX * PIX, rel=0.03)
    assert pat.find_peaks(sp) == []


@pytest.mark.parametrize(
    "fx, fy, amp, lines",
    [(3.5, 0.0, 0.02, "vertical"), (0.0, 2.2, 0.005, "horizontal"), (1.9, 1.3, 0.003, "lines at")],
)
def test_sinusoid_frequency_direction_and_amplitude_are_recovered(fx, fy, amp, lines):
    shape = (768, 768)
    yy, xx = np.mgrid[: shape[0], : shape[1]] * PIX
    e = 0.01 * np.random.default_rng(1).standard_normal(shape) + amp * np.cos(2 * np.pi * (fx * xx + fy * yy) + 0.3)
    peaks = pat.find_peaks(_spectrum(e))
    assert len(peaks) == 1, [p.describe() for p in peaks]
    p = peaks[0]
    bin_mm = 1 / (128 * PIX)
    assert np.hypot(abs(p.fx_per_mm) - abs(fx), abs(p.fy_per_mm) - abs(fy)) < 0.5 * bin_mm
    assert p.frequency_per_mm == pytest.approx(np.hypot(fx, fy), abs=0.5 * bin_mm)
    assert p.amplitude == pytest.approx(amp, rel=0.1)
    assert p.lines.startswith(lines)


def test_peak_bound_is_an_upper_bound_on_the_false_alarm_rate():
    # pure noise: at the default rate (10⁻³ per spectrum) no peak in 40 spectra; at a stated 50 per spectrum
    # the count stays below 50 (an upper bound, module docstring: measured 0.05–0.1 of it) but is not nil
    counts = {1e-3: 0, 50.0: 0}
    for seed in range(40):
        sp = _spectrum(np.random.default_rng(seed).standard_normal((512, 512)))
        for rate in counts:
            counts[rate] += len(pat.find_peaks(sp, false_alarm=rate))
    assert counts[1e-3] == 0
    assert 0.5 * 40 <= counts[50.0] <= 50 * 40, counts


def test_line_correlated_noise_is_not_a_peak():
    # every row shifted by its own random offset: a ridge along the vertical frequency axis, not a narrow peak
    rng = np.random.default_rng(3)
    e = 0.01 * rng.standard_normal((768, 768)) + 0.01 * rng.standard_normal((768, 1))
    assert pat.find_peaks(_spectrum(e)) == []


def test_notch_removes_the_sinusoid_and_keeps_a_disc():
    shape = (512, 512)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    disc = ((yy - 256.3) ** 2 + (xx - 250.7) ** 2 <= 3.0**2).astype(float)
    clean = 1000.0 * (1.0 - 0.05 * disc)
    g = clean * (1.0 + 0.02 * np.cos(2 * np.pi * 3.5 * xx * PIX)) + np.random.default_rng(4).standard_normal(shape)
    peaks = pat.find_peaks(_spectrum(g / 1000.0 - 1.0))
    assert len(peaks) == 1
    out = pat.notch(g, peaks, PIX)
    left = pat.find_peaks(_spectrum(out / 1000.0 - 1.0))
    assert left == [] or left[0].amplitude < 0.002  # < 10 % of the 2 % pattern
    # the disc's contrast (matched-filter estimate) is kept within 1 %
    est = lambda im: np.sum(disc * (1 - im / 1000.0)) / np.sum(disc)  # noqa: E731
    assert est(out) == pytest.approx(est(clean), rel=0.01)
    assert np.mean(out) == pytest.approx(np.mean(g), rel=1e-9)


def _sums(n, shared_sd, seed=0, shape=(512, 512), sigma=0.01):
    rng = np.random.default_rng(seed)
    shared = shared_sd * rng.standard_normal(shape)
    s, s2 = np.zeros(shape), np.zeros(shape)
    for _ in range(n):
        e = shared + sigma * rng.standard_normal(shape)
        s += e
        s2 += e * e
    return s, s2, np.full(shape, n, np.int32)


def test_fixed_pattern_measured_and_absent_when_there_is_none():
    fp = pat.fixed_pattern(*_sums(8, 0.005), 8)
    assert fp.significant
    assert fp.relative_sd == pytest.approx(0.005, rel=0.05)  # mean of n: σ²/n + s² (module docstring)
    assert fp.noise_sd == pytest.approx(0.01, rel=0.02)
    for seed in range(5):
        none = pat.fixed_pattern(*_sums(8, 0.0, seed=seed), 8)
        assert not none.significant and none.ratio == pytest.approx(1.0, abs=0.02)
    # a real but negligible pattern (0.05 × the noise) is not reported
    assert not pat.fixed_pattern(*_sums(8, 0.0005), 8).significant
    assert pat.fixed_pattern(*_sums(2, 0.005), 2) is None


def test_fixed_pattern_test_leaves_out_the_periodic_patterns_it_is_given():
    shape = (512, 512)
    xx = np.arange(shape[1])[None, :] * PIX
    grid = 0.02 * np.cos(2 * np.pi * 3.5 * xx)
    rng = np.random.default_rng(7)
    s, s2 = np.zeros(shape), np.zeros(shape)
    for _ in range(8):
        e = grid + 0.01 * rng.standard_normal(shape)
        s += e
        s2 += e * e
    cnt = np.full(shape, 8, np.int32)
    assert pat.fixed_pattern(s, s2, cnt, 8).significant  # the grid is shared by the images
    # the peak as the spectrum measures it (its frequency known to a fraction of a bin), fitted out
    peak = pat.find_peaks(_spectrum(grid + 0.01 * rng.standard_normal(shape)))[0]
    fp = pat.fixed_pattern(s, s2, cnt, 8, peaks=[peak], pixel_mm=PIX)
    assert not fp.significant and fp.relative_sd < 0.001, fp
