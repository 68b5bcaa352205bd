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


def atomic_write_bytes(path, data: bytes) -> Path:
    """Write a file so that it is either complete or absent: a temporary name in the same folder, flushed
    to disk, then renamed over the target (an atomic step on POSIX file systems).  A run killed midway
    leaves the previous file, or none, never a truncated one that parses."""
    import os
    import tempfile

    path = Path(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    except OSError as exc:
        raise LimenError(f"cannot write here ({exc.strerror or exc})", path) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise LimenError(f"cannot write here ({exc.strerror or exc})", path) from None
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return path


def atomic_write_text(path, text: str) -> Path:
    """:func:`atomic_write_bytes` for UTF-8 text."""
    return atomic_write_bytes(path, text.encode("utf-8"))
