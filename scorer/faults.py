"""Fault injection for the crash tests: ``LIMEN_FAULT_INJECT=point[:n]`` kills this process with SIGKILL
the n-th time (default first) it passes ``point``.  Unset (always, in real use) it does nothing.

Points of the nightly run are listed in :mod:`scorer.qc.faults`; ``write`` is passed by every output file
(:func:`scorer.files.atomic_write_bytes`) half-way through writing its temporary copy, so a test can kill a
run in the middle of its n-th file.
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
