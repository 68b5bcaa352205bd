"""The command line that produced a result, recorded in every report's provenance.

The CLI sets it once per call (also when ``limen`` is called in-process, as the demo does);
reports read it.  A base module: it imports nothing of Limen, so every package may use it.
"""

from __future__ import annotations

import contextvars
import shlex
from typing import Sequence

_COMMAND: contextvars.ContextVar[str | None] = contextvars.ContextVar("limen_command", default=None)


def set_invocation(args: Sequence[str], prog: str = "limen") -> None:
    """Record the arguments of the current ``limen`` call."""
    _COMMAND.set(" ".join([prog, *(shlex.quote(str(a)) for a in args)]))


def current_command() -> str | None:
    """The current call as a user would type it, or ``None`` outside the CLI."""
    return _COMMAND.get()
