"""Fault injection for the crash tests: ``LIMEN_FAULT_INJECT=point[:n]`` kills this process with SIGKILL
the n-th time (default first) it passes ``point``.  Unset (always, in real use) it does nothing.

Points: ``scanned`` (new images recorded, nothing claimed), ``claimed`` (sessions claimed, none
scored), ``scored`` (a session scored, not yet written), ``mid-write`` (inside the session's write
transaction, responses inserted, not committed), ``committed`` (a session committed, the next
not yet written), ``quarantine`` (a reason file written, the file not yet moved).
"""

from __future__ import annotations

import os
import signal

ENV = "LIMEN_FAULT_INJECT"
_passed: dict[str, int] = {}


def fault_point(name: str) -> None:
    spec = os.environ.get(ENV)
    if not spec:
        return
    point, _, nth = spec.partition(":")
    if point != name:
        return
    _passed[name] = _passed.get(name, 0) + 1
    if _passed[name] >= int(nth or 1):
        os.kill(os.getpid(), signal.SIGKILL)
