"""The inbox: find new image files, read what they say about themselves, group them into sessions.

A *session* is the set of one detector's phantom images taken on one day with the same
acquisition settings (kVp, anode, filter): the unit that is scored together and trended.
Files that cannot be scored (unreadable, not an image, processed FOR PRESENTATION, of a
detector the configuration does not know, without an acquisition date) are rejected with a
one-line reason; :func:`quarantine_file` moves them aside with the reason beside them.
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

from scorer.errors import LimenError
from scorer.files import atomic_write_text
from scorer.workflow.headers import read_acquisition_extras, read_image_metadata
from scorer.qc.config import NightlyConfig
from scorer.qc.faults import fault_point

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


def list_files(inbox: Path, exclude: list[Path] = ()) -> list[Path]:
    """Every regular file under ``inbox`` (recursively, sorted), skipping hidden files and ``exclude`` folders."""
    inbox = Path(inbox)
    if not inbox.is_dir():
        raise LimenError("inbox is not a folder", inbox)
    skip = {Path(p).resolve() for p in exclude}
    out = []
    for root, dirs, files in os.walk(inbox):
        r = Path(root)
        dirs[:] = sorted(d for d in dirs if not d.startswith(".") and (r / d).resolve() not in skip)
        out += [r / f for f in sorted(files) if not f.startswith(".") and not f.endswith(REASON_SUFFIX)]
    return out


def examine(path, sha256: str, config: NightlyConfig) -> InboxImage | Rejected:
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


def quarantine_file(path, quarantine_dir, reason: str) -> Path | None:
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
