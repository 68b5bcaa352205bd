"""Non-prewhitening model observers (NPW and NPWE), signal known exactly.

For each target and each of its candidate sites the observer

1. takes a circular region around the site (radius: half the distance to the
   nearest other site, so that no template reaches a neighbouring disc);
2. removes the background: one quadratic surface fitted by least squares to the
   rings of pixels outside the discs (and their blur margin) of all the target's
   sites at once, then divides by it, so the data are in contrast units;
3. applies a template ``w`` — the expected disc signal of unit contrast at that
   exact sub-pixel position: the disc blurred by the system's spread (estimated from
   the markers or given as an MTF) *before* the pixel aperture integrates it, and, for
   NPWE, filtered by the eye filter squared — and scales the result so that the
   response is an unbiased estimate of the disc's contrast::

       t = Σ w · (1 − g / b)  /  Σ w · s₁

   (g the pixels, b the fitted background surface, s₁ the unit-contrast signal).

In M-alternative forced choice the observer picks the site with the largest
response.  Every response, signal and non-signal, is kept in the Responses table,
with the target's variance ratio: the white-noise variance of these responses over
the textbook observer's (background known, whole template), by which the thresholds
convert the scored observer's d′ to the textbook observer's.

References
----------
.. [1] Barrett, H. H. & Myers, K. J. *Foundations of Image Science* (2004), ch. 13 —
       the non-prewhitening matched filter t = Δsᵀg.
.. [2] ICRU Report 54 (1996); Burgess, J. Opt. Soc. Am. A 11 (1994) — NPWE, the NPW
       observer with an eye filter.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Collection

import numpy as np
import pandas as pd
from scipy import fft as sfft
from scipy import ndimage, optimize
from scipy.spatial import cKDTree

from scorer.errors import LimenError
from scorer.images.image import Image
from scorer.observer.eye import DEFAULT_VIEWING_DISTANCE_MM, eye_filter
from scorer.phantom.disc import blurred_disc, disc_coverage
from scorer.phantom.layout import Layout

OBSERVERS = ("npw", "npwe")


@dataclass(frozen=True)
class SystemBlur:
    """Spread of the imaging system beyond the pixel aperture (which the coverage already holds).

    Either a Gaussian of standard deviation ``sigma_px`` (estimated from the markers),
    or a measured presampling MTF (``frequency_per_mm``, ``mtf``) from which the
    aperture sinc is divided out.
    """

    sigma_px: float = 0.0
    frequency_per_mm: tuple[float, ...] | None = None
    mtf: tuple[float, ...] | None = None
    source: str = "none"

    def gaussian_and_rest(self, pixel_mm: float) -> tuple[float, object]:
        """The spread as a Gaussian (σ in pixels, rendered exactly before the pixel aperture) and the rest.

        For a Gaussian the rest is ``None``.  For a measured MTF, the spread beyond the aperture,
        R(f) = MTF(f)/sinc(f), is fitted by exp(−2π²σ²f²) up to Nyquist (least squares on −log R, weighted by
        R², so the noisy tail counts little); the rest, R/exp(−2π²σ²f²) clipped to [0, 2] and held at its last
        value beyond the measured range, is returned as a function of radial frequency (cycles/pixel) to be
        applied on the pixel grid, where it is close to 1.
        """
        if self.mtf is None:
            return self.sigma_px, None
        f_px = np.asarray(self.frequency_per_mm, float) * pixel_mm
        m = np.asarray(self.mtf, float)
        ratio = np.clip(m / np.maximum(np.abs(np.sinc(f_px)), 0.2), 1e-6, 1.0)
        use = (f_px > 0) & (f_px <= 0.5)
        x = 2.0 * np.pi**2 * f_px[use] ** 2
        wt = ratio[use] ** 2
        sigma2 = float(np.sum(wt * x * -np.log(ratio[use])) / np.sum(wt * x * x)) if use.any() else 0.0
        sigma = float(np.sqrt(max(sigma2, 0.0)))
        rest_f = f_px.copy()
        rest_v = np.clip(ratio / np.exp(-2.0 * np.pi**2 * sigma**2 * f_px**2), 0.0, 2.0)

        def rest(f_cyc_per_px):
            return np.interp(f_cyc_per_px, rest_f, rest_v, right=rest_v[-1])

        return sigma, rest

    @classmethod
    def from_detector_dict(cls, data: dict, path) -> "SystemBlur":
        """The measured presampling MTF in a parsed ``limen detector`` JSON (keys mtf.frequency_per_mm, mtf.value).

        ``path`` names the file in errors and in ``source``; :func:`scorer.workflow.load_mtf` reads it.
        """
        try:
            mtf = data["mtf"]
            f, v = [float(x) for x in mtf["frequency_per_mm"]], [float(x) for x in mtf["value"]]
        except (ValueError, KeyError, TypeError):
            raise LimenError(
                "not a detector JSON with mtf.frequency_per_mm and mtf.value (from limen detector --json)", path
            ) from None
        if len(f) < 3 or len(f) != len(v):
            raise LimenError("MTF needs at least three frequencies with one value each", path)
        return cls(frequency_per_mm=tuple(f), mtf=tuple(v), source=f"measured MTF from {path}")

    def margin_px(self) -> float:
        return 3.0 * self.sigma_px + 1.0 if self.mtf is None else 3.0


@dataclass(frozen=True)
class ObserverConfig:
    observer: str = "npw"
    viewing_distance_mm: float = DEFAULT_VIEWING_DISTANCE_MM  # for NPWE: eye-to-image distance, image-plane units
    blur: SystemBlur | None = None  # None: estimate from the markers

    def __post_init__(self):
        if self.observer not in OBSERVERS:
            raise LimenError(f"unknown observer {self.observer!r}; choose npw or npwe")
        if not self.viewing_distance_mm > 0:
            raise LimenError("viewing distance must be positive")


# --------------------------------------------------------------------------- blur from markers
#: below this spread (pixels) the marker fit on the pixel grid is kept: blurring a disc's coverage on the grid and
#: blurring it before the aperture then differ by far less than the noise
EXACT_BLUR_FROM_PX = 0.1


def estimate_blur(image: Image, layout: Layout, placement, max_sigma_px: float = 4.0) -> SystemBlur:
    """Gaussian spread (pixels) beyond the pixel aperture, fitted to the marker discs' edges.

    Each marker is a sharp-edged disc of known diameter; its image is modelled as
    ``b · (1 − c · s_σ)``, s_σ the disc blurred by a Gaussian of σ pixels and then integrated over the
    pixels (:func:`scorer.phantom.disc.blurred_disc`), and σ (common to all markers), b and c (per marker)
    are fitted by least squares.  (Blurring the pixel coverage on the pixel grid instead, as Limen did
    before, overestimated σ: 0.634 for 0.6 px, 0.54 for 0.47 px on the independent generator's plates; that
    fast fit now only brackets the exact one.)
    """
    scale = placement.transform.scale_px_per_mm()
    patches = []
    for m in layout.markers:
        rc = placement.markers_px.get(m.id) if hasattr(placement, "markers_px") else None
        if rc is None:
            rc = placement.transform.to_pixel(m.xy_mm)[0]
        rad = m.diameter_mm / 2 * scale
        h = int(np.ceil(rad + 2 * max_sigma_px + 4))
        r0, c0 = int(round(rc[0])) - h, int(round(rc[1])) - h
        if r0 < 0 or c0 < 0 or r0 + 2 * h + 1 > image.shape[0] or c0 + 2 * h + 1 > image.shape[1]:
            continue
        g = np.asarray(image.pixels[r0 : r0 + 2 * h + 1, c0 : c0 + 2 * h + 1], dtype=float)
        centre = (rc[0] - r0, rc[1] - c0)
        patches.append((g, centre, rad, disc_coverage(centre, rad, g.shape)))
    if not patches:
        return SystemBlur(0.0, source="no marker inside the image; no blur assumed")

    def sse(model) -> float:
        # for fixed σ the model b − (b·c)·s_σ is linear in b and b·c (variable projection): a straight-line fit
        total = 0.0
        for g, centre, rad, cov in patches:
            k = model(centre, rad, g.shape, cov).ravel()
            y = g.ravel()
            km, ym = k.mean(), y.mean()
            skk = float(np.dot(k - km, k - km))
            slope = float(np.dot(k - km, y - ym)) / skk if skk > 0 else 0.0
            level = ym - slope * km
            r = y - level - slope * k
            total += float(r @ r) / max(level, 1e-12) ** 2
        return total

    # first on the pixel grid (fast, but biased high by the coverage's frequencies above Nyquist), then exactly
    # near that value: the exact model's quadrature grows as 1/σ, so a search from 0 would cost seconds
    def on_grid(sigma):
        return sse(
            lambda c, r, shape, cov: ndimage.gaussian_filter(cov, sigma, mode="nearest") if sigma > 0.02 else cov
        )

    def exact(sigma):
        return sse(lambda c, r, shape, cov: blurred_disc(c, r, sigma, shape))

    first = optimize.minimize_scalar(on_grid, bounds=(0.0, max_sigma_px), method="bounded", options={"xatol": 0.01})
    if first.x < EXACT_BLUR_FROM_PX:
        return SystemBlur(float(first.x), source=f"Gaussian fitted to {len(patches)} marker edges (below 0.1 px)")
    # the grid fit lies above the exact one (by 6–15 % near 0.5 px, up to 2× near 0.15 px), never far below
    hi = min(max_sigma_px, 1.1 * first.x + 0.05)
    fit = optimize.minimize_scalar(exact, bounds=(EXACT_BLUR_FROM_PX, hi), method="bounded", options={"xatol": 0.005})
    if fit.x < EXACT_BLUR_FROM_PX + 0.01:
        return SystemBlur(float(fit.x), source=f"Gaussian fitted to {len(patches)} marker edges (0.1 px or less)")
    return SystemBlur(float(fit.x), source=f"Gaussian fitted to {len(patches)} marker edges")


# --------------------------------------------------------------------------- templates
class _TemplateBank:
    """Unit-contrast signal s₁, observer template w and reference variance for one disc size, by sub-pixel offset.

    s₁ is the disc blurred by the system spread *before* the pixel aperture integrates it
    (:func:`scorer.phantom.disc.blurred_disc`; a measured MTF's departure from its Gaussian fit is applied
    on the pixel grid).  Offsets are quantised so that sites with the same offset share one computation: to
    1/20 px for discs of radius ≥ 2 px, to 1/200 px below (a tiny disc's Σs₁² changes with its position to
    first order).

    The reference variance is the white-noise variance (unit pixel variance, contrast units) of the textbook
    observer's response at that position: 1/Σs₁² for NPW (template s₁, background known), and for NPWE
    Σw²/(Σw·s₁)² with the eye-filtered template w = E²⊛s₁ untruncated (on the padded grid).
    """

    QUANTUM = 20
    FINE_QUANTUM = 200

    def __init__(self, radius_px: float, half: int, blur: SystemBlur, eye_tf, pixel_mm: float):
        self.radius_px, self.half = radius_px, half
        self.quantum = self.QUANTUM if radius_px >= 2.0 else self.FINE_QUANTUM
        n = 2 * half + 1
        pad = int(np.ceil(blur.margin_px())) + (half if eye_tf is not None else 0)
        self.shape = (n, n)
        self.fshape = (sfft.next_fast_len(n + pad, real=True),) * 2
        fr = sfft.fftfreq(self.fshape[0])
        fc = sfft.rfftfreq(self.fshape[1])
        f = np.hypot(fr[:, None], fc[None, :])
        self.sigma_px, rest = blur.gaussian_and_rest(pixel_mm)
        self.h_rest = None if rest is None else rest(f)
        self.h_eye = None if eye_tf is None else eye_tf(f)
        self._cache: dict[tuple[int, int], tuple[np.ndarray, np.ndarray, float]] = {}

    def get(self, dr: float, dc: float) -> tuple[np.ndarray, np.ndarray, float]:
        """(s₁, w, reference variance) for a disc centred (dr, dc) px from the patch's central pixel."""
        q = self.quantum
        key = (int(round(dr * q)), int(round(dc * q)))
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        n = self.shape[0]
        centre = (self.half + key[0] / q, self.half + key[1] / q)
        s1 = blurred_disc(centre, self.radius_px, self.sigma_px, self.shape)
        if self.h_rest is not None:
            s1 = sfft.irfft2(sfft.rfft2(s1, s=self.fshape) * self.h_rest, s=self.fshape)[:n, :n]
        if self.h_eye is None:
            out = (s1, s1, 1.0 / float(np.sum(s1 * s1)))
        else:
            w_full = sfft.irfft2(sfft.rfft2(s1, s=self.fshape) * self.h_eye, s=self.fshape)
            ref = float(np.sum(w_full * w_full)) / float(np.sum(w_full[:n, :n] * s1)) ** 2
            out = (s1, w_full[:n, :n], ref)
        if len(self._cache) < 4096:
            self._cache[key] = out
        return out


def _roi_geometry(layout: Layout, scale_px_per_mm: float) -> dict:
    """Per target: ROI radius (px) = half the distance to the nearest other site or marker."""
    xy, owner = [], []
    for t in layout.targets:
        for s in t.sites_mm:
            xy.append(s)
            owner.append(t.id)
    for m in layout.markers:
        xy.append(m.xy_mm)
        owner.append("__marker")
    xy = np.asarray(xy)
    d, _ = cKDTree(xy).query(xy, k=2)
    nearest = d[:, 1]
    out: dict[str, float] = {}
    i = 0
    for t in layout.targets:
        n = t.m_alternatives
        out[t.id] = float(nearest[i : i + n].min()) / 2.0 * scale_px_per_mm
        i += n
    return out


def _region_radii_px(radius_px: float, roi_px: float, blur: SystemBlur) -> tuple[float, float]:
    """A site's region: its outer radius and the inner radius of its background ring (pixels).

    The region reaches half-way to the nearest other site or marker (``roi_px``), for every observer: with one
    background surface shared by the target's sites (:func:`_target_responses`) a wider ring costs no d′ (the
    NPW observer's ring used to be held to 5 disc radii for a plane per site), and at least 2 px beyond the disc
    and its blur margin.
    """
    rr = max(roi_px, radius_px + blur.margin_px() + 2.0)
    return rr, radius_px + blur.margin_px()


@dataclass(frozen=True)
class SiteRegion:
    """The pixels one candidate site's response is computed from: a disc of ``radius_px`` about
    (``row_px``, ``col_px``); its part beyond ``inner_px`` is the background ring."""

    target: str
    site: int
    is_signal: bool
    diameter_mm: float
    contrast: float
    row_px: float
    col_px: float
    radius_px: float
    inner_px: float


def site_regions(layout: Layout, placement, blur: SystemBlur, observer: str = "npw") -> list[SiteRegion]:
    """Every candidate site's region, exactly as :func:`score_image` uses it (for defect checks).

    The region is the pixels within ``radius_px`` of the site; beyond ``inner_px`` they enter the target's
    shared background fit.  ``observer`` is accepted for the callers' sake: NPW and NPWE use the same regions.
    """
    scale = placement.transform.scale_px_per_mm()
    roi_radius = _roi_geometry(layout, scale)
    out = []
    for t in layout.targets:
        rad = t.diameter_mm / 2.0 * scale
        rr, inner = _region_radii_px(rad, roi_radius[t.id], blur)
        for k, (r, c) in enumerate(placement.transform.to_pixel(t.sites)):
            out.append(
                SiteRegion(t.id, k, k == t.signal_site, t.diameter_mm, t.contrast, float(r), float(c), rr, inner)
            )
    return out


# the quadratic background's monomials Y^p·X^q: 1, Y, X, Y², XY, X²
_P = np.array([0, 1, 0, 2, 1, 0])
_Q = np.array([0, 0, 1, 0, 1, 2])


def _target_responses(
    target, sites_rc, patches, h: int, rr: float, inner: float, site_ids=None
) -> tuple[list[float], float]:
    """Responses at one target's sites, with one background surface fitted to all of them, and its variance ratio.

    The background is a quadratic surface in (row, col) fitted by least squares to the rings
    inner < ρ ≤ rr round every site of the target at once (no ring holds a disc: rr reaches at most half-way
    to the nearest other site or marker).  A separate plane per site, as Limen used, gave every site its own
    background error; what an M-AFC decision — and the d′ method's σ — meets is the *difference* between
    sites, and that error is much smaller when the sites share one surface (the part common to all sites
    cancels).  On the independent generator's plates the textbook NPW observer's d′ was lost by 0.9–4.3 %
    with a plane per site, by 0.1–2.4 % with the shared surface; the shared quadratic follows a smooth
    non-uniformity (a 5 % bump of 20 mm width) about as well as the planes did, a shared plane would not.

    The responses are linear in the noise (to first order), t_i = L_i·n, L_i = ŵ_i − A_U·P·u_i with ŵ_i the
    normalised template, A_U the surface's design on the rings, P = (A_UᵀA_U)⁻¹, u_i = A_ROIᵢᵀŵ_i.  In white
    noise of unit variance their covariance is therefore known exactly:
    C_ij = δ_ij·ŵ_iᵀŵ_i − r_iᵀPu_j − r_jᵀPu_i + u_iᵀPu_j, r_i = A_ringᵢᵀŵ_i.  From it the variance the d′
    method's σ̂² estimates (the spread of the non-signal sites about their mean, averaged over which site
    holds the disc; for two sites half the variance of their difference) is divided by the textbook observer's
    variance (mean over the sites of the reference variance, see :class:`_TemplateBank`): the returned ratio.
    The thresholds divide by its square root to report the textbook observer (Barrett & Myers 2004, ch. 13);
    the ratio's dependence on the noise's correlation was below 0.35 % on the generator's plates (white,
    1 px and 2 px Gaussian-correlated noise).

    ``patches`` holds, per site scored, (row, col of the patch's central pixel, pixels, kept pixels or None,
    (s₁, w, reference variance)); ``sites_rc`` only the sites scored (sites excluded for a defect are left out of
    the fit and of the ratio).  Pixels not kept (defects in a ring, :mod:`scorer.observer.defects`) leave the
    background fit and the template, which is renormalised over the pixels kept (Σŵ·s₁ = 1), and the covariance
    above is taken over the same pixels, so the ratio describes the observer as it was applied.  With one site
    left the ratio is that site's variance over the reference (no spread between sites to measure).
    """
    site_ids = range(len(patches)) if site_ids is None else site_ids
    centre = np.mean(sites_rc, axis=0)
    span = max(rr, float(np.max(np.hypot(*(np.asarray(sites_rc) - centre).T))) + rr)
    local = np.arange(-h, h + 1, dtype=float)
    powers = np.arange(5)
    # every sum over pixels below is a moment Σ f·Y^p·X^q = Vyᵀ f Vx (Y, X the scaled coordinates)
    ata, atg, geo = np.zeros((6, 6)), np.zeros(6), []
    for (r, c), (ri, ci, g, keep, _) in zip(sites_rc, patches):
        dy, dx = local - (r - ri), local - (c - ci)
        d2 = dy[:, None] ** 2 + dx[None, :] ** 2
        roi = d2 <= rr * rr
        if keep is not None:
            roi &= keep
        ring = roi & (d2 > inner * inner)
        vy = ((ri + local - centre[0]) / span)[:, None] ** powers
        vx = ((ci + local - centre[1]) / span)[:, None] ** powers
        mom = vy.T @ ring @ vx
        ata += mom[_P[:, None] + _P[None, :], _Q[:, None] + _Q[None, :]]
        atg += (vy[:, :3].T @ np.where(ring, g, 0.0) @ vx[:, :3])[_P, _Q]
        geo.append((roi, ring, vy[:, :3], vx[:, :3]))
    p_mat = np.linalg.pinv(ata)  # the coordinates are scaled to ±1 over the target: well conditioned
    coef = p_mat @ atg
    cmat = np.zeros((3, 3))
    cmat[_P, _Q] = coef
    out, u, rvec, wsq, ref = [], [], [], [], []
    for (roi, ring, vy, vx), (_, _, g, _, (s1, w, ref_var)), k in zip(geo, patches, site_ids):
        bg = vy @ cmat @ vx.T
        if np.min(bg[roi]) <= 0:
            raise LimenError(f"target {target.id!r}: background level ≤ 0 at site {k}; is the image linearised?")
        wn = np.where(roi, w, 0.0)
        wn /= float(np.sum(wn * s1))
        out.append(float(np.sum(wn * (1.0 - g / bg))))
        u.append((vy.T @ wn @ vx)[_P, _Q])
        rvec.append((vy.T @ np.where(ring, wn, 0.0) @ vx)[_P, _Q])
        wsq.append(float(np.sum(wn * wn)))
        ref.append(ref_var)
    u, rvec = np.asarray(u), np.asarray(rvec)
    cross = rvec @ p_mat @ u.T
    cov = np.diag(wsq) - cross - cross.T + u @ p_mat @ u.T
    m = len(out)
    if m == 1:
        spread = cov[0, 0]
    elif m == 2:
        spread = (cov[0, 0] + cov[1, 1] - 2.0 * cov[0, 1]) / 2.0
    else:
        spread = 0.0
        for s in range(m):
            keep = [j for j in range(m) if j != s]
            sub = cov[np.ix_(keep, keep)]
            spread += (np.trace(sub) - sub.sum() / (m - 1)) / (m - 2)
        spread /= m
    return out, float(spread / np.mean(ref))


def saturation_level(pixels: np.ndarray, min_fraction: float = 1e-3) -> float | None:
    """The clipping level when at least ``min_fraction`` of the pixels sit exactly at the maximum."""
    top = float(np.max(pixels))
    return top if np.count_nonzero(pixels == top) >= min_fraction * pixels.size else None


def _saturated_line(pixels: np.ndarray, top: float, r0: int, c0: int, hit) -> str:
    """'saturated row N' / 'saturated column N' when the saturated pixels of a site lie on a row or column that is
    mostly at the maximum (a detector defect), else ''."""
    if hit is None:
        return ""
    rr, cc = np.nonzero(hit)
    for r in sorted(set((rr + r0).tolist())):
        if np.mean(pixels[r] >= top) >= 0.5:
            return f"saturated row {r}"
    for c in sorted(set((cc + c0).tolist())):
        if np.mean(pixels[:, c] >= top) >= 0.5:
            return f"saturated column {c}"
    return ""


def score_image(
    image: Image,
    layout: Layout,
    placement,
    config: ObserverConfig = ObserverConfig(),
    image_id: str | None = None,
    skip: Collection[tuple[str, int]] = (),
    masked: np.ndarray | None = None,
) -> pd.DataFrame:
    """Model-observer responses at every candidate site of every target.

    ``skip``: (target id, site) pairs not to compute (their response is NaN) — sites excluded
    for a defect (:mod:`scorer.observer.defects`); they are neither read nor checked, and the target's
    background surface is fitted to the rings of its other sites.
    ``masked``: defective pixels (boolean image) left out of the target's background fit and of the
    templates, each template renormalised (Σw·s₁ over the pixels kept), so the response still estimates the
    contrast; the variance ratio is computed over the pixels kept.

    Returns
    -------
    DataFrame with one row per target × site: ``image, target, diameter_mm, contrast,
    m_alternatives, site, is_signal, response, row_px, col_px, observer, variance_ratio``.
    The response is in contrast units (an unbiased estimate of the disc contrast
    when the template matches the signal).  ``variance_ratio`` (one value per target) is the
    white-noise variance of this observer's responses, as the d′ method measures it, over the
    textbook observer's (see :func:`_target_responses`).
    """
    pixels = np.asarray(image.pixels, dtype=float)
    pixel_mm = image.pixel_mm
    tf = placement.transform
    scale = tf.scale_px_per_mm()
    blur = config.blur if config.blur is not None else estimate_blur(image, layout, placement)
    roi_radius = _roi_geometry(layout, scale)
    eye_tf = None
    if config.observer == "npwe":
        # eye filter squared on the template (ICRU Report 54): E(f) with f in cycles/mm at the image plane
        eye_tf = lambda f_px: eye_filter(f_px / pixel_mm, config.viewing_distance_mm) ** 2  # noqa: E731
    image_id = image_id or image.metadata.source_path or "image"
    saturated = saturation_level(pixels)
    rows = []
    H, W = pixels.shape
    for t in layout.targets:
        rad = t.diameter_mm / 2.0 * scale
        sites_rc = tf.to_pixel(t.sites)
        rr, inner = _region_radii_px(rad, roi_radius[t.id], blur)
        h = int(np.ceil(rr))
        bank = _TemplateBank(rad, h, blur, eye_tf, pixel_mm)
        patches, scored = [], []
        for k, (r, c) in enumerate(sites_rc):
            if (t.id, k) in skip:
                continue
            ri, ci = int(round(r)), int(round(c))
            if ri - h < 0 or ci - h < 0 or ri + h + 1 > H or ci + h + 1 > W:
                raise LimenError(f"target {t.id!r} site {k} lies at the image edge; the phantom is cut off")
            g = pixels[ri - h : ri + h + 1, ci - h : ci + h + 1]
            keep = None if masked is None else ~masked[ri - h : ri + h + 1, ci - h : ci + h + 1]
            if keep is not None and keep.all():
                keep = None
            if saturated is not None and np.any(g >= saturated if keep is None else g[keep] >= saturated):
                line = _saturated_line(pixels, saturated, ri - h, ci - h, g >= saturated if keep is None else None)
                if line:
                    raise LimenError(
                        f"target {t.id!r} site {k} is crossed by {line} (pixels at the detector's maximum value "
                        "along the line): a detector defect, not an over-exposure; score with the defect checks "
                        "on, which exclude the sites it touches"
                    )
                raise LimenError(
                    f"target {t.id!r} site {k} is saturated (pixels at the detector's maximum "
                    "value): an over-exposure; repeat the exposure at a lower dose"
                )
            patches.append((ri, ci, g, keep, bank.get(r - ri, c - ci)))
            scored.append(k)
        response = dict.fromkeys(range(len(sites_rc)), np.nan)
        ratio = np.nan  # every site skipped: nothing scored (the whole trial is excluded)
        if scored:
            found, ratio = _target_responses(t, sites_rc[scored], patches, h, rr, inner, site_ids=scored)
            response.update(zip(scored, found))
        for k, (r, c) in enumerate(sites_rc):
            rows.append(
                (
                    image_id,
                    t.id,
                    t.diameter_mm,
                    t.contrast,
                    t.m_alternatives,
                    k,
                    k == t.signal_site,
                    response[k],
                    float(r),
                    float(c),
                    config.observer,
                    ratio,
                )
            )
    df = pd.DataFrame(
        rows,
        columns=[
            "image",
            "target",
            "diameter_mm",
            "contrast",
            "m_alternatives",
            "site",
            "is_signal",
            "response",
            "row_px",
            "col_px",
            "observer",
            "variance_ratio",
        ],
    )
    df.attrs["blur"] = {"sigma_px": blur.sigma_px, "source": blur.source}
    return df


def decide(responses: pd.DataFrame) -> pd.DataFrame:
    """M-AFC decisions: per image × target, the site with the largest response.

    Returns the trials table ``reader, image, target, diameter_mm, contrast, chosen_site,
    true_site, correct, m_alternatives`` (``reader`` is the observer's name), with the
    ``detector`` column first after ``reader`` when the responses carry one, and
    ``variance_ratio`` last when they carry it (the count method uses it).
    """
    if responses.empty:
        return pd.DataFrame(
            columns=[
                "reader",
                "image",
                "target",
                "diameter_mm",
                "contrast",
                "chosen_site",
                "true_site",
                "correct",
                "m_alternatives",
            ]
        )
    idx = responses.groupby(["image", "target"], sort=False)["response"].idxmax()
    extra = ["detector"] if "detector" in responses.columns else []
    ratio = ["variance_ratio"] if "variance_ratio" in responses.columns else []
    chosen = responses.loc[
        idx, ["image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "observer"] + extra + ratio
    ]
    truth = responses[responses["is_signal"]].set_index(["image", "target"])["site"]
    out = chosen.rename(columns={"site": "chosen_site", "observer": "reader"}).reset_index(drop=True)
    out["true_site"] = truth.reindex(list(zip(out["image"], out["target"]))).to_numpy()
    out["correct"] = (out["chosen_site"] == out["true_site"]).astype(int)
    return out[
        ["reader"]
        + extra
        + ["image", "target", "diameter_mm", "contrast", "chosen_site", "true_site", "correct", "m_alternatives"]
        + ratio
    ]


METHOD_TEXT = (
    "<p><b>Observer.</b> Non-prewhitening (NPW) matched filter, signal known exactly, one region per candidate "
    "site: a disc reaching half-way to the nearest other site. <b>Template</b>: the expected image of the disc at "
    "the site's own sub-pixel position (the disc blurred by the system spread from the markers or the measured "
    "MTF, then integrated over the pixels; for NPWE filtered by the eye filter squared). <b>Background</b>: one "
    "least-squares quadratic surface fitted to the rings outside the discs of all the target's sites, estimated "
    "anew in every image (not known in advance); the response Σw(1 − g/b)/Σw·s₁ estimates the disc's contrast. "
    "<b>Reported observer</b>: the textbook one, background known and template whole (d′² = (ΔsᵀΔs)²/ΔsᵀKΔs for "
    "NPW): the scored observer's d′ is converted by the ratio of the two observers' response variances in white "
    "noise, computed from the templates (a loss of 0–2.5 % of d′, largest for large discs in small regions; "
    "its dependence on the noise's correlation measured below 0.35 %). <b>d′ method</b>: d′ per unit contrast "
    "= 1/σ, σ² the response variance pooled over the diameter's sites; the threshold is the contrast where d′ "
    "reaches the fixed detectability d′_T (the same for every M); its 95 % CI is analytic. "
    "<b>Count method</b>: binomial "
    "maximum-likelihood fit of Pc_M(k·C) with its small-sample bias removed, profile likelihood CI. "
    "<b>Discs of about a pixel</b>: their d′ per unit contrast depends on where they fall on the pixel grid "
    "(with sharp discs up to ×2 between a pixel corner and a pixel centre); Limen reports the pooled value over "
    "the plate's sites, a few % below the phase-averaged d′² of a Fourier prediction when the blur is small.</p>"
)
