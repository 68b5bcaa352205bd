"""The ``limen`` command line: thin over the scorer package.

Each sub-command lives in its own module under :mod:`scorer.commands` and is
registered here.  Expected bad input (:class:`~scorer.errors.LimenError`) is
printed on one line and exits with status 2.
"""

from __future__ import annotations

import importlib
import sys

import click

from scorer import __version__
from scorer.errors import LimenError

# module name under scorer.commands -> the click command object inside it
_COMMANDS = {
    "simulate": "simulate",
    "score": "score",
    "detector": "detector",
    "compare_detectors": "compare_detectors",
    "analyse": "analyse",
    "serve": "serve",
    "users": "users",
}


class _LimenGroup(click.Group):
    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except LimenError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)


@click.group(cls=_LimenGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="limen")
def main():
    """Limen: score contrast-detail phantom images, measure detectors, analyse reader studies.

    Results support, and never replace, a qualified medical physicist's judgement.
    """


def _register() -> None:
    for module_name, attr in _COMMANDS.items():
        try:
            module = importlib.import_module(f"scorer.commands.{module_name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"scorer.commands.{module_name}":
                continue  # command not built yet
            raise
        main.add_command(getattr(module, attr))


_register()

if __name__ == "__main__":  # pragma: no cover
    main()
