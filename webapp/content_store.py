"""The content store: uploads copied under their hash, placed only once checked; files found again later.

Stored files are named ``<sha256><suffix>`` (the client's file name is never part of a stored path); a failed
request removes the files it placed that no committed row refers to (:func:`discard_unreferenced`).
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

from scorer.errors import LimenError

IMAGE_SUFFIXES = {".dcm", ".dicom", ".tif", ".tiff", ".png", ".npy"}
LAYOUT_SUFFIXES = {".toml"}


def safe_label(name: str | None) -> str:
    """A display label for an uploaded file (coordinator pages only): base name, printable, ≤ 120 chars."""
    base = re.split(r"[\\/]", name or "")[-1]
    base = re.sub(r"[^\w.\- ]+", "_", base).strip(" .")
    return base[:120] or "upload"


STORE_CHUNK_BYTES = 1 << 20


@dataclass(frozen=True)
class Stored:
    """A file in the content store: its hash, path, whether this call put it there, and the check's result."""

    sha256: str
    path: Path
    new: bool
    checked: object = None


def store_bytes(stream, suffix: str, store_dir: Path, max_bytes: int, label: str) -> tuple[str, Path]:
    """:func:`store_file` without a check; return (sha256, path)."""
    out = store_file(stream, suffix, store_dir, max_bytes, label)
    return out.sha256, out.path


def store_file(stream, suffix: str, store_dir: Path, max_bytes: int, label: str, check=None) -> Stored:
    """Copy an upload into the content store as ``<sha256><suffix>``, placed only if ``check`` accepts it.

    The client's file name is never used for the stored path, only its (checked) extension.  The stream is
    read once to hash and size it, then (from the start again) written under a temporary name
    (:func:`scorer.files.write_staged`); ``check(temporary path)`` — reading it as an image, a layout… — runs
    on those bytes, and only then is the file renamed to its hash.  So a refused file (too large, empty, not
    an image) leaves nothing in the store, and a server killed mid-copy leaves no file under a hash it does not
    match.  A stream whose content changes between the two readings (a file being rewritten during a folder
    import) is refused.  A stream that cannot seek is held in memory (at most ``max_bytes``).  When the store
    already holds the hash, ``check`` runs on the stored file and nothing is written.

    Inside a request, files this call placed are listed in ``flask.g.limen_new_files``: the request's end
    removes them again if the request failed and no committed row refers to them (:func:`discard_unreferenced`).
    """
    import os

    from scorer.files import discard, write_staged

    store_dir.mkdir(parents=True, exist_ok=True)
    try:
        start = stream.tell() if stream.seekable() else None
    except (AttributeError, OSError):
        start = None
    h = hashlib.sha256()
    size = 0
    held = []  # only for a stream that cannot be read twice
    while chunk := stream.read(STORE_CHUNK_BYTES):
        size += len(chunk)
        if size > max_bytes:
            raise LimenError(f"file is larger than the limit of {max_bytes // (1024 * 1024)} MB", label)
        h.update(chunk)
        if start is None:
            held.append(chunk)
    if size == 0:
        raise LimenError("file is empty", label)
    digest = h.hexdigest()
    final = store_dir / f"{digest}{suffix}"
    if final.exists():
        return Stored(digest, final, False, check(final) if check else None)
    if start is not None:
        stream.seek(start)
        held = _reread(stream, size, digest, label)
    tmp = write_staged(store_dir, held, prefix=".upload.", suffix=suffix, mode=0o600, target=final)
    try:
        checked = check(tmp) if check else None
        os.replace(tmp, final)
    except BaseException:
        discard(tmp)
        raise
    _note_new_file(final)
    return Stored(digest, final, True, checked)


def _note_new_file(path: Path) -> None:
    from flask import g, has_request_context

    if has_request_context():
        g.setdefault("limen_new_files", []).append(path)


def discard_unreferenced(session, paths) -> list[Path]:
    """Remove store files that no study refers to (as image, layout or conversion function); return them.

    Called at the end of a failed request on the files it placed, after its transaction is rolled back, so an
    upload refused after some of its files were stored (a later file of the batch was bad) leaves nothing."""
    from sqlalchemy import or_, select

    from scorer.files import discard
    from webapp.models import Study, StudyImage

    gone = []
    for p in paths:
        used = (
            session.execute(
                select(StudyImage.id).where(or_(StudyImage.stored_name == p.name, StudyImage.conversion_file == str(p)))
            ).first()
            or session.execute(select(Study.id).where(Study.layout_file == str(p))).first()
        )
        if not used:
            discard(p)
            gone.append(p)
    return gone


def _reread(stream, size: int, digest: str, label: str):
    """The stream's bytes again, checked against the first reading's size and hash before the last piece is
    handed on (so a changed stream raises before the stored file is renamed into place)."""
    h = hashlib.sha256()
    n = 0
    while chunk := stream.read(STORE_CHUNK_BYTES):
        n += len(chunk)
        h.update(chunk)
        if n > size:
            break
        if n < size:
            yield chunk
        else:
            pending = chunk
    if n != size or h.hexdigest() != digest:
        raise LimenError("file changed while it was being stored; upload or import it again", label)
    yield pending


def check_suffix(name: str, allowed: set[str], what: str) -> str:
    suffix = Path(safe_label(name)).suffix.lower()
    if suffix not in allowed:
        raise LimenError(
            f"{what} must be one of {', '.join(sorted(allowed))} (got '{suffix or 'no extension'}')", safe_label(name)
        )
    return ".dcm" if suffix == ".dicom" else suffix


def stored_file(path_text: str, store_dir: Path) -> Path:
    """A layout or conversion file the database names by the absolute path it had when it was added.

    The file of that name in the same folder of *this* instance's store comes first (an instance restored from a
    backup, or moved: the old path may be gone or belong to another instance; stored files are named by their
    hash, so a same-named file is the same file), then the path itself, then a bundled layout of that name
    (Limen installed elsewhere).  A file found nowhere is returned as named, for the reader to report."""
    p = Path(path_text)
    here = Path(store_dir) / p.parent.name / p.name
    if here.is_file():
        return here
    if p.is_file():
        return p
    bundled = bundled_layouts().get(p.name)
    return Path(bundled) if bundled else p


def bundled_layouts() -> dict[str, str]:
    """Layouts shipped with Limen: {file name: path}."""
    from scorer.phantom.layout import PHANTOM_DIR

    return {p.name: str(p) for p in sorted(PHANTOM_DIR.glob("*.toml"))}
