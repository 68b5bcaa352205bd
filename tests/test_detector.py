"""Detector physics: slanted-edge MTF, NNPS, DQE, conversion fit, beam-quality table.

Every check compares with an analytic result named beside it.
"""

import numpy as np
import pytest
from scipy.stats import norm

from scorer.detector import measure_mtf, measure_nnps, simulator
from scorer.detector.measure import compute_dqe, fit_conversion, measure_detector
from scorer.errors import LimenError
from scorer.images import Image
from scorer.workflow import beam_qualities, q_for_beam

# ---------------------------------------------------------------- synthetic images


def gaussian_edge(n=256, angle_deg=2.5, sigma_mm=0.05, pitch_mm=0.1, horizontal=False, lo=100.0, hi=1000.0):
    """Point-sampled edge blurred by a Gaussian of sd sigma: ESF = Φ(d/σ) sampled at pixel centres."""
    r, c = np.mgrid[0:n, 0:n].astype(float)
    th = np.radians(angle_deg)
    d = ((c - (n - 1) / 2) * np.cos(th) - (r - (n - 1) / 2) * np.sin(th)) * pitch_mm
    img = lo + (hi - lo) * norm.cdf(d / sigma_mm)
    return img.T if horizontal else img


def aperture_edge(n=256, angle_deg=2.5, sub=16):
    """Fraction of each square pixel on the bright side of a straight edge (100 % fill factor)."""
    th = np.radians(angle_deg)
    s = (np.arange(sub) + 0.5) / sub - 0.5
    r, c = np.mgrid[0:n, 0:n].astype(float)
    frac = np.zeros((n, n))
    for dr in s:
        for dc in s:
            d = (c + dc - (n - 1) / 2) * np.cos(th) - (r + dr - (n - 1) / 2) * np.sin(th)
            frac += d > 0
    return frac / sub**2


# ---------------------------------------------------------------- MTF


@pytest.mark.parametrize("angle_deg", [1.5, 2.5, 3.5, 5.0, -2.0])
@pytest.mark.parametrize("horizontal", [False, True])
@pytest.mark.parametrize("sigma_mm", [0.03, 0.08])
def test_mtf_gaussian_edge(angle_deg, horizontal, sigma_mm):
    # Gaussian blur of sd σ: MTF(f) = exp(−2π²σ²f²) (Fourier transform of a Gaussian; docs/references.md).
    p = 0.1
    res = measure_mtf(gaussian_edge(angle_deg=angle_deg, sigma_mm=sigma_mm, pitch_mm=p, horizontal=horizontal), (p, p))
    f = res.frequency_per_mm
    assert f.max() == pytest.approx(1.1 * 0.5 / p, abs=0.05)  # reported up to 1.1 × Nyquist
    upto = f <= 0.5 / p + 1e-9
    expected = np.exp(-2 * np.pi**2 * sigma_mm**2 * f**2)
    err = np.abs(res.value - expected)[upto].max()
    assert err < 0.02, err  # measured: < 0.003 for all angles and orientations
    assert res.direction == ("y" if horizontal else "x")
    assert abs(res.edge_angle_deg) == pytest.approx(abs(angle_deg), abs=0.05)


def test_mtf_square_aperture_sinc():
    # Square pixel aperture, 100 % fill: MTF(f) = |sinc(pf)|, 2/π at Nyquist (docs/references.md).
    p = 0.085
    res = measure_mtf(100 + 900 * aperture_edge(angle_deg=3.0), (p, p))
    f = res.frequency_per_mm
    upto = f <= 0.5 / p + 1e-9
    assert np.abs(res.value - np.abs(np.sinc(p * f)))[upto].max() < 0.02
    assert res.at(0.5 / p) == pytest.approx(2 / np.pi, abs=0.02)


def test_mtf_refuses_unusable_edges():
    flat = np.full((256, 256), 500.0)
    with pytest.raises(LimenError):
        measure_mtf(flat, (0.1, 0.1), path="flat.dcm")
    # an edge exactly along the columns cannot be oversampled
    with pytest.raises(LimenError, match="too small"):
        measure_mtf(gaussian_edge(angle_deg=0.0), (0.1, 0.1), path="straight.dcm")


def test_mtf_simulated_panels():
    # Direct conversion, 100 % fill factor: presampling MTF = |sinc(pf)| → 2/π ≈ 0.637 at Nyquist
    # (docs/references.md, square pixel aperture); indirect: the simulator's analytic presampling MTF.
    sim = simulator  # a plain import: a broken simulator fails these checks, never skips them
    for name in ("direct", "indirect"):
        model = sim.detector_model(name)
        for angle in (2.5, 92.5):  # near-vertical and near-horizontal edges
            s = sim.simulate(model, "edge", dose_ugy=100.0, seed=3, small=True, edge_angle_deg=angle)
            res = measure_mtf(s.kerma_ugy(), s.spacing_mm)
            fn = res.nyquist_per_mm
            if name == "direct":
                assert res.at(fn) == pytest.approx(2 / np.pi, abs=0.03)
            f = res.frequency_per_mm[res.frequency_per_mm <= fn]
            assert np.abs(res.at(f) - model.presampling_mtf(f)).max() < 0.04


# ---------------------------------------------------------------- NNPS


def white_flats(n_images=4, size=512, mean=1000.0, sd=20.0, seed=0):
    rng = np.random.default_rng(seed)
    return [mean + rng.normal(0.0, sd, (size, size)) for _ in range(n_images)]


def test_nnps_white_noise():
    # White noise of variance σ² on Δx × Δy pixels: NPS = σ²ΔxΔy (Parseval), NNPS = σ²ΔxΔy/m² (docs/references.md).
    p, m, sd = 0.1, 1000.0, 20.0
    res = measure_nnps(white_flats(mean=m, sd=sd), (p, p))
    expected = sd**2 * p * p / m**2
    assert res.n_rois == 36  # 3 × 3 half-overlapping 256-px ROIs per 512-px image
    for cut in (res.x_mm2, res.y_mm2, res.radial_mm2, res.value_mm2):
        assert np.mean(cut) == pytest.approx(expected, rel=0.05)
    # every frequency within 5 reported standard errors (the uncertainty is honest)
    z = np.abs(res.x_mm2 - expected) / res.x_se_mm2
    assert z.max() < 5
    assert 0.02 < res.relative_uncertainty < 0.1  # ≈ 1/√(36 ROIs × 14 lines) with overlap
    assert res.nnps_2d_mm2.shape == (256, 256)
    assert res.frequency_per_mm[-1] == pytest.approx(0.5 / p)


def test_nnps_unchanged_by_linear_ramp():
    # Detrending with a 2-D second-order polynomial removes any plane exactly (IEC 62220-1, from memory);
    # the ramp has zero mean so the normalising mean signal is unchanged.
    flats = white_flats()
    yy, xx = np.mgrid[0:512, 0:512].astype(float)
    ramp = 0.3 * (xx - xx.mean()) + 0.2 * (yy - yy.mean())
    assert np.ptp(ramp[:256, :256]) > 5 * 20.0  # the ramp dwarfs the noise within one ROI
    a = measure_nnps(flats, (0.1, 0.1))
    b = measure_nnps([f + ramp for f in flats], (0.1, 0.1))
    assert np.allclose(b.value_mm2, a.value_mm2, rtol=1e-6)
    assert np.allclose(b.radial_mm2, a.radial_mm2, rtol=1e-6)


def test_nnps_bad_input():
    with pytest.raises(LimenError, match="smaller than one"):
        measure_nnps([np.ones((100, 100))], (0.1, 0.1), paths=["tiny.dcm"])
    with pytest.raises(LimenError, match="non-positive mean"):
        measure_nnps([np.zeros((300, 300))], (0.1, 0.1), paths=["dark.dcm"])


# ---------------------------------------------------------------- DQE


def test_dqe_ideal_poisson_counter():
    # Ideal quantum counter: NNPS = 1/(qK), presampling MTF = |sinc(pf)|, so DQE(f) = sinc²(pf) → 1 at low
    # frequency (docs/references.md; Poisson variance = mean).
    rng = np.random.default_rng(11)
    p, q, k = 0.1, 25000.0, 40.0  # photons per mm² per µGy, µGy → 10 000 counts per pixel
    lam = q * k * p * p
    flats = [rng.poisson(lam, (512, 512)).astype(float) for _ in range(6)]
    edge = rng.poisson(lam * (0.05 + 0.95 * aperture_edge(n=384, angle_deg=2.0))).astype(float)
    ims = [Image(f, (p, p)) for f in flats]
    met = measure_detector(ims, [Image(edge, (p, p))], kerma_ugy=k, q_per_mm2_ugy=q)
    f = met.dqe.frequency_per_mm
    low = f <= 0.25 * 0.5 / p
    assert np.mean(met.dqe.value[low]) == pytest.approx(1.0, abs=0.05)
    ratio = met.dqe.value / np.sinc(p * f) ** 2
    assert np.mean(ratio) == pytest.approx(1.0, abs=0.05)
    assert np.abs(ratio - 1).max() < 0.2


def test_dqe_simulated_direct_panel_low_frequency():
    # Low-frequency DQE of a quantum-limited detector = η · A_S (quantum detection efficiency × Swank
    # factor; Swank, J. Appl. Phys. 44 (1973), from memory); the simulated direct panel's electronic noise
    # is negligible at 100 µGy.
    sim = simulator  # a plain import: a broken simulator fails these checks, never skips them
    model = sim.detector_model("direct")
    flats = [sim.simulate(model, "flat", dose_ugy=100.0, seed=s, small=True) for s in range(4)]
    edge = sim.simulate(model, "edge", dose_ugy=100.0, seed=9, small=True)
    ims = [Image(s.kerma_ugy(), s.spacing_mm) for s in flats]
    met = measure_detector(
        ims, [Image(edge.kerma_ugy(), edge.spacing_mm)], kerma_ugy=100.0, q_per_mm2_ugy=model.q_per_mm2_ugy
    )
    low = met.dqe.frequency_per_mm <= 1.0
    assert np.mean(met.dqe.value[low]) == pytest.approx(model.qde * model.swank, abs=0.06)


def test_dqe_refuses_without_kerma_or_q():
    p = 0.1
    mtf = measure_mtf(gaussian_edge(), (p, p))
    nnps = measure_nnps(white_flats(n_images=1), (p, p))
    with pytest.raises(LimenError, match="air kerma"):
        compute_dqe(mtf, nnps, None, 30000.0)
    with pytest.raises(LimenError, match="q"):
        compute_dqe(mtf, nnps, 10.0, None)
    with pytest.raises(LimenError):
        compute_dqe(mtf, nnps, -1.0, 30000.0)


# ---------------------------------------------------------------- conversion function and q table


def test_conversion_fit_linear_and_log():
    k = np.array([5.0, 10.0, 25.0, 50.0, 100.0])
    lin = fit_conversion(k, 60.0 + 78.0 * k)
    assert lin.kind == "linear" and not lin.nonlinear
    assert lin.conversion.gain == pytest.approx(78.0) and lin.conversion.offset == pytest.approx(60.0)
    assert lin.linear.r_squared == pytest.approx(1.0)
    assert np.allclose(lin.conversion.to_kerma_ugy(60.0 + 78.0 * k), k)
    log = fit_conversion(k, 2000.0 + 900.0 * np.log(k))
    assert log.kind == "logarithmic" and not log.nonlinear
    assert log.conversion.gain == pytest.approx(900.0)
    # a saturating response is neither: flagged non-linear
    sat = fit_conversion(k, 60 + 4000 * (1 - np.exp(-k / 40)))
    assert sat.nonlinear and sat.note


def test_conversion_fit_bad_input():
    with pytest.raises(LimenError, match="two or more"):
        fit_conversion([10.0, 10.0], [100.0, 101.0], path="k.csv")
    with pytest.raises(LimenError, match="positive"):
        fit_conversion([0.0, 10.0, 20.0], [1.0, 2.0, 3.0])


def test_beam_quality_table():
    # q values of RQA beam qualities, IEC 62220-1-1 (from memory, as in docs/references.md).
    table = beam_qualities()
    assert {k: v["q_per_mm2_ugy"] for k, v in table.items()} == {
        "RQA3": 21759.0,
        "RQA5": 29653.0,
        "RQA7": 32362.0,
        "RQA9": 31077.0,
    }
    assert all(v["note"] == "from memory" for v in table.values())
    assert q_for_beam("rqa5") == 29653.0
    with pytest.raises(LimenError, match="unknown beam"):
        q_for_beam("W/Rh 28")


def test_dqe_above_one_beyond_its_ci_is_flagged():
    # DQE ≤ 1 for any real detector (IEC 62220-1; an ideal counter reaches 1): a wrong kerma (here 1e-3 of the
    # true one, as in "--kerma-ugy 1e-30" found by the audit) pushes it far above 1 and must be flagged
    rng = np.random.default_rng(5)
    p, q, k = 0.1, 25000.0, 40.0
    lam = q * k * p * p
    flats = [rng.poisson(lam, (512, 512)).astype(float) for _ in range(4)]
    edge = rng.poisson(lam * (0.05 + 0.95 * aperture_edge(n=384, angle_deg=2.0))).astype(float)
    from scorer.detector import compute_dqe

    mtf, nnps = measure_mtf(edge, (p, p)), measure_nnps(flats, (p, p))
    good = compute_dqe(mtf, nnps, k, q)
    assert good.warnings == [] and np.all(good.ci_low <= good.value) and np.all(good.value <= good.ci_high)
    bad = compute_dqe(mtf, nnps, k * 1e-3, q)
    assert bad.warnings and "exceeds 1 beyond its uncertainty" in bad.warnings[0]


def test_2d_nnps_display_masks_zero_frequency():
    # the detrended NNPS is ~0 at f = 0; on a log colour scale that one bin would span decades and flatten
    # the rest (common practice: exclude the DC bin, clip the scale at percentiles)
    from scorer.reports.detector import nnps_display_scale

    f = np.fft.fftshift(np.fft.fftfreq(8))
    img = np.zeros((8, 8))
    img[4, 4] = -30.0
    out = nnps_display_scale(img, f, f)
    assert np.isnan(out[4, 4]) and np.nanmin(out) == 0.0
