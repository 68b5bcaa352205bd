"""`limen analyse` end to end through click's test runner (small simulated studies)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.study import simulate_reader_study


@pytest.fixture(scope="module")
def study_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("study")
    st = simulate_reader_study(np.random.default_rng(31), 4, diameters_mm=(0.25, 1.0), n_images=8, n_repeats=2)
    st.trials.to_csv(d / "reads.csv", index=False)
    st.model_trials.to_csv(d / "model.csv", index=False)
    st.trials[st.trials.reader == "reader01"].to_csv(d / "one.csv", index=False)
    st.trials.drop(columns=["true_site"]).to_csv(d / "bad.csv", index=False)
    return d


def test_json_has_the_documented_keys(study_files):
    res = CliRunner().invoke(
        main,
        [
            "analyse",
            str(study_files / "reads.csv"),
            "--model",
            str(study_files / "model.csv"),
            "--json",
            "--n-boot",
            "100",
            "--seed",
            "3",
        ],
    )
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    for key in ("readers", "curves", "detector_comparison", "human_model_factor", "agreement"):
        assert key in out
    assert out["readers"] == ["reader01", "reader02", "reader03", "reader04"]
    pooled = [c for c in out["curves"] if c["reader"] == "pooled"]
    assert len(pooled) == 4 and all(c["ci_low"] < c["threshold_contrast"] < c["ci_high"] for c in pooled)
    for c in out["detector_comparison"]:
        assert {"diameter_mm", "ratio", "ci_low", "ci_high", "p_adjusted"} <= set(c)
    assert out["human_model_factor"]["factor"] > 1
    # same seed, same numbers
    res2 = CliRunner().invoke(
        main,
        [
            "analyse",
            str(study_files / "reads.csv"),
            "--model",
            str(study_files / "model.csv"),
            "--json",
            "--n-boot",
            "100",
            "--seed",
            "3",
        ],
    )
    assert json.loads(res2.stdout)["curves"] == out["curves"]


def test_out_writes_report_and_tables(study_files, tmp_path):
    res = CliRunner().invoke(
        main,
        [
            "analyse",
            str(study_files / "reads.csv"),
            "--model",
            str(study_files / "model.csv"),
            "--out",
            str(tmp_path / "out"),
            "--n-boot",
            "50",
        ],
    )
    assert res.exit_code == 0, res.output
    assert "human/model (npwe) threshold factor" in res.stdout
    for name in (
        "analysis.json",
        "report.html",
        "reader_curves.csv",
        "pooled_curves.csv",
        "comparison.csv",
        "human_model_factor.csv",
    ):
        assert (tmp_path / "out" / name).is_file(), name
    page = (tmp_path / "out" / "report.html").read_text()
    assert "never replace" in page and page.count("<svg") >= 4  # curves ×2, forest, Bland–Altman
    # the page says the readers are simulated, and shows contrasts in % with readable headings
    assert "Simulated readers:" in page
    assert "threshold (%)" in page and "threshold_contrast" not in page


def test_bad_table_exits_2_with_one_line(study_files):
    res = CliRunner().invoke(main, ["analyse", str(study_files / "bad.csv")])
    assert res.exit_code == 2
    assert res.stderr.strip().startswith("error:") and "missing column(s) true_site" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1 and "Traceback" not in res.stderr
    res = CliRunner().invoke(main, ["analyse", str(study_files / "nope.csv")])
    assert res.exit_code == 2 and "file not found" in res.stderr


def test_one_reader_study_gives_notes_not_a_crash(study_files):
    res = CliRunner().invoke(main, ["analyse", str(study_files / "one.csv"), "--json", "--n-boot", "50"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    assert "NaN" not in res.stdout
    assert all(c["reader"] == "reader01" for c in out["curves"])
    assert out["detector_comparison"] == [] and out["human_model_factor"] is None
    assert any("pooled curve not estimated" in n for n in out["notes"])


def test_bootstrap_budget_refuses_before_any_fit(study_files):
    # reads.csv: 4 readers, 2 detectors, 8 images, 10 contrasts per diameter (simulate_reader_study's default
    # n_contrasts).  Each resample holds the draw counts of the 8 images and 4 readers and the resampled counts of
    # the 4 readers × 10 levels (refitted at once to compare the detectors; scorer.study.analysis.bootstrap_block):
    # 52 cells per resample, 26 000 for 500.  The likelihood grid is evaluated in chunks and not counted.
    reads = str(study_files / "reads.csv")
    args = ["analyse", reads, "--n-boot", "500", "--json"]
    over = CliRunner().invoke(main, args, env={"LIMEN_MAX_BOOTSTRAP_CELLS": "25999"})
    assert over.exit_code == 2, over.output
    lines = over.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --n-boot 500 resamples × 52 cells each ")
    assert "26000" in lines[0] and "LIMEN_MAX_BOOTSTRAP_CELLS" in lines[0] and "4 readers × 10 contrast" in lines[0]
    assert over.stdout == ""  # refused before anything was computed or printed
    at = CliRunner().invoke(main, args, env={"LIMEN_MAX_BOOTSTRAP_CELLS": "26000"})
    assert at.exit_code == 0, at.output
    # one reader, one detector: 8 images + 1 reader + 1 reader × 10 levels = 19 cells per resample
    one = str(study_files / "one.csv")
    res = CliRunner().invoke(
        main, ["analyse", one, "--n-boot", "100", "--json"], env={"LIMEN_MAX_BOOTSTRAP_CELLS": "1899"}
    )
    assert res.exit_code == 2 and "1900" in res.stderr
