"""The `limen` command line itself: fast start, every command reachable, every option explained."""

import subprocess
import sys

import click
import pytest
from click.testing import CliRunner

from scorer.cli import COMMANDS, main


def test_help_and_version_load_no_heavy_module():
    # `limen --help` must answer at once: the commands' modules (numpy, scipy, matplotlib, pandas) load only
    # when their command runs. Checked by import, not by a timer (timings live in bench/).
    code = (
        "import sys; from scorer.cli import main\n"
        "try:\n    main.main(args=['--help'], standalone_mode=False)\nexcept SystemExit:\n    pass\n"
        "heavy = [m for m in ('numpy', 'scipy', 'matplotlib', 'pandas') if m in sys.modules]\n"
        "print('HEAVY:' + ','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "HEAVY:"


def test_every_listed_command_resolves_and_its_help_line_fits():
    res = CliRunner().invoke(main, ["--help"])
    assert res.exit_code == 0
    for name, (_module, _attr, short) in COMMANDS.items():
        assert name in res.output
        cmd = main.get_command(click.Context(main), name)
        assert isinstance(cmd, click.Command) and cmd.name == name, name
        assert short and len(short) < 110


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_option_has_help_text(name):
    cmd = main.get_command(click.Context(main), name)
    missing = [p.name for p in cmd.params if isinstance(p, click.Option) and not (p.help or "").strip()]
    assert missing == [], f"limen {name}: options without help: {missing}"
