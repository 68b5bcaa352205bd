"""The suite's rule that a skip caused by the project's own code is a failure (issue 22; tests/conftest.py)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path


def test_skip_of_own_code_fails_and_missing_outside_component_still_skips(tmp_path):
    shutil.copy(Path(__file__).with_name("conftest.py"), tmp_path / "conftest.py")
    (tmp_path / "test_probe.py").write_text(
        "import pytest\n"
        "def test_own():\n"
        "    pytest.importorskip('scorer.no_such_module')\n"
        "def test_outside():\n"
        "    pytest.importorskip('no_such_outside_package_xyz')\n"
    )
    (tmp_path / "test_probe_module.py").write_text(
        "import pytest\npytest.importorskip('webapp.no_such_module')\ndef test_x():\n    pass\n"
    )
    res = subprocess.run(
        [
            sys.executable,
            "-m",
            "pytest",
            "-q",
            "-p",
            "no:cacheprovider",
            "-p",
            "no:xdist",
            "--continue-on-collection-errors",
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=120,
    )
    tail = res.stdout.strip().splitlines()[-1]
    assert res.returncode != 0
    assert "1 failed" in tail and "1 skipped" in tail and "1 error" in tail, res.stdout[-2000:]
