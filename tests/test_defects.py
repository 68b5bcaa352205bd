"""scorer.observer.defects: robust scale, the false-flag bound, pixel and line defects, the defect map.

Sources (docs/references.md): the MAD's consistency factor 1.4826 for Gaussian data (Rousseeuw & Croux 1993),
checked against scipy.stats.median_abs_deviation(scale="normal"); the per-test level α/N for N tests (Šidák
1967), checked against scipy's normal tail; the number of flags on pure Gaussian noise is Poisson with mean
N·P(|Z| > z) (binomial with tiny p: common practice).
"""

from __future__ import annotations

import re
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from scorer.errors import LimenError
from scorer.observer import defects as dfx
from scorer.observer.npw import SiteRegion


def test_robust_sd_is_the_scaled_mad_of_scipy():
    x = np.random.default_rng(0).normal(3.0, 2.5, 20001)
    assert dfx.robust_sd(x) == pytest.approx(stats.median_abs_deviation(x, scale="normal"), rel=1e-4)
    assert dfx.robust_sd(x) == pytest.approx(2.5, rel=0.03)  # consistent for Gaussian data
    x[:2000] = 1e6  # 10 % gross outliers move it by about a tenth (breakdown point 50 %)
    assert dfx.robust_sd(x) == pytest.approx(2.5, rel=0.2)


@pytest.mark.parametrize("n, rate", [(1, 0.05), (10**6, 1e-3), (3 * 10**7, 1e-3)])
def test_outlier_bound_gives_the_stated_expected_number_of_false_flags(n, rate):
    z = dfx.outlier_z(n, rate)
    assert n * 2 * stats.norm.sf(z) == pytest.approx(rate, rel=1e-9)


def test_outlier_bound_refuses_a_rate_outside_zero_one():
    with pytest.raises(LimenError):
        dfx.outlier_z(100, 0.0)


def _noise(shape, seed, level=1000.0, sigma=10.0):
    return level + sigma * np.random.default_rng(seed).standard_normal(shape)


def test_flag_count_on_pure_noise_matches_the_calibration():
    # at a false-flag rate of 0.999 per image the count over 30 images is Poisson(≈ 30) if the bound, the block
    # MAD and the smooth background are right together (the default 10⁻³ would need 10⁵ images to show a flag)
    shape = (256, 256)
    tested = np.ones(shape, bool)
    none = np.zeros(shape, bool)
    n_flags = 0
    for seed in range(30):
        found = dfx.find_defects(_noise(shape, seed), tested, none, false_flag_rate=0.999)
        n_flags += len(found.pixels)
    # rate 0.999 per image over 30 images: Poisson mean ≈ 30; 99.9 % interval 14–50
    assert 14 <= n_flags <= 50, n_flags


def test_no_flag_on_clean_noise_at_the_default_rate():
    shape = (384, 384)
    tested = np.ones(shape, bool)
    none = np.zeros(shape, bool)
    # a heel effect of ±13 % and quantum-like noise: the smooth background follows the trend to the edges
    heel = 1.0 + 0.13 * np.linspace(-1, 1, shape[1])[None, :]
    for seed in range(6):
        g = 1000.0 * heel + 10.0 * np.sqrt(heel) * np.random.default_rng(seed).standard_normal(shape)
        found = dfx.find_defects(g, tested, none)
        assert not found.pixels and not found.lines, [d.name for d in found.defects]


def test_defects_are_found_and_named():
    shape = (384, 384)
    g = _noise(shape, 1)
    g[:, 100] = 0.0  # dead column
    g[200, :] = 4095.0  # saturated row (the image's plateau maximum)
    g[:, 300] *= 0.95  # a weak dark column: 5 % = 5 σ per pixel, flagged as a line, not pixel by pixel
    g[50, 50] = 3000.0  # hot pixel
    g[80:83, 250:253] += 300.0  # hot 3 × 3 cluster
    g[330:334, 60:64] -= 150.0  # dark spot (dust)
    found = dfx.find_defects(g, np.ones(shape, bool), np.zeros(shape, bool))
    names = sorted(d.name for d in found.defects)
    assert "dead column 100" in names
    assert "saturated row 200" in names
    assert any(re.fullmatch(r"dark column 300 \(-[45]\.\d+ % of the background\)", n) for n in names), names
    assert "hot pixel at row 50, column 50" in names
    assert "hot cluster (9 px) at row 81, column 251" in names
    assert "dark spot (16 px) at row 332, column 62" in names
    assert len(names) == 6, names
    assert found.clipped_fraction < 1e-3


def test_widespread_clipping_is_not_called_a_defect():
    shape = (256, 256)
    g = np.minimum(_noise(shape, 2), 1000.0)  # half the pixels at the plateau: an over-exposure
    found = dfx.find_defects(g, np.ones(shape, bool), np.zeros(shape, bool))
    assert found.clipped_fraction > 0.4
    assert not any(d.kind == "saturated pixels" for d in found.pixels)


def _region(target, site, row, col, radius=10.0, inner=3.0, signal=False):
    return SiteRegion(target, site, signal, 0.5, 0.01, row, col, radius, inner)


def test_site_effects_exclude_at_the_disc_and_mask_in_the_ring():
    shape = (100, 100)
    label = np.zeros(shape, np.int32)
    label[50, 52] = 1  # 2 px from site a's centre: inside its disc footprint (inner 3 px + 1)
    label[20, 28] = 2  # 8 px from site b's centre: in its background ring only
    defects = [SimpleNamespace(name="hot pixel A"), SimpleNamespace(name="hot pixel B")]
    regions = [_region("a", 0, 50, 50), _region("b", 0, 20, 20), _region("c", 0, 80, 80)]
    eff = dfx.site_effects(defects, label, regions)
    assert eff.excluded == {("a", 0): "hot pixel A"}
    assert eff.masked == {("b", 0): ("hot pixel B", 9)}  # the pixel and its 8 neighbours
    assert eff.mask[19:22, 27:30].all() and eff.mask.sum() == 18


def test_a_ring_mostly_covered_by_defects_excludes_the_site():
    yy, xx = np.mgrid[:60, :60]
    d = np.hypot(yy - 30, xx - 30)
    label = ((d > 6) & (d < 12)).astype(np.int32)  # most of the ring (3–10 px), none of the disc (≤ 4 px)
    eff = dfx.site_effects([SimpleNamespace(name="a dark ring")], label, [_region("a", 0, 30, 30)])
    assert "background ring" in eff.excluded[("a", 0)]


def test_defect_map_round_trip_and_shape_check():
    shape = (128, 160)
    flats = [_noise(shape, s) for s in range(3)]
    for f in flats:
        f[:, 40] = 0.0
        f[70, 90] *= 1.3
    m = dfx.defect_map_from_flats(flats)
    assert [d.name for d in m.lines] == ["dead column 40 (defect map)"]
    assert m.pixels == [(70, 90)]
    again = dfx.DefectMap.from_dict(m.to_dict(), "detector.json")
    defects, label = again.labelled(shape)
    names = [d.name for d in defects]
    assert names == ["dead column 40 (defect map)", "defective pixel at row 70, column 90 (defect map)"]
    assert label[5, 40] == 1 and label[70, 90] == 2 and np.count_nonzero(label) == shape[0] + 1
    with pytest.raises(LimenError, match="the defect map is 128 × 160 pixels but the image is 128 × 161"):
        again.labelled((128, 161))
    with pytest.raises(LimenError, match="malformed"):
        dfx.DefectMap.from_dict({"shape": [1]}, "x.json")


def test_clean_flats_give_an_empty_defect_map():
    m = dfx.defect_map_from_flats([_noise((256, 256), s) for s in range(4)])
    assert not m.pixels and not m.lines


def test_fixed_spot_invisible_in_one_image_is_found_in_the_mean():
    # a 4 × 4 dust speck of 0.6 σ per pixel: never flagged in one image; in the mean of 16, smoothed, it
    # stands at about 8 σ
    shape = (256, 256)
    n = 16
    s, s2, cnt = np.zeros(shape), np.zeros(shape), np.zeros(shape, np.int32)
    for i in range(n):
        e = 0.01 * np.random.default_rng(i).standard_normal(shape)
        e[120:124, 60:64] -= 0.006
        s += e
        s2 += e * e
        cnt += 1
    spots = dfx.fixed_spots(s, cnt, n)
    assert len(spots) == 1 and abs(spots[0].row - 121.5) < 1.5 and abs(spots[0].col - 61.5) < 1.5
    assert spots[0].peak < 0
    # without the speck: nothing
    s0 = sum(0.01 * np.random.default_rng(100 + i).standard_normal(shape) for i in range(n))
    assert dfx.fixed_spots(s0, cnt, n) == []


@pytest.mark.parametrize("sigma_levels", [0.2, 0.5, 0.8, 2.0])
def test_quantised_images_one_grey_level_is_not_a_defect(sigma_levels):
    # an 8-bit image whose noise is about a grey level: the MAD collapses to 0 there, a one-level departure is
    # rounding (Sheppard's correction: variance q²/12), not a defect; a dead column and a hot pixel still are
    shape = (256, 256)
    for seed in range(3):
        g = np.round(125 + sigma_levels * np.random.default_rng(seed).standard_normal(shape))
        found = dfx.find_defects(g, np.ones(shape, bool), np.zeros(shape, bool))
        assert not found.defects, [d.name for d in found.defects]
    g[:, 100] = 0.0
    g[50, 50] = 160.0
    names = [d.name for d in dfx.find_defects(g, np.ones(shape, bool), np.zeros(shape, bool)).defects]
    assert names == ["dead column 100", "hot pixel at row 50, column 50"]
