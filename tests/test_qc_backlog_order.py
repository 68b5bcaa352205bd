"""The baseline and the alerts depend on acquisition dates, not on the order sessions were scored in
(issue 23, item 3): a backlog scored night by night, scored in a shuffled order of arrival, and scored by
two runs at once on PostgreSQL ends with the same baseline and the same alerts.

The reference is the night-by-night (serial) run of the same images; the drift is physical (Rose,
J. Opt. Soc. Am. 38 (1948): C_T ∝ dose^(−1/2)), so alerts exist to compare.
"""

import datetime as dt
import json
import shutil
import subprocess
import sys

import pytest
from qc_helpers import night, write_config

from scorer.qc.simulated import Panel

FIRST = dt.date(2026, 3, 2)
DOSES = [100.0, 100.0, 100.0, 100.0, 40.0, 25.0, 100.0]
K = 3


def _nights():
    return [FIRST + dt.timedelta(days=k) for k in range(len(DOSES))]


@pytest.fixture(scope="module")
def backlog(tmp_path_factory):
    """Each night's images written once into a staging folder (copied into inboxes in any order)."""
    root = tmp_path_factory.mktemp("backlog")
    for k, date in enumerate(_nights()):
        night(root / "stage" / str(date), date, [Panel("direct", DOSES[k])], seed=500 + k)
    cfg = write_config(root / "cfg", baseline_sessions=K, n_boot=50, methods=("dprime",))
    return root, cfg


def _run(inbox, cfg, db, wait=True):
    cmd = [sys.executable, "-m", "scorer.cli", "nightly", "--inbox", str(inbox), "--config", str(cfg)]
    cmd += ["--db", db, "--settle-seconds", "0", "--json"]
    if not wait:
        return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    assert p.returncode in (0, 1), p.stderr[-2000:]
    return json.loads(p.stdout)


def _copy_night(root, inbox, date):
    shutil.copytree(root / "stage" / str(date), inbox / str(date), dirs_exist_ok=True)


def _state(db):
    from scorer.qc import open_store

    store = open_store(db)
    try:
        dates = {s["id"]: s["session_date"] for s in store.sessions()}
        bl = store.baseline(store.detectors()[0], "dprime")
        base = None if bl is None else sorted(dates[i] for i in bl[2])
        alerts = sorted(
            (a["session_date"], a["diameter_mm"], a["rule"], a["direction"], round(a["value"] or 0, 12))
            for a in store.alerts()
        )
    finally:
        store.close()
    return base, alerts


def test_shuffled_arrival_gives_the_serial_baseline_and_alerts(backlog, tmp_path):
    root, cfg = backlog
    serial_db = f"sqlite:///{tmp_path / 'serial.sqlite'}"
    for date in _nights():
        _copy_night(root, tmp_path / "serial", date)
        _run(tmp_path / "serial", cfg, serial_db)
    want = _state(serial_db)
    assert want[0] == [str(d) for d in _nights()[:K]] and want[1], want
    # arrival order: a late (degraded) night first, the baseline nights last, a backlog run in the middle
    order = [5, 4, 6, 0, 2, 1, 3]
    shuffled_db = f"sqlite:///{tmp_path / 'shuffled.sqlite'}"
    changed = []
    for k in order:
        _copy_night(root, tmp_path / "shuffled", _nights()[k])
        js = _run(tmp_path / "shuffled", cfg, shuffled_db)
        changed += js["baseline_changes"] + js["withdrawn_alerts"]
    assert _state(shuffled_db) == want
    assert changed, "late sessions inside the baseline window must change the baseline and say so"


def test_two_runs_at_once_on_postgresql_give_the_serial_result(backlog, tmp_path, postgres_url):
    root, cfg = backlog
    serial_db = f"sqlite:///{tmp_path / 'serial.sqlite'}"
    for date in _nights():
        _copy_night(root, tmp_path / "serial", date)
        _run(tmp_path / "serial", cfg, serial_db)
    for date in _nights():
        _copy_night(root, tmp_path / "both", date)
    procs = [_run(tmp_path / "both", cfg, postgres_url, wait=False) for _ in range(2)]
    for p in procs:
        out, err = p.communicate(timeout=600)
        assert p.returncode in (0, 1), err[-2000:]
    assert _state(postgres_url) == _state(serial_db)
