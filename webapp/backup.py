"""Backing up a web-app instance into a folder that is itself an instance folder.

``limen backup --instance OLD --out NEW`` writes ``NEW/limen.db`` (SQLite), ``NEW/store/`` (uploaded images,
layouts, conversion functions, display pixels) and ``NEW/secret_key``; restoring is starting the app on it
(``limen serve --instance NEW``, or copying NEW to where the instance should live).

Consistency while the server runs: the database is copied first, with SQLite's online backup (a snapshot of one
moment, write-ahead log included), then the store.  The store only gains files while studies run (files are
named by their hash and never rewritten; refused uploads never enter it), so every file the copied database
refers to is in the copied store.  Temporaries (``.*.part*``) are left out.  ``backup.json``, written last,
marks a complete backup and lists what it holds.  A PostgreSQL database is not copied (dump it with
``pg_dump``, see the README); the store and the key still are.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import shutil
import sqlite3
from dataclasses import dataclass
from pathlib import Path

from scorer.errors import LimenError

MANIFEST = "backup.json"
FORMAT = "limen-backup/1"


@dataclass(frozen=True)
class BackupSummary:
    out: Path
    database: str  # "sqlite" or what to do instead
    files: int
    bytes: int


def _is_temporary(path: Path) -> bool:
    return path.name.startswith(".") and ".part" in path.name


def backup_instance(app, out) -> BackupSummary:
    """Copy ``app``'s database (SQLite), content store and secret key into the new folder ``out``."""
    from sqlalchemy.engine import make_url

    from scorer import __version__
    from scorer.files import atomic_write_text

    out = Path(out)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise LimenError("backup folder exists and is not empty; give a new folder", out)
    instance = Path(app.instance_path).resolve()
    if out.resolve() == instance or instance in out.resolve().parents:
        raise LimenError("the backup folder must lie outside the instance folder", out)
    out.mkdir(parents=True, exist_ok=True)
    url = make_url(app.config["DATABASE_URL"])
    if url.get_backend_name() == "sqlite" and url.database not in (None, "", ":memory:"):
        _sqlite_snapshot(Path(url.database), out / "limen.db")
        database = "sqlite"
        db_sha256 = _sha256(out / "limen.db")
    else:
        database = f"not included ({url.get_backend_name()}: dump it with its own tool, e.g. pg_dump)"
        db_sha256 = None
    store = Path(app.config["STORE_DIR"])
    n_files = n_bytes = 0
    for src in sorted(store.rglob("*")):
        if not src.is_file() or any(_is_temporary(p) for p in (src, *src.relative_to(store).parents)):
            continue
        dst = out / "store" / src.relative_to(store)
        dst.parent.mkdir(parents=True, exist_ok=True)
        try:
            shutil.copy2(src, dst)
        except OSError as exc:
            raise LimenError(f"cannot copy {src.relative_to(store)} ({exc.strerror or exc})", out) from None
        n_files += 1
        n_bytes += dst.stat().st_size
    key = instance / "secret_key"
    if key.is_file():
        shutil.copy2(key, out / "secret_key")
        os.chmod(out / "secret_key", 0o600)
    manifest = {
        "format": FORMAT,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "limen_version": __version__,
        "source_instance": str(instance),
        "database": database,
        "database_sha256": db_sha256,
        "store_files": n_files,
        "store_bytes": n_bytes,
        "secret_key": key.is_file(),
    }
    atomic_write_text(out / MANIFEST, json.dumps(manifest, indent=2) + "\n")
    return BackupSummary(out=out, database=database, files=n_files, bytes=n_bytes)


def _sqlite_snapshot(src: Path, dst: Path) -> None:
    """SQLite's online backup of ``src`` into ``dst`` (one consistent moment, even while the server writes)."""
    tmp = dst.with_name(f".{dst.name}.part")
    try:
        source = sqlite3.connect(src, timeout=30)
        try:
            target = sqlite3.connect(tmp)
            try:
                source.backup(target)
            finally:
                target.close()
        finally:
            source.close()
        os.replace(tmp, dst)
    except sqlite3.Error as exc:
        tmp.unlink(missing_ok=True)
        raise LimenError(f"cannot back up the database ({exc})", src) from None


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            h.update(chunk)
    return h.hexdigest()
