"""The inbox: find new image files, read what they say about themselves, group them into sessions.

A *session* is the set of one detector's phantom images taken on one day with the same
acquisition settings (kVp, anode, filter): the unit that is scored together and trended.
Files that cannot be scored (unreadable, not an image, processed FOR PRESENTATION, of a
detector the configuration does not know, without an acquisition date) are rejected with a
one-line reason; :func:`quarantine_file` moves them aside with the reason beside them.
"""

from __future__ import annotations

import errno
import os
import shutil
import stat
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from scorer.errors import LimenError
from scorer.files import PathArg, atomic_write_text
from scorer.qc.config import NightlyConfig
from scorer.qc.faults import fault_point
from scorer.workflow.headers import read_acquisition_extras, read_image_metadata

REASON_SUFFIX = ".reason.txt"


@dataclass
class InboxImage:
    """A readable phantom image of a known detector, waiting to be scored."""

    path: str
    sha256: str
    detector: str
    session_date: str  # YYYY-MM-DD
    acquired: str | None = None  # ISO 8601
    detector_id: str | None = None
    device_serial: str | None = None
    station_name: str | None = None
    kvp: float | None = None
    exposure_uas: float | None = None
    anode: str | None = None
    filter: str | None = None
    flags: list[str] = field(default_factory=list)

    @property
    def group_key(self) -> str:
        """Detector, day and settings: images with the same key belong to one session."""
        kvp = "?" if self.kvp is None else f"{self.kvp:g}"
        return f"{self.detector}|{self.session_date}|{kvp} kV|{self.anode or '?'}/{self.filter or '?'}"


@dataclass
class Rejected:
    """A file that cannot be scored, and why (one line)."""

    path: str
    sha256: str | None
    reason: str


def list_files(inbox: Path, exclude: Sequence[Path] = ()) -> list[Path]:
    """Every regular file under ``inbox`` (recursively, sorted), skipping hidden files and ``exclude`` folders.

    Entries that are not regular files, or cannot be used as they are, are left out; :func:`scan_entries`
    also says which and why.
    """
    return [f for f, _ in scan_entries(inbox, exclude)[0]]


@dataclass
class Skipped:
    """An inbox entry left where it is, and why (one line): said once per path and kind (see DEVELOPERS.md)."""

    key: str  # the file-cache key: the path, its undecodable bytes escaped
    kind: str  # what is wrong, short: the file-cache marker is "!" + kind
    reason: str
    size: int = 0
    mtime_ns: str = "0"

    @property
    def marker(self) -> str:
        return "!" + self.kind


#: the longest path the nightly database stores (the file cache's key column)
MAX_PATH_CHARS = 1024

_NOT_REGULAR = (
    (stat.S_ISFIFO, "fifo", "a named pipe (FIFO), not a regular file: skipped"),
    (stat.S_ISSOCK, "socket", "a socket, not a regular file: skipped"),
    (stat.S_ISCHR, "device", "a character device, not a regular file: skipped"),
    (stat.S_ISBLK, "device", "a block device, not a regular file: skipped"),
)


def path_text(path: str | bytes | os.PathLike[str] | os.PathLike[bytes]) -> str:
    """``path`` as text that can be printed and stored: bytes that are not UTF-8 shown as ``\\xNN``."""
    return os.fsencode(os.fspath(path)).decode("utf-8", "backslashreplace")


def _stamp(st: os.stat_result | None) -> tuple[int, str]:
    return (int(st.st_size), str(st.st_mtime_ns)) if st is not None else (0, "0")


def classify(path: Path) -> tuple[os.stat_result | None, Skipped | None]:
    """``(stat, None)`` for a regular file the scan can read by name, else ``(lstat or None, Skipped)``.

    Never opens the file: a named pipe is recognised from its mode, so the scan cannot block on one.
    """
    key = path_text(path)
    try:
        lst = os.lstat(path)
    except FileNotFoundError:
        return None, None  # gone meanwhile (another run's quarantine)
    except OSError as exc:
        return None, Skipped(key, "unreadable", f"cannot be examined ({exc.strerror or exc}): skipped")
    size, mtime = _stamp(lst)
    if key != str(path):
        return lst, Skipped(key, "name", "file name is not valid UTF-8: rename the file to have it scored", size, mtime)
    if len(key) > MAX_PATH_CHARS:
        return lst, Skipped(
            key[:200] + "…", "name", f"path longer than {MAX_PATH_CHARS} characters: move it higher up", size, mtime
        )
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if not stat.S_ISLNK(lst.st_mode):
            return None, None  # gone meanwhile
        try:
            target = os.readlink(path)
        except OSError:
            target = "?"
        return lst, Skipped(
            key, "dangling", f"symbolic link to {path_text(target)!r}, which does not exist: skipped", size, mtime
        )
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            return lst, Skipped(key, "loop", "symbolic link loop (the link leads back to itself): skipped", size, mtime)
        return lst, Skipped(key, "unreadable", f"cannot be examined ({exc.strerror or exc}): skipped", size, mtime)
    for test, kind, reason in _NOT_REGULAR:
        if test(st.st_mode):
            return st, Skipped(key, kind, reason, *_stamp(st))
    if stat.S_ISDIR(st.st_mode):
        return st, Skipped(
            key, "folder-link", "symbolic link to a folder: not followed (scan that folder itself)", size, mtime
        )
    return st, None


def scan_entries(inbox: Path, exclude: Sequence[Path] = ()) -> tuple[list[tuple[Path, os.stat_result]], list[Skipped]]:
    """The regular files under ``inbox`` with their ``stat`` (recursively, sorted; hidden names and ``exclude``
    folders skipped), and the entries left out with the reason: named pipes, sockets and devices (never opened),
    dangling links, link loops, links to folders, names that are not UTF-8, folders that cannot be listed."""
    inbox = Path(inbox)
    if not inbox.is_dir():
        raise LimenError("inbox is not a folder", inbox)
    skip = {Path(p).resolve() for p in exclude}
    out: list[tuple[Path, os.stat_result]] = []
    skipped: list[Skipped] = []

    def unlistable(exc: OSError) -> None:
        reason = f"folder cannot be read ({exc.strerror or exc}): not scanned"
        skipped.append(Skipped(path_text(exc.filename), "unlistable", reason))

    for root, dirs, files in os.walk(inbox, onerror=unlistable):
        r = Path(root)
        keep = []
        for d in sorted(dirs):
            if d.startswith(".") or (r / d).resolve() in skip:
                continue
            if os.path.islink(r / d):
                skipped.append(classify(r / d)[1] or Skipped(path_text(r / d), "folder-link", "not followed"))
            else:
                keep.append(d)
        dirs[:] = keep
        for f in sorted(files):
            if f.startswith(".") or f.endswith(REASON_SUFFIX):
                continue
            st, problem = classify(r / f)
            if problem is not None:
                skipped.append(problem)
            elif st is not None:
                out.append((r / f, st))
    return out, skipped


def check_inbox(inbox: PathArg, quarantine_dir: PathArg | None = None) -> tuple[Path, Path]:
    """``(inbox, quarantine folder)`` checked before a nightly run does anything, or a one-line LimenError.

    The inbox must be a folder whose path is UTF-8 text (the database stores paths as text); the quarantine
    folder (``--quarantine``, default ``INBOX/quarantine``) is created when missing and must take a file, so a
    regular file named ``quarantine`` in the inbox, or a folder the run cannot write, stops the run at once
    rather than on the first unusable file.
    """
    inbox = Path(inbox)
    if not inbox.is_dir():
        raise LimenError("inbox is not a folder", inbox)
    if path_text(inbox.resolve()) != str(inbox.resolve()):
        raise LimenError("the inbox's path is not valid UTF-8: rename the folder", path_text(inbox))
    if quarantine_dir is None:
        return inbox, prepare_quarantine(inbox / "quarantine", given=False)
    return inbox, prepare_quarantine(quarantine_dir, given=True)


def prepare_quarantine(quarantine_dir: PathArg, given: bool) -> Path:
    """The quarantine folder, created if missing and checked writable (a file made and removed), or a one-line
    LimenError naming it."""
    qdir = Path(quarantine_dir)
    shown = path_text(qdir)
    what = "--quarantine" if given else "INBOX/quarantine (where unusable files are moved)"
    if shown != str(qdir) or path_text(qdir.resolve()) != str(qdir.resolve()):
        raise LimenError(f"{what}: the path is not valid UTF-8", shown)
    if qdir.exists() and not qdir.is_dir():
        hint = "" if given else "; move this file away or give --quarantine"
        raise LimenError(f"{what} is a file, not a folder{hint}", shown)
    try:
        qdir.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=qdir, prefix=".limen-write-test-"):
            pass
    except OSError as exc:
        raise LimenError(f"{what}: cannot write in this folder ({exc.strerror or exc})", shown) from None
    return qdir


def examine(path: PathArg, sha256: str, config: NightlyConfig) -> InboxImage | Rejected:
    """Place one file in its session, or say in one line why it cannot be used.

    A DICOM file whose header is sound (pixel data present, as long as the file) is placed from
    its header alone: decoding is left to the scoring workers, where a file that still fails is
    quarantined and its session re-formed.  Anything else is read fully
    (:func:`scorer.workflow.read_image_metadata`), whose error names the problem.
    """
    path = Path(path)
    try:
        md = read_image_metadata(path)
    except LimenError as exc:
        return Rejected(str(path), sha256, _strip(str(exc), path))
    if md.presentation_intent == "FOR PRESENTATION":
        return Rejected(
            str(path),
            sha256,
            "FOR PRESENTATION image: processed for display, its pixel values are "
            "not linear in air kerma (export the FOR PROCESSING image)",
        )
    if md.file_format != "dicom":
        return Rejected(
            str(path),
            sha256,
            f"unknown detector: a {md.file_format.upper()} file carries no detector "
            "identification (nightly scoring reads DICOM)",
        )
    det = config.detector_for(md.detector_id, md.device_serial, md.station_name)
    if det is None:
        ids = (
            ", ".join(
                f"{k} {v!r}"
                for k, v in (
                    ("Detector ID", md.detector_id),
                    ("Device Serial Number", md.device_serial),
                    ("Station Name", md.station_name),
                )
                if v
            )
            or "no identifier"
        )
        return Rejected(str(path), sha256, f"unknown detector ({ids}): not in the nightly configuration")
    extra = read_acquisition_extras(path)
    date = (md.acquisition_datetime or "")[:10] or extra.get("content_date")
    if not date or len(date) != 10:
        return Rejected(
            str(path),
            sha256,
            "no acquisition date (Acquisition DateTime, Acquisition Date or "
            "Content Date): cannot tell which session the image belongs to",
        )
    kvp = None if md.kvp is None else round(float(md.kvp), 1)
    img = InboxImage(
        path=str(path),
        sha256=sha256,
        detector=det.name,
        session_date=date,
        acquired=md.acquisition_datetime,
        detector_id=md.detector_id,
        device_serial=md.device_serial,
        station_name=md.station_name,
        kvp=kvp,
        exposure_uas=md.exposure_uas,
        anode=extra.get("anode"),
        filter=extra.get("filter"),
    )
    img.flags = det.expected.check(img.kvp, img.anode, img.filter, img.exposure_uas)
    return img


def _strip(message: str, path: Path) -> str:
    prefix = f"{path}: "
    return message[len(prefix) :] if message.startswith(prefix) else message


def quarantine_file(path: PathArg, quarantine_dir: PathArg, reason: str) -> Path | None:
    """Move ``path`` into ``quarantine_dir`` with ``<name>.reason.txt`` (one line) beside it.

    The reason is written first, then the file is moved, so a run killed in between leaves the
    file in the inbox (quarantined again next run), never a quarantined file without a reason.
    Returns the new path, or None when the file had gone already (another run moved it).
    """
    path, qdir = Path(path), Path(quarantine_dir)
    qdir.mkdir(parents=True, exist_ok=True)
    dest = qdir / path.name
    n = 1
    while dest.exists():
        dest = qdir / f"{path.stem}-{n}{path.suffix}"
        n += 1
    note = dest.with_name(dest.name + REASON_SUFFIX)
    atomic_write_text(note, " ".join(reason.split()) + "\n")
    fault_point("quarantine")
    try:
        shutil.move(str(path), str(dest))
    except FileNotFoundError:
        # another run moved it first; when it moved it to the same name, the reason file is that run's (the same
        # reason), so it stays — removing it left a quarantined file without its reason
        if not dest.exists():
            note.unlink(missing_ok=True)
        return None
    return dest
