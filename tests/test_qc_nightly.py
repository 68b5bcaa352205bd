"""`limen nightly` on an inbox with good sessions and every kind of bad file; idempotency; waiting sessions.

Expected behaviour is the issue's specification; the scoring itself is `score_files` (tested elsewhere
against published formulas), so here the check is that each session's stored thresholds equal a direct
`score_files` call on the same files (same seed), and that nothing is scored twice.
"""

import json
import shutil

import numpy as np
import pytest
from click.testing import CliRunner
from qc_helpers import (
    D1,
    D2,
    DIRECT,
    INDIRECT,
    assert_stored_like_direct,
    bad_files,
    check_database,
    flat_field,
    layout,
    night,
    write_config,
)

from scorer.cli import main
from scorer.images import load_conversion
from scorer.qc import SCHEMA_VERSION, load_config, open_store, run_nightly
from scorer.workflow import score_files


def _nightly(args):
    res = CliRunner().invoke(main, ["nightly", "--settle-seconds", "0", *args])
    return res


@pytest.fixture
def scene(tmp_path):
    inbox = tmp_path / "inbox"
    d1 = night(inbox, D1, ["direct"], seed=1)  # complete session
    i1 = night(tmp_path / "staging", D1, ["indirect"], n_images=4, seed=2)
    for f in i1[:3]:  # too few images: waits for the fourth
        (inbox / f.parent.name).mkdir(parents=True, exist_ok=True)
        shutil.copy(f, inbox / f.parent.name / f.name)
    d2 = night(inbox, D2, ["direct"], seed=3)  # complete, plus a flat field below
    flat = flat_field(inbox, D2)
    dup = inbox / "copies" / "renamed-copy.dcm"
    dup.parent.mkdir()
    shutil.copy(d1[0], dup)
    bad = bad_files(inbox, d1[1])
    cfg = write_config(tmp_path / "cfg")
    return {
        "inbox": inbox,
        "d1": d1,
        "i1": i1,
        "d2": d2,
        "flat": flat,
        "dup": dup,
        "bad": bad,
        "cfg": cfg,
        "db": f"sqlite:///{tmp_path / 'nightly.sqlite'}",
        "tmp": tmp_path,
    }


def test_sessions_scored_once_bad_files_quarantined_waiting_session_completes(scene):
    inbox, db = scene["inbox"], scene["db"]
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", db, "--json"])
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert set(js) >= {"scored_images", "sessions_scored", "sessions_waiting", "quarantined", "alerts"}
    assert js["sessions_scored"] == 2 and js["scored_images"] == 8
    assert js["sessions_waiting"] == 1
    assert js["waiting"][0]["detector"] == INDIRECT and js["waiting"][0]["images"] == 3
    assert js["alerts"] == []
    assert [d["path"] for d in js["duplicates"]] == [str(scene["dup"])]
    reasons = {q["path"]: q["reason"] for q in js["quarantined"]}
    bad = scene["bad"]
    assert "truncated" in reasons[str(bad["truncated"])]
    assert "no pixel data" in reasons[str(bad["non_image"])]
    assert "FOR PRESENTATION" in reasons[str(bad["presentation"])]
    assert "unknown detector" in reasons[str(bad["unknown"])] and "ZZ-9999" in reasons[str(bad["unknown"])]
    assert "not a recognised image file" in reasons[str(bad["text"])]
    assert reasons[str(scene["flat"])].startswith("phantom not found")
    assert len(reasons) == 6
    qdir = inbox / "quarantine"
    for q in js["quarantined"]:
        moved = qdir / q["moved_to"].split("/")[-1]
        assert moved.exists() and not (inbox / q["path"]).exists()
        note = moved.with_name(moved.name + ".reason.txt").read_text()
        assert note.count("\n") == 1 and note.strip() == q["reason"]
    sessions, free = check_database(db, 2, images_per_session=4)
    assert free == 3
    # the stored thresholds are exactly those of score_files on the same files with the same seed
    conv = load_conversion(scene["cfg"].parent / "direct-conversion.toml")
    direct = score_files(sorted(map(str, scene["d2"])), layout(), conversion=conv, n_boot=50, seed=0)
    store = open_store(db)
    df = store.thresholds_frame(detector=DIRECT)
    store.close()
    got = df[df["session_date"] == str(D2)].sort_values(["method", "diameter_mm"])
    want = direct.thresholds_frame().sort_values(["method", "diameter_mm"])
    np.testing.assert_allclose(got["threshold_contrast"].to_numpy(), want["threshold_contrast"].to_numpy(), rtol=1e-12)
    # and so are its responses per site and each image's correct/trial counts
    assert_stored_like_direct(db, DIRECT, D2, direct)

    # re-run: nothing new is scored, nothing re-quarantined
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", db, "--json"])
    js = json.loads(res.stdout)
    assert res.exit_code == 0 and js["sessions_scored"] == 0 and js["quarantined"] == [] and js["sessions_waiting"] == 1

    # the last image of the waiting session arrives, with a renamed copy of an already scored image
    (inbox / "late").mkdir()
    shutil.copy(scene["i1"][3], inbox / "late" / "fourth.dcm")
    shutil.copy(scene["d2"][0], inbox / "late" / "scored-before-renamed.dcm")
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", db, "--json"])
    js = json.loads(res.stdout)
    assert res.exit_code == 0, res.output
    assert js["sessions_scored"] == 1 and js["scored_images"] == 4 and js["sessions_waiting"] == 0
    assert sorted(d["path"] for d in js["duplicates"]) == sorted(
        [str(scene["dup"]), str(inbox / "late" / "scored-before-renamed.dcm")]
    )
    check_database(db, 3, images_per_session=4)


def test_text_output_and_default_configuration(tmp_path):
    """Without --config every detector gets the bundled layout and 4 images per session (here: waiting)."""
    inbox = tmp_path / "inbox"
    night(inbox, D1, ["direct"], n_images=3, seed=1)
    res = _nightly(["--inbox", str(inbox), "--db", str(tmp_path / "q.sqlite")])
    assert res.exit_code == 0, res.output
    assert "waiting HSX-SE-0417  2026-03-02  3 of 4 images" in res.output
    assert "never replace" in res.output
    assert (tmp_path / "q.sqlite").exists()


def test_default_config_uses_the_bundled_layout_and_four_images(tmp_path):
    from scorer.phantom import default_layout_path
    from scorer.qc import default_config

    c = default_config()
    d = c.detector_for("ANY-1", None, None)
    assert d.name == "ANY-1" and d.min_images == 4 and d.limits is None
    assert d.layout.source_path == str(default_layout_path())
    assert c.detector_for(None, None, None) is None  # no identifier at all: unknown


def test_usage_and_database_errors_exit_2(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    res = _nightly(["--inbox", str(inbox), "--workers", "2", "--dask", "tcp://127.0.0.1:1"])
    assert res.exit_code == 2 and "either --workers or --dask" in res.output
    res = _nightly(["--inbox", str(inbox), "--db", "postgresql+psycopg://nobody@127.0.0.1:1/none"])
    assert res.exit_code == 2 and "cannot open database" in res.output
    assert len(res.output.strip().splitlines()) == 1
    res = _nightly(["--inbox", str(inbox), "--db", str(tmp_path / "no" / "such" / "dir" / "x.sqlite")])
    assert res.exit_code == 2 and "does not exist" in res.output


def test_schema_version_recorded_and_newer_schema_refused(tmp_path):
    from sqlalchemy import text

    from scorer.databases import NIGHTLY
    from scorer.errors import LimenError

    url = f"sqlite:///{tmp_path / 'v.sqlite'}"
    store = open_store(url)
    assert store.schema_version() == SCHEMA_VERSION  # limen_meta: releases before Alembic refuse it
    with store.transaction() as s:
        s.execute(text(f"UPDATE {NIGHTLY.version_table} SET version_num = 'nightly_9999'"))
    store.close()
    with pytest.raises(LimenError, match="nightly_9999 was written by a later Limen"):
        open_store(url)


def test_settings_flags_and_separate_sessions(tmp_path):
    """Images at another kVp form their own session and are flagged against the expected settings."""
    from scorer.qc.simulated import Panel

    inbox = tmp_path / "inbox"
    night(inbox, D1, [Panel("direct", 100.0, {"KVP": 31.0})], seed=4)
    night(inbox / "b", D1, ["direct"], seed=5)
    cfg = write_config(tmp_path, detector_extra="[detectors.expected]\nkvp = 28\nkvp_tolerance = 0.5")
    r = run_nightly(inbox, load_config(cfg), db_url=f"sqlite:///{tmp_path / 'f.sqlite'}")
    assert len(r.sessions_scored) == 2
    store = open_store(f"sqlite:///{tmp_path / 'f.sqlite'}")
    flags = sorted(tuple(s["flags"]) for s in store.sessions())
    store.close()
    assert flags == [(), ("kVp 31 (expected 28 ± 0.5)",)]


def test_store_on_postgresql(postgres_url, scene):
    """The same scenario against PostgreSQL (CI starts a throwaway server on loopback)."""
    inbox = scene["inbox"]
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", postgres_url, "--json"])
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert js["sessions_scored"] == 2 and len(js["quarantined"]) == 6
    check_database(postgres_url, 2, images_per_session=4)
    conv = load_conversion(scene["cfg"].parent / "direct-conversion.toml")
    direct = score_files(sorted(map(str, scene["d2"])), layout(), conversion=conv, n_boot=50, seed=0)
    assert_stored_like_direct(postgres_url, DIRECT, D2, direct)
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", postgres_url, "--json"])
    assert json.loads(res.stdout)["sessions_scored"] == 0


def test_report_folder_is_rewritten_each_night_keeping_foreign_files(scene):
    """--report names the same folder every night: the previous night's files are replaced (through the
    manifest of scorer.files.OutputFolder), a file someone else put there stays, a file is refused."""
    inbox, db, report = scene["inbox"], scene["db"], scene["tmp"] / "report"
    args = ["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", db, "--json", "--report", str(report)]
    res = _nightly(args)
    assert res.exit_code == 0, res.output
    manifest = json.loads((report / ".limen-outputs.json").read_text())
    assert manifest["complete"] and "trend.html" in manifest["files"]
    (report / "notes-by-the-physicist.txt").write_text("keep me\n")
    (report / "stale-from-an-older-release.csv").write_text("x\n")  # owned by the earlier run: listed below
    manifest["files"].append("stale-from-an-older-release.csv")
    (report / ".limen-outputs.json").write_text(json.dumps(manifest))
    res = _nightly(args)
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["report"] == str(report / "trend.html")
    assert (report / "notes-by-the-physicist.txt").read_text() == "keep me\n"
    assert not (report / "stale-from-an-older-release.csv").exists()
    assert (report / "trend.html").stat().st_size > 0
    assert not list(report.glob(".*.part"))
    afile = scene["tmp"] / "a-file"
    afile.write_text("")
    res = _nightly(["--inbox", str(inbox), "--config", str(scene["cfg"]), "--db", db, "--report", str(afile)])
    assert res.exit_code == 2 and "'--report'" in res.output and "is a file" in res.output
    assert res.output.count("\n") == 1


def test_a_second_session_of_the_same_morning_from_other_files_is_scored_and_said(tmp_path):
    """Issue 21: the demo wrote its nights again on a second run (new DICOM UIDs, so new files) and every
    session was stored twice without a word.  Files already scored are never scored again (their content hash);
    new files with the same detector, date and settings as a stored session form another session, which is
    scored — a physicist may repeat a morning — and the run says so (text and JSON)."""
    inbox = tmp_path / "inbox"
    night(inbox, D1, ["direct"], seed=1)
    cfg = write_config(tmp_path / "cfg")
    db = str(tmp_path / "r.sqlite")
    first = _nightly(["--inbox", str(inbox), "--config", str(cfg), "--db", db, "--json"])
    assert first.exit_code == 0, first.output
    assert json.loads(first.stdout)["repeated_sessions"] == []
    again = _nightly(["--inbox", str(inbox), "--config", str(cfg), "--db", db, "--json"])
    assert json.loads(again.stdout)["sessions_scored"] == 0  # the same files: nothing new
    night(inbox / "again", D1, ["direct"], seed=1)  # the same morning written again: same pixels, new UIDs
    res = _nightly(["--inbox", str(inbox), "--config", str(cfg), "--db", db, "--json"])
    js = json.loads(res.stdout)
    assert js["sessions_scored"] == 1 and len(js["repeated_sessions"]) == 1
    rep = js["repeated_sessions"][0]
    assert rep["session_date"] == D1.isoformat() and rep["images"] == 4 and len(rep["earlier_sessions"]) == 1
    assert "already has 1 session(s) on 2026-03-02 with the same settings" in res.stderr
