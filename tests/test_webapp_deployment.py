"""Deployment: the default instance folder, and a backup restored into a fresh instance serving the same study."""

from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path

from click.testing import CliRunner
from webapp_helpers import MINI, demo_app, login, pass_display_check, read_all

from scorer.cli import main

ROOT = Path(__file__).resolve().parents[1]


def test_the_default_instance_folder_is_the_users_data_folder(tmp_path, monkeypatch):
    """platformdirs' user data folder (XDG_DATA_HOME on Linux), never the package or the checkout."""
    import webapp
    from webapp import create_app

    monkeypatch.delenv("LIMEN_INSTANCE", raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    monkeypatch.chdir(tmp_path)
    app = create_app({"SECRET_KEY": "k" * 64})
    inst = Path(app.instance_path)
    assert inst == tmp_path / "data" / "limen" / "reader-studies" and (inst / "limen.db").is_file()
    package = Path(webapp.__file__).resolve().parent
    assert package not in inst.parents and ROOT not in inst.parents
    monkeypatch.setenv("LIMEN_INSTANCE", str(tmp_path / "chosen"))
    assert Path(create_app({"SECRET_KEY": "k" * 64}).instance_path) == tmp_path / "chosen"


def _coordinator_view(app, sid):
    c = app.test_client()
    login(c, "coordinator")
    return c, c.get(f"/coordinator/studies/{sid}/responses.csv").data, c.get("/coordinator/").text


def test_a_backup_restored_into_a_fresh_instance_serves_the_same_study(tmp_path):
    # the source instance keeps its key in a file (as `limen serve` does), has an open study with responses and a
    # draft study whose layout was uploaded into the store
    app, sid = demo_app(tmp_path / "old", SECRET_KEY=None)
    reader = app.test_client()
    tok = login(reader, "reader1")
    pass_display_check(reader, sid, tok)
    read_all(reader, sid, tok, limit=3)
    coord, csv_before, dash_before = _coordinator_view(app, sid)
    ctok = login(coord, "coordinator")
    r = coord.post(
        "/coordinator/studies/new",
        data={"csrf_token": ctok, "name": "draft to restore", "layout_file": (MINI.open("rb"), "mini.toml")},
        content_type="multipart/form-data",
    )
    assert r.status_code == 302, r.text
    draft_id = int(r.headers["Location"].rstrip("/").split("/")[-1])
    next_before = reader.get(f"/reading/api/studies/{sid}/next").json
    region_before = reader.get(next_before["region_url"]).data
    old_instance = Path(app.instance_path)

    out = tmp_path / "backup"
    r = CliRunner().invoke(main, ["backup", "--instance", str(old_instance), "--out", str(out)])
    assert r.exit_code == 0, r.output
    manifest = json.loads((out / "backup.json").read_text())
    assert manifest["database"] == "sqlite" and manifest["store_files"] > 0 and manifest["secret_key"]
    assert not [p for p in out.rglob("*") if ".part" in p.name]
    with sqlite3.connect(out / "limen.db") as con:  # a complete, consistent database file
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    # a second backup into the same folder is refused
    again = CliRunner().invoke(main, ["backup", "--instance", str(old_instance), "--out", str(out)])
    assert again.exit_code == 2 and "not empty" in again.output

    # the old instance is lost; the backup folder, moved elsewhere, becomes the instance
    app.extensions["limen_engine"].dispose()
    shutil.rmtree(old_instance)
    restored_dir = tmp_path / "new-server" / "instance"
    shutil.copytree(out, restored_dir.parent / "instance")
    from webapp import create_app

    restored = create_app({"INSTANCE_PATH": str(restored_dir), "ANALYSIS_N_BOOT": 20})
    _, csv_after, dash_after = _coordinator_view(restored, sid)
    assert csv_after == csv_before and "draft to restore" in dash_after
    # the reader's session survives (same key) and the next trial and its pixels are the same
    reader2 = restored.test_client()
    reader2.set_cookie("session", reader.get_cookie("session").value)
    next_after = reader2.get(f"/reading/api/studies/{sid}/next").json
    assert next_after == next_before
    assert reader2.get(next_after["region_url"]).data == region_before
    # the draft's uploaded layout and the open study's conversion functions are found in the new store
    from webapp import content_store
    from webapp.models import Study, StudyImage, db

    store = Path(restored.config["STORE_DIR"])
    with restored.app_context():
        layout = content_store.stored_file(db().get(Study, draft_id).layout_file, store)
        assert store in layout.parents and layout.is_file()
        for im in db().query(StudyImage).filter_by(study_id=sid):
            conv = content_store.stored_file(im.conversion_file, store)
            assert store in conv.parents and conv.is_file()
