"""Hostile database arguments to the newer commands (issue 24): `trend`, `baseline`, `nightly`, `users`, `serve`.

The rule (DESIGN.md "Conventions"): a bad input gives exit status 2 and exactly one line ``error: …`` on stderr
naming the database and the problem, never a traceback.  And opening a database must not make one unless the
command writes results; a database of the other kind (nightly QC against reader-study) is refused by name, not
filled with the other schema.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from click.testing import CliRunner

from scorer.cli import main


def _run(args):
    return CliRunner().invoke(main, [str(a) for a in args])


def _one_error(res, *needles: str) -> str:
    """Exit status 2 and exactly one stderr line, ``error: …``, holding each of ``needles``."""
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    assert res.exit_code == 2, (res.exit_code, res.output)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    for n in needles:
        assert n in lines[0], lines[0]
    return lines[0]


def _tables(path: Path) -> set[str]:
    con = sqlite3.connect(path)
    try:
        return {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    finally:
        con.close()


@pytest.fixture(scope="module")
def dbs(tmp_path_factory):
    """A nightly database and a reader-study database, each made by its own command's code."""
    from scorer.qc import open_store
    from webapp import create_app

    root = tmp_path_factory.mktemp("dbs")
    nightly = root / "nightly.sqlite"
    open_store(f"sqlite:///{nightly}").close()
    web = root / "web.sqlite"
    app = create_app({"INSTANCE_PATH": str(root / "inst"), "DATABASE_URL": f"sqlite:///{web}"})
    app.extensions["limen_engine"].dispose()
    return {"nightly": nightly, "web": web, "instance": root / "inst"}


# --------------------------------------------------------------------------- read-only commands make nothing
@pytest.mark.parametrize("command", [["trend", "--out", "{tmp}/report"], ["baseline", "show"]])
def test_mistyped_database_path_is_not_created(tmp_path, command):
    db = tmp_path / "nightyl.sqlite"  # the typo
    args = [a.format(tmp=tmp_path) for a in command]
    _one_error(_run([*args, "--db", db]), str(db), "no such database")
    assert not db.exists() and not list(tmp_path.glob("nightyl*"))


@pytest.mark.parametrize("command", [["trend", "--out", "{tmp}/report"], ["baseline", "show"]])
def test_zero_byte_file_is_not_made_a_database(tmp_path, command):
    db = tmp_path / "empty.sqlite"
    db.write_bytes(b"")
    _one_error(_run([*[a.format(tmp=tmp_path) for a in command], "--db", db]), str(db), "0 bytes")
    assert db.stat().st_size == 0


def test_zero_byte_file_refused_by_nightly_too(tmp_path):
    (tmp_path / "inbox").mkdir()
    db = tmp_path / "empty.sqlite"
    db.write_bytes(b"")
    _one_error(_run(["nightly", "--inbox", tmp_path / "inbox", "--db", db]), str(db), "0 bytes")
    assert db.stat().st_size == 0


def test_non_database_file_refused(tmp_path):
    db = tmp_path / "notes.sqlite"
    db.write_text("session notes, not a database\n", encoding="utf-8")
    _one_error(_run(["baseline", "show", "--db", db]), str(db), "not a SQLite database")
    assert db.read_text(encoding="utf-8") == "session notes, not a database\n"


@pytest.mark.parametrize(
    "command",
    [["nightly", "--inbox", "{tmp}/inbox"], ["trend", "--out", "{tmp}/report"], ["baseline", "show"]],
)
def test_in_memory_database_refused_where_results_must_persist(tmp_path, command):
    (tmp_path / "inbox").mkdir()
    args = [a.format(tmp=tmp_path) for a in command]
    _one_error(_run([*args, "--db", "sqlite:///:memory:"]), "in-memory")


def test_in_memory_database_refused_by_the_web_app(tmp_path):
    _one_error(_run(["users", "list", "--db", "sqlite://", "--instance", tmp_path / "inst"]), "in-memory")


def test_foreign_sqlite_database_refused(tmp_path):
    db = tmp_path / "other.sqlite"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE invoices (id INTEGER PRIMARY KEY, amount REAL)")
    con.commit()
    con.close()
    _one_error(_run(["trend", "--db", db, "--out", tmp_path / "r"]), "another program", "invoices")
    assert _tables(db) == {"invoices"}


# --------------------------------------------------------------------------- the wrong kind of database
@pytest.mark.parametrize("command", [["baseline", "show"], ["trend", "--out", "{tmp}/report"]])
def test_web_app_database_refused_by_nightly_commands(tmp_path, dbs, command):
    import shutil

    web = tmp_path / "web.sqlite"
    shutil.copyfile(dbs["web"], web)
    before = _tables(web)
    args = [a.format(tmp=tmp_path) for a in command]
    _one_error(_run([*args, "--db", web]), "reader-study", "not a nightly")
    assert _tables(web) == before  # no qc_* table made in it


def test_web_app_database_refused_by_nightly(tmp_path, dbs):
    import shutil

    web = tmp_path / "web.sqlite"
    shutil.copyfile(dbs["web"], web)
    (tmp_path / "inbox").mkdir()
    before = _tables(web)
    _one_error(_run(["nightly", "--inbox", tmp_path / "inbox", "--db", web]), "reader-study", "not a nightly")
    assert _tables(web) == before


def test_nightly_database_refused_by_the_web_app(tmp_path, dbs):
    import shutil

    db = tmp_path / "nightly.sqlite"
    shutil.copyfile(dbs["nightly"], db)
    before = _tables(db)
    res = _run(["users", "list", "--db", f"sqlite:///{db}", "--instance", tmp_path / "inst"])
    _one_error(res, "nightly QC database", "not a reader-study")
    assert _tables(db) == before  # no users/studies tables made in it


# --------------------------------------------------------------------------- users / serve: bad URLs
@pytest.mark.parametrize(
    "url, needle",
    [
        ("nosuchdb://host/x", "unknown kind of database"),
        ("not a database url", "not a database URL"),
        ("postgresql+psycopg://nobody@127.0.0.1:1/none", "cannot open database"),
        ("sqlite:////proc/limen-hostile.sqlite", "limen-hostile.sqlite"),
    ],
    ids=["unknown-scheme", "not-a-url", "unreachable-postgresql", "unwritable-folder"],
)
@pytest.mark.parametrize("command", [["users", "list"], ["serve", "--port", "0"]])
def test_web_app_commands_with_a_database_they_cannot_use(tmp_path, url, needle, command):
    res = _run([*command, "--db", url, "--instance", tmp_path / "inst"])
    _one_error(res, needle)
    assert "Traceback" not in res.output


def test_web_app_refuses_a_non_database_file(tmp_path):
    db = tmp_path / "limen.db"
    db.write_bytes(b"\x00\x01 not sqlite at all" * 10)
    _one_error(_run(["users", "list", "--db", f"sqlite:///{db}", "--instance", tmp_path / "inst"]), "not a SQLite")
