"""Click options that several ``limen`` commands share: each defined once, so it reads the same everywhere.

Each function returns a fresh ``click.option`` decorator. Where commands genuinely differ in what an option
says (``--seed``, ``--out``, ``--conversion``, …) the help text is a parameter; options that differ in more
than that (name of the value, default, type) stay in their command's module.

This module imports click only: ``limen --help`` must load no numpy, scipy, matplotlib or pandas
(tests/test_cli.py).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import click

if TYPE_CHECKING:
    from click.decorators import FC

    from scorer.observer.limits import HumanFactor, Limits

#: help of ``--layout`` where the layout's sites are scored or drawn
LAYOUT_HELP = "Phantom layout TOML (default: the bundled demo plate)."
#: help of ``--layout`` where only its diameters (and M) are used for predicted thresholds
PREDICTION_LAYOUT_HELP = "Phantom layout whose diameters get predicted thresholds."
#: help of ``--seed`` of the commands whose randomness is an image bootstrap
BOOTSTRAP_SEED_HELP = "Seed of the bootstrap (non-negative integer); the same seed gives the same intervals."
JSON_HELP = "Print one JSON object on stdout."


def layout(help: str = LAYOUT_HELP) -> Callable[[FC], FC]:
    """``--layout FILE`` → ``layout_file`` (None: the bundled demo plate)."""
    return click.option("--layout", "layout_file", type=click.Path(dir_okay=False), default=None, help=help)


def observer() -> Callable[[FC], FC]:
    """``--observer npw|npwe`` (default npw)."""
    return click.option(
        "--observer",
        type=click.Choice(["npw", "npwe"]),
        default="npw",
        show_default=True,
        help="Model observer: non-prewhitening (npw) or with the eye filter (npwe).",
    )


def threshold_method(default: str, help: str) -> Callable[[FC], FC]:
    """``--method dprime|count|both``; the commands differ in the default and in what the method is used for."""
    return click.option(
        "--method", type=click.Choice(["dprime", "count", "both"]), default=default, show_default=True, help=help
    )


def limits(help: str) -> Callable[[FC], FC]:
    """``--limits FILE`` → ``limits_file``."""
    return click.option("--limits", "limits_file", type=click.Path(dir_okay=False), default=None, help=help)


#: the range of a human/model threshold factor given by hand: readers' thresholds are typically 1–3 times the
#: model observer's (common practice); a value beyond a factor of 10 either way is a typing error
HUMAN_FACTOR_RANGE = (0.1, 10.0)


class HumanFactorType(click.ParamType):  # type: ignore[type-arg]  # generic from click 8.3 on; 8.1 is allowed
    """A finite number within :data:`HUMAN_FACTOR_RANGE`; inf, NaN, 1e300 or 1e-300 are refused in one line."""

    name = "float"  # the metavar FLOAT, as before (--help unchanged)

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> float:
        import math

        lo, hi = HUMAN_FACTOR_RANGE
        try:
            f = float(value)
        except (TypeError, ValueError):
            self.fail(f"{str(value)[:40]!r} is not a number", param, ctx)
        if not (math.isfinite(f) and lo <= f <= hi):
            self.fail(
                f"{str(value)[:40]} is outside {lo:g}–{hi:g} (a human reader's threshold over the model "
                "observer's, typically 1–3)",
                param,
                ctx,
            )
        return f


def human_factor(help: str) -> Callable[[FC], FC]:
    """``--human-factor X`` (a finite number in 0.1–10, default None)."""
    return click.option("--human-factor", type=HumanFactorType(), default=None, help=help)


def refuse_unused_factor(human_factor: HumanFactor | float | None, limits: Limits | None) -> None:
    """A human/model factor given with limits written for a model observer would be ignored: refuse it."""
    from scorer.errors import LimenError

    if human_factor is not None and limits is not None and limits.observer != "human":
        raise LimenError(
            f"{limits.path or 'limits'}: these limits are for the {str(limits.observer).upper()} model observer, so "
            "a human/model factor does not apply; drop --human-factor/--human-factor-from",
            "--human-factor",
        )


def human_factor_from() -> Callable[[FC], FC]:
    """``--human-factor-from analysis.json`` → ``factor_file``."""
    return click.option(
        "--human-factor-from",
        "factor_file",
        type=click.Path(dir_okay=False),
        default=None,
        help="analysis.json from `limen analyse --model`: take the human/model factor measured for this observer.",
    )


def conversion(help: str) -> Callable[[FC], FC]:
    """``--conversion FILE`` → ``conversion_file``."""
    return click.option("--conversion", "conversion_file", type=click.Path(dir_okay=False), default=None, help=help)


def mtf() -> Callable[[FC], FC]:
    """``--mtf detector.json`` → ``mtf_file``."""
    return click.option(
        "--mtf",
        "mtf_file",
        type=click.Path(dir_okay=False),
        default=None,
        help="Detector JSON from `limen detector` whose measured MTF shapes the templates.",
    )


def pixel_spacing() -> Callable[[FC], FC]:
    """``--pixel-spacing MM`` → ``pixel_spacing`` for images that carry no spacing."""
    return click.option(
        "--pixel-spacing",
        "pixel_spacing",
        type=float,
        default=None,
        help="Pixel spacing (mm) for images without DICOM spacing (TIFF, PNG, npy).",
    )


def n_boot(help: str) -> Callable[[FC], FC]:
    """``--n-boot N`` (0 … 100 000, default 1000)."""
    return click.option("--n-boot", type=click.IntRange(0, 100000), default=1000, show_default=True, help=help)


def seed(help: str = BOOTSTRAP_SEED_HELP) -> Callable[[FC], FC]:
    """``--seed N`` (non-negative, default 0)."""
    return click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True, help=help)


def diameters() -> Callable[[FC], FC]:
    """``--diameters D1,D2,…`` for predicted thresholds."""
    return click.option(
        "--diameters", default=None, help="Disc diameters (mm, comma-separated) for predicted thresholds."
    )


def alternatives(help: str) -> Callable[[FC], FC]:
    """``--alternatives M`` → ``m_alternatives`` (2 … 64, default None)."""
    return click.option("--alternatives", "m_alternatives", type=click.IntRange(2, 64), default=None, help=help)


def json_output(help: str = JSON_HELP) -> Callable[[FC], FC]:
    """``--json`` flag → ``as_json``."""
    return click.option("--json", "as_json", is_flag=True, help=help)


def out_folder(help: str, *, required: bool = False) -> Callable[[FC], FC]:
    """``--out DIR`` → ``out_dir``; optional (default None) unless ``required``."""
    if required:
        return click.option("--out", "out_dir", type=click.Path(file_okay=False), required=True, help=help)
    return click.option("--out", "out_dir", type=click.Path(file_okay=False), default=None, help=help)


def replace() -> Callable[[FC], FC]:
    """``--replace`` flag: let ``--out`` name a folder an earlier run wrote to (:class:`scorer.files.OutputFolder`)."""
    return click.option(
        "--replace",
        is_flag=True,
        help="Let --out name a folder an earlier run wrote to: its files are replaced (others are kept).",
    )


def nightly_db() -> Callable[[FC], FC]:
    """``--db URL|FILE`` (required) of the commands that read the nightly database."""
    return click.option("--db", "db", required=True, help="Database URL or SQLite file written by `limen nightly`.")
