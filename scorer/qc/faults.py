"""Fault injection for the crash tests: ``LIMEN_FAULT_INJECT=point[:n]`` kills this process with SIGKILL
the n-th time (default first) it passes ``point``.  Unset (always, in real use) it does nothing.

Points: ``scanned`` (new images recorded, nothing claimed), ``claimed`` (sessions claimed, none
scored), ``scored`` (a session scored, not yet written), ``mid-write`` (inside the session's write
transaction, responses inserted, not committed), ``committed`` (a session committed, the next
not yet written), ``quarantine`` (a reason file written, the file not yet moved).
"""

from __future__ import annotations

from scorer.faults import ENV, _passed, fault_point  # noqa: F401  (one hook for the whole package)

__all__ = ["ENV", "_passed", "fault_point"]
