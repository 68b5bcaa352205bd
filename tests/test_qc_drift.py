"""A drift of one detector over several nights is caught; the unchanged detector raises no alert;
alerts are e-mailed through SMTP (a local aiosmtpd server on loopback); trend report and baselines.

The drift is physical: the simulated dose of the direct panel falls night after night, and by the Rose
model (Rose, J. Opt. Soc. Am. 38 (1948)) its threshold contrast rises as dose^(−1/2) — ×1.8 at 30 %
of the dose, far beyond the night-to-night scatter of a 4-image session.
"""

import datetime as dt
import json

import pandas as pd
import pytest
from click.testing import CliRunner
from helpers import free_port
from qc_helpers import DIRECT, INDIRECT, night, write_config

from scorer.cli import main
from scorer.qc.simulated import Panel

N_BASE = 3
DOSES = [100.0] * N_BASE + [55.0, 30.0, 17.0]
FIRST = dt.date(2026, 3, 2)


@pytest.fixture(scope="module")
def smtp_sink():
    from aiosmtpd.controller import Controller

    class Sink:
        def __init__(self):
            self.messages = []

        async def handle_DATA(self, server, session, envelope):
            self.messages.append(
                (envelope.mail_from, list(envelope.rcpt_tos), envelope.content.decode("utf-8", "replace"))
            )
            return "250 OK"

    sink = Sink()
    ctl = Controller(sink, hostname="127.0.0.1", port=free_port())
    ctl.start()
    yield ctl, sink
    ctl.stop()


@pytest.fixture(scope="module")
def nights(tmp_path_factory, smtp_sink):
    ctl, sink = smtp_sink
    root = tmp_path_factory.mktemp("drift")
    smtp = (
        f'[smtp]\nhost = "127.0.0.1"\nport = {ctl.port}\nsender = "limen@example.org"\n'
        'recipients = ["physics@example.org"]'
    )
    cfg = write_config(root / "cfg", baseline_sessions=N_BASE, n_boot=50, methods=("dprime",), extra=smtp)
    db = f"sqlite:///{root / 'drift.sqlite'}"
    runs = []
    for k, dose in enumerate(DOSES):
        date = FIRST + dt.timedelta(days=k)
        night(root / "inbox", date, [Panel("direct", dose), Panel("indirect", 100.0)], seed=100 + k)
        res = CliRunner().invoke(
            main,
            [
                "nightly",
                "--inbox",
                str(root / "inbox"),
                "--config",
                str(cfg),
                "--db",
                db,
                "--settle-seconds",
                "0",
                "--json",
            ]
            + (["--report", str(root / "report")] if k == len(DOSES) - 1 else []),
        )
        runs.append((res.exit_code, json.loads(res.stdout), res.output))
    return {"root": root, "cfg": cfg, "db": db, "runs": runs, "sink": sink}


def test_the_drifting_detector_is_caught_and_the_steady_one_is_not(nights):
    runs = nights["runs"]
    for code, js, out in runs[:N_BASE]:
        assert code == 0 and js["alerts"] == [] and js["sessions_scored"] == 2, out
    alerts = [a for _, js, _ in runs for a in js["alerts"]]
    assert alerts, "no alert for a panel at 17 % of its dose"
    assert {a["detector"] for a in alerts} == {DIRECT}
    assert all(a["direction"] == "worse" for a in alerts)
    code, js, _ = runs[-1]
    assert code == 1 and js["alerts"], "the last night (17 % dose) must raise an alert and exit 1"
    assert {a["session_date"] for a in js["alerts"]} == {str(FIRST + dt.timedelta(days=len(DOSES) - 1))}


def test_alerts_are_emailed_once(nights):
    msgs = nights["sink"].messages
    n_alerts = sum(len(js["alerts"]) for _, js, _ in nights["runs"])
    assert msgs and sum(js["emailed_alerts"] for _, js, _ in nights["runs"]) == n_alerts
    frm, to, body = msgs[-1]
    assert frm == "limen@example.org" and to == ["physics@example.org"]
    assert "Subject: [Limen] test programme (invented):" in body and DIRECT in body and INDIRECT not in body
    assert "never replace" in body
    from scorer.qc import open_store

    store = open_store(nights["db"])
    assert all(a["emailed"] for a in store.alerts())
    store.close()


def test_trend_report_and_csv(nights, tmp_path):
    rep = nights["root"] / "report"
    html = (rep / "trend.html").read_text()
    assert "<svg" in html and DIRECT in html and INDIRECT in html and "never replace" in html
    df = pd.read_csv(rep / "trend.csv")
    assert set(df["detector"]) == {DIRECT, INDIRECT}
    assert len(df) == 2 * len(DOSES) * 3  # detectors × nights × diameters of the mini plate
    assert df["in_baseline"].sum() == 2 * N_BASE * 3
    assert (df[df["detector"] == INDIRECT]["alerts"].fillna("") == "").all()
    assert len(pd.read_csv(rep / "alerts.csv")) == sum(len(js["alerts"]) for _, js, _ in nights["runs"])
    res = CliRunner().invoke(
        main, ["trend", "--db", nights["db"], "--out", str(tmp_path / "t"), "--json", "--config", str(nights["cfg"])]
    )
    assert res.exit_code == 0, res.output
    assert (tmp_path / "t" / "trend.html").exists() and json.loads(res.stdout)["csv"].endswith("trend.csv")


def test_baseline_commands(nights, tmp_path):
    import shutil

    db_file = tmp_path / "copy.sqlite"
    shutil.copy(nights["root"] / "drift.sqlite", db_file)
    res = CliRunner().invoke(main, ["baseline", "show", "--db", str(db_file), "--json"])
    rows = json.loads(res.stdout)
    assert {r["source"] for r in rows} == {"automatic"} and {r["n_sessions"] for r in rows} == {N_BASE}
    res = CliRunner().invoke(
        main,
        [
            "baseline",
            "set",
            "--db",
            str(db_file),
            "--detector",
            DIRECT,
            "--from",
            str(FIRST + dt.timedelta(days=3)),
            "--to",
            str(FIRST + dt.timedelta(days=5)),
        ],
    )
    assert res.exit_code == 0, res.output
    rows = json.loads(
        CliRunner().invoke(main, ["baseline", "show", "--db", str(db_file), "--detector", DIRECT, "--json"]).stdout
    )
    assert {r["source"] for r in rows} == {"explicit"} and {r["n_sessions"] for r in rows} == {3}
    res = CliRunner().invoke(main, ["baseline", "set", "--db", str(db_file), "--detector", DIRECT, "--sessions", "999"])
    assert res.exit_code == 2 and "not scored sessions" in res.output
    res = CliRunner().invoke(main, ["baseline", "clear", "--db", str(db_file), "--detector", DIRECT])
    assert res.exit_code == 0 and "3 baseline row(s) removed" in res.output
