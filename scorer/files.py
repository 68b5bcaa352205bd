"""Reading the small TOML files Limen is configured with, with errors that name the file."""

from __future__ import annotations

import tomllib
from pathlib import Path

from scorer.errors import LimenError


def read_toml(path, what: str) -> dict:
    """Parse a TOML file; an unreadable or malformed file raises a one-line LimenError naming it."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise LimenError(f"cannot read {what} ({exc.strerror or exc})", path) from None
    except UnicodeDecodeError:
        raise LimenError(f"{what} is not UTF-8 text", path) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise LimenError(f"not valid TOML: {exc}", path) from None
