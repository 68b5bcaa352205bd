"""Conversion function: stored pixel value ↔ detector air kerma.

Two response kinds, as met on real panels (IEC 62220-1 calls this the
conversion function):

* ``linear``:      PV = offset + gain · K
* ``logarithmic``: PV = offset + gain · ln(K / 1 µGy)

Linearising turns stored values into air kerma in µGy so that every later
analysis works in units proportional to air kerma.  A conversion function is
read from a small TOML or JSON file::

    kind = "linear"          # or "logarithmic"
    offset = 512.0           # pixel value at zero kerma (linear) or at 1 µGy (logarithmic)
    gain = 12.5              # pixel value per µGy (linear) or per unit ln(K) (logarithmic)
    source = "fitted by limen detector on 2026-11-30"   # optional, free text
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from scorer.errors import LimenError
from scorer.files import PathArg, atomic_write_text

KINDS = ("linear", "logarithmic")


@dataclass(frozen=True)
class ConversionFunction:
    """How a detector's stored pixel values follow air kerma K (µGy).

    Attributes
    ----------
    kind : str
        ``"linear"``: pixel value = offset + gain·K; ``"logarithmic"``: pixel value = offset + gain·ln K.
    offset : float
        Pixel value at zero kerma (linear) or at 1 µGy (logarithmic).
    gain : float
        Pixel values per µGy (linear) or per unit of ln K (logarithmic); finite and non-zero.
    source : str
        Where the function came from (a file, a fit), for the record.
    """

    kind: str

    offset: float
    gain: float
    source: str = ""

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"conversion kind must be one of {KINDS}, got {self.kind!r}")
        if not np.isfinite(self.gain) or self.gain == 0:
            raise ValueError("conversion gain must be finite and non-zero")

    def to_kerma_ugy(self, pixel_values: ArrayLike) -> NDArray[np.float64]:
        """Air kerma (µGy) for stored pixel values."""
        pv = np.asarray(pixel_values, dtype=np.float64)
        if self.kind == "linear":
            return (pv - self.offset) / self.gain
        return np.exp((pv - self.offset) / self.gain)

    def to_pixel_value(self, kerma_ugy: ArrayLike) -> NDArray[np.float64]:
        """Stored pixel value for air kerma (µGy) — the inverse of :meth:`to_kerma_ugy`."""
        k = np.asarray(kerma_ugy, dtype=np.float64)
        if self.kind == "linear":
            return self.offset + self.gain * k
        return self.offset + self.gain * np.log(k)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def load_conversion(path: PathArg) -> ConversionFunction:
    """Read a conversion function from a TOML or JSON file (errors name the file).

    Parameters
    ----------
    path : str or path-like
        TOML or JSON file with ``kind``, ``offset`` and ``gain``.

    Returns
    -------
    ConversionFunction

    Raises
    ------
    LimenError
        One line naming the file when it cannot be read or holds no valid conversion function.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise LimenError(f"cannot read conversion file ({exc.strerror or exc})", path) from None
    try:
        data = json.loads(text) if path.suffix.lower() == ".json" else tomllib.loads(text)
    except (ValueError, tomllib.TOMLDecodeError) as exc:
        raise LimenError(f"not valid {'JSON' if path.suffix.lower() == '.json' else 'TOML'}: {exc}", path) from None
    if "conversion" in data and isinstance(data["conversion"], dict):
        data = data["conversion"]
    allowed = {"kind", "offset", "gain", "source", "r_squared", "r2"}
    unknown = sorted(set(data) - allowed)
    if unknown:
        raise LimenError(f"unknown key(s) {', '.join(unknown)} in conversion function", path)
    for key in ("kind", "offset", "gain"):
        if key not in data:
            raise LimenError(f"conversion function lacks '{key}'", path)
    try:
        return ConversionFunction(
            kind=str(data["kind"]),
            offset=float(data["offset"]),
            gain=float(data["gain"]),
            source=str(data.get("source", "")),
        )
    except (TypeError, ValueError) as exc:
        raise LimenError(f"bad conversion function: {exc}", path) from None


def save_conversion(conv: ConversionFunction, path: PathArg) -> None:
    """Write a conversion function as TOML (readable by :func:`load_conversion`), complete or absent.

    Parameters
    ----------
    conv : ConversionFunction
        The function to write.
    path : str or path-like
        The TOML file written.
    """
    lines = [f'kind = "{conv.kind}"', f"offset = {conv.offset!r}", f"gain = {conv.gain!r}"]
    if conv.source:
        lines.append("source = " + json.dumps(conv.source))
    atomic_write_text(Path(path), "\n".join(lines) + "\n")
