"""The ``limen`` command line: thin over the scorer package.

Each sub-command lives in its own module under :mod:`scorer.commands` and is
registered here.  Expected bad input (:class:`~scorer.errors.LimenError`) is
printed on one line and exits with status 2.
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Sequence
from typing import Any

import click

from scorer import __version__
from scorer.errors import LimenError
from scorer.invocation import set_invocation

# command name -> (module under scorer.commands, attribute, one-line help shown by `limen --help`).
# Modules are imported only when their command runs (or its own --help is asked for), so `limen --help`
# and `limen --version` load neither numpy nor matplotlib. tests/test_cli.py checks the help lines match.
COMMANDS: dict[str, tuple[str, str, str]] = {
    "simulate": (
        "simulate",
        "simulate",
        "Simulate raw direct/indirect panel images (phantom, flat, edge) for demos and tests.",
    ),
    "score": ("score", "score", "Score contrast-detail phantom images: threshold contrast per diameter, verdicts."),
    "detector": (
        "detector",
        "detector",
        "Measure a detector: conversion function, MTF, NNPS, DQE, predicted thresholds.",
    ),
    "compare-detectors": ("compare_detectors", "compare_detectors", "Put two measured detectors side by side."),
    "analyse": ("analyse", "analyse", "Analyse a reader study: per-reader and pooled curves, human/model factor."),
    "nightly": ("nightly", "nightly", "Score an inbox of phantom images once per session; store, trend, alert."),
    "trend": ("trend", "trend", "Write the trend report (HTML, CSV) of a nightly database."),
    "receive": (
        "receive",
        "receive",
        "Receive QC images from modalities over DICOM (C-STORE) into the nightly inbox.",
    ),
    "dose-series": (
        "dose_series",
        "dose_series",
        "Score phantom images at several air kermas: threshold against kerma, β, kerma for a limit.",
    ),
    "baseline": ("baseline", "baseline", "Show, set or clear the baselines the nightly alerts compare with."),
    "quarantine": ("quarantine", "quarantine", "List the nightly run's quarantined files; release one once fixed."),
    "serve": ("serve", "serve", "Run the reader-study web app under waitress (add --demo for a ready study)."),
    "users": ("users", "users", "Add, list, disable or enable web-app accounts; reset passwords; end sessions."),
    "backup": ("backup", "backup", "Back up a web-app instance (database, image store, key) into a new folder."),
}


class _LimenGroup(click.Group):
    """The ``limen`` group: lazy sub-commands, one-line errors for expected bad input, the call recorded."""

    def main(
        self,
        args: Sequence[str] | None = None,
        prog_name: str | None = None,
        complete_var: str | None = None,
        standalone_mode: bool = True,
        **kwargs: Any,
    ) -> Any:
        set_invocation(sys.argv[1:] if args is None else list(args))
        kwargs["complete_var"] = complete_var
        if not standalone_mode:
            return super().main(args=args, prog_name=prog_name, standalone_mode=False, **kwargs)
        try:
            rv = super().main(args=args, prog_name=prog_name, standalone_mode=False, **kwargs)
        except click.UsageError as exc:
            # one line, naming the command and the option, instead of click's three-line usage block
            where = exc.ctx.command_path if exc.ctx is not None else "limen"
            click.echo(f"error: {where}: {' '.join(exc.format_message().split())} (see {where} --help)", err=True)
            sys.exit(2)
        except click.ClickException as exc:
            click.echo(f"error: {' '.join(exc.format_message().split())}", err=True)
            sys.exit(exc.exit_code)
        except click.exceptions.Abort:
            click.echo("aborted", err=True)
            sys.exit(1)
        sys.exit(rv if isinstance(rv, int) else 0)

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(COMMANDS) | set(self.commands))

    def get_command(self, ctx: click.Context, name: str) -> click.Command | None:
        if name in self.commands:
            return self.commands[name]
        if name not in COMMANDS:
            return None
        module_name, attr, _ = COMMANDS[name]
        cmd: click.Command = getattr(importlib.import_module(f"scorer.commands.{module_name}"), attr)
        self.add_command(cmd, name)
        return cmd

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        rows = [(name, COMMANDS[name][2]) for name in sorted(COMMANDS)]
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except LimenError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)


@click.group(cls=_LimenGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="limen")
def main() -> None:
    """Limen: score contrast-detail phantom images, measure detectors, analyse reader studies.

    Results support, and never replace, a qualified medical physicist's judgement.
    """


if __name__ == "__main__":  # pragma: no cover
    main()
