"""The optional parts (pyproject extras [web], [nightly], [postgres]): the scoring core imports and `limen score`
runs without them, and each command needing one says in one line which to install (exit 2)."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from helpers import MINI

#: every module the three extras bring, made unimportable in the child process (sys.modules[name] = None)
BLOCKED = ["flask", "flask_login", "flask_wtf", "waitress", "werkzeug", "dask", "distributed", "psycopg"]
RUN = (
    "import sys\n"
    f"for m in {BLOCKED!r}:\n"
    "    sys.modules[m] = None\n"
    "from scorer.cli import main\n"
    "sys.argv = ['limen'] + sys.argv[1:]\n"
    "main()\n"
)


def _limen(*args, cwd):
    return subprocess.run(
        [sys.executable, "-c", RUN, *map(str, args)], cwd=cwd, capture_output=True, text=True, timeout=600
    )


def test_scoring_core_without_the_extras(tmp_path):
    res = _limen("simulate", "--layout", MINI, "--count", "2", "--seed", "3", "--out", "img", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    images = sorted(str(p) for p in (tmp_path / "img").glob("*.dcm"))
    res = _limen("score", *images, "--layout", MINI, "--method", "dprime", "--n-boot", "20", "--json", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert out, res.stdout


@pytest.mark.parametrize(
    "args, extra",
    [
        (["serve", "--instance", "inst"], "web"),
        (["users", "list", "--instance", "inst"], "web"),
        (["backup", "--instance", "inst", "--out", "bk"], "web"),
        (["nightly", "--inbox", "inbox", "--dask", "tcp://127.0.0.1:1"], "nightly"),
        (["trend", "--db", "postgresql+psycopg://qc@127.0.0.1:1/qc", "--out", "r"], "postgres"),
    ],
    ids=["serve", "users", "backup", "nightly-dask", "postgresql"],
)
def test_a_command_needing_an_extra_names_it(tmp_path, args, extra):
    (tmp_path / "inbox").mkdir()
    res = _limen(*args, cwd=tmp_path)
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and f"pip install 'limen[{extra}]'" in lines[0], res.stderr
