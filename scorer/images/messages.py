"""Pieces of the one-line error and warning messages: shapes, spacings and exceptions as short text."""

from __future__ import annotations

from collections.abc import Iterable
from typing import SupportsFloat, SupportsInt


def fmt_shape(shape: Iterable[SupportsInt]) -> str:
    """``(48, 64)`` → ``"48×64"``."""
    return "×".join(str(int(n)) for n in shape)


def fmt_spacing(spacing: Iterable[SupportsFloat]) -> str:
    """``(0.1, 0.1)`` → ``"0.1×0.1"``."""
    return "×".join(f"{float(v):g}" for v in spacing)


def exc_text(exc: BaseException) -> str:
    """An exception as ``"Type: message"`` on one line, cut to 200 characters."""
    text = " ".join(str(exc).split())
    if len(text) > 200:
        text = text[:197] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__
