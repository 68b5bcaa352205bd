"""Files the web app writes (secret key, content store, display pixels, demo conversion functions) are written
whole or not at all: a temporary name, flushed, renamed.  A server killed at any of its writes leaves complete
files only; an empty or cut-short secret key file is refused with one line, never used.

Kills use the fault hook ``LIMEN_FAULT_INJECT=write:n`` (``scorer/faults.py``, passed by every write of
:mod:`scorer.files`): the process kills itself with SIGKILL part-way through its n-th file.  A writer that did not
go through :mod:`scorer.files` would not pass the hook, so the process would live and the test fail.
"""

from __future__ import annotations

import hashlib
import io
import os
import signal
import sqlite3
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import MINI

from scorer.errors import LimenError

_DEMO = """
import sys
from webapp import create_app
from webapp.demo import create_demo_study
app = create_app({"INSTANCE_PATH": sys.argv[1]})
create_demo_study(app, n_readers=3, images_per_detector=2, trials_per_reader=None, n_practice=0,
                  repeat_fraction=0, layout_path=sys.argv[2], diameters_mm=None, half_width_ln=2.0)
print("done")
"""


def _env(**extra):
    env = {k: v for k, v in os.environ.items() if k not in ("LIMEN_SECRET_KEY", "LIMEN_FAULT_INJECT")}
    return {**env, **extra}


def _demo(instance: Path, fault: str | None = None, timeout=120):
    env = _env(LIMEN_FAULT_INJECT=fault) if fault else _env()
    return subprocess.run(
        [sys.executable, "-c", _DEMO, str(instance), str(MINI)],
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def _complete_files(instance: Path) -> list[str]:
    """Check every file the app wrote in ``instance`` completely; return their names (a damaged one fails)."""
    from scorer.images import load_conversion

    names = []
    for p in sorted(instance.rglob("*")):
        if not p.is_file() or ".part" in p.suffixes or p.name.startswith("limen.db"):
            continue  # temporaries (.*.part, .*.part.<ext>) of the killed write; the database is SQLite's own
        rel = str(p.relative_to(instance))
        data = p.read_bytes()
        if p.name == "secret_key":
            assert len(data) == 64 and all(c in b"0123456789abcdef" for c in data), rel
        elif "display" in p.relative_to(instance).parts:  # display/study-<id>/<sha256>.u16.npy
            arr = np.load(p)  # a cut .npy fails here: the header declares the full shape
            assert arr.dtype == np.uint16 and arr.size > 0, rel
        elif p.parent.name == "conversions":
            load_conversion(p)
            assert data.endswith(b"\n"), rel
        else:  # content store: the name is the file's own SHA-256
            assert p.stem == hashlib.sha256(data).hexdigest(), rel
        names.append(rel)
    return names


def test_killed_at_every_write_leaves_only_complete_files(tmp_path):
    """Kill the demo set-up (key, conversions, uploads, display pixels) half-way through each of its files in
    turn: each time exactly the files written before the kill are there, all complete, and a new start in
    the same instance folder finishes the job."""
    full = _demo(tmp_path / "full")
    assert full.returncode == 0 and "done" in full.stdout, full.stderr[-2000:]
    written = _complete_files(tmp_path / "full")
    kinds = {("display" if "display" in Path(n).parts else Path(n).parent.name) if "/" in n else n for n in written}
    assert kinds == {"secret_key", "store", "conversions", "display"}, written
    assert len(written) == 11  # key, 2 conversions, 4 images, 4 display arrays
    # kill at the 1st, 2nd, … write until a run gets through (the simulated images are also written, whole,
    # to a temporary folder before they are uploaded: those writes count too but leave nothing in the instance)
    counts = []
    for n in range(1, 40):
        inst = tmp_path / f"kill-{n}"
        r = _demo(inst, fault=f"write:{n}")
        if r.returncode == 0:
            break
        assert r.returncode == -signal.SIGKILL, (n, r.returncode, r.stderr[-2000:])
        left = _complete_files(inst)
        assert len(list(inst.rglob(".*.part*"))) <= 1  # the killed file, never under its real name
        counts.append(len(left))
        last = inst
    assert counts == sorted(counts) and counts[0] == 0 and counts[-1] == len(written) - 1, counts
    assert len(set(counts)) == len(written)  # a kill during each of the instance's 11 files was seen
    again = _demo(last)
    assert again.returncode == 0, again.stderr[-2000:]
    names = set(_complete_files(last))
    with sqlite3.connect(last / "limen.db") as con:  # the killed run committed nothing; the new one its study
        shas = [r[0] for r in con.execute("select sha256 from study_images")]
    assert len(shas) == 4
    assert all({f"store/{s}.dcm", f"store/display/study-1/{s}.u16.npy"} <= names for s in shas), (shas, names)


def test_secret_key_is_created_whole_private_and_kept(tmp_path, monkeypatch):
    from webapp import create_app

    monkeypatch.delenv("LIMEN_SECRET_KEY", raising=False)
    a = create_app({"INSTANCE_PATH": str(tmp_path / "inst")})
    key_file = tmp_path / "inst" / "secret_key"
    assert len(a.config["SECRET_KEY"]) == 64 and key_file.read_text() == a.config["SECRET_KEY"]
    assert stat.S_IMODE(key_file.stat().st_mode) == 0o600
    b = create_app({"INSTANCE_PATH": str(tmp_path / "inst")})
    assert b.config["SECRET_KEY"] == a.config["SECRET_KEY"]


def test_killed_while_writing_the_secret_key_leaves_none_and_the_next_start_makes_one(tmp_path):
    inst = tmp_path / "inst"
    code = "import sys; from webapp import create_app; create_app({'INSTANCE_PATH': sys.argv[1]})"
    r = subprocess.run(
        [sys.executable, "-c", code, str(inst)], env=_env(LIMEN_FAULT_INJECT="write:1"), capture_output=True, timeout=60
    )
    assert r.returncode == -signal.SIGKILL
    assert not (inst / "secret_key").exists()
    r = subprocess.run([sys.executable, "-c", code, str(inst)], env=_env(), capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert len((inst / "secret_key").read_text()) == 64


@pytest.mark.parametrize("content", ["", "\n", "3f9a0c"])
def test_empty_or_cut_short_secret_key_is_refused_in_one_line(tmp_path, monkeypatch, content):
    from scorer.cli import main
    from webapp import create_app

    monkeypatch.delenv("LIMEN_SECRET_KEY", raising=False)
    inst = tmp_path / "inst"
    inst.mkdir()
    (inst / "secret_key").write_text(content)
    with pytest.raises(LimenError, match="secret key file .*(is empty|holds only 6 characters)"):
        create_app({"INSTANCE_PATH": str(inst)})
    res = CliRunner().invoke(main, ["serve", "--instance", str(inst), "--port", "0"])
    assert res.exit_code == 2
    last = res.output.strip().splitlines()[-1]
    assert last.startswith("error: ") and str(inst / "secret_key") in last and "delete it" in last
    assert "Traceback" not in res.output
    assert (inst / "secret_key").read_text() == content  # refused, not replaced behind the user's back


def test_secret_key_from_the_environment_writes_no_file(tmp_path, monkeypatch):
    from webapp import create_app

    monkeypatch.setenv("LIMEN_SECRET_KEY", "k" * 40)
    app = create_app({"INSTANCE_PATH": str(tmp_path / "inst")})
    assert app.config["SECRET_KEY"] == "k" * 40 and not (tmp_path / "inst" / "secret_key").exists()


class _Unseekable(io.RawIOBase):
    def __init__(self, data):
        self._b = io.BytesIO(data)

    def readable(self):
        return True

    def read(self, n=-1):
        return self._b.read(n)


class _ChangesOnSecondReading(io.BytesIO):
    """A file rewritten while the server copies it: the second reading gives other bytes."""

    def __init__(self, first, second):
        super().__init__(first)
        self._second = second

    def seek(self, pos, whence=0):
        self.__init__(self._second, self._second)
        return super().seek(pos, whence)


def test_store_bytes_streams_in_pieces_and_names_by_hash(tmp_path):
    from webapp.content_store import STORE_CHUNK_BYTES, store_bytes

    data = np.random.default_rng(3).bytes(2 * STORE_CHUNK_BYTES + 123)
    expect = hashlib.sha256(data).hexdigest()  # FIPS 180-4 SHA-256 (hashlib), the store's content key
    for stream in (io.BytesIO(data), _Unseekable(data)):
        store = tmp_path / type(stream).__name__
        digest, path = store_bytes(stream, ".dcm", store, 10 * STORE_CHUNK_BYTES, "up.dcm")
        assert digest == expect and path == store / f"{expect}.dcm" and path.read_bytes() == data
        assert stat.S_IMODE(path.stat().st_mode) == 0o600
        assert [p.name for p in store.iterdir()] == [path.name]  # no temporary left


def test_store_bytes_refuses_a_stream_that_changed_and_stores_nothing(tmp_path):
    from webapp.content_store import STORE_CHUNK_BYTES, store_bytes

    first = b"a" * (STORE_CHUNK_BYTES + 10)
    for second in (b"b" * len(first), first[:-1], first + b"x"):
        store = tmp_path / f"s{len(second)}{second[:1].decode()}"
        with pytest.raises(LimenError, match="up.dcm: file changed while it was being stored"):
            store_bytes(_ChangesOnSecondReading(first, second), ".dcm", store, 10 * len(first), "up.dcm")
        assert list(store.iterdir()) == []


def test_store_bytes_limits_still_apply(tmp_path):
    from webapp.content_store import store_bytes

    with pytest.raises(LimenError, match="up.png: file is empty"):
        store_bytes(io.BytesIO(b""), ".png", tmp_path, 100, "up.png")
    with pytest.raises(LimenError, match="up.png: file is larger than the limit"):
        store_bytes(io.BytesIO(b"x" * 101), ".png", tmp_path, 100, "up.png")
    assert list(tmp_path.iterdir()) == []


def test_two_servers_starting_at_once_share_one_secret_key(tmp_path, monkeypatch):
    """Of two processes creating the key of a new instance folder at the same moment, one key wins (the file is
    linked into place only if absent) and both use it; no temporary is left."""
    monkeypatch.delenv("LIMEN_SECRET_KEY", raising=False)
    inst = tmp_path / "inst"
    code = (
        "import sys, time; from webapp import create_app\n"
        "t = float(sys.argv[2])\n"
        "while time.time() < t: pass\n"
        "print(create_app({'INSTANCE_PATH': sys.argv[1]}).config['SECRET_KEY'])"
    )
    import time

    start = str(time.time() + 4.0)  # both past their imports, then racing for the file
    procs = [
        subprocess.Popen([sys.executable, "-c", code, str(inst), start], env=_env(), stdout=subprocess.PIPE, text=True)
        for _ in range(2)
    ]
    keys = [p.communicate(timeout=60)[0].strip() for p in procs]
    assert all(p.returncode == 0 for p in procs)
    assert keys[0] == keys[1] == (inst / "secret_key").read_text() and len(keys[0]) == 64
    assert not list(inst.glob(".*.part"))


def test_stale_temporaries_of_a_killed_server_are_removed_at_start(tmp_path):
    from webapp import STALE_TEMPORARY_S, create_app

    store = tmp_path / "inst" / "store"
    (store / "display" / "study-1").mkdir(parents=True)
    old = store / "display" / "study-1" / ".abc.u16.npy.x1.part"
    fresh = store / ".def.dcm.x2.part"
    staged = store / ".upload.x3.part.dcm"  # an upload staged under its extension, to be checked before placing
    old.write_bytes(b"half")
    fresh.write_bytes(b"being written")
    staged.write_bytes(b"half an upload")
    t = old.stat().st_mtime - STALE_TEMPORARY_S - 10
    os.utime(old, (t, t))
    os.utime(staged, (t, t))
    create_app({"INSTANCE_PATH": str(tmp_path / "inst"), "SECRET_KEY": "k" * 64})
    assert not old.exists() and not staged.exists()
    assert fresh.exists()  # a write in progress (younger than an hour) is left alone
