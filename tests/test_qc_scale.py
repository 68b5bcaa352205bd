"""Scale-out gives the same numbers: a Dask cluster and a local process pool store exactly the thresholds
(and responses) of the serial run — the seed is fixed per configuration and scoring is deterministic."""

import shutil

import pytest
from qc_helpers import D1, D2, night, thresholds, write_config

from scorer.qc import load_config, open_store, run_nightly


@pytest.fixture(scope="module")
def inbox(tmp_path_factory):
    root = tmp_path_factory.mktemp("scale")
    night(root / "inbox", D1, ["direct", "indirect"], seed=31)
    night(root / "inbox", D2, ["direct"], seed=32)
    cfg = load_config(write_config(root / "cfg", n_boot=40))
    serial_db = f"sqlite:///{root / 'serial.sqlite'}"
    r = run_nightly(root / "inbox", cfg, db_url=serial_db)
    assert len(r.sessions_scored) == 3 and r.runner == "serial"
    return root, cfg, serial_db


def _responses(url):
    from sqlalchemy import select

    from scorer.qc.tables import ImageRow, ResponseRow

    store = open_store(url)
    with store.transaction() as s:
        rows = s.execute(
            select(ImageRow.sha256, ResponseRow.target, ResponseRow.site, ResponseRow.response).join(
                ImageRow, ImageRow.id == ResponseRow.image_id
            )
        ).all()
    store.close()
    return sorted(tuple(r) for r in rows)


def test_dask_local_cluster_equals_serial(inbox, tmp_path):
    distributed = pytest.importorskip("distributed")
    root, cfg, serial_db = inbox
    shutil.copytree(root / "inbox", tmp_path / "inbox")
    db = f"sqlite:///{tmp_path / 'dask.sqlite'}"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cl:
        r = run_nightly(tmp_path / "inbox", cfg, db_url=db, dask=cl)
    assert r.runner.startswith("Dask") and len(r.sessions_scored) == 3
    assert thresholds(db) == thresholds(serial_db)
    assert _responses(db) == _responses(serial_db)


def test_process_pool_equals_serial(inbox, tmp_path):
    root, cfg, serial_db = inbox
    shutil.copytree(root / "inbox", tmp_path / "inbox")
    db = f"sqlite:///{tmp_path / 'pool.sqlite'}"
    r = run_nightly(tmp_path / "inbox", cfg, db_url=db, workers=2)
    assert r.runner == "process pool (2 workers)" and len(r.sessions_scored) == 3
    assert thresholds(db) == thresholds(serial_db)


def test_unreachable_dask_scheduler_is_a_one_line_error(inbox, tmp_path, monkeypatch):
    import scorer.qc.scale
    from scorer.errors import LimenError

    monkeypatch.setattr(scorer.qc.scale, "DASK_CONNECT_TIMEOUT_S", 2.0)
    root, cfg, _ = inbox
    shutil.copytree(root / "inbox", tmp_path / "inbox")
    with pytest.raises(LimenError, match="cannot reach the Dask scheduler"):
        run_nightly(tmp_path / "inbox", cfg, db_url=f"sqlite:///{tmp_path / 'x.sqlite'}", dask="tcp://127.0.0.1:9")
