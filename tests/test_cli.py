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


def _commands(group=main, path=()):
    """Every command and sub-command below ``limen`` as (path, command)."""
    ctx = click.Context(group)
    for name in group.list_commands(ctx):
        cmd = group.get_command(ctx, name)
        yield (*path, name), cmd
        if isinstance(cmd, click.Group):
            yield from _commands(cmd, (*path, name))


def _words(text: str) -> str:
    return " ".join(text.split())


@pytest.mark.parametrize("path,cmd", list(_commands()), ids=lambda v: " ".join(v) if isinstance(v, tuple) else "")
def test_every_help_lists_every_option_with_its_text(path, cmd):
    # the options are built by shared decorators (scorer/commands/options.py): `limen CMD --help` must still
    # show each option of the command, under its own name, with its whole help text
    res = CliRunner().invoke(main, [*path, "--help"], terminal_width=120)
    assert res.exit_code == 0, res.output
    shown = _words(res.output)
    for p in cmd.params:
        if not isinstance(p, click.Option) or p.hidden:
            continue
        for opt in p.opts + p.secondary_opts:
            assert opt in res.output, f"limen {' '.join(path)} --help does not show {opt}"
        if p.help:
            assert _words(p.help) in shown, f"limen {' '.join(path)} --help: text of {p.opts[0]} missing"


#: the options each command shares with others (scorer/commands/options.py); a decorator dropped while
#: moving them would take the option away from both the command and its help, so they are listed here
SHARED_OPTIONS = {
    "score": "--layout --observer --method --limits --human-factor --human-factor-from --conversion --mtf "
    "--pixel-spacing --n-boot --seed --json --out --replace",
    "dose-series": "--layout --conversion --observer --method --limits --human-factor --human-factor-from --mtf "
    "--pixel-spacing --n-boot --seed --json --out --replace",
    "simulate": "--layout --seed --out",
    "analyse": "--n-boot --seed --json --out --replace",
    "detector": "--layout --diameters --alternatives --conversion --json --out --replace",
    "compare-detectors": "--layout --diameters --alternatives --json --out --replace",
    "trend": "--db --json --out --replace",
    "nightly": "--db --json",
    "baseline show": "--db --json",
    "baseline set": "--db",
    "baseline clear": "--db",
}


@pytest.mark.parametrize("name", sorted(SHARED_OPTIONS))
def test_shared_options_stay_on_their_commands(name):
    res = CliRunner().invoke(main, [*name.split(), "--help"], terminal_width=120)
    assert res.exit_code == 0, res.output
    listed = {w.rstrip(",") for line in res.output.splitlines() for w in line.split()[:3] if w.startswith("--")}
    missing = set(SHARED_OPTIONS[name].split()) - listed
    assert not missing, f"limen {name} --help lacks {sorted(missing)}"


def test_shared_options_module_loads_click_only():
    # the shared options are imported by every command module; they must not pull numpy & co. in themselves
    code = (
        "import sys; import scorer.commands.options\n"
        "print('HEAVY:' + ','.join(m for m in ('numpy', 'scipy', 'matplotlib', 'pandas') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "HEAVY:"
