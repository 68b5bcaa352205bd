"""An independent generator of contrast-detail plates with analytic model-observer truth.

Independent of Limen's simulator, of Limen's disc renderer (``scorer.phantom.disc``) and of ``tests/npw_truth.py``:
discs are rendered here in the Fourier domain, exactly up to a truncation of a Gaussian tail.

Rendering
---------
A disc of radius R and unit contrast, blurred by a Gaussian of standard deviation σ and integrated over square
pixels of side p (100 % fill), has the continuous Fourier transform (Bracewell, *The Fourier Transform and its
Applications*, 3rd ed. (2000), ch. 12 — the "jinc" pair; the pixel aperture is a rect, whose transform is a sinc)::

    F(f) = R·J₁(2πR|f|)/|f| · exp(−2π²σ²|f|²) · sinc(p·fx) · sinc(p·fy) · exp(−2πi f·x₀)   (F(0) = πR²)

Its samples at the pixel centres of an N × N patch follow from the Poisson summation formula: the patch's DFT is
the transform sampled at f = u/(N·p) and folded over every multiple of the sampling frequency 1/p (aliasing),
divided by p².  The folding runs until the Gaussian factor is below 10⁻⁸ of its peak, so the pixel values are
exact to that order; the patch is padded until the blurred disc has vanished at its border (no wrap-around).
The result is the fraction of each pixel's area the blurred disc covers, in units of contrast.

Noise
-----
Additive, stationary and of known covariance K, generated with circular convolutions on the whole image, so K is
exactly circulant with eigenvalues λ_k (the noise power spectrum on the image's DFT grid):

* ``white``: λ_k = σ²;
* ``correlated``: a white part plus Gaussian-filtered white noise, λ_k = σ_w² + σ_c²·|H_k|²/mean|H|², with
  H(f) = exp(−2π²ℓ²f²) (ℓ in pixels) — the shape of quantum noise spread by a scintillator plus white read-out
  noise.  Every pixel has variance σ_w² + σ_c².

Truth (per unit contrast, per diameter)
---------------------------------------
With Δs = b·s₁ (b the background, s₁ the sampled unit-contrast disc above), the non-prewhitening matched filter
(template w = Δs) and its eye-filtered variant (w = E²⊛Δs) have (Barrett & Myers, *Foundations of Image Science*
(2004), ch. 13; Burgess, J. Opt. Soc. Am. A 11 (1994); ICRU Report 54 (1996))::

    d′ = wᵀΔs / √(wᵀKw):   NPW   d′² = (ΔsᵀΔs)² / (ΔsᵀKΔs)
                           NPWE  d′² = (Σ_k |ΔS_k|² E_k²)² / (Σ_k |ΔS_k|² E_k⁴ λ_k)    (Parseval; K circulant)

and the threshold contrast C_T = d′_T / k, k the d′ per unit contrast and d′_T a fixed detectability, the same
for every M: by default the d′ at which a 3-AFC observer's proportion correct is halfway between chance and 1
(Pc = 2/3), with Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx (Green & Swets 1966), integrated and inverted here
(``Design.criterion_pc``: the d′ where this plate's M reaches that Pc instead).

The eye filter is the one Limen documents (scorer/observer/eye.py: E(ρ) = ρ^1.3·exp(−0.04·ρ²), ρ the frequency in
cycles per degree at the viewing distance D, ρ = f·D·π/180), written out again here.

Plates
------
Each plate is axis-aligned and every candidate site of one diameter sits at the same sub-pixel position, so the
truth of a diameter is one number (it depends only on the disc's position within its pixel and on K).  Geometries:
``row4`` (four sites in a row), ``ring5`` (five sites on a circle, each moved to the pixel lattice) and ``pair2``
(two sites side by side, 2-AFC); ``row`` (sites in a row, M given per diameter by ``Design.alternatives``, a
plate mixing cells of different M).  Three fiducials and a larger orientation key register the plate.  The layout is
written in Limen's layout format (limen-layout/1, scorer/phantom/layout.py).
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import fft as sfft
from scipy import integrate, optimize, special, stats

GEOMETRIES = {"row4": 4, "ring5": 5, "pair2": 2, "row": 0}  # "row": M per diameter (Design.alternatives)


# --------------------------------------------------------------------------- M-AFC (Green & Swets 1966)
def pc_mafc(dprime: float, m: int) -> float:
    """Pc_M(d′) = ∫ φ(x − d′) Φ(x)^(M−1) dx by adaptive quadrature."""
    val, _ = integrate.quad(
        lambda x: stats.norm.pdf(x - dprime) * stats.norm.cdf(x) ** (m - 1), dprime - 12, dprime + 12, epsabs=1e-13
    )
    return float(val)


def dprime_at_criterion(m: int, pc: float | None = None) -> float:
    """d′ at which M-AFC reaches ``pc`` (default halfway between chance 1/M and 1)."""
    pc = (1.0 + 1.0 / m) / 2.0 if pc is None else pc
    return float(optimize.brentq(lambda d: pc_mafc(d, m) - pc, 0.0, 10.0, xtol=1e-12))


# --------------------------------------------------------------------------- eye filter (written out again)
def eye(frequency_per_mm, viewing_distance_mm: float) -> np.ndarray:
    """E(f) = ρ^1.3 exp(−0.04 ρ²), ρ = f·D·π/180 cycles/degree (the definition Limen documents); peak scale free."""
    rho = np.abs(np.asarray(frequency_per_mm, float)) * viewing_distance_mm * np.pi / 180.0
    return rho**1.3 * np.exp(-0.04 * rho**2)


# --------------------------------------------------------------------------- discs, by the Fourier transform
def blurred_disc(center_rc, radius_px: float, sigma_px: float, shape) -> np.ndarray:
    """Blurred, pixel-integrated unit disc on an array of ``shape`` (pixel centres at integer coordinates).

    Computed as described in the module docstring; the array must be large enough to hold the blurred disc
    with a margin (else it wraps round).  Lengths in pixels (p = 1).
    """
    if sigma_px < 0.15:
        raise ValueError("the Fourier renderer needs a Gaussian blur of at least 0.15 px")
    n_r, n_c = shape
    # fold until exp(−2π²σ²f²) < 1e-8: f_max = √(18.4/(2π²σ²)) cycles/px
    f_max = np.sqrt(18.4 / (2 * np.pi**2 * sigma_px**2))
    k = int(np.ceil(f_max - 0.5))

    def axis(n):
        base = np.fft.fftfreq(n)  # cycles/px on the DFT grid
        return base[None, :] + np.arange(-k, k + 1)[:, None]  # (2k+1, n): every alias of each DFT frequency

    fr, fc = axis(n_r), axis(n_c)
    # separable factors: aperture, Gaussian, shift
    gr = np.sinc(fr) * np.exp(-2 * np.pi**2 * sigma_px**2 * fr**2) * np.exp(-2j * np.pi * fr * center_rc[0])
    gc = np.sinc(fc) * np.exp(-2 * np.pi**2 * sigma_px**2 * fc**2) * np.exp(-2j * np.pi * fc * center_rc[1])
    f = np.hypot(fr[:, :, None, None], fc[None, None, :, :])  # (2k+1, n_r, 2k+1, n_c)
    with np.errstate(invalid="ignore", divide="ignore"):
        jinc = np.where(f > 0, radius_px * special.j1(2 * np.pi * radius_px * f) / f, np.pi * radius_px**2)
    spec = (jinc * gr[:, :, None, None] * gc[None, None, :, :]).sum(axis=(0, 2))
    return np.real(np.fft.ifft2(spec))


def disc_patch(frac_rc, radius_px: float, sigma_px: float) -> tuple[np.ndarray, int]:
    """The blurred disc on a square patch; its centre at (h + frac_rc) with h the returned half-size."""
    h = int(np.ceil(radius_px + 7 * sigma_px + 3))
    n = sfft.next_fast_len(2 * h + 1)
    return blurred_disc((h + frac_rc[0], h + frac_rc[1]), radius_px, sigma_px, (n, n)), h


# --------------------------------------------------------------------------- noise
@dataclass(frozen=True)
class Noise:
    """Stationary Gaussian noise: white part of SD ``white_sd`` plus Gaussian-filtered part of SD ``corr_sd``."""

    white_sd: float
    corr_sd: float = 0.0
    corr_px: float = 0.0
    name: str = "white"

    def _h2(self, shape) -> np.ndarray:
        f2 = np.fft.fftfreq(shape[0])[:, None] ** 2 + np.fft.fftfreq(shape[1])[None, :] ** 2
        h2 = np.exp(-4 * np.pi**2 * self.corr_px**2 * f2)  # |H|²
        return h2 / h2.mean()

    def spectrum(self, shape) -> np.ndarray:
        """λ_k, the eigenvalues of the circulant covariance on an image of ``shape`` (mean λ = pixel variance)."""
        lam = np.full(shape, self.white_sd**2)
        if self.corr_sd > 0:
            lam = lam + self.corr_sd**2 * self._h2(shape)
        return lam

    def draw(self, rng: np.random.Generator, shape) -> np.ndarray:
        out = self.white_sd * rng.standard_normal(shape)
        if self.corr_sd > 0:
            z = rng.standard_normal(shape)
            out += self.corr_sd * np.real(np.fft.ifft2(np.fft.fft2(z) * np.sqrt(self._h2(shape))))
        return out


WHITE = Noise(30.0, name="white")
CORRELATED = Noise(white_sd=10.0, corr_sd=20.0, corr_px=1.0, name="correlated")


# --------------------------------------------------------------------------- plates
@dataclass(frozen=True)
class Design:
    """What a plate holds (lengths in mm; phases in pixels, per diameter)."""

    name: str
    geometry: str
    pixel_mm: float
    blur_sigma_mm: float
    diameters_mm: tuple[float, ...]
    phases_px: tuple[tuple[float, float], ...]  # sub-pixel position (row, col) of every site of a diameter
    n_contrasts: int = 10  # log-spaced from 0.35 × the lower to 3.5 × the higher of the NPW and NPWE thresholds
    site_spacing_mm: float = 4.0  # between neighbouring sites (row4, pair2) or ring radius × 2 sin(π/5) (ring5)
    background: float = 1000.0
    marker_contrast: float = 0.5
    criterion_pc: float | None = None
    alternatives: tuple[int, ...] | None = None  # geometry "row": M of each diameter


ROW4 = Design(
    "row4-0.1mm",
    "row4",
    pixel_mm=0.1,
    blur_sigma_mm=0.06,
    diameters_mm=(0.12, 0.2, 0.35, 0.6, 1.0),
    phases_px=((0.0, 0.0), (0.3, 0.45), (0.5, 0.5), (0.15, 0.7), (0.4, 0.1)),
)
RING5 = Design(
    "ring5-0.085mm",
    "ring5",
    pixel_mm=0.085,
    blur_sigma_mm=0.04,
    diameters_mm=(0.1, 0.25, 0.5, 1.0),
    phases_px=((0.5, 0.5), (0.2, 0.35), (0.0, 0.0), (0.35, 0.25)),
    site_spacing_mm=4.5,
)
PAIR2 = Design(
    "pair2-0.07mm",
    "pair2",
    pixel_mm=0.07,
    blur_sigma_mm=0.05,
    diameters_mm=(0.1, 0.3, 0.8),
    phases_px=((0.25, 0.5), (0.5, 0.0), (0.1, 0.3)),
)


@dataclass
class Plate:
    """A plate of ``design`` for ``noise``: layout, pixel positions, truth, and a noise-free image."""

    design: Design
    noise: Noise
    viewing_distance_mm: float = 500.0
    margin_mm: float = 6.0
    targets: list[dict] = field(default_factory=list, init=False)
    markers: list[dict] = field(default_factory=list, init=False)

    def __post_init__(self):
        d = self.design
        ms = d.alternatives if d.geometry == "row" else (GEOMETRIES[d.geometry],) * len(d.diameters_mm)
        self.m_of = dict(zip(d.diameters_mm, ms))
        self.m = max(ms)
        # a fixed detectability for every M (3-AFC halfway), or the d′ of a Pc given for this plate's M
        self.dprime_t = (
            dprime_at_criterion(3) if d.criterion_pc is None else dprime_at_criterion(self.m, d.criterion_pc)
        )
        p = d.pixel_mm
        # site offsets (pixels, integer lattice) about the target's anchor
        s_px = d.site_spacing_mm / p
        if d.geometry == "ring5":
            rad = s_px / (2 * np.sin(np.pi / 5))
            ang = -np.pi / 2 + 2 * np.pi * np.arange(5) / 5
            offs = np.round(np.column_stack([rad * np.sin(ang), rad * np.cos(ang)]))
            cell = (2 * rad + s_px, 2 * rad + s_px)
        else:
            step = int(round(s_px))

            def row_offsets(m):
                return np.floor(np.column_stack([np.zeros(m), step * (np.arange(m) - (m - 1) / 2)]))

            offs = row_offsets(self.m)
            cell = (s_px, (self.m - 1) * step + s_px)
        offs_of = {dm: (row_offsets(self.m_of[dm]) if d.geometry == "row" else offs) for dm in d.diameters_mm}
        self._offsets = offs
        rng = np.random.default_rng(zlib.crc32(d.name.encode()))
        combos = [(dm, i, j) for i, dm in enumerate(d.diameters_mm) for j in range(d.n_contrasts)]
        ncols = int(np.ceil(np.sqrt(len(combos) * cell[0] / cell[1])))
        mpx = int(round(self.margin_mm / p)) + int(round(4.0 / p))  # room for the markers' column
        nrows = int(np.ceil(len(combos) / ncols))
        self.shape = (2 * mpx + int(np.ceil(nrows * cell[0])), 2 * mpx + int(np.ceil(ncols * cell[1])))
        contrasts = {}
        for dm in d.diameters_mm:
            ct = sorted((self.dprime_t / self.k_npw(dm), self.dprime_t / self.k_npwe(dm)))
            contrasts[dm] = np.geomspace(0.35 * ct[0], min(3.5 * ct[1], 0.9), d.n_contrasts)
        for j, (dm, i, jc) in enumerate(combos):
            r0 = mpx + int(round(cell[0] * (j // ncols + 0.5)))
            c0 = mpx + int(round(cell[1] * (j % ncols + 0.5)))
            ph = d.phases_px[i]
            self.targets.append(
                {
                    "id": f"d{i}-c{jc}",
                    "diameter_mm": dm,
                    "contrast": float(f"{contrasts[dm][jc]:.4g}"),
                    "sites_px": [(r0 + o[0] + ph[0], c0 + o[1] + ph[1]) for o in offs_of[dm]],
                    "signal_site": int(rng.integers(self.m_of[dm])),
                }
            )
        # plate outline = the image minus a frame of margin_mm/2; plate origin at pixel (o, o)
        self.origin_px = int(round(self.margin_mm / 2 / p))
        H, W = self.shape
        mk = 3.0 / p  # fiducial diameter 3 mm; key 5 mm
        q = mpx / 2 + self.origin_px / 2
        self.markers = [
            {"id": "F1", "rc": (q + 0.37, q + 0.21), "diameter_mm": 3.0},
            {"id": "F2", "rc": (q + 0.12, W - q - 0.44), "diameter_mm": 3.0},
            {"id": "F3", "rc": (H - q - 0.29, W - q - 0.08), "diameter_mm": 3.0},
            {"id": "K", "rc": (H - q - 0.3, q + 0.6 + 2 * mk / 3), "diameter_mm": 5.0},
        ]

    # ---------------------------------------------------------------- truth
    def _s1(self, diameter_mm: float) -> tuple[np.ndarray, int]:
        d = self.design
        i = d.diameters_mm.index(diameter_mm)
        return disc_patch(d.phases_px[i], diameter_mm / 2 / d.pixel_mm, d.blur_sigma_mm / d.pixel_mm)

    def _embedded_spectrum(self, diameter_mm: float) -> np.ndarray:
        s, _ = self._s1(diameter_mm)
        big = np.zeros(self.shape)
        big[: s.shape[0], : s.shape[1]] = s
        return np.fft.fft2(big)

    @cached_property
    def _lambda(self) -> np.ndarray:
        return self.noise.spectrum(self.shape)

    def k_npw(self, diameter_mm: float) -> float:
        """NPW d′ per unit contrast, b·ΔsᵀΔs/√(ΔsᵀKΔs) with Δs = s₁ (Barrett & Myers 2004, ch. 13)."""
        S2 = np.abs(self._embedded_spectrum(diameter_mm)) ** 2
        n = S2.size
        return float(self.design.background * (S2.sum() / n) / np.sqrt((S2 * self._lambda).sum() / n))

    def k_npwe(self, diameter_mm: float) -> float:
        """NPWE d′ per unit contrast: template E²⊛Δs over the whole plane (Burgess 1994; ICRU 54)."""
        S2 = np.abs(self._embedded_spectrum(diameter_mm)) ** 2
        p = self.design.pixel_mm
        f = np.hypot(np.fft.fftfreq(self.shape[0])[:, None], np.fft.fftfreq(self.shape[1])[None, :]) / p
        e2 = eye(f, self.viewing_distance_mm) ** 2
        n = S2.size
        num = (S2 * e2).sum() / n
        return float(self.design.background * num / np.sqrt((S2 * e2**2 * self._lambda).sum() / n))

    def truth(self, observer: str = "npw") -> dict[float, float]:
        """True threshold contrast per diameter, C_T = d′_T / k."""
        k = self.k_npw if observer == "npw" else self.k_npwe
        return {dm: self.dprime_t / k(dm) for dm in self.design.diameters_mm}

    # ---------------------------------------------------------------- images
    @cached_property
    def mean_image(self) -> np.ndarray:
        d = self.design
        p, sig = d.pixel_mm, d.blur_sigma_mm / d.pixel_mm
        t = np.zeros(self.shape)
        discs = [(m["rc"], m["diameter_mm"], d.marker_contrast) for m in self.markers]
        discs += [(tg["sites_px"][tg["signal_site"]], tg["diameter_mm"], tg["contrast"]) for tg in self.targets]
        for rc, dm, c in discs:
            ri, ci = int(np.floor(rc[0])), int(np.floor(rc[1]))
            patch, h = disc_patch((rc[0] - ri, rc[1] - ci), dm / 2 / p, sig)
            n = patch.shape[0]
            rs, cs = ri - h, ci - h
            t[rs : rs + n, cs : cs + n] += c * patch
        return d.background * (1.0 - t)

    def draw(self, rng: np.random.Generator) -> np.ndarray:
        return self.mean_image + self.noise.draw(rng, self.shape)

    # ---------------------------------------------------------------- layout
    def _mm(self, rc) -> tuple[float, float]:
        p = self.design.pixel_mm
        return (float((rc[1] - self.origin_px) * p), float((rc[0] - self.origin_px) * p))

    def layout_toml(self) -> str:
        """The plate in Limen's layout format limen-layout/1 (scorer/phantom/layout.py)."""
        p = self.design.pixel_mm
        H, W = self.shape
        w_mm = (W - 2 * self.origin_px) * p
        h_mm = (H - 2 * self.origin_px) * p
        out = [
            'format = "limen-layout/1"',
            "",
            "[phantom]",
            f'name = "independent truth plate {self.design.name}"',
            f"width_mm = {w_mm!r}",
            f"height_mm = {h_mm!r}",
            "",
        ]
        for mk in self.markers:
            x, y = self._mm(mk["rc"])
            out += [
                "[orientation_key]" if mk["id"] == "K" else "[[fiducials]]",
                f'id = "{mk["id"]}"',
                f"x_mm = {x!r}",
                f"y_mm = {y!r}",
                f"diameter_mm = {mk['diameter_mm']!r}",
                f"contrast = {self.design.marker_contrast!r}",
                "",
            ]
        for tg in self.targets:
            sites = ", ".join("[{!r}, {!r}]".format(*self._mm(rc)) for rc in tg["sites_px"])
            out += [
                "[[targets]]",
                f'id = "{tg["id"]}"',
                f"diameter_mm = {tg['diameter_mm']!r}",
                f"contrast = {tg['contrast']!r}",
                f"sites_mm = [{sites}]",
                f"signal_site = {tg['signal_site']}",
                "",
            ]
        return "\n".join(out)
