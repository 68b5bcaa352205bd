"""Analytic NPW truth on images we build ourselves (not with Limen's simulator or disc renderer).

The generator draws sharp discs of contrast C on a flat background b (kerma drops to b·(1 − C) behind a
disc, integrated over each pixel's aperture by a 48 × 48 sub-sample grid: our own code, finer than Limen's
template) and adds stationary Gaussian noise of known covariance K:

* white: K = σ²·I;
* correlated: n = h ⊛ z on a periodic image, z white of variance σ², h a Gaussian kernel of standard deviation
  ``corr_px`` normalised to Σh² = 1, so every pixel still has variance σ² and the NPS is σ²·|H(f)|².

The detectability of a linear template w for the signal Δs in noise K is (Barrett & Myers, *Foundations of
Image Science* (2004), ch. 13, eq. 13.139 ff.)::

    d′ = wᵀΔs / √(wᵀKw);   the NPW template w = Δs gives  d′² = (ΔsᵀΔs)² / (ΔsᵀKΔs).

Limen's observer estimates the background by a least-squares plane fitted to a ring around each site. That fit
is linear in the data, so to first order in n/b the response is itself a linear template applied to the noise:

    b·Σw·(1 − g/b̂) = C·b·wᵀs − w′ᵀn,   w′ = w − A_R (A_RᵀA_R)⁻¹ A_ROIᵀ w   (the second term on ring pixels)

with A the plane's design matrix (1, Δrow, Δcol) on the ring R and on the ROI.  So the local-background
observer's d′ per unit contrast is b·wᵀs / √(w′ᵀKw′): the same formula with w′ in the noise term (its
signal term is unchanged because the ring holds no signal).  Its loss against the known-background observer
is √(w′ᵀKw′ / wᵀKw) ≥ 1 in white noise (the projection only adds variance there).
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

SUB = 48  # sub-samples per pixel side of our own disc renderer


def exact_disc(center_rc, radius_px, shape):
    """Fraction of each pixel of ``shape`` covered by a disc (48 × 48 mid-point sub-samples per pixel)."""
    out = np.zeros(shape)
    cr, cc = center_rc
    r0, r1 = max(int(np.floor(cr - radius_px)) - 1, 0), min(int(np.ceil(cr + radius_px)) + 2, shape[0])
    c0, c1 = max(int(np.floor(cc - radius_px)) - 1, 0), min(int(np.ceil(cc + radius_px)) + 2, shape[1])
    off = (np.arange(SUB) + 0.5) / SUB - 0.5
    ys = (np.arange(r0, r1)[:, None] + off).reshape(-1) - cr
    xs = (np.arange(c0, c1)[:, None] + off).reshape(-1) - cc
    inside = (ys[:, None] ** 2 + xs[None, :] ** 2) <= radius_px**2
    out[r0:r1, c0:c1] = inside.reshape(r1 - r0, SUB, c1 - c0, SUB).mean(axis=(1, 3))
    return out


def noise_filter(shape, corr_px):
    """|H| on the FFT grid of ``shape`` for a Gaussian kernel of std ``corr_px`` px with Σh² = 1 (None: white)."""
    if not corr_px:
        return None
    fr = np.fft.fftfreq(shape[0])[:, None]
    fc = np.fft.fftfreq(shape[1])[None, :]
    h = np.exp(-2 * np.pi**2 * corr_px**2 * (fr**2 + fc**2))
    return h / np.sqrt(np.mean(h**2))  # Parseval: Σh² = mean |H|² = 1


def make_noise(rng, shape, sigma, corr_px=0.0):
    z = sigma * rng.standard_normal(shape)
    H = noise_filter(shape, corr_px)
    return z if H is None else np.real(np.fft.ifft2(np.fft.fft2(z) * H))


def cov_times(x, sigma, corr_px=0.0):
    """K·x for the noise of :func:`make_noise` (x on a patch; zero-padded so the circular product is linear)."""
    if not corr_px:
        return sigma**2 * x
    pad = int(np.ceil(8 * corr_px)) + 1
    xp = np.pad(x, pad)
    H = noise_filter(xp.shape, corr_px)  # the kernel of K is h ⋆ h: its transfer function is |H|²
    y = np.real(np.fft.ifft2(np.fft.fft2(xp) * H**2)) * sigma**2
    return y[pad:-pad, pad:-pad]


def mean_image(layout, transform, shape, background):
    """The noiseless image: markers and signal discs (sharp, exact coverage) on ``background``."""
    scale = transform.scale_px_per_mm()
    t = np.ones(shape)
    discs = [(m.xy_mm, m.diameter_mm, m.contrast) for m in layout.markers]
    discs += [(tt.signal_xy_mm, tt.diameter_mm, tt.contrast) for tt in layout.targets]
    for xy, d, c in discs:
        t -= c * exact_disc(transform.to_pixel(xy)[0], d / 2 * scale, shape)
    return background * t


def roi_radius_px(layout, scale):
    """Per target: half the distance from its sites to the nearest other site or marker (the observer's ROI)."""
    xy = [s for t in layout.targets for s in t.sites_mm] + [m.xy_mm for m in layout.markers]
    d, _ = cKDTree(np.asarray(xy)).query(np.asarray(xy), k=2)
    out, i = {}, 0
    for t in layout.targets:
        out[t.id] = float(d[i : i + t.m_alternatives, 1].min()) / 2 * scale
        i += t.m_alternatives
    return out


def site_dprime(center_rc, radius_px, roi_px, background, sigma, corr_px=0.0, margin_px=1.0):
    """Analytic d′ per unit contrast at one site: (known background, Limen's local background).

    Region as Limen documents it (DEVELOPERS.md, "The observer"): a disc of radius
    min(roi, max(5·r, r + margin + 8)), at least r + margin + 2; the ring is its part beyond r + margin.
    """
    rr = max(min(roi_px, max(5 * radius_px, radius_px + margin_px + 8)), radius_px + margin_px + 2)
    h = int(np.ceil(rr)) + 1
    ri, ci = int(round(center_rc[0])), int(round(center_rc[1]))
    s = exact_disc((center_rc[0] - ri + h, center_rc[1] - ci + h), radius_px, (2 * h + 1, 2 * h + 1))
    yy, xx = np.mgrid[-h : h + 1, -h : h + 1].astype(float)
    dy, dx = yy - (center_rc[0] - ri), xx - (center_rc[1] - ci)
    dist = np.hypot(dy, dx)
    roi = dist <= rr
    ring = roi & (dist > radius_px + margin_px)
    w = np.where(roi, s, 0.0)  # the NPW template: the expected signal
    A_roi = np.column_stack([np.ones(roi.sum()), dy[roi], dx[roi]])
    A_r = np.column_stack([np.ones(ring.sum()), dy[ring], dx[ring]])
    coef = np.linalg.solve(A_r.T @ A_r, A_roi.T @ w[roi])
    w_loc = w.copy()
    w_loc[ring] -= A_r @ coef
    sig = background * float(w.ravel() @ s.ravel())  # wᵀΔs per unit contrast
    kb = sig / np.sqrt(float(w.ravel() @ cov_times(w, sigma, corr_px).ravel()))
    loc = sig / np.sqrt(float(w_loc.ravel() @ cov_times(w_loc, sigma, corr_px).ravel()))
    return kb, loc


def layout_truth(layout, transform, background, sigma, corr_px=0.0):
    """Analytic d′ per unit contrast at every candidate site: DataFrame target, site, diameter, kb, local."""
    import pandas as pd

    scale = transform.scale_px_per_mm()
    roi = roi_radius_px(layout, scale)
    rows = []
    for t in layout.targets:
        for k, rc in enumerate(transform.to_pixel(t.sites)):
            kb, loc = site_dprime(rc, t.diameter_mm / 2 * scale, roi[t.id], background, sigma, corr_px)
            rows.append((t.id, k, t.diameter_mm, t.m_alternatives, kb, loc))
    return pd.DataFrame(rows, columns=["target", "site", "diameter_mm", "m_alternatives", "kb", "local"])
