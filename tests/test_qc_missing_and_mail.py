"""Missing QC, quarantine release, the alert exit status across a killed run, and the alert e-mail
(issue 23, items 4 and 5 and the e-mail part), on the mini plate's simulated nights.

Mail goes to a local aiosmtpd server on loopback, as in tests/test_qc_drift.py; the message is parsed back with
the standard library's email parser (RFC 5322 headers, as a mail client reads them).
"""

import datetime as dt
import email
import json
import os
import subprocess
import sys
from email.policy import default as default_policy

import pytest
from click.testing import CliRunner
from helpers import free_port
from qc_helpers import DIRECT, night, write_config

from scorer.cli import main
from scorer.qc.simulated import Panel

D1 = dt.date(2026, 3, 2)


@pytest.fixture(scope="module")
def smtp_sink():
    from aiosmtpd.controller import Controller

    class Sink:
        def __init__(self):
            self.messages = []

        async def handle_DATA(self, server, session, envelope):
            self.messages.append(email.message_from_bytes(envelope.content, policy=default_policy))
            return "250 OK"

    sink = Sink()
    ctl = Controller(sink, hostname="127.0.0.1", port=free_port())
    ctl.start()
    yield ctl, sink
    ctl.stop()


def _smtp(port):
    return f'[smtp]\nhost = "127.0.0.1"\nport = {port}\nsender = "limen@example.org"\nrecipients = ["qc@example.org"]'


def _nightly(inbox, cfg, db, *extra):
    return CliRunner().invoke(
        main, ["nightly", "--inbox", str(inbox), "--config", str(cfg), "--db", db, "--settle-seconds", "0", *extra]
    )


def test_incomplete_session_and_silent_detector_are_alerts_of_their_own(tmp_path):
    inbox = tmp_path / "inbox"
    files = night(inbox, D1, [Panel("direct")], seed=11)
    files[-1].unlink()  # 3 of 4 images
    cfg = write_config(tmp_path / "cfg", extra="[alerts]\nincomplete_hours = 2\nsilent_days = 30")
    db = f"sqlite:///{tmp_path / 'm.sqlite'}"
    res = _nightly(inbox, cfg, db)
    # the images arrived just now: not yet overdue; but the detector's last images are from March (silent)
    assert res.exit_code == 1 and "missing QC: silent" in res.output and "missing QC: incomplete" not in res.output, (
        res.output
    )
    from sqlalchemy import update

    from scorer.qc import open_store
    from scorer.qc.tables import ImageRow, utcnow

    store = open_store(db)
    with store.transaction() as s:  # the three images arrived three hours ago
        s.execute(update(ImageRow).values(first_seen=utcnow() - dt.timedelta(hours=3)))
    store.close()
    res = _nightly(inbox, cfg, db, "--json")
    js = json.loads(res.stdout)
    assert res.exit_code == 1
    assert [m["kind"] for m in js["missing_qc"]] == ["incomplete"]
    assert "3 of 4 images" in js["missing_qc"][0]["message"] and DIRECT in js["missing_qc"][0]["message"]
    res = _nightly(inbox, cfg, db, "--json")  # raised once, reported: the next run is quiet
    assert res.exit_code == 0 and json.loads(res.stdout)["missing_qc"] == []
    res = CliRunner().invoke(main, ["trend", "--db", db, "--out", str(tmp_path / "t"), "--config", str(cfg)])
    assert res.exit_code == 0, res.output
    html = (tmp_path / "t" / "trend.html").read_text()
    assert "Missing QC" in html and "3 of 4 images" in html


def test_a_night_of_quarantined_files_alerts_and_release_frees_the_file(tmp_path):
    inbox = tmp_path / "inbox"
    files = night(inbox, D1, [Panel("direct", tags={"DetectorID": "HSX-SE-9999"})], n_images=2, seed=12)
    cfg = write_config(tmp_path / "cfg", min_images=2)
    db = f"sqlite:///{tmp_path / 'q.sqlite'}"
    res = _nightly(inbox, cfg, db, "--json")
    js = json.loads(res.stdout)
    assert res.exit_code == 1 and [m["kind"] for m in js["missing_qc"]] == ["quarantined"], res.output
    listed = json.loads(CliRunner().invoke(main, ["quarantine", "list", "--db", db, "--json"]).stdout)
    assert len(listed) == 2 and all("unknown detector" in e["reason"] for e in listed)
    # the configuration is fixed (the panel was replaced: its new identifier is added), the file released
    cfg.write_text(cfg.read_text().replace('detector_id = "HSX-SE-0417"', 'detector_id = "HSX-SE-9999"'))
    res = CliRunner().invoke(main, ["quarantine", "release", "--db", db, *(str(e["id"]) for e in listed)])
    assert res.exit_code == 0 and all(f.exists() for f in files), res.output
    res = _nightly(inbox, cfg, db, "--json")
    js = json.loads(res.stdout)
    assert js["quarantined"] == [] and js["scored_images"] == 2, res.output
    res = CliRunner().invoke(main, ["quarantine", "release", "--db", db, "999"])
    assert res.exit_code == 2 and "no quarantine entry 999" in res.output


def test_a_run_killed_while_writing_its_report_leaves_the_exit_status_to_the_rerun(tmp_path):
    inbox = tmp_path / "inbox"
    night(inbox, D1, [Panel("direct", tags={"DetectorID": "HSX-SE-9999"})], n_images=2, seed=13)
    cfg = write_config(tmp_path / "cfg", min_images=2)
    db = f"sqlite:///{tmp_path / 'k.sqlite'}"
    cmd = [sys.executable, "-m", "scorer.cli", "nightly", "--inbox", str(inbox), "--config", str(cfg), "--db", db]
    cmd += ["--settle-seconds", "0", "--report", str(tmp_path / "report")]
    # output files: 1–2 the quarantined files' reasons, 3 trend.csv — killed half-way through the report
    env = dict(os.environ, LIMEN_FAULT_INJECT="write:3")
    killed = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert killed.returncode == -9, killed.stderr[-2000:]
    env.pop("LIMEN_FAULT_INJECT")
    again = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert again.returncode == 1, again.stdout + again.stderr[-2000:]
    assert "raised by an earlier run that did not finish" in again.stdout
    third = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert third.returncode == 0, third.stdout + third.stderr[-2000:]


def test_mail_names_detector_date_and_worst_diameter_and_marks_late_alerts(tmp_path, smtp_sink):
    ctl, sink = smtp_sink
    inbox = tmp_path / "inbox"
    cfg_dir = tmp_path / "cfg"
    # limits every threshold fails: a 'limits' alert on every diameter of the first night
    limits = cfg_dir / "limits.toml"
    cfg_dir.mkdir()
    limits.write_text(
        'format = "limen-limits/1"\nobserver = "human"\nsource = "invented for the test"\n'
        "[[limits]]\ndiameter_mm = 0.1\nacceptable = 0.0001\n[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.00001\n"
    )
    down = free_port()  # nothing listens there: an SMTP outage
    cfg = write_config(
        cfg_dir, methods=("dprime",), extra=_smtp(down), detector_extra='limits = "limits.toml"\nhuman_factor = 1.8'
    )
    night(inbox, D1, [Panel("direct")], seed=14)
    db = f"sqlite:///{tmp_path / 'mail.sqlite'}"
    res = _nightly(inbox, cfg, db, "--json")
    assert res.exit_code == 1, res.output
    js = json.loads(res.stdout)
    assert js["emailed_alerts"] == 0 and any("cannot send the alert e-mail" in e for e in js["errors"])
    n_alerts = len(js["alerts"])
    assert n_alerts >= 2
    before = len(sink.messages)
    cfg.write_text(cfg.read_text().replace(f"port = {down}", f"port = {ctl.port}"))
    night(inbox, D1 + dt.timedelta(days=1), [Panel("direct")], seed=15)
    res = _nightly(inbox, cfg, db, "--json", "--report", str(tmp_path / "rep"))
    js = json.loads(res.stdout)
    assert len(sink.messages) == before + 1  # one mail per run, every pending alert in it
    msg = sink.messages[-1]
    subject = msg["subject"]
    assert DIRECT in subject and "2026-03-02 … 2026-03-03" in subject and "worst" in subject and " mm" in subject
    body = msg.get_content()
    assert body.count("LATE") == n_alerts + 0 or body.count("LATE (raised") == n_alerts, body
    assert "limits" in body and "human-equivalent" in body and str(tmp_path / "rep" / "trend.html") in body
    assert js["emailed_alerts"] == n_alerts + len(js["alerts"])
    # overlapping runs: what one run claimed, another cannot claim until the lease runs out
    from scorer.qc import open_store

    store = open_store(db)
    night(inbox, D1 + dt.timedelta(days=2), [Panel("direct")], seed=16)
    with store.transaction() as s:
        from sqlalchemy import update

        from scorer.qc.tables import AlertRow

        s.execute(update(AlertRow).values(emailed_at=None, mail_token=None))
    t1, first = store.claim_for_mail()
    t2, second = store.claim_for_mail()
    assert first and second == []
    store.mail_done(t1, sent=False)
    t3, third = store.claim_for_mail()
    assert len(third) == len(first)
    store.close()


def test_a_relative_inbox_is_stored_with_absolute_paths(tmp_path, monkeypatch):
    # a Dask worker started in another folder must find the files: the coordinator hands out absolute paths
    night(tmp_path / "inbox", D1, [Panel("direct")], n_images=1, seed=17)
    cfg = write_config(tmp_path / "cfg")
    monkeypatch.chdir(tmp_path)
    db = f"sqlite:///{tmp_path / 'rel.sqlite'}"
    res = _nightly("inbox", cfg, db, "--json")
    assert res.exit_code == 0, res.output
    from scorer.qc import open_store

    store = open_store(db)
    (imgs,) = store.free_groups().values()
    store.close()
    assert all(os.path.isabs(im["path"]) and os.path.exists(im["path"]) for im in imgs)


def test_a_warning_when_the_configuration_expects_a_tag_the_images_lack(tmp_path):
    night(tmp_path / "inbox", D1, [Panel("direct", tags={"AnodeTargetMaterial": None})], n_images=1, seed=18)
    cfg = write_config(tmp_path / "cfg", detector_extra='[detectors.expected]\nanode = "TUNGSTEN"')
    res = _nightly(tmp_path / "inbox", cfg, f"sqlite:///{tmp_path / 'w.sqlite'}", "--json")
    assert res.exit_code == 0, res.output
    (w,) = json.loads(res.stdout)["warnings"]
    assert "expects anode" in w and DIRECT in w and "no automatic baseline forms" in w
