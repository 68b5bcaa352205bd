"""Phantom images with the features of real exposures, built by the tests themselves (not Limen's simulator).

The clean image is tests/npw_truth.py's: sharp discs of exact pixel coverage (48 × 48 sub-samples) on a flat
background, plus Gaussian noise.  Each feature below is added on its own, to the same noise (paired), so a
change in the thresholds is the feature's:

* heel effect: a linear gain gradient along one axis (± ``amount`` at the image edges);
* scatter pedestal: a smooth pedestal S = SPR × background with its own Poisson-like noise (variance ∝ S),
  so the image's relative noise and the discs' image contrast both change (expected threshold change on the
  nominal contrast scale: √(1 + SPR) for quantum noise, see test_realism.py);
* smooth non-uniformity: a broad Gaussian bump of relative height ``amount``;
* grid lines: a sinusoidal gain a·cos(2π f x) along the columns;
* hot pixels, a hot 3 × 3 cluster at a given site, a dead column, a saturated row (values at the largest
  value of the image, ``SATURATED``), a bright label outside the plate;
* a fixed gain pattern: white pixel gains of relative SD ``amount``, the same in every image.

Values are in units proportional to air kerma (``BACKGROUND`` behind the plate); the noise is white or
Gaussian-correlated (npw_truth.make_noise) of SD ``SIGMA`` at the background.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from npw_truth import make_noise, mean_image

from scorer.images import Image
from scorer.images.image import ImageMetadata
from scorer.phantom import PhantomTransform

PIX = 0.1
BACKGROUND = 10000.0
SIGMA = 100.0  # 1 % relative noise at the background
SATURATED = 16383.0  # a 14-bit detector's largest value


@dataclass
class Scene:
    layout: object
    shape: tuple[int, int]
    transform: PhantomTransform
    mean: np.ndarray

    def site_px(self, target_index: int, signal: bool) -> tuple[int, int]:
        """Pixel (row, col) of a target's signal site, or of the site after it."""
        t = self.layout.targets[target_index]
        k = t.signal_site if signal else (t.signal_site + 1) % t.m_alternatives
        r, c = self.transform.to_pixel(t.sites)[k]
        return int(round(r)), int(round(c))


def scene(layout, margin_px: int = 60, rotation_deg: float = 2.0) -> Scene:
    shape = (int(layout.height_mm / PIX) + margin_px, int(layout.width_mm / PIX) + margin_px)
    tf = PhantomTransform.from_params(
        rotation_deg=rotation_deg,
        flipped=False,
        magnification=1.0,
        phantom_center_mm=layout.center_mm,
        center_px=((shape[0] - 1) / 2 + 0.3, (shape[1] - 1) / 2 - 0.2),
        pixel_mm=PIX,
    )
    return Scene(layout, shape, tf, mean_image(layout, tf, shape, BACKGROUND))


def images(sc: Scene, n: int, seed: int, feature=None, corr_px: float = 0.0) -> list[Image]:
    """``n`` noisy images of the scene, ``feature(g, noise_rng, i)`` applied to each (None: clean)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        noise = make_noise(rng, sc.shape, SIGMA, corr_px)
        g = sc.mean + noise
        if feature is not None:
            g = feature(sc, g, np.random.default_rng([seed, i, 7]), i)
        md = ImageMetadata(source_path=f"image-{i + 1:02d}.npy", content_sha256=f"{seed}-{i}-{hash(g.tobytes())}")
        out.append(Image(np.asarray(g, float), (PIX, PIX), md))
    return out


# --------------------------------------------------------------------------- features
def heel(amount: float = 0.13, axis: int = 1):
    def f(sc, g, rng, i):
        x = np.linspace(-1.0, 1.0, sc.shape[axis])
        gain = 1.0 + amount * (x[None, :] if axis == 1 else x[:, None])
        return g * gain

    return f


def scatter(spr: float = 0.3):
    def f(sc, g, rng, i):
        s = spr * BACKGROUND
        # the pedestal's own quanta: variance ∝ its mean, on the scale of the primary's (σ² = SIGMA² at BACKGROUND)
        return g + s + rng.standard_normal(sc.shape) * SIGMA * np.sqrt(s / BACKGROUND)

    return f


def bump(amount: float = 0.05, width_frac: float = 0.3):
    def f(sc, g, rng, i):
        yy, xx = np.mgrid[: sc.shape[0], : sc.shape[1]]
        r0, c0 = 0.4 * sc.shape[0], 0.6 * sc.shape[1]
        w = width_frac * max(sc.shape)
        return g * (1.0 + amount * np.exp(-((yy - r0) ** 2 + (xx - c0) ** 2) / (2 * w * w)))

    return f


def grid_lines(amplitude: float = 0.02, cycles_per_mm: float = 3.5):
    def f(sc, g, rng, i):
        x = np.arange(sc.shape[1]) * PIX
        return g * (1.0 + amplitude * np.cos(2 * np.pi * cycles_per_mm * x))[None, :]

    return f


def hot_pixel_places(sc: Scene, n: int = 40, seed: int = 3) -> list[tuple[int, int]]:
    """Where :func:`hot_pixels` puts its pixels: the central 60 % of the image, fixed by ``seed``."""
    r = np.random.default_rng(seed)
    rows = r.integers(int(0.2 * sc.shape[0]), int(0.8 * sc.shape[0]), n)
    cols = r.integers(int(0.2 * sc.shape[1]), int(0.8 * sc.shape[1]), n)
    return list(zip(rows.tolist(), cols.tolist()))


def hot_pixels(n: int = 40, value_factor: float = 6.0, seed: int = 3):
    """``n`` hot pixels at fixed places (a detector defect: the same in every image), at distinct values."""

    def f(sc, g, rng, i):
        g = g.copy()
        for k, (r, c) in enumerate(hot_pixel_places(sc, n, seed)):
            g[r, c] = value_factor * BACKGROUND * (1 + 0.01 * k)
        return g

    return f


def hot_cluster(target_index: int, signal: bool, excess: float = 0.3):
    """A 3 × 3 cluster of pixels ``excess`` × background too bright, centred on one site."""

    def f(sc, g, rng, i):
        r, c = sc.site_px(target_index, signal)
        g = g.copy()
        g[r - 1 : r + 2, c - 1 : c + 2] += excess * BACKGROUND
        return g

    return f


def dead_column(col: int):
    def f(sc, g, rng, i):
        g = g.copy()
        g[:, col] = 0.0
        return g

    return f


def saturated_row(row: int):
    def f(sc, g, rng, i):
        g = np.minimum(g, SATURATED - 1.0)
        g[row, :] = SATURATED
        return g

    return f


def label_outside(value_factor: float = 1.6):
    """A bright rectangular label in the margin outside the plate (lettering on the cassette)."""

    def f(sc, g, rng, i):
        g = g.copy()
        g[2:14, 40:160] = value_factor * BACKGROUND + rng.standard_normal((12, 120)) * SIGMA
        return g

    return f


def fixed_gain(amount: float = 0.01, seed: int = 11):
    def f(sc, g, rng, i):
        gain = 1.0 + amount * np.random.default_rng(seed).standard_normal(sc.shape)
        return g * gain

    return f
