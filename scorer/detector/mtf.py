"""Presampling MTF by the slanted-edge method.

The steps, all on an image linear in air kerma:

1. **Find the edge.**  The dominant gradient direction tells whether the edge is
   closer to vertical (runs along the rows' index) or horizontal; a horizontal edge
   is handled by transposing.  On a block-averaged copy the strongest column
   gradient of each row gives a coarse line; rows where the edge is weak (outside
   an edge plate) are dropped.
2. **Locate it precisely.**  In a band of ``±(lsf_half_width_px + 8)`` pixels
   around the coarse line, each row's derivative (Hann-weighted) gives a centroid;
   a straight line ``x = a + b·y`` is fitted by least squares with 3-MAD outlier
   rejection, twice.  The edge angle is ``atan(b·Δx/Δy)`` to the pixel columns.
3. **Oversampled ESF.**  Every pixel of the band is projected on the edge normal
   (signed distance in mm) and averaged into bins of width
   ``bin_fraction × pixel pitch`` (default one quarter of a pixel); empty bins are
   filled by linear interpolation.  The bin average is a box filter of the bin
   width, corrected in step 5.
4. **LSF.**  Central difference ``(ESF[i+1] − ESF[i−1]) / (2Δ)``, multiplied by a
   Tukey window (cosine fraction 0.5) spanning ``±lsf_half_width_px`` pixels
   around the LSF centroid.
5. **MTF.**  |FFT| of the windowed LSF (zero-padded to at least 1024 bins),
   normalised at zero frequency, divided by the transfer functions of the binning
   box, sinc(fΔ), and of the central difference, sinc(2fΔ) (numpy's normalised
   sinc), so that a noise-free ideal edge returns its true presampling MTF.

Values are reported up to ``report_max_fraction_nyquist`` (default 1.1) times the
Nyquist frequency; :attr:`MTFResult.frequency_ext_per_mm` keeps them up to twice
the Nyquist frequency for the prediction's aliasing terms.

References
----------
.. [1] IEC 62220-1-1 / 62220-1-2, *Medical electrical equipment — Characteristics of
       digital X-ray imaging devices — Determination of the detective quantum
       efficiency* (slanted-edge presampling MTF; edge angle about 1.5°–3°, from memory).
.. [2] Bracewell, R. N. *The Fourier Transform and Its Applications* — transfer
       function of a box average and of a central difference (sinc).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import ndimage

from scorer.errors import LimenError

DEFAULT_BIN_FRACTION = 0.25
DEFAULT_LSF_HALF_WIDTH_PX = 40
#: an edge's step must exceed the pixel noise by this factor (a flat field has none)
MIN_STEP_TO_NOISE = 5.0
#: above this, an MTF value at low frequency is physically implausible
MAX_PLAUSIBLE_MTF = 1.05
MIN_EDGE_ROWS = 32
#: steepest edge accepted: the slanted-edge method measures the presampling MTF along the rows or columns only
#: for an edge close to them (IEC 62220-1 places it about 1.5°–3° off, from memory); at 10° the frequency axis
#: is still within 1.5 % (1/cos 10°)
MAX_EDGE_ANGLE_DEG = 10.0
#: the edge is cut into this many segments along its length for the MTF's uncertainty (at least 64 rows each)
N_SEGMENTS = 8
Z95 = 1.959963984540054


@dataclass
class MTFResult:
    """Presampling MTF of one edge orientation (or the mean of several).

    Attributes
    ----------
    frequency_per_mm, value : ndarray
        MTF up to ``report_max_fraction_nyquist`` × Nyquist.
    frequency_ext_per_mm, value_ext : ndarray
        The same curve up to 2 × Nyquist (for the aliasing terms of :mod:`scorer.detector.predict`).
    direction : str
        ``"x"`` when the MTF is along the image rows (measured on a near-vertical
        edge), ``"y"`` along the columns, ``"mean"`` for an average of both.
    edge_angle_deg : float
        Angle of the edge to the pixel columns (x) or rows (y), signed.
    pixel_pitch_mm : float
        Pitch across the edge; Nyquist = 1 / (2 · pitch).
    """

    frequency_per_mm: np.ndarray
    value: np.ndarray
    frequency_ext_per_mm: np.ndarray
    value_ext: np.ndarray
    direction: str
    edge_angle_deg: float
    pixel_pitch_mm: float
    bin_width_mm: float
    lsf_half_width_px: int
    n_edge_rows: int = 0
    empty_bins: int = 0
    esf_distance_mm: np.ndarray | None = None
    esf: np.ndarray | None = None
    warnings: list[str] = field(default_factory=list)
    se_ext: np.ndarray | None = None  # standard error of value_ext (spread between segments of the edge)
    n_segments: int = 0

    @property
    def se(self) -> np.ndarray | None:
        return None if self.se_ext is None else self.se_ext[: self.value.size]

    def ci(self) -> tuple[np.ndarray, np.ndarray] | None:
        """95 % CI of ``value`` (normal, from ``se``), or None without segments."""
        if self.se is None:
            return None
        return self.value - Z95 * self.se, self.value + Z95 * self.se

    @property
    def nyquist_per_mm(self) -> float:
        return 0.5 / self.pixel_pitch_mm

    def at(self, frequency_per_mm: NDArray[np.float64] | Sequence[float]) -> NDArray[np.float64]:
        """MTF interpolated at the given frequencies (NaN beyond the extended range)."""
        value: NDArray[np.float64] = np.interp(
            frequency_per_mm, self.frequency_ext_per_mm, self.value_ext, left=np.nan, right=np.nan
        )
        return value

    def to_dict(self) -> dict[str, Any]:
        ci = self.ci()
        return {
            "frequency_per_mm": self.frequency_per_mm.tolist(),
            "value": self.value.tolist(),
            "direction": self.direction,
            "edge_angle_deg": self.edge_angle_deg,
            "pixel_pitch_mm": self.pixel_pitch_mm,
            "nyquist_per_mm": self.nyquist_per_mm,
            "bin_width_mm": self.bin_width_mm,
            "lsf_half_width_px": self.lsf_half_width_px,
            "n_edge_rows": self.n_edge_rows,
            "empty_bins": self.empty_bins,
            "ci_low": None if ci is None else ci[0].tolist(),
            "ci_high": None if ci is None else ci[1].tolist(),
            "ci_note": None
            if self.se is None
            else (
                f"95 % CI from the spread of the MTF between {self.n_segments} "
                "segments of the edge (per edge), combined over edges"
            ),
            "warnings": list(self.warnings),
        }


def _edge_orientation(pixels: np.ndarray) -> str:
    """'vertical' when the intensity changes mostly along x (across columns)."""
    step = max(1, int(np.ceil(max(pixels.shape) / 512)))
    small = pixels[::step, ::step]
    gx = np.abs(np.diff(small, axis=1)).sum()
    gy = np.abs(np.diff(small, axis=0)).sum()
    return "vertical" if gx >= gy else "horizontal"


def _coarse_line(pixels: np.ndarray, path: object | None) -> tuple[np.ndarray, np.ndarray]:
    """Rows where a near-vertical edge is strong, and its coarse column there."""
    ny, nx = pixels.shape
    block = max(1, int(min(ny, nx) // 256))
    if block > 1:
        h, w = (ny // block) * block, (nx // block) * block
        small = pixels[:h, :w].reshape(h // block, block, w // block, block).mean(axis=(1, 3))
    else:
        small = pixels
    sm = ndimage.gaussian_filter(small, 1.0)
    g = np.abs(np.diff(sm, axis=1))
    col = np.argmax(g, axis=1)
    strength = g[np.arange(g.shape[0]), col]
    top = np.percentile(strength, 90)
    if not np.isfinite(top) or top <= 0:
        raise LimenError("no edge found in the edge image (flat image?)", path)
    keep = strength > 0.5 * top
    rows_small = np.nonzero(keep)[0]
    if rows_small.size < 4:
        raise LimenError("no straight edge found in the edge image", path)
    x_small = col[keep] + 0.5
    # robust straight-line fit on the coarse positions
    for _ in range(3):
        b, a = np.polyfit(rows_small, x_small, 1)
        resid = x_small - (a + b * rows_small)
        mad = np.median(np.abs(resid - np.median(resid))) + 0.5
        ok = np.abs(resid) < 4 * mad + 1
        rows_small, x_small = rows_small[ok], x_small[ok]
        if rows_small.size < 4:
            raise LimenError("no straight edge found in the edge image", path)
    b, a = np.polyfit(rows_small, x_small, 1)
    r0, r1 = rows_small.min() * block, (rows_small.max() + 1) * block
    rows = np.arange(r0, min(r1, ny))
    centre_small = (rows + 0.5) / block - 0.5
    x = ((a + b * centre_small) * block).astype(float) + (block - 1) / 2.0
    return rows, x


def _band(
    pixels: np.ndarray, rows: np.ndarray, x_centre: np.ndarray, half: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sheared band of ±half pixels around x_centre on each row (rows fully inside only)."""
    nx = pixels.shape[1]
    start = np.round(x_centre).astype(int) - half
    inside = (start >= 0) & (start + 2 * half + 1 <= nx)
    rows, start = rows[inside], start[inside]
    offs = np.arange(2 * half + 1)
    cols = start[:, None] + offs[None, :]
    band = pixels[rows[:, None], cols]
    return rows, cols, band


def _fit_edge(rows: np.ndarray, cols: np.ndarray, band: np.ndarray, path: object | None) -> tuple[float, float]:
    """Sub-pixel edge centroid per row, then a robust straight line x = a + b·y."""
    d = np.diff(band, axis=1)
    xmid = 0.5 * (cols[:, 1:] + cols[:, :-1])
    # orient the derivative so that the edge step is positive
    if d.sum() < 0:
        d = -d
    w = np.hanning(d.shape[1] + 2)[1:-1]
    dw = np.clip(d, 0, None) * w
    tot = dw.sum(axis=1)
    good = tot > 0
    if good.sum() < MIN_EDGE_ROWS:
        raise LimenError(f"edge too short: {good.sum()} usable rows, need {MIN_EDGE_ROWS}", path)
    cen = (dw[good] * xmid[good]).sum(axis=1) / tot[good]
    y = rows[good].astype(float)
    keep = np.ones_like(y, dtype=bool)
    for _ in range(2):
        b, a = np.polyfit(y[keep], cen[keep], 1)
        resid = cen - (a + b * y)
        mad = np.median(np.abs(resid[keep] - np.median(resid[keep])))
        keep = np.abs(resid) <= max(3.0 * 1.4826 * mad, 1e-9)
        if keep.sum() < MIN_EDGE_ROWS // 2:
            keep = np.ones_like(y, dtype=bool)
            break
    b, a = np.polyfit(y[keep], cen[keep], 1)
    return a, b  # numpy float64, a float


def _tukey_window(n: int, centre: float, half_width_bins: float, alpha: float = 0.5) -> np.ndarray:
    i = np.arange(n, dtype=float)
    t = (i - centre) / half_width_bins  # −1 … 1 inside the window
    w = np.zeros(n)
    a = np.abs(t)
    flat = a <= 1 - alpha
    taper = (a > 1 - alpha) & (a < 1)
    w[flat] = 1.0
    w[taper] = 0.5 * (1 + np.cos(np.pi * (a[taper] - (1 - alpha)) / alpha))
    return w


def measure_mtf(
    pixels: NDArray[Any],
    spacing_mm: Sequence[float] | NDArray[np.float64],
    *,
    bin_fraction: float = DEFAULT_BIN_FRACTION,
    lsf_half_width_px: int = DEFAULT_LSF_HALF_WIDTH_PX,
    report_max_fraction_nyquist: float = 1.1,
    path: object | None = None,
    keep_esf: bool = False,
) -> MTFResult:
    """Presampling MTF from one slanted-edge image (see the module docstring).

    Parameters
    ----------
    pixels : 2-D array, linear in air kerma
    spacing_mm : (row, column) pixel spacing in mm
    bin_fraction : ESF bin width as a fraction of the pixel pitch across the edge
    lsf_half_width_px : half width of the LSF window, pixels
    path : file name used in error messages

    Raises
    ------
    LimenError
        When no straight edge is found, the edge is too short, or its angle is too
        small to oversample (less than one pixel of shift along its length).
    """
    px = np.asarray(pixels, dtype=np.float64)
    if px.ndim != 2 or min(px.shape) < 2 * (lsf_half_width_px + 8) + 1:
        raise LimenError(f"edge image too small ({'x'.join(map(str, px.shape))} px) for the slanted-edge MTF", path)
    if not np.all(np.isfinite(px)):
        raise LimenError("edge image holds non-finite pixel values", path)
    if not (0 < bin_fraction <= 0.5):
        raise ValueError("bin_fraction must be in (0, 0.5]")
    dy, dx = float(spacing_mm[0]), float(spacing_mm[1])
    orientation = _edge_orientation(px)
    if orientation == "horizontal":
        px = px.T
        dy, dx = dx, dy
    direction = "x" if orientation == "vertical" else "y"
    warnings: list[str] = []

    half = int(lsf_half_width_px) + 8
    rows, xc = _coarse_line(px, path)
    rows, cols, band = _band(px, rows, xc, half)
    if rows.size < MIN_EDGE_ROWS:
        raise LimenError(f"edge too short or too close to the image border ({rows.size} rows)", path)
    a, b = _fit_edge(rows, cols, band, path)
    # second pass centred on the fitted line
    rows, cols, band = _band(px, rows, a + b * rows, half)
    a, b = _fit_edge(rows, cols, band, path)

    shift_px = abs(b) * (rows.max() - rows.min())
    if shift_px < 1.0:
        raise LimenError(
            f"edge angle {np.degrees(np.arctan(b * dx / dy)):.2f}° too small: the edge moves "
            f"{shift_px:.2f} px along its length, need at least 1 px to oversample",
            path,
        )
    angle_deg = float(np.degrees(np.arctan(b * dx / dy)))
    if abs(angle_deg) > MAX_EDGE_ANGLE_DEG:
        raise LimenError(
            f"edge angle {angle_deg:.1f}° from the pixel {'columns' if direction == 'x' else 'rows'} is more than "
            f"{MAX_EDGE_ANGLE_DEG:g}°: the MTF would be measured along a diagonal, not along the rows or columns; "
            "tilt the edge by about 1.5°–3°",
            path,
        )
    if abs(angle_deg) < 1.0:
        warnings.append(f"edge angle {angle_deg:.2f}° below 1° (about 1.5°–3° recommended)")

    # signed distance (mm) of every band pixel from the edge line, along its normal
    norm = dy / np.hypot(b * dx, dy)
    dist = ((cols - (a + b * rows[:, None])) * dx) * norm
    vals = band
    pitch = dx * norm
    bw = bin_fraction * pitch
    lim = (lsf_half_width_px + 4) * pitch
    sel = np.abs(dist) < lim
    idx = np.floor((dist[sel] + lim) / bw).astype(int)
    nb = int(np.ceil(2 * lim / bw))
    idx = np.clip(idx, 0, nb - 1)
    counts = np.bincount(idx, minlength=nb)
    sums = np.bincount(idx, weights=vals[sel], minlength=nb)
    centres = -lim + (np.arange(nb) + 0.5) * bw
    filled = counts > 0
    empty = int((~filled).sum())
    if filled.sum() < nb // 2:
        raise LimenError("too few edge samples to build the oversampled edge spread function", path)
    esf = np.interp(centres, centres[filled], sums[filled] / counts[filled])
    # an edge image must hold a step well above the pixel noise (a flat field given as an edge has none)
    far = np.abs(dist) > 0.6 * lim
    lo_side, hi_side = vals[far & (dist < 0)], vals[far & (dist > 0)]
    if lo_side.size > 10 and hi_side.size > 10:
        step = abs(float(hi_side.mean() - lo_side.mean()))
        noise = float(np.sqrt(0.5 * (lo_side.var() + hi_side.var())))
        if noise > 0 and step < MIN_STEP_TO_NOISE * noise:
            raise LimenError(
                f"no edge: the step across the fitted line is {step / noise:.1f}× the pixel noise "
                f"(need ≥ {MIN_STEP_TO_NOISE:g}×); is this a flat field given as an edge?",
                path,
            )
    if empty:
        warnings.append(f"{empty} empty ESF bins filled by interpolation (edge short or angle small)")

    f, mtf = _mtf_from_esf(esf, bw, nb, lsf_half_width_px * pitch / bw, path)
    # uncertainty: the same MTF from N_SEGMENTS consecutive segments of the edge; SE of the mean = SD/√n
    n_seg = min(N_SEGMENTS, rows.size // 64)
    se_full = None
    if n_seg >= 2:
        seg_of_row = np.minimum((np.arange(rows.size) * n_seg) // rows.size, n_seg - 1)
        seg_mtf = []
        for j in range(n_seg):
            rs = np.repeat(seg_of_row == j, dist.shape[1]).reshape(dist.shape) & sel
            ij = np.clip(np.floor((dist[rs] + lim) / bw).astype(int), 0, nb - 1)
            cj = np.bincount(ij, minlength=nb)
            sj = np.bincount(ij, weights=vals[rs], minlength=nb)
            fj = cj > 0
            if fj.sum() < nb // 2:
                continue
            esf_j = np.interp(centres, centres[fj], sj[fj] / cj[fj])
            try:
                seg_mtf.append(_mtf_from_esf(esf_j, bw, nb, lsf_half_width_px * pitch / bw, path)[1])
            except LimenError:
                continue
        if len(seg_mtf) >= 2:
            se_full = np.std(seg_mtf, axis=0, ddof=1) / np.sqrt(len(seg_mtf))
            n_seg = len(seg_mtf)
    nyq = 0.5 / pitch
    low = (f > 0) & (f <= 0.5 * nyq)
    if low.any() and float(mtf[low].max()) > MAX_PLAUSIBLE_MTF:
        warnings.append(
            f"implausible MTF: {float(mtf[low].max()):.2f} > {MAX_PLAUSIBLE_MTF:g} below half the "
            "Nyquist frequency (an MTF cannot exceed 1; check that this is a sharp, straight edge)"
        )
    ext = f <= 2.0 * nyq + 1e-12
    rep = f <= report_max_fraction_nyquist * nyq + 1e-12
    return MTFResult(
        frequency_per_mm=f[rep],
        value=mtf[rep],
        frequency_ext_per_mm=f[ext],
        value_ext=mtf[ext],
        direction=direction,
        edge_angle_deg=angle_deg,
        pixel_pitch_mm=float(pitch),
        bin_width_mm=float(bw),
        lsf_half_width_px=int(lsf_half_width_px),
        n_edge_rows=int(rows.size),
        empty_bins=empty,
        esf_distance_mm=centres if keep_esf else None,
        esf=esf if keep_esf else None,
        warnings=warnings,
        se_ext=None if se_full is None else se_full[ext],
        n_segments=n_seg if se_full is not None else 0,
    )


def _mtf_from_esf(
    esf: np.ndarray, bw: float, nb: int, window_bins: float, path: object | None
) -> tuple[np.ndarray, np.ndarray]:
    """Steps 4–5: LSF by central difference in a Tukey window, |FFT| normalised and corrected."""
    lsf = np.zeros_like(esf)
    lsf[1:-1] = (esf[2:] - esf[:-2]) / (2 * bw)
    if lsf.sum() < 0:
        lsf = -lsf
    pos = np.clip(lsf, 0, None)
    c = float((pos * np.arange(nb)).sum() / pos.sum()) if pos.sum() > 0 else nb / 2
    lsf = lsf * _tukey_window(nb, c, window_bins)
    nfft = max(1024, 1 << int(np.ceil(np.log2(4 * nb))))
    spec = np.abs(np.fft.rfft(lsf, nfft))
    if spec[0] <= 0:
        raise LimenError("edge spread function has no net step", path)
    f = np.fft.rfftfreq(nfft, d=bw)
    mtf = spec / spec[0]
    return f, mtf / (np.sinc(f * bw) * np.sinc(2 * f * bw))  # box average and central difference


def mean_mtf(results: list[MTFResult], direction: str | None = None) -> MTFResult:
    """Average several MTF results on the first one's frequency grid.

    Used for repeated edges of one orientation and for the mean of the two
    orientations (``direction="mean"``).
    """
    if not results:
        raise ValueError("no MTF results to average")
    if len(results) == 1 and direction is None:
        return results[0]
    ref = results[0]
    f, fe = ref.frequency_per_mm, ref.frequency_ext_per_mm
    v = np.mean([np.interp(f, r.frequency_ext_per_mm, r.value_ext) for r in results], axis=0)
    ve = np.mean([np.interp(fe, r.frequency_ext_per_mm, r.value_ext) for r in results], axis=0)
    dirs = {r.direction for r in results}
    d = direction or (dirs.pop() if len(dirs) == 1 else "mean")
    warn = [w for r in results for w in r.warnings]
    se_ext = None
    ses = [r.se_ext for r in results if r.se_ext is not None]
    if len(ses) == len(results):
        # SE of a mean of independent curves: √(Σ se²)/n
        se_ext = np.sqrt(
            np.sum([np.interp(fe, r.frequency_ext_per_mm, se) ** 2 for r, se in zip(results, ses)], axis=0)
        ) / len(results)
    return MTFResult(
        frequency_per_mm=f,
        value=v,
        frequency_ext_per_mm=fe,
        value_ext=ve,
        direction=d,
        edge_angle_deg=float(np.mean([r.edge_angle_deg for r in results])),
        pixel_pitch_mm=float(np.mean([r.pixel_pitch_mm for r in results])),
        bin_width_mm=ref.bin_width_mm,
        lsf_half_width_px=ref.lsf_half_width_px,
        n_edge_rows=int(sum(r.n_edge_rows for r in results)),
        empty_bins=int(sum(r.empty_bins for r in results)),
        warnings=warn,
        se_ext=se_ext,
        n_segments=int(min(r.n_segments for r in results)),
    )
