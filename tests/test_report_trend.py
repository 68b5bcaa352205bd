"""The nightly trend page (`limen trend`): the simulated-data banner decided by the stored sessions' provenance,
and the baseline named by its sessions' acquisition dates (issue 21).

The images are the nightly tests' simulated nights of the mini plate; "not simulated" images are the same
images whose DICOM Manufacturer (0008,0070) names an invented maker instead of Limen's simulator, which is how
every Limen report tells the simulator's images apart (common practice: DICOM PS3.3 C.7.5.1 General Equipment
Module, Manufacturer).
"""

from __future__ import annotations

import datetime as dt
import html
import json
from pathlib import Path

import pytest
from click.testing import CliRunner, Result
from qc_helpers import DIRECT, night, write_config

from scorer.cli import main
from scorer.qc.simulated import Panel
from scorer.reports.html import CAUTION, NOT_FOR_DIAGNOSIS
from scorer.reports.trend import baseline_sessions_text, simulated_sentence

FIRST = dt.date(2026, 3, 2)
K = 3  # baseline sessions
INVENTED_MAKER = "Northgate Radiology Works (invented)"


def _run(args: list[str]) -> Result:
    return CliRunner().invoke(main, args)


def _nights(root: Path, tags: dict[str, str], n_nights: int) -> tuple[str, Path]:
    """``n_nights`` nightly runs of the direct panel (2 images each, Manufacturer overridden by ``tags``)."""
    cfg = write_config(root / "cfg", min_images=2, baseline_sessions=K, n_boot=20, methods=("dprime",))
    db = f"sqlite:///{root / 'trend.sqlite'}"
    for k in range(n_nights):
        night(root / "inbox", FIRST + dt.timedelta(days=k), [Panel("direct", tags=tags)], n_images=2, seed=300 + k)
    args = ["--inbox", str(root / "inbox"), "--config", str(cfg), "--db", db]
    res = _run(["nightly", "--settle-seconds", "0", *args])
    assert res.exit_code in (0, 1), res.output
    return db, cfg


@pytest.fixture(scope="module")
def simulated_db(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, Path]:
    return _nights(tmp_path_factory.mktemp("sim"), {}, K)


def _trend_html(db: str, cfg: Path, out: Path) -> str:
    res = _run(["trend", "--db", db, "--out", str(out), "--config", str(cfg)])
    assert res.exit_code == 0, res.output
    return html.unescape((out / "trend.html").read_text(encoding="utf-8"))  # the text a reader sees


def test_trend_page_over_simulated_images_carries_the_banner_and_the_cautions(
    simulated_db: tuple[str, Path], tmp_path: Path
) -> None:
    page = _trend_html(*simulated_db, tmp_path / "t")
    assert "Simulated data." in page
    # 3 nights × 2 images of the direct panel, every one made by the simulator (as stored with the sessions)
    assert f"{DIRECT}: 6 of 6 image(s), in 3 session(s)" in page
    assert CAUTION in page and NOT_FOR_DIAGNOSIS in page


def test_trend_page_over_images_of_another_maker_has_no_banner(tmp_path: Path) -> None:
    db, cfg = _nights(tmp_path, {"Manufacturer": INVENTED_MAKER}, 1)
    page = _trend_html(db, cfg, tmp_path / "t")
    assert "Simulated data." not in page and "simulator" not in page
    assert CAUTION in page and NOT_FOR_DIAGNOSIS in page  # the cautions stay on every page


def test_simulated_sentence_counts_per_detector_and_ignores_unknown_provenance() -> None:
    sessions = [
        {"id": 1, "detector": "A", "n_images": 4},
        {"id": 2, "detector": "A", "n_images": 4},
        {"id": 3, "detector": "B", "n_images": 5},
        {"id": 4, "detector": "C", "n_images": 2},
    ]
    text = simulated_sentence(sessions, {1: 4, 2: 0, 3: 5, 4: None})
    assert text is not None and "A: 4 of 8 image(s), in 1 session(s)" in text and "B: 5 of 5 image(s)" in text
    assert "C:" not in text  # stored before Limen recorded it, or not simulated: no claim either way
    assert simulated_sentence(sessions, {1: 0, 2: 0, 3: 0, 4: None}) is None


def test_baseline_is_named_by_acquisition_dates_ids_only_as_detail() -> None:
    dates = {7: "2026-03-04", 1: "2026-03-02", 3: "2026-03-03", 9: "2026-03-03"}
    text = baseline_sessions_text([9, 1, 7, 3], dates)
    assert text == "acquired 2026-03-02, 2026-03-03 (2 sessions), 2026-03-04 (session ids 1, 3, 9, 7)"
    assert baseline_sessions_text([5], {5: "2026-03-05"}) == "acquired 2026-03-05 (session id 5)"


def test_trend_page_and_baseline_commands_name_the_baseline_by_date(
    simulated_db: tuple[str, Path], tmp_path: Path
) -> None:
    db, cfg = simulated_db
    page = _trend_html(db, cfg, tmp_path / "t")
    days = ", ".join(str(FIRST + dt.timedelta(days=k)) for k in range(K))
    assert f"Baseline (automatic): {DIRECT}, acquired {days} (session ids " in page, page
    assert "sessions 1, 2, 3" not in page
    res = _run(["baseline", "show", "--db", db])
    assert res.exit_code == 0 and f"automatic from the sessions acquired {days}" in res.output, res.output
    rows = json.loads(_run(["baseline", "show", "--db", db, "--json"]).stdout)
    assert rows and all(r["sessions"] == [1, 2, 3] for r in rows)  # the JSON keeps the ids
    import shutil

    copy = tmp_path / "copy.sqlite"
    shutil.copy(db.removeprefix("sqlite:///"), copy)
    first_two = f"{FIRST}, {FIRST + dt.timedelta(days=1)}"
    res = _run(["baseline", "set", "--db", f"sqlite:///{copy}", "--detector", DIRECT, "--sessions", "1,2"])
    assert res.exit_code == 0 and f"baseline of {DIRECT} set from the sessions acquired {first_two}" in res.output, (
        res.output
    )
    res = _run(["baseline", "clear", "--db", f"sqlite:///{copy}", "--detector", DIRECT, "--config", str(cfg)])
    assert res.exit_code == 0, res.output
    assert f"automatic baseline of {DIRECT} (dprime): the sessions acquired {days}" in res.output, res.output
