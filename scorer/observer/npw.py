"""Non-prewhitening model observers (NPW and NPWE), signal known exactly.

For each target and each of its candidate sites the observer

1. takes a circular region around the site (radius: half the distance to the
   nearest other site, so that no template reaches a neighbouring disc);
2. removes the local background: a plane fitted by least squares to the ring of
   pixels outside the disc (and its blur margin), then divides by the plane's level,
   so the data are in contrast units;
3. applies a template ``w`` — the expected disc signal of unit contrast at that
   exact sub-pixel position: pixel-aperture coverage of the disc, blurred by the
   system's residual spread (estimated from the markers or given as an MTF) and, for
   NPWE, filtered by the eye filter squared — and scales the result so that the
   response is an unbiased estimate of the disc's contrast::

       t = Σ w · (1 − g / b)  /  Σ w · s₁

   (g the pixels, b the fitted background plane, s₁ the unit-contrast signal).

In M-alternative forced choice the observer picks the site with the largest
response.  Every response, signal and non-signal, is kept in the Responses table.

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

from scorer.phantom.disc import SUPERSAMPLE, disc_coverage
from scorer.errors import LimenError
from scorer.observer.eye import DEFAULT_VIEWING_DISTANCE_MM, eye_filter
from scorer.images.image import Image
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

    def transfer(self, f_cyc_per_px: np.ndarray, pixel_mm: float) -> np.ndarray:
        """Transfer function on a grid of radial frequencies in cycles/pixel."""
        if self.mtf is not None:
            f_mm = f_cyc_per_px / pixel_mm
            m = np.interp(f_mm, self.frequency_per_mm, self.mtf, right=self.mtf[-1])
            sinc = np.abs(np.sinc(f_cyc_per_px))
            return np.clip(m / np.maximum(sinc, 0.2), 0.0, 1.0)
        return np.exp(-2.0 * np.pi**2 * self.sigma_px**2 * f_cyc_per_px**2)

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
def estimate_blur(image: Image, layout: Layout, placement, max_sigma_px: float = 4.0) -> SystemBlur:
    """Gaussian spread (pixels) beyond the pixel aperture, fitted to the marker discs' edges.

    Each marker is a sharp-edged disc of known diameter; its image is modelled as
    ``b · (1 − c · coverage ⊛ G_σ)`` and σ (common to all markers), b and c (per marker)
    are fitted by least squares.
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
        cov = disc_coverage((rc[0] - r0, rc[1] - c0), rad, g.shape)
        patches.append((g, cov))
    if not patches:
        return SystemBlur(0.0, source="no marker inside the image; no blur assumed")

    def sse(sigma: float) -> float:
        # for fixed σ the model b − (b·c)·(coverage ⊛ G_σ) is linear in b and b·c (variable projection)
        total = 0.0
        for g, cov in patches:
            k = ndimage.gaussian_filter(cov, sigma, mode="nearest") if sigma > 0.02 else cov
            A = np.column_stack([np.ones(g.size), -k.ravel()])
            coef, res, *_ = np.linalg.lstsq(A, g.ravel(), rcond=None)
            r = g.ravel() - A @ coef
            total += float(r @ r) / max(coef[0], 1e-12) ** 2
        return total

    fit = optimize.minimize_scalar(sse, bounds=(0.0, max_sigma_px), method="bounded", options={"xatol": 0.01})
    return SystemBlur(float(fit.x), source=f"Gaussian fitted to {len(patches)} marker edges")


# --------------------------------------------------------------------------- templates
class _TemplateBank:
    """Unit-contrast signal s₁ and observer template w for one disc size, by sub-pixel offset.

    Offsets are quantised so that sites with the same offset share one computation: to 1/20 px
    for discs of radius ≥ 2 px, to 1/200 px below.  The coverage is sampled on at least
    20 sub-pixels per disc radius.  A tiny disc's Σs₁² changes with its position to first
    order, so a coarser template (1/20 px, 10 × 10 samples per pixel) made the response of a
    0.07 mm disc on 0.085 mm pixels (radius 0.41 px) a contrast estimate off by ±5 % (standard
    deviation over positions; ±2 % at 0.1 mm), a scatter that differs from site to site.
    """

    QUANTUM = 20
    FINE_QUANTUM = 200
    SAMPLES_PER_RADIUS = 20

    def __init__(self, radius_px: float, half: int, blur: SystemBlur, eye_tf, pixel_mm: float):
        self.radius_px, self.half = radius_px, half
        self.quantum = self.QUANTUM if radius_px >= 2.0 else self.FINE_QUANTUM
        self.supersample = max(SUPERSAMPLE, int(np.ceil(self.SAMPLES_PER_RADIUS / max(radius_px, 1e-3))))
        n = 2 * half + 1
        pad = int(np.ceil(blur.margin_px())) + (half if eye_tf is not None else 0)
        self.shape = (n, n)
        self.fshape = (sfft.next_fast_len(n + pad, real=True),) * 2
        fr = sfft.fftfreq(self.fshape[0])
        fc = sfft.rfftfreq(self.fshape[1])
        f = np.hypot(fr[:, None], fc[None, :])
        self.h_blur = None if (blur.sigma_px <= 0 and blur.mtf is None) else blur.transfer(f, pixel_mm)
        self.h_eye = None if eye_tf is None else eye_tf(f)
        self._cache: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}

    def get(self, dr: float, dc: float) -> tuple[np.ndarray, np.ndarray]:
        q = self.quantum
        key = (int(round(dr * q)), int(round(dc * q)))
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        centre = (self.half + key[0] / q, self.half + key[1] / q)
        cov = disc_coverage(centre, self.radius_px, self.shape, supersample=self.supersample)
        if self.h_blur is None and self.h_eye is None:
            out = (cov, cov)
        else:
            spec = sfft.rfft2(cov, s=self.fshape)
            if self.h_blur is not None:
                spec *= self.h_blur
            n = self.shape[0]
            s1 = sfft.irfft2(spec, s=self.fshape)[:n, :n] if self.h_blur is not None else cov
            w = s1 if self.h_eye is None else sfft.irfft2(spec * self.h_eye, s=self.fshape)[:n, :n]
            out = (s1, w)
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


def _region_radii_px(radius_px: float, roi_px: float, blur: SystemBlur, observer: str) -> tuple[float, float]:
    """A site's region: its outer radius and the inner radius of its background ring (pixels)."""
    rr = roi_px
    if observer == "npw":
        # a background ring ≥ 24× the disc area keeps the background estimate's noise small (d′ loss ≈ 2 %)
        rr = min(rr, max(5.0 * radius_px, radius_px + blur.margin_px() + 8.0))
    rr = max(rr, radius_px + blur.margin_px() + 2.0)
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
    """Every candidate site's region, exactly as :func:`score_image` uses it (for defect checks)."""
    scale = placement.transform.scale_px_per_mm()
    roi_radius = _roi_geometry(layout, scale)
    out = []
    for t in layout.targets:
        rad = t.diameter_mm / 2.0 * scale
        rr, inner = _region_radii_px(rad, roi_radius[t.id], blur, observer)
        for k, (r, c) in enumerate(placement.transform.to_pixel(t.sites)):
            out.append(
                SiteRegion(t.id, k, k == t.signal_site, t.diameter_mm, t.contrast, float(r), float(c), rr, inner)
            )
    return out


def saturation_level(pixels: np.ndarray, min_fraction: float = 1e-3) -> float | None:
    """The clipping level when at least ``min_fraction`` of the pixels sit exactly at the maximum."""
    top = float(np.max(pixels))
    return top if np.count_nonzero(pixels == top) >= min_fraction * pixels.size else None


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
    for a defect (:mod:`scorer.observer.defects`); they are neither read nor checked.
    ``masked``: defective pixels (boolean image) left out of a site's background fit and template, the
    template renormalised (Σw·s₁ over the pixels kept), so the response still estimates the contrast.

    Returns
    -------
    DataFrame with one row per target × site: ``image, target, diameter_mm, contrast,
    m_alternatives, site, is_signal, response, row_px, col_px, observer``.
    The response is in contrast units (an unbiased estimate of the disc contrast
    when the template matches the signal).
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
        rr, inner = _region_radii_px(rad, roi_radius[t.id], blur, config.observer)
        h = int(np.ceil(rr))
        bank = _TemplateBank(rad, h, blur, eye_tf, pixel_mm)
        yy, xx = np.mgrid[-h : h + 1, -h : h + 1].astype(float)
        for k, (r, c) in enumerate(sites_rc):
            if (t.id, k) in skip:
                rows.append(
                    (image_id, t.id, t.diameter_mm, t.contrast, t.m_alternatives, k, k == t.signal_site, np.nan)
                    + (float(r), float(c), config.observer)
                )
                continue
            ri, ci = int(round(r)), int(round(c))
            if ri - h < 0 or ci - h < 0 or ri + h + 1 > H or ci + h + 1 > W:
                raise LimenError(f"target {t.id!r} site {k} lies at the image edge; the phantom is cut off")
            g = pixels[ri - h : ri + h + 1, ci - h : ci + h + 1]
            keep = None if masked is None else ~masked[ri - h : ri + h + 1, ci - h : ci + h + 1]
            if keep is not None and keep.all():
                keep = None
            if saturated is not None and np.any(g >= saturated if keep is None else g[keep] >= saturated):
                raise LimenError(
                    f"target {t.id!r} site {k} is saturated (pixels at the detector's maximum "
                    "value); repeat the exposure at a lower dose"
                )
            dy, dx = yy - (r - ri), xx - (c - ci)
            dist = np.hypot(dy, dx)
            roi = dist <= rr
            ring = roi & (dist > inner)
            if keep is not None:
                roi, ring = roi & keep, ring & keep
            A = np.column_stack([np.ones(ring.sum()), dy[ring], dx[ring]])
            coef, *_ = np.linalg.lstsq(A, g[ring], rcond=None)
            if coef[0] <= 0:
                raise LimenError(f"target {t.id!r}: background level ≤ 0 at site {k}; is the image linearised?")
            bg = coef[0] + coef[1] * dy + coef[2] * dx
            data = 1.0 - g / bg
            s1, w = bank.get(r - ri, c - ci)
            w = np.where(roi, w, 0.0)
            resp = float(np.sum(w * data)) / float(np.sum(w * s1))
            rows.append(
                (
                    image_id,
                    t.id,
                    t.diameter_mm,
                    t.contrast,
                    t.m_alternatives,
                    k,
                    k == t.signal_site,
                    resp,
                    float(r),
                    float(c),
                    config.observer,
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
        ],
    )
    df.attrs["blur"] = {"sigma_px": blur.sigma_px, "source": blur.source}
    return df


def decide(responses: pd.DataFrame) -> pd.DataFrame:
    """M-AFC decisions: per image × target, the site with the largest response.

    Returns the trials table ``reader, image, target, diameter_mm, contrast, chosen_site,
    true_site, correct, m_alternatives`` (``reader`` is the observer's name), with the
    ``detector`` column first after ``reader`` when the responses carry one.
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
    chosen = responses.loc[
        idx, ["image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "observer"] + extra
    ]
    truth = responses[responses["is_signal"]].set_index(["image", "target"])["site"]
    out = chosen.rename(columns={"site": "chosen_site", "observer": "reader"}).reset_index(drop=True)
    out["true_site"] = truth.reindex(list(zip(out["image"], out["target"]))).to_numpy()
    out["correct"] = (out["chosen_site"] == out["true_site"]).astype(int)
    return out[
        ["reader"]
        + extra
        + ["image", "target", "diameter_mm", "contrast", "chosen_site", "true_site", "correct", "m_alternatives"]
    ]


METHOD_TEXT = (
    "<p><b>Observer.</b> Non-prewhitening (NPW) matched filter, signal known exactly, one region per candidate "
    "site: a disc reaching half-way to the nearest other site (for NPW at most max(5r, r + margin + 8 px), "
    "r the disc radius). <b>Template</b>: the expected image of the disc at the site's own sub-pixel position "
    "(pixel-aperture coverage blurred by the system spread from the markers or the measured MTF; for NPWE "
    "filtered by the eye filter squared). <b>Background</b>: a least-squares plane fitted to the ring outside "
    "the disc and its blur margin, estimated anew in every image (not known in advance); the response "
    "Σw(1 − g/b)/Σw·s₁ estimates the disc's contrast. Being linear, this local-background observer loses "
    "0.5–4 % of the known-background NPW d′ (most for large discs in small regions). <b>d′ method</b>: "
    "d′ per unit contrast = 1/σ, σ² the response variance pooled over the diameter's sites; the threshold is "
    "the contrast where d′ reaches the M-AFC value of the halfway criterion; its 95 % CI is analytic and "
    "covers this observer's threshold. <b>Discs of about a pixel</b>: their d′ per unit contrast depends on "
    "where they fall on the pixel grid (up to ×2 between a pixel corner and a pixel centre for 0.07–0.1 mm "
    "discs on 0.085 mm pixels); Limen reports the pooled value over the plate's sites, a few % (white noise: "
    "3.6 % at 0.1 mm, 6.7 % at 0.07 mm) below the phase-averaged d′² of a Fourier prediction.</p>"
)
