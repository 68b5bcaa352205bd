"""`limen nightly --dask` against a real Dask cluster: a ``dask scheduler`` and two ``dask worker`` processes
started here on 127.0.0.1 (the cluster of ``tests/test_qc_scale.py`` runs inside the test process).  The CLI, as
a subprocess, stores exactly the thresholds of a serial run on a copy of the same inbox, every session is
computed once on the cluster and stored once, and a re-run finds nothing new.  A scheduler that cannot be reached,
or an address that is not one, is a one-line error with exit status 2 (``limen nightly``'s documented status
for bad input).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from qc_helpers import D1, check_database, night, thresholds, write_config

distributed = pytest.importorskip("distributed")

DASK = Path(sys.executable).with_name("dask")
START_TIMEOUT_S = 30.0


def _limen(args, timeout=180, env_extra=None):
    env = {**os.environ, **(env_extra or {})}
    env.pop("LIMEN_FAULT_INJECT", None)
    return subprocess.run(
        [sys.executable, "-m", "scorer.cli", *map(str, args)], env=env, capture_output=True, text=True, timeout=timeout
    )


def _stop(procs) -> None:
    """End the processes this test started (each leads its own process group: worker, nanny and children)."""
    for p in procs:
        if p.poll() is None:
            try:
                os.killpg(p.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
    deadline = time.monotonic() + 10
    for p in procs:
        try:
            p.wait(timeout=max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            try:
                os.killpg(p.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            p.wait(timeout=10)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """A scheduler on a free port of 127.0.0.1 (port 0: the system picks; the address is read from its scheduler
    file) and two single-threaded workers in their own processes; yields the scheduler's address."""
    if not DASK.exists():
        pytest.skip(f"no dask executable beside {sys.executable}")
    root = tmp_path_factory.mktemp("dask-cluster")
    sched_file = root / "scheduler.json"
    # one BLAS/OpenMP thread per worker, as the local pool runs (see the README draft on worker settings)
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
    env.pop("LIMEN_FAULT_INJECT", None)
    procs = []

    def start(args, log):
        procs.append(
            subprocess.Popen(
                [str(DASK), *args],
                cwd=root,
                env=env,
                stdout=open(root / log, "wb"),  # noqa: SIM115 - closed with the process
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        )

    try:
        start(
            ["scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard", "--scheduler-file", str(sched_file)]
            + ["--idle-timeout", "300s"],  # a scheduler orphaned by a crashed test run ends itself
            "scheduler.log",
        )
        deadline = time.monotonic() + START_TIMEOUT_S
        address = None
        while address is None and time.monotonic() < deadline:
            assert procs[0].poll() is None, (root / "scheduler.log").read_text()
            try:
                address = json.loads(sched_file.read_text())["address"]
            except (OSError, ValueError, KeyError):
                time.sleep(0.2)
        assert address and address.startswith("tcp://127.0.0.1:"), (root / "scheduler.log").read_text()
        for i in range(2):
            start(
                ["worker", address, "--nworkers", "1", "--nthreads", "1", "--host", "127.0.0.1", "--no-dashboard"]
                + ["--local-directory", str(root / f"w{i}"), "--death-timeout", "60s", "--name", f"limen-test-{i}"],
                f"worker{i}.log",
            )
        with distributed.Client(address, timeout=f"{START_TIMEOUT_S:g}s") as client:
            client.wait_for_workers(2, timeout=START_TIMEOUT_S)
            workers = client.scheduler_info()["workers"]
        assert len(workers) == 2
        yield address, root
    finally:
        _stop(procs)


def _session_tasks(address) -> dict:
    """{task key: times the scheduler sent it to a worker} for the nightly's session tasks, from its transition log."""

    def collect(dask_scheduler):
        sent = {}
        for entry in dask_scheduler.transition_log:  # (key, start, finish, recommendations, stimulus id, time)
            key, finish = str(entry[0]), entry[2]
            if key.startswith("limen-session-") and finish == "processing":
                sent[key] = sent.get(key, 0) + 1
        return sent

    with distributed.Client(address, timeout="20s") as client:
        return client.run_on_scheduler(collect)


def test_nightly_on_a_dask_cluster_equals_serial(cluster, tmp_path):
    address, _ = cluster
    night(tmp_path / "inbox", D1, ["direct", "indirect"], seed=41)
    cfg = write_config(tmp_path / "cfg", n_boot=40)
    shutil.copytree(tmp_path / "inbox", tmp_path / "inbox-serial")
    common = ["--config", cfg, "--settle-seconds", "0", "--json"]
    t0 = time.perf_counter()
    serial = _limen(["nightly", "--inbox", tmp_path / "inbox-serial", "--db", tmp_path / "serial.sqlite", *common])
    t_serial = time.perf_counter() - t0
    assert serial.returncode == 0, serial.stderr[-3000:]
    before = _session_tasks(address)
    t0 = time.perf_counter()
    r = _limen(["nightly", "--inbox", tmp_path / "inbox", "--db", tmp_path / "dask.sqlite", "--dask", address, *common])
    t_dask = time.perf_counter() - t0
    assert r.returncode == 0, r.stderr[-3000:]
    out = json.loads(r.stdout)
    assert out["runner"] == f"Dask scheduler {address}"
    assert out["sessions_scored"] == 2 and out["scored_images"] == 8 and out["errors"] == []
    print(f"serial run {t_serial:.1f} s, Dask run {t_dask:.1f} s")

    dask_db, serial_db = f"sqlite:///{tmp_path / 'dask.sqlite'}", f"sqlite:///{tmp_path / 'serial.sqlite'}"
    # the seed is fixed per configuration, so the cluster's workers must give the serial numbers exactly
    assert thresholds(dask_db) == thresholds(serial_db)
    assert len(thresholds(dask_db)) == 2 * 3 * 2  # sessions × mini-plate diameters × methods
    check_database(dask_db, expected_sessions=2, images_per_session=4)  # each image in one scored session

    # each session was one task, sent to a worker once (no retry, no second computation)
    tasks = {k: v for k, v in _session_tasks(address).items() if k not in before}
    assert len(tasks) == 2 and set(tasks.values()) == {1}, tasks

    again = _limen(
        ["nightly", "--inbox", tmp_path / "inbox", "--db", tmp_path / "dask.sqlite", "--dask", address, *common]
    )
    assert again.returncode == 0, again.stderr[-3000:]
    assert json.loads(again.stdout)["sessions_scored"] == 0
    assert thresholds(dask_db) == thresholds(serial_db)


@pytest.mark.parametrize(
    "address, message",
    [
        ("tcp://127.0.0.1:{closed}", "cannot reach the Dask scheduler"),
        ("127.0.0.1", "not a Dask scheduler address"),
        ("http://127.0.0.1:8786", "not a Dask scheduler address"),
    ],
)
def test_bad_or_unreachable_scheduler_is_one_line_exit_2(tmp_path, address, message):
    import socket

    with socket.socket() as s:  # a port nothing listens on: bound, never listened to, closed at the end
        s.bind(("127.0.0.1", 0))
        address = address.format(closed=s.getsockname()[1])
        (tmp_path / "inbox").mkdir()
        t0 = time.perf_counter()
        r = _limen(["nightly", "--inbox", tmp_path / "inbox", "--db", tmp_path / "x.sqlite", "--dask", address], 120)
        took = time.perf_counter() - t0
    assert r.returncode == 2, (r.returncode, r.stderr[-3000:])
    lines = r.stderr.strip().splitlines()
    assert "Traceback" not in r.stderr
    assert lines[-1].startswith(f"error: --dask {address}: {message}"), lines
    print(f"{address}: exit 2 after {took:.1f} s")


def test_a_port_that_never_answers_ends_the_run_instead_of_hanging(tmp_path, monkeypatch):
    """Something listens on the port but never answers (a wrong port number): distributed's Client waited for
    ever there; the nightly now gives up after twice its connect timeout, with the one-line error."""
    import socket

    import scorer.qc.scale
    from scorer.errors import LimenError
    from scorer.qc.scale import DaskRunner

    monkeypatch.setattr(scorer.qc.scale, "DASK_CONNECT_TIMEOUT_S", 2.0)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen(4)  # the kernel completes the TCP handshake; nobody reads or writes
        address = f"tcp://127.0.0.1:{s.getsockname()[1]}"
        t0 = time.perf_counter()
        with pytest.raises(LimenError, match=r"cannot reach the Dask scheduler \(no answer .* within 4 s"):
            with DaskRunner(address):
                pass
        took = time.perf_counter() - t0
    assert 3.5 < took < 15, took
    print(f"silent listener: one-line error after {took:.1f} s")
