"""Registration on scikit-image and OpenCV: the library calls give the hand-written formulas' results.

``block_mean`` (scikit-image ``block_reduce``) and the background closing of ``_depth_map`` (OpenCV) replaced
hand-written code; each is checked here, bit for bit on seeded inputs, against the formula it replaced (kept
below as the reference), so `limen score` writes the same bytes as before.  The least-squares similarity stays
hand-written (Umeyama 1991, docs/references.md): scikit-image's estimate of the same equations adds in another
order and differs in the last bits (≈ 1e-14 relative), which changed the registration's printed figures; it
serves here as the outside reference the hand-written fit must agree with.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.transform import SimilarityTransform

from scorer.phantom.registration import _depth_map, block_mean, fit_similarity, grey_closing

MIRROR = np.diag([-1.0, 1.0])


def block_mean_reference(pix: np.ndarray, f: int) -> np.ndarray:
    """The hand-written block mean that ``block_mean`` replaced (rows of a block summed, then columns, ÷ f²)."""
    if f == 1:
        return pix.astype(np.float64)
    h, w = pix.shape[0] // f, pix.shape[1] // f
    a = pix[: h * f, : w * f]
    s = a.reshape(h, f, w * f).sum(axis=1, dtype=np.float64)
    return s.reshape(h, w, f).sum(axis=2) / (f * f)


def depth_map_reference(img: np.ndarray, closing_size: int) -> np.ndarray:
    """The former ``_depth_map``: background by scipy's grey closing (Soille 2003, ch. 4: closing = erosion of
    the dilation, by the same square)."""
    bg = ndi.grey_closing(img, size=(closing_size, closing_size))
    level = float(np.median(bg))
    ok = bg > 0.1 * level if level > 0 else bg > 0
    depth = np.zeros_like(img)
    np.divide(img, bg, out=depth, where=ok)
    return np.where(ok, 1.0 - depth, 0.0)


def closing_by_definition(img: np.ndarray, size: int) -> np.ndarray:
    """Closing straight from its definition (Soille 2003, ch. 4), on scipy's placement of an even square:
    dilation = maximum over rows/cols [i − ⌊s/2⌋, i + ⌊(s−1)/2⌋] mirrored, erosion = minimum over the square
    [i − ⌊s/2⌋, i + ⌊(s−1)/2⌋]; pixels beyond the edge left out."""

    def extreme(a, lo, hi, fn):
        out = np.empty_like(a)
        n_r, n_c = a.shape
        for i in range(n_r):
            for j in range(n_c):
                out[i, j] = fn(a[max(i - lo, 0) : min(i + hi, n_r - 1) + 1, max(j - lo, 0) : min(j + hi, n_c - 1) + 1])
        return out

    lo, hi = size // 2, (size - 1) // 2
    grown = extreme(img, hi, lo, np.max)  # dilation by the mirrored square
    return extreme(grown, lo, hi, np.min)


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.uint16])
@pytest.mark.parametrize("f", [1, 2, 3, 5, 8, 9, 13, 33])
def test_block_mean_is_the_hand_written_one_to_the_bit(dtype, f):
    rng = np.random.default_rng(1000 + f)
    pix = (rng.random((301, 257)) * 3000 + 50).astype(dtype)  # neither side a multiple of most f
    got = block_mean(pix, f)
    ref = block_mean_reference(pix, f)
    assert got.dtype == np.float64 and got.shape == ref.shape
    assert np.array_equal(got, ref)


def test_one_mean_over_both_block_axes_would_not_be_bit_identical():
    """Why block_mean sums in two steps: np.mean over both block axes adds in another order (the test can fail:
    it guards the comment in block_mean)."""
    from skimage.measure import block_reduce

    pix = np.random.default_rng(7).random((160, 160)) * 1000
    one_step = block_reduce(pix, (8, 8), np.mean)
    assert np.allclose(one_step, block_mean_reference(pix, 8), rtol=1e-14, atol=0)
    assert not np.array_equal(one_step, block_mean_reference(pix, 8))


@pytest.mark.parametrize("size", [1, 2, 3, 4, 7, 8, 15, 16, 30, 31])
def test_grey_closing_is_scipys_to_the_bit(size):
    rng = np.random.default_rng(size)
    img = rng.random((97, 123)) * 1000.0
    img[40:50, 60:75] *= 0.3  # a dark blob the closing fills
    assert np.array_equal(grey_closing(img, size), ndi.grey_closing(img, size=(size, size)))


@pytest.mark.parametrize("size", [3, 4, 6])
def test_grey_closing_follows_the_definition(size):
    img = np.random.default_rng(50 + size).random((23, 19))
    assert np.array_equal(grey_closing(img, size), closing_by_definition(img, size))


@pytest.mark.parametrize("size", [5, 12, 27])
def test_depth_map_is_the_hand_written_one_to_the_bit(size):
    rng = np.random.default_rng(200 + size)
    img = 1000.0 + 30.0 * rng.standard_normal((180, 150))
    yy, xx = np.mgrid[:180, :150]
    img[(yy - 90) ** 2 + (xx - 70) ** 2 < 64] *= 0.6  # a marker-like dark disc
    img[:, :10] = 5.0  # a dark border (depth 0 there)
    assert np.array_equal(_depth_map(img, size), depth_map_reference(img, size))


def similarity_by_library(src: np.ndarray, dst: np.ndarray, reflect: bool):
    """Umeyama's least-squares similarity by scikit-image; a mirrored fit as the proper fit of the mirrored
    source (dst ≈ A'·F·src + t, so A = A'·F)."""
    F = MIRROR if reflect else np.eye(2)
    tf = SimilarityTransform.from_estimate(src @ F, dst)
    assert tf
    return tf.params[:2, :2] @ F, tf.params[:2, 2]


@pytest.mark.parametrize("seed", range(12))
def test_fit_similarity_agrees_with_scikit_image(seed):
    # Umeyama 1991, eqs. (40)–(42): the least-squares similarity; scikit-image implements the same paper.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 9))
    src = rng.uniform(-60, 60, (n, 2))
    theta = rng.uniform(0, 2 * np.pi)
    rot = np.array([[np.cos(theta), -np.sin(theta)], [np.sin(theta), np.cos(theta)]])
    mirrored = bool(seed % 2)
    A_true = rng.uniform(0.8, 1.4) * rot @ (MIRROR if mirrored else np.eye(2))
    dst = src @ A_true.T + rng.uniform(-20, 20, 2) + rng.normal(0, 0.05, (n, 2))
    for reflect in (False, True):
        A, t = fit_similarity(src, dst, reflect=reflect)
        A_lib, t_lib = similarity_by_library(src, dst, reflect)
        np.testing.assert_allclose(A, A_lib, rtol=0, atol=1e-12 * np.abs(A_lib).max())
        np.testing.assert_allclose(t, t_lib, rtol=0, atol=1e-12 * (1 + np.abs(t_lib).max()))
        assert np.linalg.det(A) < 0 if reflect else np.linalg.det(A) > 0
    A, t = fit_similarity(src, dst)  # reflect=None: the better of the two, which is the true one
    assert (np.linalg.det(A) < 0) == mirrored
    if n >= 3:
        np.testing.assert_allclose(A, A_true, atol=0.01)
