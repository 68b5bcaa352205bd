"""Find the phantom in an image: markers → similarity transform → :class:`Placement`.

The plate carries registration markers (absorbing discs, ``contrast`` = fractional
drop in air kerma): three or more fiducials and one orientation key whose diameter
differs from the fiducials' so that it breaks every rotation and mirror symmetry.
Registration runs in four steps:

1. **Coarse blobs.**  The image is block-averaged so that the smallest marker, at
   the smallest allowed magnification, still spans about six blocks.  A grey-level
   closing (larger than the largest marker) gives the local background; the
   *depth* ``1 − value / background`` is the fractional kerma drop.  Connected
   regions deeper than 35 % of the weakest marker contrast are the blobs; every blob
   is kept for the diagnostic overlay (``candidates_px``).  The targets cannot
   pass: a large target is far too faint, a deep one far too small, and blobs
   outside the marker size range implied by ``magnification_range`` are dropped.
2. **Sub-pixel centres.**  Each marker-sized blob is refined at full resolution by
   an iterated, clipped depth-weighted centroid inside a circle centred on the
   current estimate (background: median of the surrounding annulus; weight
   ``clip(depth / contrast, 0, 1)``, which is the pixel's disc coverage for a
   sharp disc).  The area of the weights gives the blob's diameter.
3. **Matching.**  Every pair of blobs assigned to every pair of markers, with and
   without a mirror, defines a similarity transform (two points fix it).  Each
   hypothesis predicts all markers; a marker counts as found when a blob of the
   right diameter lies near its prediction.  The hypothesis that finds the most
   markers (then the smallest squared error) wins; the orientation key's distinct
   diameter makes the winner unique.
4. **Fit.**  The least-squares similarity (Umeyama 1991) maps the layout's marker
   positions onto all measured centres, in detector millimetres so that
   non-square pixels are handled; the residual is reported in pixels.

**Surviving defects and edges.**  Defective rows and columns are found first
(:mod:`scorer.phantom.line_defects`) and the image repaired across them for the marker search.  A marker
crossed by such a line, or cut off by the image edge, is *not used*: the fit rests on the other markers when
at least three remain, no other assignment of them to the layout's markers fits as well (the plate's
geometry still fixes its orientation) and the residual is within the limit; the marker and the reason are in
``Placement.markers_not_used``.  Otherwise the image is refused, naming the cause.  Target sites outside the
image do not refuse it either: they are listed (``Placement.sites_outside``) and the observer scores the
sites inside (:func:`scorer.observer.scoring.score_images` leaves out the trials of the sites outside).

Every failure is a :class:`RegistrationError` (a :class:`~scorer.errors.LimenError`)
naming the file and the problem on one line, carrying the blobs found so that the
caller can draw a diagnostic overlay (:func:`scorer.reports.overlay.draw_overlay`).

References
----------
.. [1] Umeyama, S. "Least-squares estimation of transformation parameters between
       two point patterns", IEEE Trans. Pattern Anal. Mach. Intell. 13(4) (1991) 376–380.
.. [2] Soille, P. *Morphological Image Analysis*, 2nd ed., Springer (2003) — grey-level
       closing as a background estimate for dark features smaller than the
       structuring element.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NoReturn

import cv2
import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import ndimage as ndi
from skimage.measure import block_reduce

from scorer.errors import LimenError
from scorer.images.image import Image
from scorer.phantom.geometry import PhantomTransform
from scorer.phantom.layout import Layout, Marker
from scorer.phantom.line_defects import RegistrationLine, find_registration_lines, repair_lines

# Blocks across the smallest marker (at the smallest magnification) on the coarse image.
COARSE_BLOCKS_PER_MARKER = 6.0
# Size slack beyond the magnification range when looking for blobs, so that a plate
# slightly outside the range is still found and reported as such.
SIZE_SLACK = 1.25
# A blob matches a marker when its diameter is within this fraction of the predicted one.
DIAMETER_TOLERANCE = 0.25
# Blobs must be deeper than this fraction of the weakest marker's contrast.  Below ½ so that a
# raw image whose offset is large next to the signal (very low dose) still shows its markers;
# the targets stay far below it (large ones are faint, deep ones tiny and diluted by blocking).
DEPTH_FRACTION = 0.35
# Relative tolerance on the magnification range's ends (the fitted magnification of a plate
# exactly at an end scatters by ~0.1 %).
MAGNIFICATION_TOLERANCE = 0.005
MAX_MARKER_BLOBS = 40  # marker-sized blobs refined and matched (deepest first)
HYPOTHESIS_CHUNK = 4096  # hypotheses scored at once
MAX_CANDIDATES = 500  # blobs kept for the overlay


class RegistrationError(LimenError):
    """The phantom could not be placed; ``candidates_px`` lists the blobs found.

    Attributes
    ----------
    candidates_px : list of (row, col, diameter_px)
        Every blob considered, for a diagnostic overlay.
    placement : Placement or None
        The best (rejected) placement when one was fitted, e.g. for a residual
        above the limit or a plate cut off by the field edge.
    """

    def __init__(
        self,
        message: str,
        path: object | None = None,
        candidates_px: Iterable[tuple[float, float, float]] | None = None,
        placement: Placement | None = None,
    ) -> None:
        super().__init__(message, path)
        self.candidates_px = list(candidates_px or [])
        self.placement = placement


@dataclass
class Placement:
    """Where the phantom lies in an image.

    Attributes
    ----------
    transform : PhantomTransform
        Phantom mm (x, y) → pixel (col, row).
    residual_px : float
        RMS distance between the measured marker centres and the fitted transform's prediction.
    max_residual_px : float
    rotation_deg : float
        In [0, 360), counter-clockwise on the displayed image (geometry convention).
    flipped : bool
        The plate lies mirrored (upside down).
    magnification : float
        Detector-plane mm per phantom mm (uses the image's pixel spacing).
    markers_px : dict
        Marker id → measured (row, col) of the markers used in the fit.
    candidates_px : list of (row, col, diameter_px)
        Every blob considered.
    markers_not_used : dict
        Marker id → why it was left out of the fit (crossed by a defective line, outside the image).
    sites_outside : list of (target id, site index)
        Target sites whose disc lies outside the image.
    lines : list of RegistrationLine
        Defective rows and columns found before registration.
    """

    transform: PhantomTransform
    residual_px: float
    max_residual_px: float
    rotation_deg: float
    flipped: bool
    magnification: float
    markers_px: dict[str, tuple[float, float]]
    candidates_px: list[tuple[float, float, float]] = field(default_factory=list)
    markers_not_used: dict[str, str] = field(default_factory=dict)
    sites_outside: list[tuple[str, int]] = field(default_factory=list)
    lines: list[RegistrationLine] = field(default_factory=list)

    def notes(self) -> list[str]:
        """One-line statements of what the fit left out (empty when it used every marker)."""
        out = []
        if self.markers_not_used:
            n_used = len(self.markers_px)
            why = "; ".join(f"{k}: {v}" for k, v in self.markers_not_used.items())
            out.append(
                f"marker(s) {', '.join(self.markers_not_used)} not used in the registration ({why}); fitted on "
                f"the {n_used} other markers, residual {self.residual_px:.2f} px RMS"
            )
        return out

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (plain floats, lists)."""
        return {
            "markers_used": sorted(self.markers_px),
            "markers_not_used": dict(self.markers_not_used),
            "sites_outside": [{"target": t, "site": int(s)} for t, s in self.sites_outside],
            "defective_lines": [ln.to_dict() for ln in self.lines],
            "residual_px": float(self.residual_px),
            "max_residual_px": float(self.max_residual_px),
            "rotation_deg": float(self.rotation_deg),
            "flipped": bool(self.flipped),
            "magnification": float(self.magnification),
            "markers_px": {k: [float(v[0]), float(v[1])] for k, v in self.markers_px.items()},
            "transform": {
                "matrix": [[float(a) for a in row] for row in self.transform.matrix],
                "offset": [float(a) for a in self.transform.offset],
                "maps": "phantom (x_mm, y_mm) -> pixel (col, row)",
            },
        }


# --------------------------------------------------------------------------- similarity fit
def fit_similarity(
    src: ArrayLike, dst: ArrayLike, reflect: bool | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Least-squares similarity ``dst ≈ A @ src + t`` with ``A = s·R`` (or ``s·R·F``).

    Parameters
    ----------
    src, dst : (N, 2) arrays of corresponding points, N ≥ 2.
    reflect : bool or None
        False: a proper rotation (det A > 0).  True: a mirrored one, ``A = s·R·diag(−1, 1)``.
        None: whichever fits better.

    Returns
    -------
    A : (2, 2) array, t : (2,) array

    References
    ----------
    Umeyama, IEEE TPAMI 13 (1991) 376–380, eqs. (40)–(42).
    """
    src = np.asarray(src, float)
    dst = np.asarray(dst, float)
    if reflect is None:
        fits = [fit_similarity(src, dst, r) for r in (False, True)]
        err = [np.sum((src @ A.T + t - dst) ** 2) for A, t in fits]
        return fits[int(np.argmin(err))]
    F = np.diag([-1.0, 1.0]) if reflect else np.eye(2)
    x = src @ F  # F is its own inverse and symmetric
    mx, my = x.mean(axis=0), dst.mean(axis=0)
    xc, yc = x - mx, dst - my
    var_x = np.mean(np.sum(xc**2, axis=1))
    if var_x <= 0:
        raise ValueError("source points coincide")
    cov = yc.T @ xc / len(x)
    U, D, Vt = np.linalg.svd(cov)
    S = np.diag([1.0, np.sign(np.linalg.det(U) * np.linalg.det(Vt)) or 1.0])
    R = U @ S @ Vt
    scale = np.trace(np.diag(D) @ S) / var_x
    A = scale * R @ F
    t = my - A @ src.mean(axis=0)
    return A, t


def _angle_of(A: NDArray[np.float64]) -> tuple[float, bool, float]:
    """(rotation_deg in [0, 360), flipped, scale) of a similarity matrix in the geometry convention."""
    det = float(np.linalg.det(A))
    scale = float(np.sqrt(abs(det)))
    flipped = det < 0
    R = A / scale
    if flipped:
        R = R @ np.diag([-1.0, 1.0])
    theta = float(np.degrees(np.arctan2(R[0, 1], R[0, 0])) % 360.0)
    if theta >= 360.0:  # -tiny % 360 rounds to 360.0
        theta = 0.0
    return theta, flipped, scale


# --------------------------------------------------------------------------- blobs
def block_mean(pix: NDArray[Any], f: int) -> NDArray[np.float64]:
    """Mean of non-overlapping f × f blocks (the last partial rows and columns are dropped); float64."""
    if f == 1:
        return pix.astype(np.float64)
    h, w = pix.shape[0] // f, pix.shape[1] // f
    a = pix[: h * f, : w * f]
    # Rows of each block summed first, then its columns, then ÷ f²: the order of the sums before (the result is
    # the same to the last bit; one np.mean over both block axes adds in another order).
    # scikit-image ships no annotations: block_reduce is an untyped call
    rows: NDArray[np.float64] = block_reduce(a, (f, 1), np.sum, func_kwargs={"dtype": np.float64})  # type: ignore[no-untyped-call]
    blocks: NDArray[np.float64] = block_reduce(rows, (1, f), np.sum)  # type: ignore[no-untyped-call]
    return blocks / (f * f)


def _depth_map(img: NDArray[np.float64], closing_size: int) -> NDArray[np.float64]:
    """Fractional drop below the local background (grey closing), 0 where the background is dark."""
    bg = grey_closing(img, closing_size)
    level = float(np.median(bg))
    ok = bg > 0.1 * level if level > 0 else bg > 0
    depth = np.zeros_like(img)
    np.divide(img, bg, out=depth, where=ok)
    depth = np.where(ok, 1.0 - depth, 0.0)
    return depth


def grey_closing(img: NDArray[np.float64], size: int) -> NDArray[np.float64]:
    """Grey-level closing by a ``size`` × ``size`` square (OpenCV), the same as ``scipy.ndimage.grey_closing``.

    Pixels beyond the edge are left out (OpenCV's default border for dilation and erosion), as scipy's
    ``reflect`` mode leaves them out for a maximum or minimum.  An even square cannot be centred: scipy's
    dilation reaches one pixel further down and right, its erosion one further up and left, and the anchors
    below place OpenCV's squares the same way (tests/test_registration_libraries.py).
    """
    kernel = np.ones((size, size), np.uint8)
    grown = cv2.dilate(img, kernel, anchor=((size - 1) // 2,) * 2)
    return np.asarray(cv2.erode(grown, kernel, anchor=(size // 2,) * 2), dtype=np.float64)  # float64 in and out


@dataclass
class _Blob:
    row: float
    col: float
    diameter_px: float
    depth: float
    refined: bool = False


def _coarse_blobs(pix: NDArray[Any], f: int, closing_size: int, threshold: float) -> list[_Blob]:
    coarse = block_mean(pix, f)
    depth = _depth_map(coarse, closing_size)
    labels, n = ndi.label(depth > threshold)
    if n == 0:
        return []
    flat = np.flatnonzero(labels)  # only the (few) blob pixels are measured
    lab = labels.ravel()[flat]
    dep = depth.ravel()[flat]
    r_idx, c_idx = np.divmod(flat, depth.shape[1])
    area = np.bincount(lab, minlength=n + 1)[1:].astype(float)
    wsum = np.bincount(lab, dep, minlength=n + 1)[1:]
    cm = np.column_stack(
        [
            np.bincount(lab, dep * r_idx, minlength=n + 1)[1:] / wsum,
            np.bincount(lab, dep * c_idx, minlength=n + 1)[1:] / wsum,
        ]
    )
    peak = np.zeros(n + 1)
    np.maximum.at(peak, lab, dep)
    peak = peak[1:]
    order = np.argsort(-area * np.asarray(peak))[:MAX_CANDIDATES]
    out = []
    for i in order:
        r, c = cm[i]
        out.append(
            _Blob(r * f + (f - 1) / 2.0, c * f + (f - 1) / 2.0, 2.0 * np.sqrt(area[i] / np.pi) * f, float(peak[i]))
        )
    return out


def _refine(
    pix: NDArray[Any], r0: float, c0: float, diameter_px: float, iterations: int = 6
) -> tuple[float, float, float, float, bool] | None:
    """Sub-pixel centre and diameter of a dark disc near (r0, c0) at full resolution.

    Iterated clipped depth-weighted centroid: weight = clip(depth / contrast, 0, 1) inside a
    circle (disc radius plus a margin) centred on the current estimate; background = median
    of the annulus outside it.  Background noise inside the circle is symmetric about the
    current estimate, so it only pulls towards it, and the fixed point is the disc's centre.

    Returns (row, col, diameter_px, contrast, touches_edge) or None when no disc is there.
    """
    rows, cols = pix.shape
    r, c, radius = float(r0), float(c0), max(float(diameter_px) / 2.0, 1.5)
    contrast = 0.0
    edge = False
    for _ in range(iterations):
        support = radius + max(3.0, 0.25 * radius)
        half = int(np.ceil(support + max(6.0, 0.5 * radius)))
        ri, ci = int(round(r)), int(round(c))
        a0, a1 = max(ri - half, 0), min(ri + half + 1, rows)
        b0, b1 = max(ci - half, 0), min(ci + half + 1, cols)
        edge = a0 > ri - half or b0 > ci - half or a1 < ri + half + 1 or b1 < ci + half + 1
        win = pix[a0:a1, b0:b1].astype(np.float64)
        rr = np.arange(a0, a1, dtype=float)[:, None] - r
        cc = np.arange(b0, b1, dtype=float)[None, :] - c
        d2 = rr * rr + cc * cc
        ring = win[d2 > support * support]
        if ring.size < 8:
            return None
        bg = float(np.median(ring))
        if not bg > 0:
            return None
        depth = 1.0 - win / bg
        inner = d2 <= (0.5 * radius) ** 2
        if not inner.any():
            return None
        contrast = float(np.median(depth[inner]))
        if not contrast > 0:
            return None
        w = np.clip(depth / contrast, 0.0, 1.0)
        w[d2 > support * support] = 0.0
        total = float(w.sum())
        if total <= 0:
            return None
        dr = float((w * rr).sum() / total)
        dc = float((w * cc).sum() / total)
        r, c = r + dr, c + dc
        radius = max(np.sqrt(total / np.pi), 1.0)
        if dr * dr + dc * dc < 1e-4:
            break
    return r, c, 2.0 * radius, contrast, edge


# --------------------------------------------------------------------------- matching
def _match(
    p: NDArray[np.complex128],
    diam_mm: NDArray[np.float64],
    z: NDArray[np.complex128],
    dz: NDArray[np.float64],
    mag_lo: float,
    mag_hi: float,
    tol_px_mm: float,
) -> tuple[NDArray[np.intp], bool, complex, complex] | None:
    """Best correspondence of blobs (complex detector mm ``p``, diameters) to markers ``z``.

    Returns (assignment array of blob index per marker, −1 if none; flip; complex s, t).
    """
    K, N = len(p), len(z)
    if K < 2:
        return None
    ii, jj = np.nonzero(~np.eye(K, dtype=bool))
    aa, bb = np.triu_indices(N, 1)
    I = np.repeat(ii, len(aa))  # noqa: E741 - I, J, A, B index pairs as in the matching equations
    J = np.repeat(jj, len(aa))
    A = np.tile(aa, len(ii))
    B = np.tile(bb, len(ii))
    best: tuple[float, NDArray[np.intp], bool, complex, complex] | None = None
    for flip in (False, True):
        zz = np.conj(z) if flip else z
        s = (p[J] - p[I]) / (zz[B] - zz[A])
        mag = np.abs(s)
        ok = (mag >= mag_lo) & (mag <= mag_hi)
        ok &= np.abs(diam_mm[I] / (mag * dz[A]) - 1) < DIAMETER_TOLERANCE
        ok &= np.abs(diam_mm[J] / (mag * dz[B]) - 1) < DIAMETER_TOLERANCE
        if not ok.any():
            continue
        s_all, I_all, A_all, mag_all = s[ok], I[ok], A[ok], mag[ok]
        for c0 in range(0, len(s_all), HYPOTHESIS_CHUNK):  # bounded memory: chunk × N × K
            sl = slice(c0, c0 + HYPOTHESIS_CHUNK)
            s, Ia, Aa, mag = s_all[sl], I_all[sl], A_all[sl], mag_all[sl]
            t = p[Ia] - s * zz[Aa]
            q = s[:, None] * zz[None, :] + t[:, None]  # H × N predicted
            dist = np.abs(q[:, :, None] - p[None, None, :])  # H × N × K
            dpred = mag[:, None] * dz[None, :]  # H × N predicted diameters
            size_ok = np.abs(diam_mm[None, None, :] / dpred[:, :, None] - 1) < DIAMETER_TOLERANCE
            tol = np.maximum(tol_px_mm, 0.2 * dpred)[:, :, None]
            dist = np.where(size_ok & (dist < tol), dist, np.inf)
            k = np.argmin(dist, axis=2)
            dmin = np.take_along_axis(dist, k[:, :, None], axis=2)[:, :, 0]
            found = np.isfinite(dmin)
            count = found.sum(axis=1)
            sse = np.where(found, dmin / dpred, 0.0) ** 2
            score = count - np.minimum(sse.sum(axis=1), 0.99)  # count first, then relative error
            h = int(np.argmax(score))
            if best is None or score[h] > best[0]:
                best = (float(score[h]), np.where(found[h], k[h], -1), flip, s[h], t[h])
    if best is None:
        return None
    return best[1:]


# --------------------------------------------------------------------------- main entry
def register(
    image: Image,
    layout: Layout,
    *,
    max_residual_px: float = 1.0,
    magnification_range: tuple[float, float] = (0.8, 1.4),
    path: object | None = None,
) -> Placement:
    """Find the phantom's markers and fit the phantom-mm → pixel transform.

    Parameters
    ----------
    image : Image
        Raw FOR PROCESSING values or values linearised in air kerma (only ratios to the
        local background are used, so a small offset does not matter).
    layout : Layout
    max_residual_px : float
        Largest acceptable RMS marker residual of the fit.
    magnification_range : (float, float)
        Allowed geometric magnification (detector plane / phantom plane).
    path : str or Path, optional
        Named in error messages (default: the image's source path).

    Returns
    -------
    Placement

    Raises
    ------
    RegistrationError
        Phantom absent (how many markers were found of how many expected), cut off by the
        field edge, residual above ``max_residual_px``, magnification outside the range,
        or an image smaller than the phantom.
    """
    where = path if path is not None else (image.metadata.source_path or None)
    pix = np.asarray(image.pixels)
    if pix.ndim != 2:
        raise RegistrationError(f"expected a 2-D image, got shape {pix.shape}", where)
    rows, cols = pix.shape
    dr_mm, dc_mm = (float(v) for v in image.spacing_mm)
    pixel_mm = image.pixel_mm
    mag_lo, mag_hi = (float(v) for v in magnification_range)
    if not 0 < mag_lo <= mag_hi:
        raise RegistrationError(f"bad magnification range {magnification_range!r}", where)
    markers = layout.markers
    n_exp = len(markers)

    # image smaller than the phantom (at the smallest magnification, in any orientation)?
    h_mm, w_mm = rows * dr_mm, cols * dc_mm
    short, long_ = sorted((layout.width_mm * mag_lo, layout.height_mm * mag_lo))
    if min(h_mm, w_mm) < short or h_mm * w_mm < short * long_:
        raise RegistrationError(
            f"image ({h_mm:.1f} × {w_mm:.1f} mm) is smaller than the phantom "
            f"({layout.width_mm:g} × {layout.height_mm:g} mm at magnification ≥ {mag_lo:g})",
            where,
        )

    d_mm = np.array([m.diameter_mm for m in markers])
    c_min = min(m.contrast for m in markers)
    d_lo_px = d_mm.min() * mag_lo / SIZE_SLACK / pixel_mm
    d_hi_px = d_mm.max() * mag_hi * SIZE_SLACK / pixel_mm
    f = max(1, int(d_mm.min() * mag_lo / pixel_mm / COARSE_BLOCKS_PER_MARKER))
    closing = int(np.ceil(1.3 * d_hi_px / f)) + 3
    lines = find_registration_lines(pix, c_min)
    work = repair_lines(pix, lines) if lines else pix  # for the marker search only
    blobs = _coarse_blobs(work, f, closing, DEPTH_FRACTION * c_min)

    # refine the marker-sized blobs at full resolution
    sized = [b for b in blobs if 0.6 * d_lo_px <= b.diameter_px <= 1.4 * d_hi_px][:MAX_MARKER_BLOBS]
    good: list[_Blob] = []
    for b in sized:
        res = _refine(work, b.row, b.col, b.diameter_px)
        if res is None:
            continue
        b.row, b.col, b.diameter_px, b.depth, _ = res
        b.refined = True
        if d_lo_px <= b.diameter_px <= d_hi_px and b.depth >= DEPTH_FRACTION * c_min:
            good.append(b)
    candidates = [(float(b.row), float(b.col), float(b.diameter_px)) for b in blobs]

    def fail(message: str, placement: Placement | None = None) -> NoReturn:
        raise RegistrationError(message, where, candidates, placement)

    what = f"{len(layout.fiducials)} fiducials + orientation key"
    if len(good) < 3:
        fail(
            f"phantom not found: {len(good)} of {n_exp} markers ({what}) found "
            f"({len(blobs)} dark blob(s) in all); is the phantom in the field?"
        )

    # match in detector millimetres (x = col·Δcol, y = row·Δrow)
    p = np.array([b.col * dc_mm + 1j * b.row * dr_mm for b in good])
    diam = np.array([b.diameter_px * pixel_mm for b in good])
    z = np.array([m.x_mm + 1j * m.y_mm for m in markers])
    best = _match(p, diam, z, d_mm, mag_lo / SIZE_SLACK, mag_hi * SIZE_SLACK, 3.0 * pixel_mm)
    if best is None:
        fail(
            f"phantom not found: 0 of {n_exp} markers ({what}) found; {len(good)} marker-like "
            f"blob(s), but no two of them fit the layout"
        )
    assign, flip, s, t = best
    n_found = int((assign >= 0).sum())
    if n_found < 3:
        fail(
            f"phantom not found: at most {n_found} of {n_exp} markers ({what}) found in the "
            f"layout's arrangement among {len(good)} marker-like blob(s)"
        )

    def fit(found: list[int]) -> Placement:
        """Least-squares similarity on the found markers, in detector mm (non-square pixels)."""
        meas_rc = np.array([(good[assign[i]].row, good[assign[i]].col) for i in found])
        meas_mm = np.column_stack([meas_rc[:, 1] * dc_mm, meas_rc[:, 0] * dr_mm])
        src = np.column_stack([z.real, z.imag])[found]
        A_mm, t_mm = fit_similarity(src, meas_mm, reflect=flip)
        Dinv = np.diag([1.0 / dc_mm, 1.0 / dr_mm])
        tf = PhantomTransform.from_arrays(Dinv @ A_mm, Dinv @ t_mm)
        res = np.hypot(*(tf.to_pixel(src) - meas_rc).T)
        rotation, flipped, mag = _angle_of(A_mm)
        return Placement(
            transform=tf,
            residual_px=float(np.sqrt(np.mean(res**2))),
            max_residual_px=float(res.max()),
            rotation_deg=rotation,
            flipped=flipped,
            magnification=mag,
            markers_px={markers[i].id: (float(rc[0]), float(rc[1])) for i, rc in zip(found, meas_rc)},
            candidates_px=candidates,
        )

    found = [i for i in range(n_exp) if assign[i] >= 0]
    first = fit(found)
    scale = first.transform.scale_px_per_mm()
    pred = first.transform.to_pixel([m.xy_mm for m in markers])
    not_used: dict[str, str] = {}
    for i, m in enumerate(markers):
        rc = pred[i] if assign[i] < 0 else (good[assign[i]].row, good[assign[i]].col)
        r_px = 0.5 * m.diameter_mm * scale
        if not _inside(rc, r_px, rows, cols):
            partly = _inside(rc, -r_px, rows, cols)  # some of the disc inside: cut by the edge
            not_used[m.id] = "cut off by the image edge" if partly else "outside the image"
            continue
        crossing = [ln for ln in lines if ln.distance_px(float(rc[0]), float(rc[1])) <= r_px + 2.0]
        if crossing:
            not_used[m.id] = "crossed by " + ", ".join(ln.describe() for ln in crossing)
    unexplained = [markers[i].id for i in range(n_exp) if assign[i] < 0 and markers[i].id not in not_used]
    if unexplained:
        fail(
            f"only {n_found} of {n_exp} markers found; marker(s) {', '.join(unexplained)} not found where the "
            "others place them" + _lines_text(lines),
            first,
        )
    used = [i for i in found if markers[i].id not in not_used]
    if len(used) < 3:
        why = "; ".join(f"{k}: {v}" for k, v in not_used.items())
        fail(
            f"phantom cut off or crossed by defects: only {len(used)} of {n_exp} markers usable ({why}); at least "
            "three are needed to place the phantom",
            first,
        )
    placement = fit(used)
    placement.markers_not_used = not_used
    placement.lines = list(lines)
    if not_used:
        meas_rc = np.array([placement.markers_px[markers[i].id] for i in used])
        other = _other_assignment(
            markers, used, np.column_stack([meas_rc[:, 1] * dc_mm, meas_rc[:, 0] * dr_mm]), max_residual_px * pixel_mm
        )
        if other is not None:
            fail(
                f"marker(s) {', '.join(not_used)} not used ({'; '.join(not_used.values())}), and the other markers "
                f"fit the layout equally well in another orientation (as {', '.join(other)}): the plate's "
                "orientation is not determined",
                placement,
            )
    transform = placement.transform
    mag = placement.magnification

    # target sites (with their discs) outside the image are listed; the observer scores the sites inside
    scale = transform.scale_px_per_mm()
    n_sites = 0
    for tg in layout.targets:
        rc = transform.to_pixel(tg.sites)
        r_ = 0.5 * tg.diameter_mm * scale
        n_sites += len(rc)
        placement.sites_outside += [(tg.id, k) for k, x in enumerate(rc) if not _inside(x, r_, rows, cols)]
    if len(placement.sites_outside) == n_sites:
        fail(f"phantom cut off by the field edge: all {n_sites} target sites lie outside the image", placement)
    if not mag_lo * (1 - MAGNIFICATION_TOLERANCE) <= mag <= mag_hi * (1 + MAGNIFICATION_TOLERANCE):
        fail(f"magnification {mag:.3f} lies outside the allowed range {mag_lo:g}–{mag_hi:g}", placement)
    if placement.residual_px > max_residual_px:
        fail(
            f"marker fit residual {placement.residual_px:.2f} px RMS (max {placement.max_residual_px:.2f} px) "
            f"exceeds the limit of {max_residual_px:g} px; wrong layout file or a distorted image?"
            + _lines_text(lines),
            placement,
        )
    return placement


def _lines_text(lines: Sequence[RegistrationLine]) -> str:
    return f" (defective line(s) in the image: {', '.join(ln.name for ln in lines[:5])})" if lines else ""


def _other_assignment(
    markers: Sequence[Marker], used: list[int], meas_mm: NDArray[np.float64], max_residual_mm: float
) -> list[str] | None:
    """Another assignment of the used markers' centres to layout markers of the same size that fits within the
    residual limit (so the markers left fix neither the orientation nor the mirror), or None."""
    z = np.array([m.xy_mm for m in markers], float)
    d = np.array([m.diameter_mm for m in markers], float)
    options = [[j for j in range(len(markers)) if abs(d[j] / d[i] - 1) < DIAMETER_TOLERANCE] for i in used]
    for perm in itertools.product(*options):
        if len(set(perm)) < len(perm) or list(perm) == list(used):
            continue
        src = z[list(perm)]
        for reflect in (False, True):
            A, t = fit_similarity(src, meas_mm, reflect=reflect)
            if np.sqrt(np.mean(np.sum((src @ A.T + t - meas_mm) ** 2, axis=1))) <= max_residual_mm:
                return [markers[j].id for j in perm]
    return None


def _inside(rc: Sequence[float] | NDArray[np.float64], radius_px: float, rows: int, cols: int) -> bool:
    """Does a disc at (row, col) lie wholly inside the image (pixel edges at −½ and n − ½)?"""
    r, c = float(rc[0]), float(rc[1])
    return (
        r - radius_px >= -0.5 and c - radius_px >= -0.5 and r + radius_px <= rows - 0.5 and c + radius_px <= cols - 0.5
    )
