"""The physical parameters of a simulated flat panel, and what follows from them analytically.

:class:`DetectorModel` holds what :mod:`scorer.detector.simulator` needs to make images (quantum
detection efficiency, Swank factor, light spread, fill factor, gain, electronic noise, pixel pitch, the
beam's photon fluence per air kerma q) and computes the analytic quantities a measurement should find:
the presampling MTF, the quantum-limited DQE(0) = η·A_S, and the electronic-noise-equivalent air kerma.

**Depth-dependent light spread (Lubberts effect).**  An indirect panel's scintillator spreads the light of
a quantum by an amount that depends on where in its depth the quantum was absorbed.  The model has two
depths: a fraction ``near_fraction`` w of the quanta is spread with the short length L_n
(``light_spread_near_mm``), the rest with L (``light_spread_mm``), each an exponential line-spread
function with transfer T_L(f) = 1/(1 + (2πLf)²).  The mean signal is spread by the average transfer,
MTF_light = (1 − w)·T_L + w·T_Ln, but each quantum's noise by its own, so the noise power goes as
(1 − w)·T_L² + w·T_Ln² ≥ MTF_light²: the DQE falls with frequency even without electronic noise
(Lubberts 1968).  With w = 0 (the default) one spread acts on signal and noise alike.

**Electronic-noise-equivalent kerma** K_e: the air kerma at which the pixel variance of the additive
electronic noise equals that of the quantum noise, e = q_pix·K_e in the components σ²(K) = e + q_pix·K + s·K²
that ``limen detector --noise-series`` fits (:mod:`scorer.detector.noise`).  In quanta per pixel,
q_pix·K = N₁K·ρ/A_S with N₁ = q·Δx²·η the quanta absorbed per pixel per µGy and ρ the fraction of the
quantum noise variance the light spread leaves on the pixel grid (1 without spread), and e = σ_e²/g² + 1/12
ADU²/g² (read-out noise and rounding, g the ADU per detected quantum).

References
----------
.. [1] Swank, R. K. "Absorption and noise in x-ray phosphors", J. Appl. Phys. 44 (1973) — DQE(0) = η·A_S.
.. [2] Lubberts, G. "Random noise produced by x-ray fluorescent screens", J. Opt. Soc. Am. 58 (1968) —
       depth-dependent blur makes the noise transfer exceed the MTF.
.. [3] IEC 62220-1-1 / 62220-1-2 — q, the photon fluence per air kerma of a beam quality.
"""

from __future__ import annotations

import dataclasses
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from scorer.images.conversion import ConversionFunction


@dataclass(frozen=True)
class DetectorModel:
    """Physical parameters of a simulated flat panel (every one overridable from a TOML file).

    The presets (:mod:`scorer.detector.presets`) take their values from published typical values of each
    panel type, cited there; the panels themselves are invented, not the data of any product.
    """

    name: str
    conversion: str  # "direct" (a-Se) or "indirect" (CsI + a-Si:H)
    detector_type: str  # DICOM Detector Type: DIRECT or SCINTILLATOR
    pixel_pitch_mm: float = 0.085
    rows: int = 2816  # 239.4 mm
    cols: int = 3520  # 299.2 mm
    q_per_mm2_ugy: float = 5000.0  # photons per mm² per µGy, ~28 kV W/Rh mammography beam (from memory)
    qde: float = 0.90  # quantum detection efficiency η
    swank: float = 0.95  # Swank factor A_S
    fill_factor: float = 1.0  # fraction of charge/light collected by the pixel
    light_spread_mm: float = 0.0  # exponential LSF length L (0 = no spread)
    light_spread_near_mm: float = 0.0  # L_n of the quanta absorbed near the photodiodes (Lubberts effect)
    near_fraction: float = 0.0  # fraction w of the quanta spread with L_n (0 = one spread for all)
    adu_per_quantum: float = 2.4  # ADU per detected quantum at full collection
    electronic_noise_adu: float = 3.0
    gain_nonuniformity: float = 0.0  # relative SD of a fixed pixel-gain pattern (structure noise); 0 = off
    pattern_seed: int = 0  # seed of that fixed pattern (the same for every image of the panel)
    offset_adu: float = 60.0
    bits: int = 14
    kvp: float = 28.0
    modality: str = "MG"  # DICOM Modality: MG (mammography) or DX (general radiography)
    beam: str = ""  # beam quality the preset is meant for (recorded; q_per_mm2_ugy is what counts)
    detector_id: str = ""
    station_name: str = ""
    institution: str = ""
    manufacturer: str = "Limen simulation"

    @property
    def gain_adu_per_ugy(self) -> float:
        """Mean pixel value per µGy above the offset (the conversion function's slope)."""
        return self.quanta_per_pixel_per_ugy * self.adu_per_quantum * self.fill_factor

    @property
    def quanta_per_pixel_per_ugy(self) -> float:
        """N₁ = q·Δx²·η: X-ray quanta absorbed in one pixel per µGy."""
        return self.q_per_mm2_ugy * self.pixel_pitch_mm**2 * self.qde

    @property
    def dqe_zero(self) -> float:
        """Quantum-limited DQE at zero frequency, η·A_S (Swank 1973)."""
        return self.qde * self.swank

    def spread_components(self) -> list[tuple[float, float]]:
        """(weight, LSF length in mm) of each depth's light spread; [] without spread."""
        if self.light_spread_mm <= 0 and (self.near_fraction <= 0 or self.light_spread_near_mm <= 0):
            return []
        w = float(self.near_fraction)
        out = [(1.0 - w, float(self.light_spread_mm))]
        if w > 0:
            out.append((w, float(self.light_spread_near_mm)))
        return [(wt, length) for wt, length in out if wt > 0]

    def light_transfer(self, frequency_per_mm: ArrayLike) -> NDArray[np.float64]:
        """Mean light-spread transfer Σ w_i / (1 + (2πL_i f)²) (the signal's; 1 without spread)."""
        f = np.asarray(frequency_per_mm, dtype=float)
        comps = self.spread_components()
        if not comps:
            return np.ones_like(f)
        # start at an array of zeros, not sum()'s int 0 (the same values: 0 + x = x), so the type is an array
        return sum((w / (1.0 + (2 * np.pi * length * f) ** 2) for w, length in comps), np.zeros_like(f))

    def noise_power_transfer(self, frequency_per_mm: ArrayLike) -> NDArray[np.float64]:
        """Σ w_i·T_i(f)²: how the light spread passes quantum-noise power (≥ light_transfer², Lubberts)."""
        f = np.asarray(frequency_per_mm, dtype=float)
        comps = self.spread_components()
        if not comps:
            return np.ones_like(f)
        return sum((w / (1.0 + (2 * np.pi * length * f) ** 2) ** 2 for w, length in comps), np.zeros_like(f))

    def presampling_mtf(self, frequency_per_mm: ArrayLike) -> NDArray[np.float64]:
        """Analytic presampling MTF along a pixel axis: aperture sinc × mean light spread."""
        f = np.asarray(frequency_per_mm, dtype=float)
        mtf: NDArray[np.float64] = np.abs(np.sinc(self.pixel_pitch_mm * f)) * self.light_transfer(f)
        return mtf

    @property
    def nyquist_per_mm(self) -> float:
        return 0.5 / self.pixel_pitch_mm

    def spread_variance_fraction(self, n: int = 256) -> float:
        """ρ: the fraction of the quantum noise variance left after the light spread, which the simulator
        applies on the pixel grid (the mean of Σ w_i T_i² over the grid's frequencies; 1 without spread)."""
        if not self.spread_components():
            return 1.0
        f1 = np.fft.fftfreq(n, d=self.pixel_pitch_mm)
        return float(np.mean(self.noise_power_transfer(np.hypot(f1[:, None], f1[None, :]))))

    @property
    def electronic_variance_quanta2(self) -> float:
        """Pixel variance of read-out noise and rounding, in detected quanta² (module docstring)."""
        g = self.adu_per_quantum * self.fill_factor
        return (self.electronic_noise_adu**2 + 1.0 / 12.0) / g**2

    @property
    def electronic_noise_kerma_ugy(self) -> float:
        """K_e, the air kerma at which electronic and quantum pixel variances are equal (module docstring)."""
        quantum_per_ugy = self.quanta_per_pixel_per_ugy * self.spread_variance_fraction() / self.swank
        return self.electronic_variance_quanta2 / quantum_per_ugy

    def with_electronic_noise_kerma(self, kerma_ugy: float) -> "DetectorModel":
        """The same panel with the read-out noise (ADU) that makes its electronic-noise kerma ``kerma_ugy``."""
        quantum_per_ugy = self.quanta_per_pixel_per_ugy * self.spread_variance_fraction() / self.swank
        g = self.adu_per_quantum * self.fill_factor
        var_adu2 = kerma_ugy * quantum_per_ugy * g**2 - 1.0 / 12.0
        if var_adu2 < 0:
            raise ValueError(f"an electronic-noise kerma of {kerma_ugy:g} µGy is below the rounding noise")
        return self.with_overrides(electronic_noise_adu=float(np.sqrt(var_adu2)))

    @property
    def saturation_ugy(self) -> float:
        """Air kerma at which the mean signal reaches the top of the bit depth."""
        return float((2**self.bits - 1 - self.offset_adu) / self.gain_adu_per_ugy)  # int ** int types as Any

    def conversion_function(self) -> ConversionFunction:
        return ConversionFunction(
            "linear", self.offset_adu, self.gain_adu_per_ugy, source=f"simulated panel {self.name}"
        )

    def with_overrides(self, **kw: Any) -> DetectorModel:
        return dataclasses.replace(self, **kw)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def validate_model(m: DetectorModel) -> None:
    """Raise ValueError naming the first parameter out of its range."""
    if m.conversion not in ("direct", "indirect"):
        raise ValueError("conversion must be 'direct' or 'indirect'")
    for k in ("pixel_pitch_mm", "q_per_mm2_ugy", "adu_per_quantum"):
        if not getattr(m, k) > 0:
            raise ValueError(f"{k} must be positive")
    for k in ("qde", "swank", "fill_factor"):
        if not 0 < getattr(m, k) <= 1:
            raise ValueError(f"{k} must lie in (0, 1]")
    if m.light_spread_mm < 0 or m.light_spread_near_mm < 0 or m.electronic_noise_adu < 0:
        raise ValueError("light_spread_mm, light_spread_near_mm and electronic_noise_adu must be ≥ 0")
    if not 0 <= m.near_fraction < 1:
        raise ValueError("near_fraction must lie in [0, 1)")
    if not 0 <= m.gain_nonuniformity < 0.5:
        raise ValueError("gain_nonuniformity must lie in [0, 0.5)")
    if m.modality not in ("MG", "DX"):
        raise ValueError("modality must be 'MG' or 'DX'")
