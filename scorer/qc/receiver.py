"""The DICOM node behind ``limen receive``: a Storage SCP that writes what the modalities send into the inbox.

A modality (or a PACS) opens an association with our AE title, proposes presentation contexts and sends each
QC image with C-STORE.  We accept the storage SOP classes of digital X-ray and digital mammography images, both
FOR PROCESSING and FOR PRESENTATION (``limen nightly`` decides what it scores and quarantines the rest with a
reason), in uncompressed or lossless transfer syntaxes, plus Verification (C-ECHO).  Every other abstract syntax
is rejected in the association's presentation-context negotiation, and an association whose calling AE title is
not in the configuration's allow-list is rejected as a whole.

Each dataset is written as a DICOM Part 10 file (preamble, file meta, the dataset's bytes exactly as received)
under a temporary hidden name in the inbox, flushed to disk, renamed to ``<SOP Instance UID>.dcm`` and the folder
itself flushed -- all before the success status goes back.  So ``limen nightly`` never sees half a file (the
scanner skips hidden names), and an image whose C-STORE was acknowledged survives a SIGKILL of this process.

References (docs/references.md):
  DICOM PS3.4 Annex A (Verification SOP Class) and Annex B (Storage Service Class): the SOP Class UIDs of
  B.5 (Table B.5-1) and the C-STORE statuses of B.2.3 (Table B.2-1): 0000 Success, A700–A7FF Refused: Out of
  Resources, A900–A9FF Error: Data Set Does Not Match SOP Class, C000–CFFF Error: Cannot Understand.
  DICOM PS3.8 section 7.1 and 9.3.4 (A-ASSOCIATE-RJ: result 1 rejected-permanent, source 1 service-user,
  reason 3 calling-AE-title-not-recognized, 7 called-AE-title-not-recognized) and 9.3.3.2 (presentation
  context result 3 abstract-syntax-not-supported, 4 transfer-syntaxes-not-supported).
  DICOM PS3.10 section 7.1: the Part 10 file (128-byte preamble, "DICM", group 0002 file meta).
  DICOM PS3.5 section 9.1: UIDs are digits and dots, at most 64 characters.
"""

from __future__ import annotations

import hashlib
import re
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from scorer.errors import LimenError
from scorer.files import atomic_write_bytes, sync_folder
from scorer.qc.config import ReceiveConfig

#: Storage SOP classes accepted (PS3.4 Table B.5-1).  Computed Radiography, intra-oral and tomosynthesis
#: images are not phantom images this tool scores, so their contexts are rejected.
STORAGE_SOP_CLASSES = {
    "1.2.840.10008.5.1.4.1.1.1.1": "Digital X-Ray Image Storage - For Presentation",
    "1.2.840.10008.5.1.4.1.1.1.1.1": "Digital X-Ray Image Storage - For Processing",
    "1.2.840.10008.5.1.4.1.1.1.2": "Digital Mammography X-Ray Image Storage - For Presentation",
    "1.2.840.10008.5.1.4.1.1.1.2.1": "Digital Mammography X-Ray Image Storage - For Processing",
}
VERIFICATION_SOP_CLASS = "1.2.840.10008.1.1"  # PS3.4 Annex A
#: Transfer syntaxes accepted for images: uncompressed and lossless only (PS3.5 Annex A).  A lossy-compressed
#: QC image would change the noise the observer measures, so a modality offering only lossy syntaxes gets its
#: context rejected (result 4) rather than a threshold that is silently wrong.
TRANSFER_SYNTAXES = {
    "1.2.840.10008.1.2.1": "Explicit VR Little Endian",
    "1.2.840.10008.1.2": "Implicit VR Little Endian",  # the DICOM default every node must accept
    "1.2.840.10008.1.2.4.70": "JPEG Lossless, First-Order Prediction",
    "1.2.840.10008.1.2.4.57": "JPEG Lossless",
    "1.2.840.10008.1.2.4.80": "JPEG-LS Lossless",
    "1.2.840.10008.1.2.4.90": "JPEG 2000 (Lossless Only)",
    "1.2.840.10008.1.2.4.201": "HTJ2K (Lossless Only)",
    "1.2.840.10008.1.2.5": "RLE Lossless",
}
# C-STORE statuses, PS3.4 Table B.2-1
SUCCESS = 0x0000
OUT_OF_RESOURCES = 0xA700
DOES_NOT_MATCH_SOP_CLASS = 0xA900
CANNOT_UNDERSTAND = 0xC000

#: grace given to open associations on SIGTERM/SIGINT before they are aborted
STOP_GRACE_S = 20.0
_UID = re.compile(r"[0-9]+(\.[0-9]+)*")
_UNSAFE = re.compile(r"[^0-9A-Za-z.\-]")


def file_name_for(sop_instance_uid, data: bytes) -> str:
    """The inbox file name of a received dataset: ``<SOP Instance UID>.dcm``.

    A valid UID (PS3.5 9.1: digits and dots, ≤ 64 characters) is used as it is.  Anything else is sanitised
    to letters, digits, dots and hyphens (no path separator, never a leading dot, which would hide the file
    from the nightly scanner) and marked ``x-``; an empty one becomes ``sha256-<first 32 hex digits>``.
    """
    uid = str(sop_instance_uid or "").strip().strip("\0").strip()
    if len(uid) <= 64 and _UID.fullmatch(uid):
        return f"{uid}.dcm"
    safe = _UNSAFE.sub("_", uid)[:64].strip("._-")
    if not safe:
        return f"sha256-{hashlib.sha256(data).hexdigest()[:32]}.dcm"
    return f"x-{safe}.dcm"


class InboxWriter:
    """Write received datasets into the inbox: each complete or absent, names unique, nothing overwritten.

    A second dataset with the name of a file already present is compared with it: the same bytes (the
    modality sent the image again) count as stored; different bytes get the name ``<UID>.<sha256[:16]>.dcm``
    so neither is lost.  Names being written are reserved, so two associations never race for one name.
    """

    def __init__(self, inbox) -> None:
        self.inbox = Path(inbox)
        self._lock = threading.Lock()
        self._reserved: set[Path] = set()

    def write(self, data: bytes, sop_instance_uid) -> tuple[Path, bool]:
        """Store ``data``; return (path, True if identical bytes were already there).

        Raises
        ------
        LimenError
            The file cannot be written (disk full, permissions), naming the file.
        """
        name = file_name_for(sop_instance_uid, data)
        digest = None
        with self._lock:
            target = self.inbox / name
            n = 0
            while target in self._reserved or target.exists():
                if target not in self._reserved and _same_bytes(target, data):
                    return target, True
                digest = digest or hashlib.sha256(data).hexdigest()
                n += 1
                stem = name[: -len(".dcm")]
                target = self.inbox / (f"{stem}.{digest[:16]}.dcm" if n == 1 else f"{stem}.{digest[:16]}-{n}.dcm")
            self._reserved.add(target)
        try:
            atomic_write_bytes(target, data)  # temporary hidden name, fsync, rename
            try:
                sync_folder(self.inbox)  # the rename itself on disk before we acknowledge
            except OSError as exc:
                raise LimenError(f"cannot flush the inbox folder ({exc.strerror or exc})", self.inbox) from None
        finally:
            with self._lock:
                self._reserved.discard(target)
        return target, False


def _same_bytes(path: Path, data: bytes) -> bool:
    try:
        if path.stat().st_size != len(data):
            return False
        return path.read_bytes() == data
    except OSError:
        return False


def check_inbox(inbox, config_path=None) -> Path:
    """Create the inbox if needed and prove it writable (a probe file written and removed), or raise a
    one-line LimenError naming it; also remove temporaries a killed receiver left (older than an hour)."""
    import os
    import tempfile

    inbox = Path(inbox)
    try:
        inbox.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".limen-receive-probe.", suffix=".part", dir=inbox)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        where = f" (from {config_path})" if config_path else ""
        raise LimenError(f"inbox is not a writable folder{where}: {exc.strerror or exc}", inbox) from None
    now = time.time()
    for tmp in inbox.glob(".*.dcm.*.part"):
        try:
            if now - tmp.stat().st_mtime > 3600:
                tmp.unlink()
        except OSError:
            pass
    return inbox


@dataclass
class AssociationRecord:
    """What happened on one connection, printed as one line when it closes."""

    peer: str
    calling_ae: str = ""
    called_ae: str = ""
    outcome: str = "closed before any association request"
    stored: int = 0
    already_here: int = 0
    echoes: int = 0
    refused: list[str] = field(default_factory=list)  # images refused (C-STORE failure status)
    contexts_rejected: list[str] = field(default_factory=list)  # "name (why)", transfer-syntax ones first

    #: rejected contexts named in the line; the rest are counted (a modality may propose a hundred classes)
    SHOWN_CONTEXTS = 3

    def line(self) -> str:
        if not self.calling_ae:
            return f"connection from {self.peer}: {self.outcome}"
        who = f"association {self.calling_ae} from {self.peer} to {self.called_ae or '?'}"
        if self.outcome.startswith("rejected"):
            return f"{who}: {self.outcome}"
        parts = [self.outcome, f"{self.stored} image(s) stored"]
        if self.already_here:
            parts.append(f"{self.already_here} already in the inbox")
        if self.echoes:
            parts.append(f"{self.echoes} echo(es)")
        parts.append(
            f"{len(self.refused)} image(s) refused" + (f" ({'; '.join(self.refused)})" if self.refused else "")
        )
        if self.contexts_rejected:
            shown = self.contexts_rejected[: self.SHOWN_CONTEXTS]
            more = len(self.contexts_rejected) - len(shown)
            parts.append(
                f"{len(self.contexts_rejected)} proposed context(s) not accepted: "
                + "; ".join(shown)
                + (f"; and {more} more" if more else "")
            )
        return f"{who}: " + ", ".join(parts)


class Receiver:
    """The Storage SCP of one ``[receive]`` configuration.

    ``start()`` binds and serves in background threads (one per association, pynetdicom's threaded server);
    ``stop()`` closes the listening socket, lets open associations finish for ``grace_s`` and aborts the rest.
    ``log`` receives one line per association (and one per write failure).
    """

    def __init__(self, config: ReceiveConfig, log: Callable[[str], None] = print, port: int | None = None) -> None:
        self.config = config
        self.log = log
        self.port = config.port if port is None else port
        self.writer = InboxWriter(config.inbox)
        self.address: tuple[str, int] | None = None
        self.totals = {"associations": 0, "rejected": 0, "stored": 0, "refused": 0}
        self._records: dict[int, AssociationRecord] = {}
        self._lock = threading.Lock()
        self._server = None
        self._active: list = []

    # ------------------------------------------------------------------ life cycle
    def start(self) -> tuple[str, int]:
        """Check the inbox, bind, start serving; return the (address, port) listened on.

        Raises
        ------
        LimenError
            Unwritable inbox, port in use or not allowed, an address that is not this machine's or does not
            resolve: one line naming the configuration file.
        """
        import logging
        import socket

        from pynetdicom import AE, evt

        cfg = self.config
        check_inbox(cfg.inbox, cfg.path)
        logging.getLogger("pynetdicom").addHandler(logging.NullHandler())
        ae = AE(ae_title=cfg.ae_title)
        ae.require_calling_aet = list(cfg.calling_ae_titles)  # others: A-ASSOCIATE-RJ reason 3 (PS3.8 9.3.4)
        ae.require_called_aet = True  # a modality set up with another title: reason 7
        for uid in STORAGE_SOP_CLASSES:
            ae.add_supported_context(uid, list(TRANSFER_SYNTAXES))
        ae.add_supported_context(VERIFICATION_SOP_CLASS)
        handlers = [
            (evt.EVT_CONN_OPEN, self._on_open),
            (evt.EVT_REJECTED, self._on_rejected),
            (evt.EVT_ESTABLISHED, self._on_established),
            (evt.EVT_C_ECHO, self._on_echo),
            (evt.EVT_C_STORE, self._on_store),
            (evt.EVT_RELEASED, self._on_released),
            (evt.EVT_ABORTED, self._on_aborted),
            (evt.EVT_CONN_CLOSE, self._on_close),
        ]
        where = f"[receive] bind = {cfg.bind!r}, port = {self.port}"
        try:
            self._server = ae.start_server((cfg.bind, self.port), block=False, evt_handlers=handlers)
        except socket.gaierror as exc:
            raise LimenError(f"{where}: cannot resolve the address ({exc.strerror or exc})", cfg.path) from None
        except OSError as exc:
            import errno

            reason = {
                errno.EADDRINUSE: "the port is already in use (is another DICOM node running?)",
                errno.EACCES: "not allowed to listen on this port (ports below 1024 need privileges; 11112 does not)",
                errno.EADDRNOTAVAIL: "the address is not one of this machine's",
            }.get(exc.errno, exc.strerror or str(exc))
            raise LimenError(f"{where}: cannot listen: {reason}", cfg.path) from None
        except OverflowError as exc:
            raise LimenError(f"{where}: {exc}", cfg.path) from None
        self.address = tuple(self._server.server_address[:2])
        return self.address

    def stop_listening(self) -> None:
        """Close the listening socket: no new association; open ones go on."""
        if self._server is not None:
            server, self._server = self._server, None
            server.shutdown()
            self._active = server.active_associations  # the acceptor threads of this server, still running

    def stop(self, grace_s: float = STOP_GRACE_S) -> None:
        """Stop accepting; wait up to ``grace_s`` for open associations, then abort what remains (their
        unacknowledged images are sent again by the modality; acknowledged ones are already on disk)."""
        self.stop_listening()
        active, self._active = self._active, []
        deadline = time.monotonic() + grace_s
        while any(a.is_alive() for a in active) and time.monotonic() < deadline:
            time.sleep(0.05)
        for a in active:
            if a.is_alive():
                a.abort()
        for a in active:
            a.join(timeout=5.0)

    # ------------------------------------------------------------------ event handlers (association threads)
    def _record(self, assoc) -> AssociationRecord:
        with self._lock:
            rec = self._records.get(id(assoc))
            if rec is None:
                rec = self._records[id(assoc)] = AssociationRecord(peer=_peer(assoc))
            return rec

    def _on_open(self, event) -> None:
        self._record(event.assoc)

    def _titles(self, event) -> AssociationRecord:
        rec = self._record(event.assoc)
        rq = event.assoc.requestor
        rec.calling_ae = str(rq.ae_title or "").strip()
        prim = getattr(rq, "primitive", None)
        rec.called_ae = str(getattr(prim, "called_ae_title", "") or "").strip()
        return rec

    def _on_rejected(self, event) -> None:
        rec = self._titles(event)
        if rec.calling_ae not in self.config.calling_ae_titles:
            why = "calling AE title not in [receive] calling_ae_titles"
        elif rec.called_ae != self.config.ae_title:
            why = f"called AE title is not ours ({self.config.ae_title})"
        else:
            why = "too many associations at once"
        rec.outcome = f"rejected ({why})"

    def _on_established(self, event) -> None:
        rec = self._titles(event)
        rec.outcome = "open"
        # PS3.8 9.3.3.2: result 4 (none of the proposed transfer syntaxes) matters most: one of our classes,
        # offered only in a lossy or unknown encoding; result 3 is the rest of what the modality can send
        for cx in sorted(event.assoc.rejected_contexts, key=lambda c: c.result != 4):
            what = {3: "abstract syntax not supported", 4: "no acceptable transfer syntax"}.get(cx.result, "rejected")
            rec.contexts_rejected.append(f"{_sop_name(cx.abstract_syntax)} ({what})")

    def _on_echo(self, event) -> int:
        self._record(event.assoc).echoes += 1
        return SUCCESS

    def _on_store(self, event) -> int:
        rec = self._record(event.assoc)
        status, note = self.store(event)
        if status == SUCCESS:
            if note == "already here":
                rec.already_here += 1
            else:
                rec.stored += 1
        else:
            rec.refused.append(f"status 0x{status:04X}: {note}")
        return status

    def store(self, event) -> tuple[int, str]:
        """Check one C-STORE's dataset and write it; return (status, note).  Success only once it is on disk."""
        sop_class = str(event.context.abstract_syntax)
        try:
            ds = event.dataset
            got_class = str(ds.get("SOPClassUID", "") or "")
            uid = str(ds.get("SOPInstanceUID", "") or "")
        except Exception as exc:  # pydicom cannot decode what was sent
            return CANNOT_UNDERSTAND, f"dataset cannot be decoded ({type(exc).__name__})"
        if got_class != sop_class:
            return DOES_NOT_MATCH_SOP_CLASS, f"dataset's SOP Class {got_class or 'missing'} is not {sop_class}"
        if not uid:
            return DOES_NOT_MATCH_SOP_CLASS, "dataset has no SOP Instance UID"
        try:
            data = event.encoded_dataset(include_meta=True)
            path, again = self.writer.write(data, uid)
        except LimenError as exc:
            self.log(f"error: {exc}")
            return OUT_OF_RESOURCES, "cannot write it to the inbox"
        return SUCCESS, ("already here" if again else path.name)

    def _on_released(self, event) -> None:
        self._record(event.assoc).outcome = "released"

    def _on_aborted(self, event) -> None:
        self._record(event.assoc).outcome = "aborted"

    def _on_close(self, event) -> None:
        with self._lock:
            rec = self._records.pop(id(event.assoc), None)
        if rec is None:
            return
        if rec.outcome == "open":
            rec.outcome = "ended without release (aborted or connection lost)"
        with self._lock:
            self.totals["associations"] += 1 if rec.calling_ae else 0
            self.totals["rejected"] += 1 if rec.outcome.startswith("rejected") else 0
            self.totals["stored"] += rec.stored
            self.totals["refused"] += len(rec.refused)
        self.log(rec.line())


def _peer(assoc) -> str:
    rq = assoc.requestor
    host, port = getattr(rq, "address", "") or "?", getattr(rq, "port", None)
    return f"{host}:{port}" if port else str(host)


def _sop_name(uid) -> str:
    uid = str(uid)
    name = STORAGE_SOP_CLASSES.get(uid)
    if name:
        return name
    try:
        from pydicom.uid import UID

        name = UID(uid).name
    except Exception:
        name = ""
    return f"{name} ({uid})" if name and name != uid else uid
