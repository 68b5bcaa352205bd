"""Hostile input to the newer commands (issue 24: dose-series, compare-detectors --dose-a/--dose-b, analyse,
--human-factor, messages) and the older commands' leftovers (issue 22: simulate, detector, score --replace).

The rule (README, DESIGN.md "Conventions"; common practice for command-line tools): a bad input gives exit
status 2 and one line ``error: …`` on stderr naming the file or option and the problem — no traceback, no silent
regrouping or averaging, no number read as something else.  Each case was found by the audit of issue 24 (or 22)
and fails on the code as it was before the fix.  The inputs are built here from simulated images of the mini plate.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Callable

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import MINI

from scorer.cli import main

FAST = ["--n-boot", "20"]
EXAMPLE_LIMITS = (
    Path(__file__).resolve().parents[1] / "scorer" / "data" / ("limits-eu-guidelines-2006-digital-mammography.toml")
)
#: a folder no one can create, root included (/proc takes no new entries)
UNWRITABLE = Path("/proc/limen-hostile-out/x")
_PROGRESS = re.compile(r"\d+%\|")  # a tqdm progress bar segment (written with carriage returns)


def _run(args, env=None):
    return CliRunner().invoke(main, [str(a) for a in args], env=env)


def _messages(stderr: str) -> list[str]:
    """What stderr says, progress bars left out: each line or carriage-return segment that is not a bar."""
    return [s.strip() for s in re.split(r"[\r\n]+", stderr) if s.strip() and not _PROGRESS.search(s)]


def _simulate(out: Path, *extra) -> None:
    res = _run(["simulate", "--small", "--layout", MINI, "--out", out, *extra])
    assert res.exit_code == 0, res.output


@pytest.fixture(scope="module")
def W(tmp_path_factory):
    """Direct-panel phantom images at 25, 50 and 100 µGy (two each, one folder per kerma), an indirect-panel image,
    the direct panel's conversion function, a real dose-series JSON, a reader table and a detector JSON."""
    root = tmp_path_factory.mktemp("hostile-dose")
    w = SimpleNamespace(root=root, bad=root / "bad")
    w.bad.mkdir()
    for k in (25, 50, 100):
        _simulate(root / f"k{k}", "--count", "2", "--seed", str(k), "--dose-ugy", str(k))
    _simulate(root / "ind", "--detector", "indirect", "--seed", "7", "--dose-ugy", "50")
    w.k = {k: sorted((root / f"k{k}").glob("*.dcm")) for k in (25, 50, 100)}
    w.ind = sorted((root / "ind").glob("*.dcm"))
    w.conv = root / "k25" / "direct-conversion.toml"
    res = _run(["dose-series", *w.k[25], *w.k[100], "--layout", MINI, "--conversion", w.conv, *FAST, "--json"])
    assert res.exit_code == 0, res.output
    w.dose = json.loads(res.stdout)
    assert sum(f.get("beta") is not None for f in w.dose["fits"]) >= 2
    w.dose_a = root / "dose-a.json"
    w.dose_a.write_text(json.dumps(w.dose))
    # a detector JSON as compare-detectors reads it (an MTF curve is enough for the refusals here)
    w.det = root / "detector.json"
    w.det.write_text(json.dumps({"mtf": {"frequency_per_mm": [0, 1, 2, 3], "value": [1, 0.8, 0.5, 0.3]}}))
    from scorer.study import simulate_reader_study

    st = simulate_reader_study(np.random.default_rng(3), 4, diameters_mm=(0.25, 1.0), n_images=6, n_repeats=1)
    w.trials = st.trials
    return w


@dataclass
class Case:
    id: str
    build: Callable  # W -> list of CLI arguments
    names: str | Callable  # what the error line must name (text, or W -> text)
    says: tuple[str, ...] = ()
    not_says: tuple[str, ...] = ()


def _write(w, name: str, data) -> Path:
    p = w.bad / name
    p.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, bytes):
        p.write_bytes(data)
    else:
        p.write_text(data, encoding="utf-8")
    return p


def _kerma_csv(w, name: str, rows) -> Path:
    return _write(w, name, "path,kerma_ugy\n" + "".join(f"{p.resolve()},{k}\n" for p, k in rows))


def _dose(*files, extra=()):
    return ["dose-series", *files, "--layout", MINI, *FAST, *extra]


def _mixed_folder(w) -> list[Path]:
    """A folder holding a 25 µGy and a 100 µGy image, beside the 50 µGy folder."""
    mix = w.root / "mixed"
    mix.mkdir(exist_ok=True)
    out = []
    for src in (w.k[25][0], w.k[100][0]):
        dst = mix / src.name
        shutil.copyfile(src, dst)
        out.append(dst)
    return [*out, *w.k[50]]


def _dose_json(name: str, edit: Callable[[dict], None]):
    """compare-detectors with the good dose series as A and an edited copy as B."""

    def build(w):
        d = json.loads(json.dumps(w.dose))
        edit(d)
        p = _write(w, f"{name}/dose_series.json", json.dumps(d))  # json writes NaN as NaN (Python reads it back)
        return ["compare-detectors", w.det, w.det, "--dose-a", w.dose_a, "--dose-b", p]

    return build


def _fitted(d: dict) -> dict:
    return next(f for f in d["fits"] if f.get("beta") is not None)


def _trials(name: str, edit: Callable):
    def build(w):
        df = w.trials.copy()
        edit(df)
        p = w.bad / name
        df.to_csv(p, index=False)
        return ["analyse", p, *FAST]

    return build


def _stray_chosen(df):
    df.loc[5, "chosen_site"], df.loc[5, "correct"] = 7, 0  # a 4-AFC cell (sites 0–3) answered "7"


def _stray_true(df):
    i = df.index[(df["detector"] == "direct") & (df["diameter_mm"] == 0.25)][0]
    df.loc[i, ["chosen_site", "true_site", "correct"]] = [4, 4, 1]  # a fifth site in one detector's cells


def _model_limits(w) -> Path:
    return _write(
        w,
        "npw-limits.toml",
        'format = "limen-limits/1"\nname = "model limits"\nobserver = "npw"\nsource = "invented for a test"\n'
        "[[limits]]\ndiameter_mm = 0.25\nacceptable = 0.05\n[[limits]]\ndiameter_mm = 1.0\nacceptable = 0.01\n",
    )


def _tiny_flat(w) -> Path:
    p = w.bad / "tiny-flat.npy"
    np.save(p, np.random.default_rng(0).normal(1000.0, 10.0, (40, 40)))
    return p


LONG = "n" * 100_000

CASES = [
    # ---- A. dose-series
    Case(
        "kerma-csv-binary",
        lambda w: _dose(*w.k[25], *w.k[100], extra=["--kerma-csv", _write(w, "binary.csv", bytes(range(256)) * 4)]),
        "binary.csv",
        ("UTF-8",),
    ),
    # --out is checked before any image is read: the broken image is never reached
    Case(
        "out-unwritable-before-any-image",
        lambda w: _dose(
            _write(w, "junk.dcm", b"not an image"),
            *w.k[25],
            *w.k[100],
            extra=["--conversion", w.conv, "--out", UNWRITABLE],
        ),
        str(UNWRITABLE),
        ("--out",),
        ("junk.dcm",),
    ),
    Case(
        "folder-of-two-kermas",
        lambda w: _dose(*_mixed_folder(w), extra=["--conversion", w.conv]),
        "mixed",
        ("different air kermas", "25", "100"),
    ),
    Case(
        "kerma-csv-image-twice",
        lambda w: _dose(
            w.k[25][0],
            w.k[100][0],
            extra=["--kerma-csv", _kerma_csv(w, "twice.csv", [(w.k[25][0], 25), (w.k[25][0], 30), (w.k[100][0], 100)])],
        ),
        "twice.csv",
        ("line 3", "again", "line 2"),
    ),
    # the CSV gives the 25 µGy image the 100 µGy image's kerma and vice versa
    Case(
        "kerma-csv-contradicts-conversion",
        lambda w: _dose(
            w.k[25][0],
            w.k[100][0],
            extra=[
                "--kerma-csv",
                _kerma_csv(w, "swapped.csv", [(w.k[25][0], 100), (w.k[100][0], 25)]),
                "--conversion",
                w.conv,
            ],
        ),
        "swapped.csv",
        ("contradicts --conversion",),
    ),
    # DICOM PS3.3, DX Detector Module: Detector Type (0018,7004) DIRECT vs SCINTILLATOR — two panels in one series
    Case(
        "direct-and-indirect-in-one-series",
        lambda w: _dose(
            *w.k[25],
            *w.ind,
            extra=["--kerma-csv", _kerma_csv(w, "panels.csv", [(w.k[25][0], 25), (w.k[25][1], 25), (w.ind[0], 50)])],
        ),
        lambda w: w.ind[0].name,
        ("Detector Type", "SCINTILLATOR", "DIRECT", "one panel"),
    ),
    Case(
        "kerma-csv-negative-kerma",
        lambda w: _dose(
            w.k[25][0],
            w.k[100][0],
            extra=["--kerma-csv", _kerma_csv(w, "negative.csv", [(w.k[25][0], -25), (w.k[100][0], 100)])],
        ),
        "negative.csv",
        ("line 2", "-25", "positive"),
        ("not listed",),
    ),
    # ---- B. compare-detectors --dose-a/--dose-b with a malformed or unmatched dose series
    Case(
        "dose-json-fit-without-ci",
        _dose_json("no-ci", lambda d: [_fitted(d).pop(k) for k in ("beta_ci_low", "beta_ci_high")]),
        "no-ci",
        ("beta_ci_low",),
    ),
    Case(
        "dose-json-beta-not-a-number",
        _dose_json("beta-text", lambda d: _fitted(d).update(beta="steep")),
        "beta-text",
        ("'beta'", "not a finite number"),
    ),
    Case(
        "dose-json-negative-reference-kerma",
        _dose_json("neg-ref", lambda d: _fitted(d).update(reference_kerma_ugy=-50.0)),
        "neg-ref",
        ("reference_kerma_ugy", "positive"),
    ),
    Case(
        "dose-json-covariance-3x3",
        _dose_json("cov", lambda d: _fitted(d).update(cov_alpha_beta=np.eye(3).tolist())),
        "cov",
        ("cov_alpha_beta", "2 × 2"),
    ),
    Case(
        "dose-json-npw-against-npwe",
        _dose_json("npwe", lambda d: d.update(observer="npwe")),
        "npwe",
        ("NPWE", "NPW", "same model observer"),
    ),
    Case(
        "dose-json-no-diameter-in-common",
        _dose_json("other-diameters", lambda d: [f.update(diameter_mm=f["diameter_mm"] * 7) for f in d["fits"]]),
        "other-diameters",
        ("no fitted diameter in common",),
    ),
    Case("dose-json-empty-fits", _dose_json("empty", lambda d: d.update(fits=[])), "empty", ("no fitted diameter",)),
    Case(
        "dose-json-nan-beta",
        _dose_json("nan-beta", lambda d: _fitted(d).update(beta=float("nan"))),
        "nan-beta",
        ("'beta'", "not a finite number"),
    ),
    # ---- C. analyse: site labels outside the cell's sites (M-AFC: the sites are the cell's M alternatives)
    Case("analyse-chosen-site-outside", _trials("stray-chosen.csv", _stray_chosen), "stray-chosen.csv", ("7",)),
    Case(
        "analyse-true-site-outside",
        _trials("stray-true.csv", _stray_true),
        "stray-true.csv",
        ("different numbers of sites", "direct: 5", "indirect: 4"),
    ),
    Case(
        "analyse-n-alternatives-below-sites-seen",
        _trials("n-alt.csv", lambda df: df.insert(len(df.columns), "n_alternatives", 2)),
        "n-alt.csv",
        ("n_alternatives is 2", "4 different sites"),
    ),
    # ---- D. --human-factor: a finite, sane number, and only where it applies
    *[
        Case(
            f"human-factor-{v}",
            lambda w, v=v: [
                "score",
                *w.k[25],
                "--layout",
                MINI,
                *FAST,
                "--limits",
                EXAMPLE_LIMITS,
                "--human-factor",
                v,
            ],
            "--human-factor",
            ("0.1–10",),
        )
        for v in ("inf", "1e300", "1e-300", "nan")
    ],
    Case(
        "human-factor-with-model-limits",
        lambda w: ["score", *w.k[25], "--layout", MINI, *FAST, "--limits", _model_limits(w), "--human-factor", "1.6"],
        "--human-factor",
        ("npw-limits.toml", "NPW model observer"),
    ),
    Case(
        "human-factor-with-model-limits-dose-series",
        lambda w: _dose(
            *w.k[25], *w.k[100], extra=["--conversion", w.conv, "--limits", _model_limits(w), "--human-factor", "1.6"]
        ),
        "--human-factor",
        ("NPW model observer",),
    ),
    # ---- E. messages
    Case(
        "message-plain-number",
        _trials(
            "half-correct.csv",
            lambda df: df.__setitem__("correct", df["correct"].astype(float).where(df.index != 3, 0.5)),
        ),
        "half-correct.csv",
        ("got 0.5",),
        ("np.float64",),
    ),
    Case(
        "message-diameter-wording",
        _trials(
            "neg-diameter.csv", lambda df: df.__setitem__("diameter_mm", df["diameter_mm"].where(df.index != 2, -1.0))
        ),
        "neg-diameter.csv",
        ("diameter_mm must be a positive number of mm",),
        ("fraction in mm",),
    ),
    Case(
        "message-long-name-kerma-csv",
        lambda w: _dose(*w.k[25], *w.k[100], extra=["--kerma-csv", w.bad / LONG]),
        "characters",
        ("cannot read kerma CSV",),
        (LONG[:1000],),
    ),
    Case(
        "message-long-text-in-table",
        _trials(
            "long-contrast.csv",
            lambda df: df.__setitem__("contrast", df["contrast"].astype(object).where(df.index != 1, LONG)),
        ),
        "long-contrast.csv",
        ("100002 characters",),
        (LONG[:1000],),
    ),
    # ---- F. issue 22's leftovers of the older commands
    Case(
        "simulate-out-unwritable", lambda w: ["simulate", "--small", "--out", UNWRITABLE], str(UNWRITABLE), ("--out",)
    ),
    # refusals of `limen detector` come alone, without the generic "no conversion function" warning before them
    Case(
        "detector-flat-too-small",
        lambda w: ["detector", "--flat", _tiny_flat(w), "--pixel-spacing", "0.085"],
        "tiny-flat.npy",
        ("256",),
    ),
    Case(
        "detector-flat-given-as-edge",
        lambda w: ["detector", "--edge", w.k[25][0]],
        lambda w: w.k[25][0].name,
        ("edge",),
    ),
    Case(
        "detector-phantom-as-flat",
        lambda w: ["detector", "--flat", w.k[25][0]],
        lambda w: w.k[25][0].name,
        ("not a flat field",),
    ),
]


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_hostile_newer_input(case, W):
    args = case.build(W)
    res = _run(args)
    assert res.exception is None or isinstance(res.exception, SystemExit), (
        f"{case.id}: {type(res.exception).__name__}: {res.exception}\n{res.stderr}"
    )
    assert res.exit_code == 2, f"{case.id}: exit {res.exit_code}, expected 2\n{res.stderr}"
    said = _messages(res.stderr)
    assert len(said) == 1 and said[0].startswith("error: "), f"{case.id}: not exactly one error line:\n{res.stderr}"
    line = said[0]
    assert len(line) < 1000, f"{case.id}: {len(line)} characters"
    names = case.names(W) if callable(case.names) else case.names
    assert names in line, f"{case.id}: the error does not name {names}: {line}"
    for s in case.says:
        assert s.lower() in line.lower(), f"{case.id}: {s!r} not said: {line}"
    for s in case.not_says:
        assert s.lower() not in line.lower(), f"{case.id}: {s!r} said: {line}"
    assert "np.float64" not in line and "np.int64" not in line


def test_kerma_csv_scaled_against_the_conversion_is_warned(W):
    # every listed kerma 10× what the plate background gives through the conversion function: consistent between
    # images (the CSV may hold kermas measured without the plate), so the series runs, with a warning that says so
    csv = _kerma_csv(W, "times-ten.csv", [(p, 10 * k) for k in (25, 100) for p in W.k[k]])
    res = _run(_dose(*W.k[25], *W.k[100], extra=["--kerma-csv", csv, "--conversion", W.conv]))
    assert res.exit_code == 0, res.stderr
    warned = [s for s in _messages(res.stderr) if s.startswith("warning: ") and "times-ten.csv" in s]
    assert len(warned) == 1 and "10×" in warned[0], res.stderr


def test_human_factor_in_range_is_accepted(W):
    # the boundary of the stated range is a value, not an error; 1.6 is the demo study's factor
    for v in ("0.1", "10", "1.6"):
        res = _run(["score", *W.k[25], "--layout", MINI, *FAST, "--limits", EXAMPLE_LIMITS, "--human-factor", v])
        assert res.exit_code in (0, 1, 3), (v, res.stderr)  # verdicts: pass, fail, indeterminate (README)
        assert not [s for s in _messages(res.stderr) if s.startswith("error")], res.stderr


def test_analyse_accepts_a_cell_whose_sites_are_all_seen(W):
    p = W.bad / "reads-ok.csv"
    W.trials.assign(n_alternatives=4).to_csv(p, index=False)
    res = _run(["analyse", p, *FAST, "--json"])
    assert res.exit_code == 0, res.stderr
    assert json.loads(res.stdout)["m_alternatives"] == 4


def test_simulator_is_imported_plainly_by_the_detector_tests():
    # issue 22: pytest.importorskip turned a broken import of Limen's own simulator into silent skips of the MTF
    # and DQE checks; a plain import fails instead
    text = (Path(__file__).parent / "test_detector.py").read_text(encoding="utf-8")
    assert not re.search(r"importorskip\(\s*['\"]scorer", text)
    assert re.search(r"^from scorer\.detector import [^\n]*\bsimulator\b", text, re.M)  # however ruff sorts it


# ------------------------------------------------------------------ score --out DIR --replace, killed mid-run


def _limen(args, env_extra=None):
    env = {**os.environ, **(env_extra or {})}
    return subprocess.run(
        [sys.executable, "-m", "scorer.cli", *map(str, args)], env=env, capture_output=True, text=True, timeout=300
    )


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("fault", ["write:1", "write:4", "swap"])
def test_replace_killed_mid_run_keeps_the_earlier_result(W, tmp_path, fault):
    """``score --out DIR --replace`` killed with SIGKILL (fault points of scorer/faults.py: half-way through its
    1st or 4th output file, or between the two renames of the swap) leaves the earlier complete result in DIR —
    every file byte for byte — and the next run finishes the job.  Before, the earlier files were removed first."""
    out = tmp_path / "out"
    args = ["score", *W.k[25], "--layout", MINI, *FAST, "--out", out]
    first = _limen(args)
    assert first.returncode == 0, first.stderr
    (out / "my notes.txt").write_text("the physicist's own file")
    before = _snapshot(out)
    killed = _limen([*args, "--replace", "--seed", "3"], {"LIMEN_FAULT_INJECT": fault})
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    if fault == "swap":
        # killed between the renames: DIR is gone for a moment; the next run puts the complete new result in place
        assert not out.exists()
    else:
        assert _snapshot(out) == before
    again = _limen([*args, "--replace", "--seed", "3"])
    assert again.returncode == 0, again.stderr
    after = _snapshot(out)
    assert after["my notes.txt"] == b"the physicist's own file"
    assert json.loads(after[".limen-outputs.json"])["complete"] is True
    assert set(after) == set(before)
    assert after["results.json"] != before["results.json"]  # the new seed's result
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".out.limen-")]


def test_replace_outside_a_writable_parent_still_replaces(W, tmp_path, monkeypatch):
    # where no folder can be made beside the output folder, the files are replaced in place as before
    from scorer.files import OutputFolder

    out = tmp_path / "out"
    out.mkdir()
    (out / "a.txt").write_text("foreign")
    monkeypatch.setattr(OutputFolder, "_build_beside", lambda self: False)
    folder = OutputFolder(out, replace=True, command="t", beside=True)
    assert folder.path == out
    (folder.path / "r.json").write_text("{}")
    assert folder.finish() == ["r.json"]
    assert sorted(p.name for p in out.iterdir()) == [".limen-outputs.json", "a.txt", "r.json"]
