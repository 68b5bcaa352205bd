"""Phantom-millimetre ↔ pixel geometry shared by the simulator and the registration.

Conventions
-----------
* Phantom coordinates ``(x_mm, y_mm)``: origin at the plate's top-left corner as
  drawn in the layout file, x to the right, y downwards.
* Pixel coordinates ``(row, col)``: pixel centres at integer positions, so the
  centre of pixel (r, c) lies at ((c + ½)·Δcol, (r + ½)·Δrow) mm on the detector.
* A placement is a similarity transform, possibly with a reflection:
  ``[col, row]ᵀ = A · [x_mm, y_mm]ᵀ + t`` with ``A = (m / Δ) · R(θ) · F``, where
  F mirrors x when the phantom lies upside down, R(θ) rotates counter-clockwise
  as seen on the displayed image (rows running down), and m is the geometric
  magnification (detector plane / phantom plane).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray


def _rotation(theta_deg: float) -> NDArray[np.float64]:
    t = np.deg2rad(theta_deg)
    c, s = np.cos(t), np.sin(t)
    # counter-clockwise on screen where y runs downwards
    return np.array([[c, s], [-s, c]])


@dataclass(frozen=True)
class PhantomTransform:
    """Phantom mm (x, y) → pixel (col, row): ``xy_px = matrix @ xy_mm + offset``."""

    matrix: tuple[tuple[float, float], tuple[float, float]]
    offset: tuple[float, float]

    @property
    def A(self) -> NDArray[np.float64]:
        return np.asarray(self.matrix, dtype=float)

    @property
    def t(self) -> NDArray[np.float64]:
        return np.asarray(self.offset, dtype=float)

    @classmethod
    def from_arrays(cls, A: ArrayLike, t: ArrayLike) -> PhantomTransform:
        A = np.asarray(A, float)
        t = np.asarray(t, float)
        return cls(((A[0, 0], A[0, 1]), (A[1, 0], A[1, 1])), (t[0], t[1]))

    @classmethod
    def from_params(
        cls,
        *,
        rotation_deg: float,
        flipped: bool,
        magnification: float,
        phantom_center_mm: tuple[float, float],
        center_px: tuple[float, float],
        pixel_mm: float,
    ) -> "PhantomTransform":
        """Place the phantom centre at pixel ``center_px`` = (row, col)."""
        F = np.diag([-1.0, 1.0]) if flipped else np.eye(2)
        A = (magnification / pixel_mm) * _rotation(rotation_deg) @ F
        c_mm = np.asarray(phantom_center_mm, float)
        c_px = np.array([center_px[1], center_px[0]], float)  # (col, row)
        return cls.from_arrays(A, c_px - A @ c_mm)

    def to_pixel(self, xy_mm: ArrayLike) -> NDArray[np.float64]:
        """Phantom points (N, 2) in mm → pixel (N, 2) as (row, col)."""
        xy = np.atleast_2d(np.asarray(xy_mm, float))
        cr: NDArray[np.float64] = xy @ self.A.T + self.t
        return cr[:, ::-1]

    def to_phantom(self, rc_px: ArrayLike) -> NDArray[np.float64]:
        """Pixel (N, 2) as (row, col) → phantom mm (N, 2) as (x, y)."""
        rc = np.atleast_2d(np.asarray(rc_px, float))
        xy: NDArray[np.float64] = (rc[:, ::-1] - self.t) @ np.linalg.inv(self.A).T
        return xy

    @property
    def flipped(self) -> bool:
        return bool(np.linalg.det(self.A) < 0)

    def scale_px_per_mm(self) -> float:
        """Pixels per phantom millimetre (magnification / pixel pitch)."""
        return float(np.sqrt(abs(np.linalg.det(self.A))))

    def magnification(self, pixel_mm: float) -> float:
        return self.scale_px_per_mm() * pixel_mm

    def rotation_deg(self) -> float:
        """Rotation angle in [0, 360) with the reflection (if any) applied to x first."""
        A = self.A / self.scale_px_per_mm()
        if self.flipped:
            A = A @ np.diag([-1.0, 1.0])
        # A = R(θ) = [[c, s], [-s, c]]
        theta = np.degrees(np.arctan2(A[0, 1], A[0, 0]))
        return float(theta % 360.0)
