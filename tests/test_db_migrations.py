"""Schema migrations (Alembic) of both databases: the schema the migrations build is the models', and a database
written by the previous release (tests/data/previous-*.sqlite, made by tests/data/make_previous_release_dbs.py
with that release's own code, git commit 0c02b7c) is upgraded with every row kept."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest
from click.testing import CliRunner

from scorer.cli import main

DATA = Path(__file__).resolve().parent / "data"


def _head(which: str) -> str:
    """The newest revision shipped for ``which`` (nightly | webapp), read by Alembic from the migrations folder."""
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    from scorer.databases import NIGHTLY, WEB_APP

    cfg = Config()
    cfg.set_main_option("script_location", str((NIGHTLY if which == "nightly" else WEB_APP).script_location))
    return ScriptDirectory.from_config(cfg).get_current_head()


def _rows(path: Path) -> dict[str, tuple[list[str], list[tuple]]]:
    """Every table's columns and rows (in rowid order), read with the sqlite3 module, not with Limen."""
    con = sqlite3.connect(path)
    try:
        out = {}
        for (name,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'"):
            cols = [r[1] for r in con.execute(f"PRAGMA table_info({name})")]
            out[name] = (cols, con.execute(f"SELECT {', '.join(cols)} FROM {name} ORDER BY rowid").fetchall())
        return out
    finally:
        con.close()


def _every_row_kept(before, after, changed=()) -> int:
    """Each table of ``before`` is in ``after`` with the same rows in its old columns; returns the rows compared."""
    n = 0
    for table, (cols, rows) in before.items():
        assert table in after, table
        new_cols, new_rows = after[table]
        keep = [new_cols.index(c) for c in cols]
        got = [tuple(r[i] for i in keep) for r in new_rows]
        if table in changed:
            continue
        assert got == rows, table
        n += len(rows)
    return n


def _copy(name: str, tmp_path: Path) -> Path:
    path = tmp_path / name
    shutil.copyfile(DATA / name, path)
    return path


def test_previous_release_nightly_database_is_upgraded_with_every_row(tmp_path):
    from scorer.databases import NIGHTLY
    from scorer.qc import open_store

    path = _copy("previous-nightly.sqlite", tmp_path)
    before = _rows(path)
    assert NIGHTLY.version_table not in before and before["limen_meta"][1] == [("schema_version", "1")]
    assert all(rows for _, rows in before.values())  # the fixture has rows in every table
    store = open_store(f"sqlite:///{path}", create=False)
    try:
        sessions = store.sessions()
        assert [s["session_date"] for s in sessions] == ["2026-11-01"]  # the scored one (the other is claimed)
        assert sessions[0]["detector"] == "Room 3 – Brightwater" and sessions[0]["overall_verdict"] == "PASS"
        assert store.baseline("Room 3 – Brightwater", "dprime") is not None
    finally:
        store.close()
    after = _rows(path)
    assert after[NIGHTLY.version_table][1] == [(_head("nightly"),)]
    # limen_meta now says 2: the release before Alembic refuses it as "newer than this Limen"
    assert after["limen_meta"][1] == [("schema_version", "2")]
    assert _every_row_kept(before, after, changed={"limen_meta"}) == 17  # every row the fixture script wrote
    # the commands read it: trend, baseline show
    res = CliRunner().invoke(main, ["baseline", "show", "--db", str(path), "--json"])
    assert res.exit_code == 0, res.output
    assert '"explicit"' in res.stdout
    res = CliRunner().invoke(main, ["trend", "--db", str(path), "--out", str(tmp_path / "trend")])
    assert res.exit_code == 0, res.output
    assert "Room 3" in (tmp_path / "trend" / "trend.csv").read_text(encoding="utf-8")


def test_previous_release_web_app_database_is_upgraded_with_every_row(tmp_path):
    from scorer.databases import WEB_APP

    path = _copy("previous-webapp.sqlite", tmp_path)
    before = _rows(path)
    assert WEB_APP.version_table not in before and "adaptive_cells" not in before
    assert "placement" not in before["studies"][0] and "tile_order" not in before["trials"][0]
    assert all(rows for _, rows in before.values())
    res = CliRunner().invoke(main, ["users", "list", "--db", f"sqlite:///{path}", "--instance", str(tmp_path / "inst")])
    assert res.exit_code == 0, res.output
    for name in ("coordinator", "Reader-Åsa", "reader02"):
        assert name in res.stdout
    after = _rows(path)
    assert after[WEB_APP.version_table][1] == [(_head("webapp"),)]
    assert _every_row_kept(before, after) == 19  # every row the fixture script wrote
    # the columns and the table the previous release lacked: earlier studies keep fixed schedules (NULL)
    cols, rows = after["studies"]
    assert rows[0][cols.index("placement")] is None
    cols, rows = after["study_images"]
    assert rows[0][cols.index("practice")] == 0
    cols, rows = after["users"]
    assert [r[cols.index("username_key")] for r in rows] == ["coordinator", "reader-åsa", "reader02"]
    assert after["adaptive_cells"][1] == []


def test_previous_release_web_app_reads_in_the_app(tmp_path):
    """The upgraded study is served: the coordinator's study page lists it and its responses export."""
    from webapp import create_app
    from webapp.models import Response, Study, db

    path = _copy("previous-webapp.sqlite", tmp_path)
    app = create_app({"INSTANCE_PATH": str(tmp_path / "inst"), "DATABASE_URL": f"sqlite:///{path}"})
    with app.app_context():
        s = db()
        study = s.query(Study).one()
        assert study.name == 'Brightwater "direct vs indirect" 2026' and study.placement is None
        assert sorted(r.chosen_site for r in s.query(Response)) == [1, 2]
        db().remove()
    app.extensions["limen_engine"].dispose()


def _schema_differences(url: str, which: str) -> list:
    """What Alembic's autogenerate finds between the database at ``url`` and the live models."""
    from alembic.autogenerate import compare_metadata
    from alembic.runtime.migration import MigrationContext
    from sqlalchemy import create_engine

    from scorer.databases import NIGHTLY, WEB_APP

    if which == "nightly":
        from scorer.qc.tables import Base
    else:
        from webapp.models import Base
    version_table = (NIGHTLY if which == "nightly" else WEB_APP).version_table
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            mc = MigrationContext.configure(conn, opts={"compare_type": True, "version_table": version_table})
            return compare_metadata(mc, Base.metadata)
    finally:
        engine.dispose()


def _fresh(url: str, which: str, tmp_path: Path) -> None:
    if which == "nightly":
        from scorer.qc import open_store

        open_store(url).close()
    else:
        from webapp import create_app

        app = create_app({"INSTANCE_PATH": str(tmp_path / "inst"), "DATABASE_URL": url})
        app.extensions["limen_engine"].dispose()


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_migrations_build_the_models_schema_sqlite(tmp_path, which):
    """A new table or column in the models without a migration fails here (DEVELOPERS.md: adding a migration)."""
    url = f"sqlite:///{tmp_path / 'new.sqlite'}"
    _fresh(url, which, tmp_path)
    assert _schema_differences(url, which) == []


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_migrations_build_the_models_schema_postgresql(tmp_path, postgres_url, which):
    _fresh(postgres_url, which, tmp_path)
    assert _schema_differences(postgres_url, which) == []


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_upgraded_previous_release_matches_the_models(tmp_path, which):
    path = _copy(f"previous-{which}.sqlite", tmp_path)
    _fresh(f"sqlite:///{path}", which, tmp_path)
    assert _schema_differences(f"sqlite:///{path}", which) == []


def _to_postgresql(sqlite_path: Path, url: str) -> None:
    """The previous release's tables and rows copied into PostgreSQL (tables reflected from the SQLite file)."""
    from sqlalchemy import MetaData, create_engine, insert, select

    src, dst = create_engine(f"sqlite:///{sqlite_path}"), create_engine(url)
    meta = MetaData()
    meta.reflect(src)
    for table in meta.tables.values():
        for col in table.columns:
            col.type = col.type.as_generic()  # SQLite's DATETIME → DateTime (PostgreSQL: TIMESTAMP)
            col.server_default = None if col.name != "session_generation" else col.server_default
    meta.create_all(dst)
    with src.connect() as a, dst.begin() as b:
        for table in meta.sorted_tables:
            rows = [dict(r._mapping) for r in a.execute(select(table))]
            if rows:
                b.execute(insert(table), rows)
        for table in meta.sorted_tables:  # serial columns continue after the copied ids
            if "id" in table.c:
                b.exec_driver_sql(
                    f"SELECT setval(pg_get_serial_sequence('{table.name}', 'id'), "
                    f"COALESCE((SELECT MAX(id) FROM {table.name}), 0) + 1, false)"
                )
    src.dispose()
    dst.dispose()


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_previous_release_database_on_postgresql_is_adopted(tmp_path, postgres_url, which):
    from sqlalchemy import create_engine, text

    path = _copy(f"previous-{which}.sqlite", tmp_path)
    before = _rows(path)
    _to_postgresql(path, postgres_url)
    _fresh(postgres_url, which, tmp_path)
    assert _schema_differences(postgres_url, which) == []
    engine = create_engine(postgres_url)
    with engine.connect() as conn:
        for table, (cols, rows) in before.items():
            if table == "limen_meta":
                continue
            quoted = ", ".join(f'"{c}"' for c in cols)
            got = conn.execute(text(f"SELECT {quoted} FROM {table}")).all()
            assert len(got) == len(rows), table
            assert sorted(map(str, [r[0] for r in got])) == sorted(map(str, [r[0] for r in rows])), table
    engine.dispose()


def test_newer_web_app_database_is_refused(tmp_path):
    from sqlalchemy import create_engine

    from scorer.databases import WEB_APP
    from scorer.errors import LimenError

    url = f"sqlite:///{tmp_path / 'w.sqlite'}"
    _fresh(url, "webapp", tmp_path)
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.exec_driver_sql(f"UPDATE {WEB_APP.version_table} SET version_num = 'webapp_9999'")
    engine.dispose()
    with pytest.raises(LimenError, match="webapp_9999 was written by a later Limen"):
        _fresh(url, "webapp", tmp_path)


def test_migrations_are_package_data():
    """The wheel carries the migrations (tests/test_packaging.py installs one and opens a database with it)."""
    import tomllib

    root = Path(__file__).resolve().parents[1]
    st = tomllib.loads((root / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    packages, data = set(st["packages"]), st["package-data"]
    for top in (root / "scorer/qc/migrations", root / "webapp/migrations"):
        files = [p for p in top.rglob("*") if p.is_file() and "__pycache__" not in p.parts]
        assert files, top
        for f in files:
            package = ".".join(f.parent.relative_to(root).parts)
            # a module of a declared package, or a data file its package declares
            shipped = package in packages and (
                f.suffix == ".py" or any(f.relative_to(f.parent).match(pat) for pat in data.get(package, []))
            )
            assert shipped, f


def _open_at_once(url: str, which: str, tmp_path: Path, n: int = 3) -> None:
    """``n`` processes opening one new database at the same moment: each succeeds, the schema is made once."""
    import os
    import subprocess
    import sys
    import time

    from sqlalchemy import create_engine, text

    from scorer.databases import NIGHTLY, WEB_APP

    code = (
        "import sys, time\n"
        "from scorer.qc import open_store\n"
        "from webapp import create_app\n"
        "t = float(sys.argv[3])\n"
        "while time.time() < t: pass\n"
        "if sys.argv[2] == 'nightly':\n"
        "    open_store(sys.argv[1]).close()\n"
        "else:\n"
        "    create_app({'INSTANCE_PATH': sys.argv[4], 'DATABASE_URL': sys.argv[1], 'SECRET_KEY': 'k' * 40})\n"
    )
    start = str(time.time() + 5.0)  # every process past its imports, then racing
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", code, url, which, start, str(tmp_path / f"inst{k}")],
            env=env,
            stderr=subprocess.PIPE,
            text=True,
        )
        for k in range(n)
    ]
    errs = [p.communicate(timeout=120)[1] for p in procs]
    assert [p.returncode for p in procs] == [0] * n, errs
    table = (NIGHTLY if which == "nightly" else WEB_APP).version_table
    engine = create_engine(url)
    with engine.connect() as conn:
        assert conn.execute(text(f"SELECT version_num FROM {table}")).scalars().all() == [_head(which)]
    engine.dispose()
    assert _schema_differences(url, which) == []


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_processes_opening_a_new_database_at_once_sqlite(tmp_path, which):
    _open_at_once(f"sqlite:///{tmp_path / 'new.sqlite'}", which, tmp_path)


@pytest.mark.parametrize("which", ["nightly", "webapp"])
def test_processes_opening_a_new_database_at_once_postgresql(tmp_path, postgres_url, which):
    _open_at_once(postgres_url, which, tmp_path)


def test_a_database_holding_both_schemas_from_the_previous_release_stays_usable_by_both(tmp_path):
    """The previous release made the web app's tables inside a nightly database when given one (issue 24): such a
    database is adopted by each kind, with its rows, instead of being refused as the other kind."""
    from sqlalchemy import MetaData, create_engine, insert, select

    path = _copy("previous-nightly.sqlite", tmp_path)
    src, dst = create_engine(f"sqlite:///{DATA / 'previous-webapp.sqlite'}"), create_engine(f"sqlite:///{path}")
    meta = MetaData()
    meta.reflect(src)
    meta.create_all(dst)
    with src.connect() as a, dst.begin() as b:
        for table in meta.sorted_tables:
            b.execute(insert(table), [dict(r._mapping) for r in a.execute(select(table))])
    src.dispose()
    dst.dispose()
    before = _rows(path)
    _fresh(f"sqlite:///{path}", "webapp", tmp_path)
    _fresh(f"sqlite:///{path}", "nightly", tmp_path)
    after = _rows(path)
    assert after["alembic_version_webapp"][1] == [(_head("webapp"),)]
    assert after["alembic_version_nightly"][1] == [(_head("nightly"),)]
    assert _every_row_kept(before, after, changed={"limen_meta"}) == 17 + 19
