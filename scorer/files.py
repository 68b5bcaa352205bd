"""Reading the small TOML files Limen is configured with, with errors that name the file."""

from __future__ import annotations

import os
import tomllib
from collections.abc import Iterable
from pathlib import Path
from typing import Any, TypeAlias

from scorer.errors import LimenError
from scorer.faults import fault_point

PathArg: TypeAlias = str | os.PathLike[str]
"""A path as the functions of Limen take it: a string or any path-like object."""


def read_toml(path: PathArg, what: str) -> dict[str, Any]:
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


def read_json(path: PathArg, what: str) -> dict[str, Any]:
    """Parse a JSON object written by Limen; unreadable, malformed or non-object files raise a one-line
    LimenError naming the file and ``what`` it should have been."""
    import json

    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise LimenError(f"cannot read {what} ({exc.strerror or exc})", path) from None
    except UnicodeDecodeError:
        raise LimenError(f"{what} is not UTF-8 text", path) from None
    except ValueError as exc:
        raise LimenError(f"not valid JSON: {exc}", path) from None
    if not isinstance(data, dict):
        raise LimenError(f"not a {what} (expected a JSON object)", path)
    return data


def atomic_write_bytes(path: PathArg, data: bytes, *, mode: int = 0o666) -> Path:
    """Write a file so that it is either complete or absent: a temporary name in the same folder, flushed
    to disk, then renamed over the target (an atomic step on POSIX file systems).  A run killed midway
    leaves the previous file, or none, never a truncated one that parses."""
    view, half = memoryview(data), len(data) // 2  # halves without copying the data
    return atomic_write_chunks(path, (view[:half], view[half:]), mode=mode)


def atomic_write_chunks(path: PathArg, chunks: Iterable[bytes | memoryview], *, mode: int = 0o666) -> Path:
    """:func:`atomic_write_bytes` for data that comes in pieces (an upload streamed from disk), so a large file
    is never held in memory whole.  ``mode`` (less the umask) is the new file's permission; ``0o600`` keeps
    a secret readable by its owner only from the first byte on.  Crash tests kill the process once the first
    piece is written (``LIMEN_FAULT_INJECT=write:n``)."""
    import os

    path = Path(path)
    tmp = write_staged(path.parent, chunks, prefix=f".{path.name}.", mode=mode, target=path)
    try:
        os.replace(tmp, path)
    except OSError as exc:
        discard(tmp)
        raise LimenError(f"cannot write here ({exc.strerror or exc})", path) from None
    return path


def write_staged(
    folder: PathArg,
    chunks: Iterable[bytes | memoryview],
    *,
    prefix: str = ".staged.",
    suffix: str = "",
    mode: int = 0o666,
    target: PathArg | None = None,
) -> Path:
    """Write ``chunks`` to a new temporary file ``<prefix>XXXX.part<suffix>`` in ``folder``, flushed to disk, and
    return its path; the caller gives it its final name (``os.replace``, atomic on POSIX) or :func:`discard` s it.
    Used where the final name is known only once the data is written and checked (the content store names files
    by their hash).  Anything that goes wrong (including an exception raised by ``chunks``) removes the file.
    The name keeps ``suffix`` so a reader that looks at the extension can check the file before it is placed;
    the ``.part`` in it lets a start-up sweep find temporaries a killed process left."""
    import os
    import tempfile

    folder = Path(folder)
    where = Path(target) if target is not None else folder
    try:
        fd, tmp = tempfile.mkstemp(prefix=prefix, suffix=".part" + suffix, dir=folder)
    except OSError as exc:
        raise LimenError(f"cannot write here ({exc.strerror or exc})", where) from None
    try:
        os.fchmod(fd, mode & ~_umask())  # mkstemp's 0600 would hide reports from the rest of the team
        with os.fdopen(fd, "wb") as fh:
            for i, chunk in enumerate(chunks):
                fh.write(chunk)
                fh.flush()
                if i == 0:
                    fault_point("write")  # crash tests kill the run here, part-way through a file
            os.fsync(fh.fileno())
    except OSError as exc:
        discard(tmp)
        raise LimenError(f"cannot write here ({exc.strerror or exc})", where) from None
    except BaseException:
        discard(tmp)
        raise
    return Path(tmp)


def discard(path: PathArg) -> None:
    """Remove a file if it is there (a staged temporary that will not be used)."""
    import os

    try:
        os.unlink(path)
    except OSError:
        pass


def sync_folder(path: PathArg) -> None:
    """Flush a folder's entries to disk (``fsync`` on the folder itself), so a file just renamed into it
    survives a power cut as well as a killed process; call it after :func:`atomic_write_bytes` when the
    file's presence is promised to someone (an acknowledged DICOM C-STORE)."""
    import os

    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write_text(path: PathArg, text: str, *, mode: int = 0o666) -> Path:
    """:func:`atomic_write_bytes` for UTF-8 text."""
    return atomic_write_bytes(path, text.encode("utf-8"), mode=mode)


def _umask() -> int:
    """The process umask, read without changing it where Linux reports it: setting it to 0 for a moment (the
    only portable way to read it) would let another thread of the web app create world-writable files."""
    import os

    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    umask = os.umask(0)
    os.umask(umask)
    return umask


MANIFEST = ".limen-outputs.json"
_TEMP_GLOB = ".*.part"


class OutputFolder:
    """The ``--out`` folder of one run: fresh, or emptied of what an earlier Limen run wrote there.

    A folder that holds anything is refused unless ``replace`` is true; then only the files a previous
    run owned (listed in its manifest ``.limen-outputs.json``, plus temporary ``.*.part`` files a killed run
    left) are removed, and files of anyone else stay.  The manifest is written first with
    ``"complete": false`` and the list of foreign files, and rewritten with ``"complete": true`` and the
    files of this run by :meth:`finish`, so even a run killed midway can be replaced cleanly.
    Every file is written with :func:`atomic_write_bytes` (complete or absent).

    With ``beside`` (the commands that write their outputs through :attr:`path`), a folder holding an earlier
    result is never emptied first: the new result is built in a hidden folder beside it (``.<name>.limen-new``),
    and :meth:`finish` swaps the two (two renames; the foreign files come along as hard links), so a run killed
    at any moment before that leaves the earlier complete result in place.  A run killed between the two renames
    is put right by the next run on the folder (:meth:`_recover`).  Where no folder can be made beside it (its
    parent is not writable) or the folder cannot be renamed (a mount point), the files are replaced in place.
    """

    def __init__(
        self, path: PathArg, *, replace: bool = False, command: str = "", option: str = "--out", beside: bool = False
    ) -> None:
        import json

        self.path = Path(path)
        self.target = self.path
        self.command = command
        self._stage: Path | None = None
        self._earlier: list[str] = []
        p = self.path
        if p.exists() and not p.is_dir():
            raise LimenError(f"is a file, not a folder; give a folder to {option}", p)
        if beside:
            _recover(p)
        try:
            p.mkdir(parents=True, exist_ok=True)
            present = self._present()
        except OSError as exc:
            raise LimenError(f"cannot create the output folder given to {option} ({exc.strerror or exc})", p) from None
        if present and not replace:
            raise LimenError(
                f"output folder is not empty ({len(present)} file(s), e.g. {sorted(present)[0]}); "
                f"choose a new {option} folder or add --replace to replace what an earlier Limen "
                "run wrote there",
                p,
            )
        foreign = set(present)
        if present:
            old = None
            try:
                old = json.loads((p / MANIFEST).read_text(encoding="utf-8"))
            except (OSError, ValueError):
                pass
            owned = {MANIFEST} | {f for f in present if Path(f).match(_TEMP_GLOB)}
            if isinstance(old, dict):
                listed = {str(f) for f in old.get("files", []) if isinstance(f, str)}
                if old.get("complete"):
                    owned |= listed
                else:  # a killed run: everything that was not there before it started is its own
                    owned |= set(present) - {str(f) for f in old.get("foreign", []) if isinstance(f, str)}
            foreign = set(present) - owned
        self.foreign = sorted(foreign)
        self._earlier = sorted(set(present) - foreign - {MANIFEST})
        if beside and present and self._build_beside():
            return
        # the manifest says "incomplete" before anything of the earlier run is removed, so a kill from here on
        # leaves a folder that says what it is
        self._write_manifest(complete=False, files=[])
        emptied: set[Path] = set()
        for rel in sorted(set(present) - foreign - {MANIFEST}):
            target = p / rel
            if ".." in Path(rel).parts or not target.is_file():
                continue
            try:
                target.unlink()
            except OSError as exc:
                raise LimenError(f"cannot remove the earlier run's file ({exc.strerror or exc})", target) from None
            emptied.update(d for d in target.parents if p in d.parents)
        self._prune_empty_dirs(emptied)

    def _build_beside(self) -> bool:
        """Make the hidden folder beside the target and write there from now on; False where it cannot be made."""
        import shutil

        stage, _ = _siblings(self.target)
        try:
            if stage.exists():
                shutil.rmtree(stage)
            stage.mkdir()
        except OSError:
            return False
        self._stage = self.path = stage
        self._write_manifest(complete=False, files=[])
        return True

    def _present(self) -> list[str]:
        return sorted(str(f.relative_to(self.path)) for f in self.path.rglob("*") if f.is_file() or f.is_symlink())

    @staticmethod
    def _prune_empty_dirs(dirs: Iterable[Path]) -> None:
        """Remove the sub-folders (deepest first) that removing the earlier run's files left empty."""
        for d in sorted(dirs, key=lambda d: len(d.parts), reverse=True):
            try:
                d.rmdir()
            except OSError:
                pass

    def _write_manifest(self, *, complete: bool, files: list[str]) -> None:
        import json

        atomic_write_text(
            self.path / MANIFEST,
            json.dumps(
                {
                    "format": "limen-outputs/1",
                    "command": self.command,
                    "complete": complete,
                    "files": files,
                    "foreign": self.foreign,
                },
                indent=1,
            )
            + "\n",
        )

    def __truediv__(self, name: str) -> Path:

        return self.path / name

    def finish(self) -> list[str]:
        """Record the files this run wrote (everything now present but the foreign files) as complete."""
        files = [f for f in self._present() if f != MANIFEST and f not in set(self.foreign)]
        self._write_manifest(complete=True, files=files)
        if self._stage is not None:
            self._swap(files)
        return files

    def _swap(self, files: list[str]) -> None:
        """Put the complete new result (built beside) in the target's place, with the foreign files."""
        import os
        import shutil

        stage, real = self._stage, self.target.resolve()
        assert stage is not None
        for rel in self.foreign:  # a file of someone else's where this run put its own: refused, nothing swapped
            dst = stage / rel
            if os.path.lexists(dst) or any(d.is_file() for d in dst.parents if stage in d.parents):
                raise LimenError(
                    "is not Limen's and is in the way of this run's output of the same name; move it and run "
                    "again (the earlier result is left as it was)",
                    real / rel,
                )
        for rel in self.foreign:  # the physicist's own files stay: hard links, the originals untouched
            src, dst = real / rel, stage / rel
            dst.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.link(src, dst, follow_symlinks=False)
            except OSError:
                shutil.copy2(src, dst, follow_symlinks=False)
        _, old = _siblings(real)
        if old.exists():
            shutil.rmtree(old)
        try:
            os.rename(real, old)
        except OSError:  # a mount point, a folder we may not rename: replace the files in place instead
            self._move_in(real, files)
        else:
            fault_point("swap")  # crash tests kill the run between the two renames
            os.rename(stage, real)
            shutil.rmtree(old, ignore_errors=True)
        self._stage, self.path = None, self.target

    def _move_in(self, real: Path, files: list[str]) -> None:
        import os
        import shutil

        stage = self._stage
        assert stage is not None
        for rel in self._earlier:
            try:
                (real / rel).unlink()
            except OSError:
                pass
        for rel in [*files, MANIFEST]:  # the manifest last: it says "complete" once every file is in place
            (real / rel).parent.mkdir(parents=True, exist_ok=True)
            os.replace(stage / rel, real / rel)
        shutil.rmtree(stage, ignore_errors=True)


def _siblings(target: Path) -> tuple[Path, Path]:
    """The hidden folders beside an output folder: the new result being built, and the earlier one being swapped
    out."""
    target = Path(target).resolve()
    return target.parent / f".{target.name}.limen-new", target.parent / f".{target.name}.limen-old"


def _recover(target: Path) -> None:
    """Put right what a run killed in :meth:`OutputFolder._swap` left: with the target gone, the complete new
    result (else the earlier one) takes its place; leftover hidden folders go."""
    import json
    import os
    import shutil

    stage, old = _siblings(target)
    real = Path(target).resolve()
    if not real.exists() and old.is_dir():
        try:
            done = json.loads((stage / MANIFEST).read_text(encoding="utf-8")).get("complete") is True
        except (OSError, ValueError, AttributeError):
            done = False
        try:
            os.rename(stage if done else old, real)
        except OSError as exc:
            raise LimenError(f"cannot restore the output folder ({exc.strerror or exc})", target) from None
    for leftover in (stage, old):
        if leftover.is_dir() and not leftover.is_symlink():
            shutil.rmtree(leftover, ignore_errors=True)
