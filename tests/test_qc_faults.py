"""Crash and concurrency tests of `limen nightly`: a run killed with SIGKILL at many points, then re-run,
scores every session exactly once and loses nothing; two runs at once never score a session twice.

The invariants are the issue's specification, checked in the database itself (tests/qc_helpers.py
check_database): every image bound to exactly one scored session, no claim left, every scored session
complete (thresholds for every diameter and method, responses for every site of every image).
"""

import json
import os
import random
import shutil
import signal
import subprocess
import sys

import pytest
from qc_helpers import D1, D2, check_database, night, write_config

N_SESSIONS = 3


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    root = tmp_path_factory.mktemp("template")
    inbox = root / "inbox"
    night(inbox, D1, ["direct", "indirect"], seed=21)
    night(inbox, D2, ["direct"], seed=22)
    (inbox / "notes.txt").write_text("not an image\n")
    write_config(root / "cfg", n_boot=30)
    return root


def _copy(template, dest):
    shutil.copytree(template, dest)
    return dest / "inbox", dest / "cfg" / "nightly.toml"


def _cmd(inbox, cfg, db, *extra):
    return [
        sys.executable,
        "-m",
        "scorer.cli",
        "nightly",
        "--inbox",
        str(inbox),
        "--config",
        str(cfg),
        "--db",
        db,
        "--settle-seconds",
        "0",
        "--json",
        *extra,
    ]


def _env(fault=None):
    env = dict(os.environ)
    env.pop("LIMEN_FAULT_INJECT", None)
    if fault:
        env["LIMEN_FAULT_INJECT"] = fault
    return env


def _check_quarantine(inbox):
    q = inbox / "quarantine"
    assert sorted(p.name for p in q.iterdir()) == ["notes.txt", "notes.txt.reason.txt"]
    assert not (inbox / "notes.txt").exists()


@pytest.mark.parametrize(
    "fault,workers",
    [
        ("scanned", 1),
        ("claimed", 1),
        ("scored:2", 1),
        ("mid-write:2", 1),
        ("committed:1", 1),
        ("committed:3", 1),
        ("quarantine", 1),
        ("mid-write:1", 2),
    ],
)
def test_killed_run_then_rerun_scores_every_session_exactly_once(template, tmp_path, fault, workers):
    inbox, cfg = _copy(template, tmp_path / "w")
    db = f"sqlite:///{tmp_path / 'n.sqlite'}"
    extra = ["--workers", str(workers)] if workers > 1 else []
    killed = subprocess.run(_cmd(inbox, cfg, db, *extra), env=_env(fault), capture_output=True, text=True, timeout=300)
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    again = subprocess.run(_cmd(inbox, cfg, db, *extra), env=_env(), capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr[-2000:]
    point, _, nth = fault.partition(":")
    n = int(nth or 1)
    first_done = n if point == "committed" else n - 1 if point in ("scored", "mid-write") else 0
    assert json.loads(again.stdout)["sessions_scored"] == N_SESSIONS - first_done
    check_database(db, N_SESSIONS, images_per_session=4)
    _check_quarantine(inbox)


@pytest.mark.parametrize("fault", ["claimed", "mid-write:2", "committed:1"])
def test_killed_run_on_postgresql_then_rerun_scores_every_session_exactly_once(template, tmp_path, postgres_url, fault):
    # the same invariants with the database a server: a SIGKILLed client leaves its transaction open until the server
    # notices the closed socket, and a claim behind it; the re-run must finish without waiting for the lease
    inbox, cfg = _copy(template, tmp_path / "w")
    killed = subprocess.run(
        _cmd(inbox, cfg, postgres_url), env=_env(fault), capture_output=True, text=True, timeout=300
    )
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    again = subprocess.run(_cmd(inbox, cfg, postgres_url), env=_env(), capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr[-2000:]
    point, _, nth = fault.partition(":")
    n = int(nth or 1)
    first_done = n if point == "committed" else n - 1 if point == "mid-write" else 0
    assert json.loads(again.stdout)["sessions_scored"] == N_SESSIONS - first_done
    check_database(postgres_url, N_SESSIONS, images_per_session=4)
    _check_quarantine(inbox)


def test_killed_at_seeded_points(template, tmp_path):
    """Kills at seeded-random fault points (point and pass drawn from every point the run passes), each asserted to
    have happened inside the run; replaces kills after random delays, which could land after the run had ended."""
    rnd = random.Random(7)
    points = [f"{p}:{n}" for p in ("scored", "mid-write", "committed") for n in (1, 2, 3)]
    points += ["scanned", "claimed", "quarantine"]
    for k, fault in enumerate(rnd.sample(points, 2)):
        inbox, cfg = _copy(template, tmp_path / f"w{k}")
        db = f"sqlite:///{tmp_path / f'n{k}.sqlite'}"
        killed = subprocess.run(_cmd(inbox, cfg, db), env=_env(fault), capture_output=True, text=True, timeout=300)
        assert killed.returncode == -signal.SIGKILL, (fault, killed.stderr[-2000:])
        again = subprocess.run(_cmd(inbox, cfg, db), env=_env(), capture_output=True, text=True, timeout=300)
        assert again.returncode == 0, again.stderr[-2000:]
        check_database(db, N_SESSIONS, images_per_session=4)
        _check_quarantine(inbox)


def _concurrent(template, tmp_path, db):
    inbox, cfg = _copy(template, tmp_path / "w")
    procs = [
        subprocess.Popen(_cmd(inbox, cfg, db), env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        for _ in range(2)
    ]
    outs = [p.communicate(timeout=300) for p in procs]
    for p, (_out, err) in zip(procs, outs):
        assert p.returncode == 0, err[-2000:]
    results = [json.loads(out) for out, _ in outs]
    assert sum(r["sessions_scored"] for r in results) == N_SESSIONS
    ids = [s["id"] for r in results for s in r["sessions"]]
    assert len(ids) == len(set(ids)) == N_SESSIONS
    assert sum(len(r["quarantined"]) for r in results) == 1
    check_database(db, N_SESSIONS, images_per_session=4)
    _check_quarantine(inbox)
    return results


def test_two_runs_at_once_never_score_a_session_twice_sqlite(template, tmp_path):
    _concurrent(template, tmp_path, f"sqlite:///{tmp_path / 'c.sqlite'}")


def test_two_runs_at_once_never_score_a_session_twice_postgresql(template, tmp_path, postgres_url):
    _concurrent(template, tmp_path, postgres_url)


def test_claims_are_compare_and_set(tmp_path):
    """Direct check of the claim: a second claim on the same images fails; a live claim is not taken over."""
    from scorer.qc import load_config, open_store
    from scorer.qc.inbox import examine

    inbox = tmp_path / "inbox"
    files = night(inbox, D1, ["direct"], seed=3)
    cfg = load_config(write_config(tmp_path / "cfg"))
    store = open_store(f"sqlite:///{tmp_path / 'k.sqlite'}")
    from scorer.images import image_content_hash

    store.add_images([examine(f, image_content_hash(f), cfg) for f in files])
    ((key, imgs),) = store.free_groups().items()
    first = store.claim(key, imgs)
    assert first is not None
    assert store.claim(key, imgs) is None  # every image already bound
    assert store.claim(key, imgs[:1]) is None
    assert store.stale_claims() == []  # our own live claim
    gone = subprocess.Popen([sys.executable, "-c", "pass"])
    gone.wait()
    from sqlalchemy import update

    from scorer.qc.tables import SessionRow

    with store.transaction() as s:  # the holder was a process of this host that has ended
        s.execute(update(SessionRow).values(claim_pid=gone.pid))
    assert store.stale_claims() == [(first[0], first[1])]
    assert store.take_over(first[0], "not-the-token") is None
    token = store.take_over(first[0], first[1])
    assert token is not None and store.take_over(first[0], first[1]) is None  # only one run takes it over
    assert store.stale_claims() == []
    store.close()


def test_quarantine_race_keeps_the_reason_of_the_run_that_moved_the_file(tmp_path, monkeypatch):
    # two runs quarantining one file at once both chose the same name: the one whose move failed removed the reason
    # file of the one whose move succeeded (seen in the concurrent PostgreSQL test), leaving a reason-less file
    import shutil as _shutil

    import scorer.qc.inbox as inbox_mod

    f = tmp_path / "inbox" / "notes.txt"
    f.parent.mkdir()
    f.write_text("not an image\n")
    q = tmp_path / "inbox" / "quarantine"
    real_move = _shutil.move

    def other_run_moves_first(src, dst):
        real_move(src, dst)  # the other run's move, between this run's choice of name and its own move
        raise FileNotFoundError(src)

    monkeypatch.setattr(inbox_mod.shutil, "move", other_run_moves_first)
    assert inbox_mod.quarantine_file(f, q, "not a recognised image file") is None
    assert sorted(p.name for p in q.iterdir()) == ["notes.txt", "notes.txt.reason.txt"]
    assert (q / "notes.txt.reason.txt").read_text() == "not a recognised image file\n"
