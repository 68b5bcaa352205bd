"""Human eye contrast-sensitivity filter for the NPWE observer.

E(ρ) = ρⁿ exp(−cρ²), ρ in cycles per degree of visual angle, with n = 1.3 and
c = 0.04 deg² (peak near 4 cycles/degree; values from memory, see docs/references.md).
A spatial frequency f in cycles/mm on the image seen from a viewing distance
D mm is ρ = f · D · π/180 cycles/degree.

References
----------
.. [1] Burgess, A. E. "Statistically defined backgrounds: performance of a modified
       nonprewhitening observer model", J. Opt. Soc. Am. A 11 (1994).
.. [2] ICRU Report 54, *Medical Imaging — The Assessment of Image Quality* (1996).
"""

from __future__ import annotations

import numpy as np

EYE_EXPONENT_N = 1.3
EYE_COEFF_C_DEG2 = 0.04
DEFAULT_VIEWING_DISTANCE_MM = 500.0


def cycles_per_degree(frequency_per_mm, viewing_distance_mm: float = DEFAULT_VIEWING_DISTANCE_MM):
    """Convert cycles/mm in the image plane to cycles per degree at the viewing distance."""
    return np.asarray(frequency_per_mm, dtype=float) * viewing_distance_mm * np.pi / 180.0


def eye_filter(
    frequency_per_mm,
    viewing_distance_mm: float = DEFAULT_VIEWING_DISTANCE_MM,
    n: float = EYE_EXPONENT_N,
    c_deg2: float = EYE_COEFF_C_DEG2,
):
    """Eye filter E(f) for radial frequency ``frequency_per_mm`` (array), peak-normalised to 1."""
    rho = np.abs(cycles_per_degree(frequency_per_mm, viewing_distance_mm))
    e = rho**n * np.exp(-c_deg2 * rho**2)
    rho_peak = np.sqrt(n / (2.0 * c_deg2))
    e_peak = rho_peak**n * np.exp(-c_deg2 * rho_peak**2)
    return e / e_peak
