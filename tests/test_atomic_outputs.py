"""Atomic outputs: a run killed with SIGKILL at any moment leaves complete files (or none), never a truncated one
that parses; a non-empty --out is refused unless --replace, which clears only what Limen wrote; a re-run succeeds.

Kills use the fault hook ``LIMEN_FAULT_INJECT=write:n`` (``scorer/faults.py``): the process kills itself half-way
through writing its n-th output file, the worst moment for a non-atomic writer. A few timed kills at random
moments are added. Every file left must parse completely (JSON, CSV, HTML ending in ``</html>``, PNG with its
IEND chunk, NPY of the declared size).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from helpers import MINI

from scorer.cli import main
from scorer.files import MANIFEST


@pytest.fixture(scope="module")
def images(tmp_path_factory):
    d = tmp_path_factory.mktemp("atomic")
    res = CliRunner().invoke(
        main, ["simulate", "--small", "--layout", str(MINI), "--count", "2", "--seed", "4", "--out", str(d)]
    )
    assert res.exit_code == 0, res.output
    return sorted(d.glob("*.dcm"))


def _limen(args, env_extra=None, timeout=300):
    env = {**os.environ, **(env_extra or {})}
    return subprocess.run(
        [sys.executable, "-m", "scorer.cli", *map(str, args)], env=env, capture_output=True, text=True, timeout=timeout
    )


def _score_args(images, out, *extra):
    return ["score", *images, "--layout", MINI, "--n-boot", "20", "--out", out, *extra]


def _check_complete(folder: Path) -> list[str]:
    """Parse every file in ``folder`` completely; return the names checked (a failure raises)."""
    checked = []
    for p in sorted(folder.rglob("*")):
        if not p.is_file():
            continue
        name = p.name
        if name.endswith(".part"):
            continue  # a temporary file of the killed write: never a result name
        data = p.read_bytes()
        if name.endswith(".json"):
            json.loads(data)
        elif name.endswith(".csv"):
            frame = pd.read_csv(p)
            assert len(frame.columns) >= 1
            # a cut CSV could still parse: its last line must be complete (ends in a newline)
            assert data.endswith(b"\n"), name
        elif name.endswith(".html"):
            assert data.rstrip().endswith(b"</html>"), name
        elif name.endswith(".png"):
            assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[-12:-4] == b"\x00\x00\x00\x00IEND", name
        elif name.endswith(".npy"):
            np.load(p)
        checked.append(str(p.relative_to(folder)))
    return checked


def test_killed_at_every_file_leaves_only_complete_files(images, tmp_path):
    """Kill the run half-way through its 1st, 2nd, … output file; each time the folder holds complete files only,
    and ``--replace`` then finishes the job. Without atomic writes the killed file would be half written."""
    out = tmp_path / "out"
    ok = _limen(_score_args(images, out))
    assert ok.returncode == 0, ok.stderr
    full = _check_complete(out)
    n_files = len(full)  # overlays, results.json, 4 CSV, report.html and the manifest (written twice)
    assert n_files >= 8
    killed_at = []
    for n in range(1, n_files + 3):
        res = _limen(_score_args(images, out, "--replace"), {"LIMEN_FAULT_INJECT": f"write:{n}"})
        if res.returncode == 0:
            break
        assert res.returncode == -signal.SIGKILL, res.stderr
        killed_at.append(n)
        _check_complete(out)
        manifest = json.loads((out / MANIFEST).read_text())
        # the new result is built beside the folder and swapped in only when complete (issue 22): killed at any
        # file, the previous complete result is still all there
        assert manifest["complete"]
        assert all((out / f).is_file() for f in manifest["files"])
    assert len(killed_at) >= 8
    final = _limen(_score_args(images, out, "--replace"))
    assert final.returncode == 0, final.stderr
    assert sorted(_check_complete(out)) == sorted(full)
    assert not list(out.rglob("*.part"))
    assert json.loads((out / MANIFEST).read_text())["complete"] is True


def test_first_run_killed_at_seeded_files_leaves_only_complete_files(images, tmp_path):
    """A first run (no earlier result) killed with SIGKILL half-way through seeded-random output files
    (fault point ``write:n`` of scorer/faults.py, so every kill lands inside the run — common practice for crash
    tests: kill, then inspect): the folder holds complete files only, or nothing, and a re-run finishes the job.
    Replaces kills after fixed delays, which could land after the run had ended and then checked nothing."""
    probe = tmp_path / "probe"
    assert _limen(_score_args(images, probe)).returncode == 0
    n_files = len(_check_complete(probe))
    rnd = np.random.default_rng(22)
    for k, n in enumerate(sorted(rnd.choice(np.arange(1, n_files + 1), size=3, replace=False))):
        out = tmp_path / f"out{k}"
        res = _limen(_score_args(images, out), {"LIMEN_FAULT_INJECT": f"write:{n}"})
        assert res.returncode == -signal.SIGKILL, res.stderr  # the kill happened inside the run
        if out.exists():
            _check_complete(out)  # a hidden temporary copy (.part) may remain; no visible file is cut
        again = _limen(_score_args(images, out, "--replace"))
        assert again.returncode == 0, again.stderr
        assert not list(out.rglob("*.part"))
        assert sorted(_check_complete(out)) == sorted(_check_complete(probe))


def test_non_empty_out_refused_and_replace_clears_only_limens_files(images, tmp_path):
    out = tmp_path / "out"
    first = CliRunner().invoke(main, [str(a) for a in _score_args(images, out)])
    assert first.exit_code == 0, first.output
    (out / "my notes.txt").write_text("the physicist's own file")
    stale = out / "overlays" / "old-image.png"  # as if an earlier run had scored another image
    stale.write_bytes((out / "overlays" / f"{images[0].stem}.png").read_bytes())
    manifest = json.loads((out / MANIFEST).read_text())
    manifest["files"].append("overlays/old-image.png")
    (out / MANIFEST).write_text(json.dumps(manifest))

    again = CliRunner().invoke(main, [str(a) for a in _score_args(images[:1], out)])
    assert again.exit_code == 2 and "--replace" in again.stderr and len(again.stderr.strip().splitlines()) == 1

    rep = CliRunner().invoke(main, [str(a) for a in _score_args(images[:1], out, "--replace")])
    assert rep.exit_code == 0, rep.output
    assert (out / "my notes.txt").read_text() == "the physicist's own file"  # not Limen's: kept
    assert not stale.exists()  # Limen's, stale: removed
    assert sorted(p.name for p in (out / "overlays").iterdir()) == [f"{images[0].stem}.png"]
    assert json.loads((out / "results.json").read_text())["images"][0]["path"] == str(images[0])


@pytest.mark.parametrize("command", ["analyse", "detector", "compare-detectors", "dose-series"])
def test_other_commands_refuse_a_non_empty_out(command, tmp_path, images):
    out = tmp_path / "full"
    out.mkdir()
    (out / "x.txt").write_text("x")
    args = {
        "analyse": ["analyse", tmp_path / "none.csv"],
        "detector": ["detector", "--flat", images[0]],
        "compare-detectors": ["compare-detectors", tmp_path / "a.json", tmp_path / "b.json"],
        # issue 21: dose-series silently overwrote another program's dose_series.json; now it refuses like score
        "dose-series": ["dose-series", *images, "--layout", MINI, "--kerma-csv", tmp_path / "kerma.csv"],
    }[command]
    if command == "dose-series":
        (tmp_path / "kerma.csv").write_text(f"path,kerma_ugy\n{images[0]},50\n{images[1]},100\n")
        (out / "dose_series.json").write_text("{}")  # another program's file of the same name

    if command == "analyse":
        from scorer.study import simulate_reader_study

        simulate_reader_study(np.random.default_rng(1), 2, diameters_mm=(1.0,), n_images=4).trials.to_csv(
            args[1], index=False
        )
    if command == "compare-detectors":
        for p in args[1:]:
            p.write_text(json.dumps({"mtf": {"frequency_per_mm": [0, 1, 2], "value": [1, 0.8, 0.5]}}))
    res = CliRunner().invoke(main, [str(a) for a in args] + ["--out", str(out)])
    assert res.exit_code == 2, res.output
    assert "--replace" in res.stderr and len(res.stderr.strip().splitlines()) == 1
    if command == "dose-series":
        assert (out / "dose_series.json").read_text() == "{}"  # untouched
        assert sorted(p.name for p in out.iterdir()) == ["dose_series.json", "x.txt"]


def _simulate_args(out, *extra):
    return ["simulate", "--small", "--layout", MINI, "--count", "2", "--seed", "9", "--out", out, *extra]


def _check_simulated(folder: Path) -> dict[str, np.ndarray]:
    """Every file ``limen simulate`` left parses completely: each DICOM decodes to its declared size (pydicom), each
    sidecar is JSON whose SHA-256 is that of its image when both are there, the conversion TOML reads back.
    Returns the pixels of each image by name."""
    import hashlib
    import tomllib

    import pydicom

    from scorer.images import load_conversion

    pixels = {}
    for p in sorted(folder.iterdir()):
        if p.name.endswith(".part"):
            continue  # the temporary of the killed write: never a result name
        if p.suffix == ".dcm":
            ds = pydicom.dcmread(p)
            arr = ds.pixel_array
            assert arr.shape == (int(ds.Rows), int(ds.Columns)), p.name
            pixels[p.name] = arr
        elif p.suffix == ".json":
            side = json.loads(p.read_bytes())
            image = folder / side["image"]
            if image.exists():
                assert hashlib.sha256(image.read_bytes()).hexdigest() == side["sha256"], p.name
        elif p.suffix == ".toml":
            tomllib.loads(p.read_text(encoding="utf-8"))
            load_conversion(p)
        else:
            raise AssertionError(f"unexpected file {p.name}")
    return pixels


def test_simulate_killed_at_every_file_leaves_only_complete_files(tmp_path):
    """``limen simulate`` killed half-way through its n-th file (two DICOMs, their sidecars, the conversion
    function: 5 files) leaves the n − 1 files before it complete and the n-th absent; a re-run with --overwrite
    (the clash message asks for it) writes the same images and leaves no temporary behind."""
    ref = tmp_path / "ref"
    ok = _limen(_simulate_args(ref))
    assert ok.returncode == 0, ok.stderr
    reference = _check_simulated(ref)
    n_files = len(list(ref.iterdir()))
    assert n_files == 5 and len(reference) == 2
    killed_at = []
    for n in range(1, n_files + 2):
        out = tmp_path / f"killed-{n}"
        res = _limen(_simulate_args(out), {"LIMEN_FAULT_INJECT": f"write:{n}"})
        if res.returncode == 0:
            break
        assert res.returncode == -signal.SIGKILL, res.stderr
        killed_at.append(n)
        _check_simulated(out)
        assert len([p for p in out.iterdir() if not p.name.endswith(".part")]) == n - 1
        assert len(list(out.glob(".*.part"))) == 1  # the killed file exists only under its temporary name
        again = _limen(_simulate_args(out, "--overwrite"))
        assert again.returncode == 0, again.stderr
        got = _check_simulated(out)
        assert sorted(got) == sorted(reference)
        for name, arr in reference.items():
            np.testing.assert_array_equal(got[name], arr)  # same seed, same pixels
        assert not list(out.glob(".*.part"))
    assert killed_at == list(range(1, n_files + 1))


class _Killed(BaseException):
    """Stands in for SIGKILL at the write fault point, in-process."""


def _writers(tmp_path):
    """(name, call, the file that must be complete or absent, the fault-point pass to die at)."""
    import datetime as dt

    from scorer.detector import detector_model, simulate
    from scorer.images import ConversionFunction, save_conversion, write_dicom, write_image
    from scorer.qc.simulated import demo_nights
    from scorer.study.reader_model import write_demo_study
    from scorer.workflow import write_simulated

    px = np.arange(64 * 48, dtype=np.uint16).reshape(64, 48)
    sim = simulate(detector_model("direct"), "flat", 50.0, seed=1, small=True)
    t0 = dt.datetime(2026, 11, 30, 8, 0)
    return [
        ("write_dicom", lambda: write_dicom(tmp_path / "a.dcm", px, (0.1, 0.1)), tmp_path / "a.dcm", 1),
        ("write_image npy", lambda: write_image(tmp_path / "a.npy", px), tmp_path / "a.npy", 1),
        ("write_image tiff", lambda: write_image(tmp_path / "a.tiff", px), tmp_path / "a.tiff", 1),
        ("write_image png", lambda: write_image(tmp_path / "a.png", px), tmp_path / "a.png", 1),
        (
            "save_conversion",
            lambda: save_conversion(ConversionFunction("linear", 60.0, 20.0), tmp_path / "c.toml"),
            tmp_path / "c.toml",
            1,
        ),
        ("simulator sidecar", lambda: write_simulated(sim, tmp_path, "s", t0), tmp_path / "s.json", 2),
        ("reader study CSV", lambda: write_demo_study(tmp_path / "study"), tmp_path / "study" / "truth.csv", 3),
        ("nightly demo config", lambda: demo_nights(tmp_path / "qc"), tmp_path / "qc" / "nightly.toml", 3),
    ]


@pytest.mark.parametrize("index", range(8))
def test_writers_write_through_the_atomic_writer(index, tmp_path, monkeypatch):
    """Each writer outside the report folders passes the write fault point of ``atomic_write_bytes``: stopped there,
    its file is absent (not half written) and no temporary is left; unstopped, it is written."""
    import scorer.files

    name, call, target, die_at = _writers(tmp_path)[index]
    passes = []

    def fault(point):
        passes.append(point)
        if point == "write" and len(passes) == die_at:
            raise _Killed(name)

    monkeypatch.setattr(scorer.files, "fault_point", fault)
    with pytest.raises(_Killed):
        call()
    assert not target.exists(), name
    assert not list(tmp_path.rglob(".*.part")), name
    monkeypatch.setattr(scorer.files, "fault_point", lambda point: None)
    call()
    assert target.is_file() and target.stat().st_size > 0, name
