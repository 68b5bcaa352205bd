"""Periodic and fixed patterns in the background of phantom images: found, measured, and optionally removed.

Grid lines or interference add a sinusoid to every image; a detector's gain pattern that the flat-field
correction left adds the same structure to every image.  Neither averages out over the images of a set, and
both move the thresholds of the smallest discs.  This module finds them in the relative residual
e = g/b − 1 of :mod:`scorer.observer.defects` (features and defects left out) and measures them.

Periodic patterns
-----------------
* **Spectrum.**  The noise power spectrum of the background, estimated as in IEC 62220-1 for the NNPS: square
  ROIs (128 px, here not overlapping, so their periodograms are independent) where at least 90 % of the pixels
  are valid (others set to 0), each with its mean removed, averaged periodograms
  |FFT(e·w)|² · Δx·Δy / Σw² (mm², relative units).  A Hann window w keeps a sinusoid's power within a few
  bins (Harris 1978).
* **Peaks.**  Each bin above 6 bins from zero frequency is compared with the median of its 7 × 7 neighbourhood
  and of its 1 × 7 and 7 × 1 strips (the largest of the three, so a ridge along an axis — line-correlated
  noise — is not a peak).  Averaging K independent periodograms makes a bin's ratio Gamma(K, 1/K)-distributed
  (Bendat & Piersol); a bin is a peak when its ratio passes the Gamma quantile that leaves α/N_bins in the tail
  (α = 10⁻³ per spectrum, N_bins the independent bins tested: half the plane, the spectrum of a real image being
  symmetric).  The reference, the largest of three medians, lies a little above a bin's mean, so α is an upper
  bound: measured on white noise (K = 16 ROIs), 0.05–0.1 α.  On and next to the frequency axes the average
  counts as many periodograms as the ROIs' bands of rows (fx ≈ 0) or columns (fy ≈ 0), because noise
  correlated along rows or columns is shared by the ROIs of one band.
* **Amplitude.**  The excess power in the 5 × 5 bins about the peak: a sinusoid a·cos(2π f·r) on an N-pixel ROI
  puts N·a²/4 in one half-plane of the periodogram normalised by Σw², so a = 2√(excess/N) (relative to the
  background).  Frequency: the power-weighted centroid, in cycles/mm; direction: the angle of the frequency
  vector from the image's x axis (columns).  Lines perpendicular to it.
* **Notch.**  :func:`notch` removes a peak from an image: a Gaussian notch of half a ROI bin about the
  frequency (refined on the whole image's spectrum) and its mirror, in the Fourier domain.

Fixed patterns
--------------
:func:`fixed_pattern` compares the variance of the mean residual over n images with what the images' own
noise allows, σ²/n, block by block (64 px): R = mean(ē²)/mean(s²/n), s² the per-pixel variance over the
images (n − 1 degrees of freedom).  Without a fixed pattern R ≈ 1 whatever the noise's correlation; the blocks'
R give its standard error.  A pattern is reported when z > Φ⁻¹(1 − α) (one-sided, α = 10⁻³) and its relative SD
√(mean ē² − mean s²/n) is at least 0.1 × the per-image noise: adding a shared pattern of relative SD ρ·σ to
noise σ raises the noise the d′ method sees by √(1 + ρ²) (≥ 0.5 % from ρ = 0.1).  The periodic patterns found
in the set are fitted out of each block first (they are reported on their own).

References
----------
.. [1] IEC 62220-1-1 / 62220-1-2, *Determination of the detective quantum efficiency* — NNPS from ROIs of a
       flat field, averaged periodograms (see docs/references.md).
.. [2] Harris, F. J. "On the use of windows for harmonic analysis with the discrete Fourier transform",
       Proc. IEEE 66 (1978) — the Hann window's leakage.
.. [3] Bendat, J. S. & Piersol, A. G. *Random Data* — an average of K periodograms is χ²₂ₖ/2K distributed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft
from scipy import ndimage, stats

from scorer.errors import LimenError

DEFAULT_FALSE_ALARM = 1e-3
ROI_PX = 128
MIN_BIN = 6
NEIGHBOURHOOD = 7
#: a shared pattern is reported when, besides being significant, its SD is at least this fraction of the
#: per-image noise (it then raises the d′ method's noise, and the thresholds, by ≥ 0.5 %)
MIN_FIXED_TO_NOISE = 0.1


@dataclass
class BackgroundSpectrum:
    """Averaged background periodogram (NNPS-like, relative units, mm²), zero frequency at [0, 0] (not shifted)."""

    nnps_mm2: np.ndarray
    n_rois: int
    roi_px: int
    pixel_mm: float
    n_row_bands: int = 0  # distinct bands of rows (and of columns) the ROIs come from
    n_col_bands: int = 0

    def frequencies_per_mm(self) -> tuple[np.ndarray, np.ndarray]:
        f = sfft.fftfreq(self.roi_px, d=self.pixel_mm)
        return f, f

    def combined(self, other: "BackgroundSpectrum") -> "BackgroundSpectrum":
        """The average over both sets of ROIs."""
        if other.roi_px != self.roi_px:
            raise ValueError("spectra of different ROI sizes")
        n = self.n_rois + other.n_rois
        avg = (self.nnps_mm2 * self.n_rois + other.nnps_mm2 * other.n_rois) / max(n, 1)
        # images are independent: their bands add up
        bands = (self.n_row_bands + other.n_row_bands, self.n_col_bands + other.n_col_bands)
        return BackgroundSpectrum(avg, n, self.roi_px, self.pixel_mm, *bands)

    def radial_profile(self, n_bins: int | None = None):
        """Median and maximum of the spectrum over annuli: (frequency_per_mm, median, max)."""
        fr, fc = self.frequencies_per_mm()
        f = np.hypot(fr[:, None], fc[None, :])
        nyq = 0.5 / self.pixel_mm
        n_bins = n_bins or self.roi_px // 2
        edges = np.linspace(0, nyq, n_bins + 1)
        mid, med, mx = [], [], []
        for a, b in zip(edges[:-1], edges[1:]):
            sel = (f >= a) & (f < b)
            if a == 0 or not sel.any():
                continue
            mid.append((a + b) / 2)
            med.append(float(np.median(self.nnps_mm2[sel])))
            mx.append(float(np.max(self.nnps_mm2[sel])))
        return np.array(mid), np.array(med), np.array(mx)


@dataclass(frozen=True)
class PeriodicPeak:
    """A narrow peak of the background spectrum: a periodic pattern."""

    frequency_per_mm: float  # |f|
    fx_per_mm: float  # along the image's x axis (columns)
    fy_per_mm: float  # along y (rows)
    amplitude: float  # relative to the background (fraction)
    ratio: float  # peak bin / local reference level

    @property
    def angle_deg(self) -> float:
        """Direction of the frequency vector from the x axis (columns), 0…180°."""
        return float(np.degrees(np.arctan2(self.fy_per_mm, self.fx_per_mm)) % 180.0)

    @property
    def lines(self) -> str:
        a = self.angle_deg
        if a < 5 or a > 175:
            return "vertical lines (varying along x)"
        if abs(a - 90) < 5:
            return "horizontal lines (varying along y)"
        return f"lines at {a:.0f}° (frequency vector from the x axis)"

    def describe(self) -> str:
        return f"{self.frequency_per_mm:.3g} cycles/mm, {self.lines}, amplitude {100 * self.amplitude:.2g} %"

    def to_dict(self) -> dict:
        return {
            "frequency_per_mm": self.frequency_per_mm,
            "fx_per_mm": self.fx_per_mm,
            "fy_per_mm": self.fy_per_mm,
            "angle_deg": self.angle_deg,
            "amplitude": self.amplitude,
            "ratio": self.ratio,
            "description": self.describe(),
        }


def background_spectrum(
    e: np.ndarray, valid: np.ndarray, pixel_mm: float, roi_px: int = ROI_PX, min_valid: float = 0.9
) -> BackgroundSpectrum | None:
    """Averaged Hann-windowed periodogram of the relative residual over non-overlapping ROIs (None: no ROI)."""
    H, W = e.shape
    win1 = np.hanning(roi_px + 2)[1:-1]
    win = win1[:, None] * win1[None, :]
    sw2 = float(np.sum(win**2))
    acc = np.zeros((roi_px, roi_px))
    n = 0
    bands_r, bands_c = set(), set()
    for r0 in range(0, H - roi_px + 1, roi_px):
        for c0 in range(0, W - roi_px + 1, roi_px):
            v = valid[r0 : r0 + roi_px, c0 : c0 + roi_px]
            if np.mean(v) < min_valid:
                continue
            x = np.where(v, e[r0 : r0 + roi_px, c0 : c0 + roi_px], 0.0)
            x = np.where(v, x - x[v].mean(), 0.0)
            acc += np.abs(sfft.fft2(x * win)) ** 2
            n += 1
            bands_r.add(r0)
            bands_c.add(c0)
    if n == 0:
        return None
    return BackgroundSpectrum(acc / n / sw2 * pixel_mm * pixel_mm, n, roi_px, pixel_mm, len(bands_r), len(bands_c))


def find_peaks(spectrum: BackgroundSpectrum, false_alarm: float = DEFAULT_FALSE_ALARM) -> list[PeriodicPeak]:
    """Narrow peaks of the background spectrum (see module docstring), strongest first."""
    P = spectrum.nnps_mm2
    n = spectrum.roi_px
    K = spectrum.n_rois
    k = NEIGHBOURHOOD
    ref = np.maximum.reduce(
        [
            ndimage.median_filter(P, size=(k, k), mode="wrap"),
            ndimage.median_filter(P, size=(1, k), mode="wrap"),
            ndimage.median_filter(P, size=(k, 1), mode="wrap"),
        ]
    )
    fi = sfft.fftfreq(n) * n  # integer bin indices
    FR, FC = np.meshgrid(fi, fi, indexing="ij")
    tested = np.hypot(FR, FC) >= MIN_BIN
    # a real image's spectrum is symmetric, P(−f) = P(f): half the bins are independent tests; each peak is
    # found twice and kept once, where its largest bin lies in the half plane fx > 0 (or fx = 0, fy > 0)
    n_bins = int(np.count_nonzero(tested)) // 2
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(ref > 0, P / ref, 0.0)
    bound = np.full(P.shape, float(stats.gamma.isf(false_alarm / max(n_bins, 1), K, scale=1.0 / K)))
    # on and next to the axes, line-correlated noise is shared by the ROIs of one band of rows (fx ≈ 0) or
    # columns (fy ≈ 0): there the average holds as many independent periodograms as bands
    for near_axis, k_band in ((np.abs(FC) <= 1, spectrum.n_row_bands), (np.abs(FR) <= 1, spectrum.n_col_bands)):
        if 0 < k_band < K:
            bound[near_axis] = float(stats.gamma.isf(false_alarm / max(n_bins, 1), k_band, scale=1.0 / k_band))
    flagged = tested & (ratio > bound)
    if not flagged.any():
        return []
    # group in the shifted plane so that neighbours are contiguous
    sh = np.fft.fftshift
    groups, n_groups = ndimage.label(sh(flagged), structure=np.ones((3, 3), bool))
    Ps, refs, FRs, FCs = sh(P), sh(ref), sh(FR), sh(FC)
    bin_mm = 1.0 / (n * spectrum.pixel_mm)
    n_pix = n * n
    peaks = []
    for j, sl in enumerate(ndimage.find_objects(groups), start=1):
        m = groups[sl] == j
        rr, cc = np.nonzero(m)
        i_max = np.argmax(Ps[sl][m])
        r, c = rr[i_max] + sl[0].start, cc[i_max] + sl[1].start
        if not (FCs[r, c] > 0 or (FCs[r, c] == 0 and FRs[r, c] > 0)):
            continue  # the mirror of a peak kept from the other half plane
        r0, r1, c0, c1 = max(r - 2, 0), min(r + 3, n), max(c - 2, 0), min(c + 3, n)
        excess = np.clip(Ps[r0:r1, c0:c1] - refs[r0:r1, c0:c1], 0.0, None)
        tot = float(excess.sum())
        fr = float((excess * FRs[r0:r1, c0:c1]).sum() / tot) if tot > 0 else float(FRs[r, c])
        fc = float((excess * FCs[r0:r1, c0:c1]).sum() / tot) if tot > 0 else float(FCs[r, c])
        # excess is in mm² (× Δx·Δy): back to the periodogram's units before the amplitude
        amp = 2.0 * np.sqrt(tot / (spectrum.pixel_mm**2) / n_pix)
        peaks.append(
            PeriodicPeak(
                float(np.hypot(fr, fc) * bin_mm),
                float(fc * bin_mm),
                float(fr * bin_mm),
                float(amp),
                float(Ps[r, c] / refs[r, c]) if refs[r, c] > 0 else float("inf"),
            )
        )
    peaks.sort(key=lambda p: -p.amplitude)
    return peaks


def notch(pixels: np.ndarray, peaks: list[PeriodicPeak], pixel_mm: float, roi_px: int = ROI_PX) -> np.ndarray:
    """The image with each peak's frequency (and its mirror) removed by a narrow Gaussian notch.

    The notch's SD is half a bin of the ROI spectrum the peak was found in (1/(2·roi_px·pixel) cycles/mm);
    its centre is refined to the largest |FFT| of the whole image within one ROI bin of the peak.  The mean
    and everything away from the peak are unchanged.
    """
    g = np.asarray(pixels, float)
    if not peaks:
        return g
    H, W = g.shape
    G = sfft.fft2(g)
    fr = sfft.fftfreq(H, d=pixel_mm)[:, None]
    fc = sfft.fftfreq(W, d=pixel_mm)[None, :]
    s = 0.5 / (roi_px * pixel_mm)
    Hn = np.ones((H, W))
    absG = np.abs(G)
    for p in peaks:
        for sign in (1.0, -1.0):
            fy, fx = sign * p.fy_per_mm, sign * p.fx_per_mm
            near = (np.abs(fr - fy) <= 2 * s) & (np.abs(fc - fx) <= 2 * s)
            if near.any():
                idx = np.unravel_index(np.argmax(np.where(near, absG, -1.0)), absG.shape)
                fy, fx = float(fr[idx[0], 0]), float(fc[0, idx[1]])
            Hn *= 1.0 - np.exp(-((fr - fy) ** 2 + (fc - fx) ** 2) / (2 * s * s))
    return np.real(sfft.ifft2(G * Hn))


# --------------------------------------------------------------------------- fixed pattern
@dataclass
class FixedPattern:
    """Structure shared by the images of a set, beyond what their noise allows."""

    n_images: int
    ratio: float  # mean ē² / mean(s²/n): 1 without a fixed pattern
    z: float
    relative_sd: float  # SD of the shared pattern (fraction of the background)
    noise_sd: float  # per-image noise SD (fraction of the background)
    significant: bool
    n_pixels: int
    false_alarm: float = DEFAULT_FALSE_ALARM
    notes: list[str] = field(default_factory=list)

    def describe(self) -> str:
        return (
            f"a fixed pattern shared by the {self.n_images} images: relative SD {100 * self.relative_sd:.2g} % "
            f"({self.relative_sd / self.noise_sd:.2g} × the per-image noise of {100 * self.noise_sd:.2g} %); "
            "it does not average out over images"
        )

    def to_dict(self) -> dict:
        return {
            "n_images": self.n_images,
            "variance_ratio": self.ratio,
            "z": self.z,
            "relative_sd": self.relative_sd,
            "noise_sd": self.noise_sd,
            "significant": self.significant,
            "n_pixels": self.n_pixels,
            "false_alarm": self.false_alarm,
        }


def fixed_pattern(
    sum_e: np.ndarray,
    sum_e2: np.ndarray,
    count: np.ndarray,
    n_images: int,
    *,
    block_px: int = 64,
    false_alarm: float = DEFAULT_FALSE_ALARM,
    peaks: list[PeriodicPeak] = (),
    pixel_mm: float = 1.0,
) -> FixedPattern | None:
    """Test the images' mean residual for a shared pattern (see module docstring); None below 3 images.

    ``peaks`` (periodic patterns found in the set, frequencies in cycles/mm at ``pixel_mm``) are fitted and
    removed in each block before its mean square is taken — a sinusoid and its first-order terms in x and y,
    which follow a frequency known to a fraction of a bin — so the test reports what is shared besides them;
    the residual mean square divides by the pixels less the fitted terms.
    """
    if n_images < 3:
        return None
    if sum_e.shape != sum_e2.shape or sum_e.shape != count.shape:
        raise LimenError("fixed-pattern sums of different shapes")
    full = count >= n_images
    n = float(n_images)
    mean = np.where(full, sum_e / n, 0.0)
    var = np.where(full, (sum_e2 - n * mean**2) / (n - 1.0), 0.0)
    H, W = sum_e.shape
    rows = []
    for r0 in range(0, H - block_px + 1, block_px):
        for c0 in range(0, W - block_px + 1, block_px):
            f = full[r0 : r0 + block_px, c0 : c0 + block_px]
            if f.mean() < 0.5:
                continue
            x = mean[r0 : r0 + block_px, c0 : c0 + block_px][f]
            if peaks:
                yy, xx = np.nonzero(f)
                cols = []
                for pk in peaks:
                    phase = 2 * np.pi * pixel_mm * (pk.fx_per_mm * (xx + c0) + pk.fy_per_mm * (yy + r0))
                    u, v = (xx - block_px / 2) / block_px, (yy - block_px / 2) / block_px
                    for w in (np.cos(phase), np.sin(phase)):
                        cols += [w, u * w, v * w]
                X = np.column_stack(cols)
                coef, *_ = np.linalg.lstsq(X, x, rcond=None)
                m2 = float(np.sum((x - X @ coef) ** 2)) / max(x.size - X.shape[1], 1)
            else:
                m2 = float(np.mean(x**2))
            v = float(np.mean(var[r0 : r0 + block_px, c0 : c0 + block_px][f]))
            if v > 0:
                rows.append((m2, v / n))
    if len(rows) < 4:
        return None
    a = np.asarray(rows)
    R = a[:, 0] / a[:, 1]
    ratio = float(a[:, 0].sum() / a[:, 1].sum())
    se = float(np.std(R, ddof=1) / np.sqrt(len(R)))
    z = (float(np.mean(R)) - 1.0) / se if se > 0 else 0.0
    rel = float(np.sqrt(max(a[:, 0].mean() - a[:, 1].mean(), 0.0)))
    noise = float(np.sqrt(a[:, 1].mean() * n))
    sig = z > float(stats.norm.isf(false_alarm)) and rel >= MIN_FIXED_TO_NOISE * noise
    return FixedPattern(n_images, ratio, float(z), rel, noise, bool(sig), int(np.count_nonzero(full)), false_alarm)
